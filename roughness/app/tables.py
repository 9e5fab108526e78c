"""Output tables and files of a Measurement: pure projections, nothing is computed here.

Columns never change with options; values that do not apply are NaN.  1-sigma values in nm;
3-sigma columns are 3 x sigma.  ``noise_fraction`` is the noise share of the biased *variance*.
"""
from __future__ import annotations

import json
import math
import os
import platform
import shutil
import tempfile
from dataclasses import asdict
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import t as student_t

from ..analysis import SamplingAdvice
from ..stats import QuantityRoughness, RoughnessSummary
from .report import write_report
from .store import result_file_name, save_result

__all__ = ["summary_table", "edges_table", "psd_table", "failures_table", "groups_table", "compare_table",
           "write_outputs"]

_NAN = math.nan


def _stat_columns(summary, model, advice, xi_acf=_NAN) -> dict:
    row = {"n_lines": summary.n_lines, "n_edges": summary.n_edges,
           "cd_nm": summary.cd_nm, "cd_low_nm": summary.cd_low_nm, "cd_high_nm": summary.cd_high_nm}
    for q, tag in (("edge", "ler"), ("width", "lwr"), ("centre", "lpr")):
        v = summary.quantity(q)
        row.update({
            f"{q}_sigma_biased_nm": v.sigma_biased_nm,
            f"{q}_sigma_noise_nm": v.sigma_noise_nm,
            f"{q}_sigma_unbiased_nm": v.sigma_unbiased_nm,
            f"{q}_sigma_unbiased_low_nm": v.sigma_unbiased_low_nm,
            f"{q}_sigma_unbiased_high_nm": v.sigma_unbiased_high_nm,
            f"{q}_var_unbiased_nm2": v.var_unbiased_nm2,
            f"{tag}_3sigma_biased_nm": 3 * v.sigma_biased_nm,
            f"{tag}_3sigma_unbiased_nm": 3 * v.sigma_unbiased_nm,
            f"{tag}_3sigma_unbiased_low_nm": 3 * v.sigma_unbiased_low_nm,
            f"{tag}_3sigma_unbiased_high_nm": 3 * v.sigma_unbiased_high_nm,
            f"{tag}_noise_inflation": v.inflation_3sigma,
            f"{q}_status": v.status,
        })
    row["lr_correlation_biased"] = summary.lr_correlation_biased
    row["lr_correlation_unbiased"] = summary.lr_correlation_unbiased
    row.update({
        "edge_correlation_length_nm": model.correlation_length_nm if model else _NAN,
        "edge_correlation_length_se_nm": model.correlation_length_se_nm if model else _NAN,
        "edge_roughness_exponent": model.roughness_exponent if model else _NAN,
        "edge_roughness_exponent_se": model.roughness_exponent_se if model else _NAN,
        "edge_sigma_model_nm": model.sigma_nm if model else _NAN,
        "edge_psd0_nm3": model.psd0_nm3 if model else _NAN,
        "edge_psd0_se_nm3": model.psd0_se_nm3 if model else _NAN,
        "edge_psd0_two_sided_nm3": model.psd0_two_sided_nm3 if model else _NAN,
        "edge_correlation_length_acf_nm": xi_acf,
        "edge_psd_floor_mode": model.floor_mode if model else "",
        "noise_fraction": summary.edge.noise_fraction,
        "width_noise_fraction": summary.width.noise_fraction,
        "frames_for_noise_target": advice.frames_for_noise_target,
        "lines_for_precision_target": advice.lines_for_precision_target,
    })
    return row


def summary_table(meas) -> pd.DataFrame:
    """One row per measured image."""
    rows = []
    for r in meas.images:
        a = r.analysis
        row = {"image": r.name, "group": r.group, "pixel_size_nm": r.pixel_size_nm,
               "pixel_size_source": r.pixel_size_source}
        row.update(_stat_columns(a.summary, a.psd_model, a.advice, a.acf_correlation_length_nm))
        row.update({
            "edge_sigma_model_finite_nm": a.model_sigma_finite_nm,
            "noise_floor_nm3": a.noise_floor_nm3, "plateau_nm3": a.plateau_nm3, "floors_disagree": a.floors_disagree,
            "plateau_check": a.plateau_check, "precision_calibration": a.precision_calibration,
            "shrinkage": a.shrinkage,
            "row_noise_correlation": a.row_noise_correlation[0] if a.row_noise_correlation else 0.0,
            "rows": a.n_rows, "invalid_rows": a.invalid_rows, "bridged_rows": a.bridged_rows,
            "excluded_edges": a.excluded_edges, "detector": a.detector, "profile_model": a.profile_model,
            "status": a.status, "warnings": ";".join(a.warning_codes),
        })
        rows.append(row)
    return pd.DataFrame(rows, columns=SUMMARY_COLUMNS)


def groups_table(meas) -> pd.DataFrame:
    """One row per group, or one row ``all`` for a measurement without groups."""
    groups = meas.groups or ((meas.overall,) if meas.overall is not None else ())
    comp = meas.comparison
    rows = []
    for k, g in enumerate(groups):
        row = {"group": g.name or "all", "n_images": g.n_images}
        row.update(_stat_columns(g.summary, g.psd_model, g.advice))
        members = set(g.sources)
        row["rows"] = sum(r.analysis.n_rows for r in meas.images
                          if r.analysis.source in members and (not g.name or r.group == g.name))
        row["psd_grids"] = g.n_grids
        row["noise_flag"] = bool(g.summary.edge.noise_fraction > meas.settings.noise_share_target)
        row["frames"] = meas.settings.frames
        if comp is not None:
            e = comp.estimate(g.name)
            row.update({"resampled_unit": e.unit, "n_resampled_units": e.n_units,
                        "edge_sigma_unbiased_band_nm": comp.band_sigma_unbiased_nm[k],
                        "band_low_per_nm": comp.band_per_nm[0], "band_high_per_nm": comp.band_per_nm[1]})
            t = float(student_t.ppf(0.5 * (1 + comp.confidence), e.df))
            for q in ("edge", "width", "centre"):
                for kind in ("unbiased", "biased"):
                    row[f"{q}_sigma_{kind}_se_nm"] = e.se_nm[f"{q}_sigma_{kind}_nm"]
                value, se = e.value_nm[f"{q}_sigma_biased_nm"], e.se_nm[f"{q}_sigma_biased_nm"]
                row[f"{q}_sigma_biased_low_nm"], row[f"{q}_sigma_biased_high_nm"] = value - t * se, value + t * se
        rows.append(row)
    return pd.DataFrame(rows, columns=GROUP_COLUMNS)


def edges_table(meas) -> pd.DataFrame:
    """One row per edge of every measured image."""
    parts = []
    for r in meas.images:
        d = r.analysis.edges
        vb, vn = d.var_biased_nm2, d.var_noise_nm2
        vu = vb - vn
        with np.errstate(invalid="ignore"):
            parts.append(pd.DataFrame({
                "image": r.name, "edge": np.arange(vb.size), "line": d.line.astype(int), "side": d.side.astype(str),
                "mean_position_nm": d.mean_position_nm,
                "sigma_biased_nm": np.where(vb >= 0, np.sqrt(np.abs(vb)), np.nan),
                "sigma_noise_nm": np.where(vn >= 0, np.sqrt(np.abs(vn)), np.nan),
                "sigma_unbiased_nm": np.where(vu > 0, np.sqrt(np.abs(vu)), np.nan),
                "var_unbiased_nm2": vu, "fit_sigma_rms_nm": d.fit_sigma_rms_nm,
                "contrast_to_noise": d.contrast_to_noise, "valid_rows": d.valid_rows.astype(int),
                "invalid_rows": d.invalid_rows.astype(int), "exclusion": d.exclusion.astype(str),
                "flags": d.flags.astype(str), "achieved_sd_nm": d.achieved_sd_nm, "crlb_sd_nm": d.crlb_sd_nm,
                "shrinkage": d.shrinkage}))
    if not parts:
        return pd.DataFrame(columns=EDGE_COLUMNS)
    return pd.concat(parts, ignore_index=True)[EDGE_COLUMNS]


def psd_table(meas) -> pd.DataFrame:
    """Averaged PSDs (one-sided, nm^3 against cycles/nm) per quantity: the whole set (group
    ``all``), then every group."""
    if meas.overall is None:
        return pd.DataFrame(columns=PSD_COLUMNS)
    parts = []
    for g in (meas.overall,) + tuple(meas.groups):
        for q in ("edge", "width", "centre"):
            s = g.spectrum(q)
            if s is None:
                continue
            f = s.frequency_per_nm
            model = g.psd_model.model_nm3(f) if (q == "edge" and g.psd_model is not None) else np.full(f.size, np.nan)
            parts.append(pd.DataFrame({"group": g.name or "all", "quantity": q, "frequency_per_nm": f,
                                       "psd_biased_nm3": s.psd_biased_nm3,
                                       "noise_floor_nm3": s.noise_floor_spectrum_nm3, "psd_unbiased_nm3": s.psd_unbiased_nm3,
                                       "psd_model_nm3": model, "n_traces": s.n_traces, "n_images": s.n_images}))
    if not parts:
        return pd.DataFrame(columns=PSD_COLUMNS)
    return pd.concat(parts, ignore_index=True)[PSD_COLUMNS]


def compare_table(meas) -> pd.DataFrame:
    """One row per pair of groups and quantity: ``group_b - group_a`` (1-sigma nm, and 3-sigma),
    its interval, Welch p-value, Holm-adjusted p-value, and units per group for the planned
    effect at the stated power."""
    c = meas.comparison
    if c is None:
        return pd.DataFrame(columns=COMPARE_COLUMNS)
    rows = []
    for d, n in zip(c.differences, c.units_needed):
        ea, eb = c.estimate(d.group_a), c.estimate(d.group_b)
        rows.append({
            "group_a": d.group_a, "group_b": d.group_b, "quantity": d.quantity,
            "value_a_nm": d.value_a_nm, "value_b_nm": d.value_b_nm,
            "difference_nm": d.difference_nm, "difference_low_nm": d.difference_low_nm,
            "difference_high_nm": d.difference_high_nm, "difference_3sigma_nm": 3 * d.difference_nm,
            "difference_3sigma_low_nm": 3 * d.difference_low_nm, "difference_3sigma_high_nm": 3 * d.difference_high_nm,
            "ratio": d.ratio, "ratio_low": d.ratio_low, "ratio_high": d.ratio_high,
            "se_nm": d.se_nm, "df": d.df, "p_value": d.p_value, "p_value_adjusted": d.p_value_adjusted,
            "significant": d.significant, "confidence": d.confidence,
            "test": "Welch t on bootstrap standard errors; Holm over pairs" if len(c.estimates) > 2
                    else "Welch t on bootstrap standard errors",
            "resampled_unit": ea.unit if ea.unit == eb.unit else "images", "n_units_a": ea.n_units, "n_units_b": eb.n_units,
            "effect_3sigma_nm": c.effect_3sigma_nm, "power": c.power, "units_needed_per_group": n})
    return pd.DataFrame(rows, columns=COMPARE_COLUMNS)


def failures_table(meas) -> pd.DataFrame:
    return pd.DataFrame(list(meas.failures), columns=["image", "reason"])


def _columns():
    q = QuantityRoughness(1.0, 0.5)
    s = RoughnessSummary(edge=q, width=q, centre=q, **{k: 0.0 for k in (
        "lr_correlation_biased", "lr_correlation_unbiased", "lr_correlation_unbiased_low",
        "lr_correlation_unbiased_high", "cd_nm", "cd_low_nm", "cd_high_nm", "confidence")},
        n_images=1, n_lines=1, n_edges=2, n_resamples=0)
    stats = list(_stat_columns(s, None, SamplingAdvice()))
    summary = ["image", "group", "pixel_size_nm", "pixel_size_source"] + stats + [
        "edge_sigma_model_finite_nm", "noise_floor_nm3", "plateau_nm3", "floors_disagree", "plateau_check",
        "row_noise_correlation", "precision_calibration", "shrinkage", "rows", "invalid_rows", "bridged_rows", "excluded_edges", "detector", "profile_model", "status", "warnings"]
    extra = ["rows", "psd_grids", "noise_flag", "frames", "resampled_unit", "n_resampled_units"]
    extra += [f"{q}_sigma_{kind}_se_nm" for q in ("edge", "width", "centre") for kind in ("unbiased", "biased")]
    extra += [f"{q}_sigma_biased_{end}_nm" for q in ("edge", "width", "centre") for end in ("low", "high")]
    extra += ["edge_sigma_unbiased_band_nm", "band_low_per_nm", "band_high_per_nm"]
    return summary, ["group", "n_images"] + stats + extra


SUMMARY_COLUMNS, GROUP_COLUMNS = _columns()
EDGE_COLUMNS = ["image", "edge", "line", "side", "mean_position_nm", "sigma_biased_nm", "sigma_noise_nm",
                "sigma_unbiased_nm", "var_unbiased_nm2", "fit_sigma_rms_nm", "contrast_to_noise", "valid_rows",
                "invalid_rows", "exclusion", "flags", "achieved_sd_nm", "crlb_sd_nm", "shrinkage"]
COMPARE_COLUMNS = ["group_a", "group_b", "quantity", "value_a_nm", "value_b_nm", "difference_nm", "difference_low_nm",
                   "difference_high_nm", "difference_3sigma_nm", "difference_3sigma_low_nm",
                   "difference_3sigma_high_nm", "ratio", "ratio_low", "ratio_high", "se_nm", "df", "p_value",
                   "p_value_adjusted", "significant", "confidence", "test", "resampled_unit", "n_units_a",
                   "n_units_b", "effect_3sigma_nm", "power", "units_needed_per_group"]
PSD_COLUMNS = ["group", "quantity", "frequency_per_nm", "psd_biased_nm3", "noise_floor_nm3", "psd_unbiased_nm3",
               "psd_model_nm3", "n_traces", "n_images"]


def _versions():
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version()}
    for dist in ("quietedge", "numpy", "scipy", "pandas", "matplotlib", "tifffile", "imageio"):
        try:
            out[dist] = version(dist)
        except PackageNotFoundError:     # running from a source tree that is not installed
            out[dist] = "unknown"
    return out


#: Where an output folder keeps each image's result (safe ``.npz``, see :mod:`roughness.app.store`).
RESULTS_FOLDER = "per_image"


def _store_results(meas, folder: Path) -> list:
    """Every measured image's result in ``folder`` (already there from the batch's own store, or
    written now), listed as [name, group, file] so that ``compare`` can reuse the folder."""
    folder.mkdir(parents=True, exist_ok=True)
    listed = []
    for r in meas.images:
        name = result_file_name(r.name, r.group, meas.settings, r.content_key)
        if not (folder / name).exists():
            save_result(folder / name, r)
        listed.append([r.name, r.group, f"{RESULTS_FOLDER}/{name}"])
    return listed


#: Numbers in the CSV tables: six significant digits (far below any uncertainty quietedge
#: reports; the full precision of a float would suggest digits that mean nothing).
CSV_FLOAT_FORMAT = "%.6g"

#: Every file a run may write at the top of its folder; settings.json (the completion marker) last.
OUTPUT_FILES = ("summary.csv", "edges.csv", "psd.csv", "groups.csv", "compare.csv", "failures.csv", "report.html",
                "settings.json")


def write_outputs(meas, out: Path, *, report: bool = True) -> Path:
    """Write summary, edges, psd, groups, compare and failures CSV, the report and settings.json,
    as a set.

    Everything is written into a temporary folder inside ``out`` first; only then is the earlier
    run's settings.json removed, the new files moved in (each move atomic), stale files of the
    earlier run removed, and settings.json moved in last.  settings.json is the completion
    marker: where it exists the tables and the report in the folder belong to one run (``compare``
    and readers rely on it); an interrupted write leaves the earlier complete set, or a folder
    without settings.json, never a mixture that claims to be complete.
    """
    out.mkdir(parents=True, exist_ok=True)
    stored = _store_results(meas, out / RESULTS_FOLDER)
    tmp = Path(tempfile.mkdtemp(prefix=".writing-", dir=out))
    try:
        summary_table(meas).to_csv(tmp / "summary.csv", index=False, float_format=CSV_FLOAT_FORMAT)
        edges_table(meas).to_csv(tmp / "edges.csv", index=False, float_format=CSV_FLOAT_FORMAT)
        psd_table(meas).to_csv(tmp / "psd.csv", index=False, float_format=CSV_FLOAT_FORMAT)
        if meas.images:
            groups_table(meas).to_csv(tmp / "groups.csv", index=False, float_format=CSV_FLOAT_FORMAT)
        if meas.comparison is not None:
            compare_table(meas).to_csv(tmp / "compare.csv", index=False, float_format=CSV_FLOAT_FORMAT)
        if meas.failures:
            failures_table(meas).to_csv(tmp / "failures.csv", index=False)
        settings = {"settings": asdict(meas.settings), "versions": _versions(),
                    "images": [r.name for r in meas.images], "failed": [f[0] for f in meas.failures],
                    "results": stored,
                    "written": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                    "conventions": {"psd": "one-sided, nm^3 against cycles/nm; two-sided PSD(0) in *_two_sided_*",
                                    "sigma": "1-sigma in nm; 3sigma columns = 3 x sigma",
                                    "noise_fraction": "noise variance / biased variance (a share of variance)",
                                    "edge_position": "half-level point of the edge's mean profile",
                                    "psd_grid": "images of different lengths or pixel sizes are interpolated onto "
                                                "the coarsest resolution up to the lowest Nyquist frequency, "
                                                "weighted by edge length"}}
        if report:
            write_report(meas, tmp / "report.html")
        settings["files"] = sorted(p.name for p in tmp.iterdir()) + ["settings.json"]
        (tmp / "settings.json").write_text(json.dumps(settings, indent=1, default=float))
        (out / "settings.json").unlink(missing_ok=True)       # from here on the folder is not complete
        for name in OUTPUT_FILES[:-1]:
            if (tmp / name).exists():
                os.replace(tmp / name, out / name)
            else:
                (out / name).unlink(missing_ok=True)           # a stale file of an earlier run would mislead
        os.replace(tmp / "settings.json", out / "settings.json")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return out
