"""Output tables and files of a Measurement: pure projections, nothing is computed here.

Columns never change with options; values that do not apply are NaN.  1-sigma values in nm;
3-sigma columns are 3 x sigma.  ``noise_fraction`` is the noise share of the biased *variance*.
"""
from __future__ import annotations

import json
import math
import platform
from dataclasses import asdict
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from ..analysis import SamplingAdvice
from ..stats import QuantityRoughness, RoughnessSummary
from .report import write_report

__all__ = ["summary_table", "edges_table", "psd_table", "failures_table", "groups_table", "write_outputs"]

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
    rows = []
    for g in groups:
        row = {"group": g.name or "all", "n_images": g.n_images}
        row.update(_stat_columns(g.summary, g.psd_model, g.advice))
        row["psd_grids"] = g.n_grids
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
    """The whole set's averaged PSDs (one-sided, nm^3 against cycles/nm) per quantity."""
    g = meas.overall
    if g is None:
        return pd.DataFrame(columns=PSD_COLUMNS)
    parts = []
    for q in ("edge", "width", "centre"):
        s = g.spectrum(q)
        if s is None:
            continue
        f = s.frequency_per_nm
        model = g.psd_model.model_nm3(f) if (q == "edge" and g.psd_model is not None) else np.full(f.size, np.nan)
        parts.append(pd.DataFrame({"quantity": q, "frequency_per_nm": f, "psd_biased_nm3": s.psd_biased_nm3,
                                   "noise_floor_nm3": s.noise_floor_spectrum_nm3, "psd_unbiased_nm3": s.psd_unbiased_nm3,
                                   "psd_model_nm3": model, "n_traces": s.n_traces, "n_images": s.n_images}))
    if not parts:
        return pd.DataFrame(columns=PSD_COLUMNS)
    return pd.concat(parts, ignore_index=True)[PSD_COLUMNS]


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
    return summary, ["group", "n_images"] + stats + ["psd_grids"]


SUMMARY_COLUMNS, GROUP_COLUMNS = _columns()
EDGE_COLUMNS = ["image", "edge", "line", "side", "mean_position_nm", "sigma_biased_nm", "sigma_noise_nm",
                "sigma_unbiased_nm", "var_unbiased_nm2", "fit_sigma_rms_nm", "contrast_to_noise", "valid_rows",
                "invalid_rows", "exclusion", "flags", "achieved_sd_nm", "crlb_sd_nm", "shrinkage"]
PSD_COLUMNS = ["quantity", "frequency_per_nm", "psd_biased_nm3", "noise_floor_nm3", "psd_unbiased_nm3",
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


def write_outputs(meas, out: Path, *, report: bool = True) -> Path:
    """Write summary, edges, psd, groups (and failures) CSV, settings.json and the report."""
    out.mkdir(parents=True, exist_ok=True)
    summary_table(meas).to_csv(out / "summary.csv", index=False)
    edges_table(meas).to_csv(out / "edges.csv", index=False)
    psd_table(meas).to_csv(out / "psd.csv", index=False)
    if meas.images:
        groups_table(meas).to_csv(out / "groups.csv", index=False)
    fail = out / "failures.csv"
    if meas.failures:
        failures_table(meas).to_csv(fail, index=False)
    elif fail.exists():
        fail.unlink()           # a stale list from an earlier run would mislead
    settings = {"settings": asdict(meas.settings), "versions": _versions(),
                "images": [r.name for r in meas.images], "failed": [f[0] for f in meas.failures],
                "written": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                "conventions": {"psd": "one-sided, nm^3 against cycles/nm; two-sided PSD(0) in *_two_sided_*",
                                "sigma": "1-sigma in nm; 3sigma columns = 3 x sigma",
                                "noise_fraction": "noise variance / biased variance (a share of variance)",
                                "edge_position": "half-level point of the edge's mean profile",
                                "psd_grid": "images of different lengths or pixel sizes are interpolated onto "
                                            "the coarsest resolution up to the lowest Nyquist frequency, "
                                            "weighted by edge length"}}
    (out / "settings.json").write_text(json.dumps(settings, indent=1, default=float))
    if report:
        write_report(meas, out / "report.html")
    return out
