"""Output tables and files of a Measurement (the contract of DESIGN.md).

Columns never change with options; values that do not apply are NaN.  1-sigma values in nm;
3-sigma columns are derived from them (3 x sqrt(variance)).
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

__all__ = ["summary_table", "edges_table", "psd_table", "failures_table", "groups_table", "write_outputs"]


NOISE_TARGET = 0.10        # noise share the "frames needed" column aims at
SD_TARGET = 0.05           # relative sd of the unbiased edge sigma the "lines needed" column aims at


def _plan(v, model, line_length_nm, row_spacing_nm):
    from .stats import frames_for_noise_fraction, sampling_plan

    frames = lines = math.nan
    vu, sn = v["edge_var_unbiased_nm2"], v["edge_sigma_noise_nm"]
    if np.isfinite(vu) and vu > 0 and np.isfinite(sn):
        frames = frames_for_noise_fraction(noise_var_nm2=sn ** 2, unbiased_var_nm2=vu, target_fraction=NOISE_TARGET)
        if model is not None and np.isfinite(model.roughness_exponent) and np.isfinite(line_length_nm):
            lines = sampling_plan(sigma_unbiased_nm=math.sqrt(vu), correlation_length_nm=model.correlation_length_nm,
                                  roughness_exponent=model.roughness_exponent, noise_sigma_nm=sn,
                                  row_spacing_nm=row_spacing_nm, line_length_nm=line_length_nm,
                                  target_relative_sd=SD_TARGET)["lines_needed"]
    return {"frames_for_10pct_noise": frames, "lines_for_5pct_sd": lines}


def _stat_columns(v, model, xi_acf=math.nan, line_length_nm=math.nan, row_spacing_nm=math.nan):
    row = {
        "n_lines": v["n_lines"], "n_edges": v["n_edges"],
        "cd_nm": v["cd_nm"], "cd_low_nm": v["cd_low_nm"], "cd_high_nm": v["cd_high_nm"],
    }
    for q, tag in (("edge", "ler"), ("width", "lwr"), ("centre", "lpr")):
        row.update({
            f"{q}_sigma_biased_nm": v[f"{q}_sigma_biased_nm"],
            f"{q}_sigma_noise_nm": v[f"{q}_sigma_noise_nm"],
            f"{q}_sigma_unbiased_nm": v[f"{q}_sigma_unbiased_nm"],
            f"{q}_sigma_unbiased_low_nm": v[f"{q}_sigma_unbiased_low_nm"],
            f"{q}_sigma_unbiased_high_nm": v[f"{q}_sigma_unbiased_high_nm"],
            f"{q}_var_unbiased_nm2": v[f"{q}_var_unbiased_nm2"],
            f"{tag}_3sigma_biased_nm": 3 * v[f"{q}_sigma_biased_nm"],
            f"{tag}_3sigma_unbiased_nm": 3 * v[f"{q}_sigma_unbiased_nm"],
            f"{q}_status": v[f"{q}_status"],
        })
    row["lr_correlation_biased"] = v["lr_correlation_biased"]
    row["lr_correlation_unbiased"] = v["lr_correlation_unbiased"]
    nan = math.nan
    row.update({
        "edge_correlation_length_nm": model.correlation_length_nm if model else nan,
        "edge_correlation_length_se_nm": model.correlation_length_se_nm if model else nan,
        "edge_roughness_exponent": model.roughness_exponent if model else nan,
        "edge_roughness_exponent_se": model.roughness_exponent_se if model else nan,
        "edge_sigma_model_nm": model.sigma_nm if model else nan,
        "edge_psd0_nm3": model.psd0_nm3 if model else nan,
        "edge_psd0_two_sided_nm3": model.psd0_two_sided_nm3 if model else nan,
        "edge_correlation_length_acf_nm": xi_acf,
        "edge_psd_floor_mode": model.floor_mode if model else "",
        "noise_fraction": v["edge_noise_fraction"],
        "width_noise_fraction": v["width_noise_fraction"],
    })
    row.update(_plan(v, model, line_length_nm, row_spacing_nm))
    return row


def summary_table(meas) -> pd.DataFrame:
    rows = []
    for r in meas.images:
        t = r.traces
        row = {"image": r.name, "group": r.group}
        ro = r.roughness
        row.update(_stat_columns(r.summary.values, r.model, r.acf_correlation_length_nm,
                                 ro.n_rows * ro.row_spacing_nm, ro.row_spacing_nm))
        codes = [c for c, _ in r.warnings]
        status = "below_noise" if r.summary["edge_status"] == "below_noise" else ("warning" if codes else "ok")
        row.update({
            "edge_sigma_model_finite_nm": r.model_sigma_finite_nm,
            "noise_floor_nm3": r.floor_nm3, "plateau_nm3": r.plateau_nm3, "floors_disagree": r.floors_disagree,
            "rows": t.n_rows, "invalid_rows": int(np.count_nonzero(~t.valid)),
            "bridged_rows": r.roughness.bridged_rows,
            "excluded_edges": int(np.count_nonzero(r.roughness.edge_exclusion != "")),
            "detector": t.detector, "status": status, "warnings": ";".join(codes),
        })
        rows.append(row)
    return pd.DataFrame(rows, columns=_summary_columns())


def _summary_columns():
    base = ["image", "group"]
    dummy = {k: 0 for k in ("n_lines", "n_edges", "cd_nm", "cd_low_nm", "cd_high_nm", "lr_correlation_biased",
                            "lr_correlation_unbiased", "edge_noise_fraction", "width_noise_fraction")}
    for q in ("edge", "width", "centre"):
        for k in ("sigma_biased_nm", "sigma_noise_nm", "sigma_unbiased_nm", "sigma_unbiased_low_nm",
                  "sigma_unbiased_high_nm", "var_unbiased_nm2", "status"):
            dummy[f"{q}_{k}"] = 0
    cols = list(_stat_columns(dummy, None).keys())
    return base + cols + ["edge_sigma_model_finite_nm", "noise_floor_nm3", "plateau_nm3", "floors_disagree", "rows", "invalid_rows",
                          "bridged_rows", "excluded_edges", "detector", "status", "warnings"]


def groups_table(meas) -> pd.DataFrame:
    """One row per group (all images pooled, images resampled), or one row 'all'."""
    from ._measure import floor_mode
    from .model import fit_psd_model
    from .stats import summarize

    s = meas.settings
    names = sorted({r.group for r in meas.images})
    rows = []
    for g in names:
        members = [r for r in meas.images if r.group == g]
        summ = summarize([r.roughness for r in members], n_resamples=s.n_resamples, confidence=s.confidence,
                         rng=np.random.default_rng(s.seed))
        same = [r for r in members if r.roughness.n_rows == members[0].roughness.n_rows]
        try:
            model = fit_psd_model(same[0].roughness.frequency_per_nm,
                                  np.concatenate([r.roughness.psd["edge"] for r in same]),
                                  np.concatenate([r.roughness.psd["edge_floor"] for r in same]),
                                  window=s.psd_window, n_resamples=s.model_resamples,
                                  floor=floor_mode([r.traces for r in same]), rng=np.random.default_rng(s.seed))
        except (ValueError, RuntimeError):
            model = None
        row = {"group": g or "all", "n_images": len(members)}
        ro = same[0].roughness
        row.update(_stat_columns(summ.values, model, math.nan, ro.n_rows * ro.row_spacing_nm, ro.row_spacing_nm))
        rows.append(row)
    return pd.DataFrame(rows)


def edges_table(meas) -> pd.DataFrame:
    rows = []
    for r in meas.images:
        t, ro = r.traces, r.roughness
        for e in range(t.n_edges):
            vb, vn = ro.edge_var_biased_nm2[e], ro.edge_var_noise_nm2[e]
            vu = vb - vn
            rows.append({
                "image": r.name, "edge": e, "line": int(t.line_index[e]), "side": str(t.side[e]),
                "mean_position_nm": float(np.nanmean(t.position_nm[e])) if t.valid[e].any() else math.nan,
                "sigma_biased_nm": math.sqrt(vb) if vb >= 0 else math.nan,
                "sigma_noise_nm": math.sqrt(vn) if vn >= 0 else math.nan,
                "sigma_unbiased_nm": math.sqrt(vu) if vu > 0 else math.nan,
                "var_unbiased_nm2": vu,
                "fit_sigma_rms_nm": float(np.sqrt(np.nanmean(t.sigma_nm[e] ** 2))) if t.valid[e].any() else math.nan,
                "contrast_to_noise": float(t.contrast_to_noise[e]),
                "valid_rows": int(t.valid[e].sum()), "invalid_rows": int((~t.valid[e]).sum()),
                "exclusion": str(ro.edge_exclusion[e]), "flags": str(t.edge_flags[e]),
            })
    return pd.DataFrame(rows, columns=["image", "edge", "line", "side", "mean_position_nm", "sigma_biased_nm",
                                       "sigma_noise_nm", "sigma_unbiased_nm", "var_unbiased_nm2", "fit_sigma_rms_nm",
                                       "contrast_to_noise", "valid_rows", "invalid_rows", "exclusion", "flags"])


def psd_table(meas) -> pd.DataFrame:
    cols = ["quantity", "frequency_per_nm", "psd_biased_nm3", "noise_floor_nm3", "psd_unbiased_nm3", "psd_model_nm3"]
    if not meas.psd:
        return pd.DataFrame(columns=cols)
    f = meas.psd["frequency_per_nm"]
    parts = []
    for q in ("edge", "width", "centre"):
        if q not in meas.psd:
            continue
        d = meas.psd[q]
        model = (meas.overall_model.model_nm3(f) if (q == "edge" and meas.overall_model is not None)
                 else np.full(f.size, math.nan))
        parts.append(pd.DataFrame({"quantity": q, "frequency_per_nm": f, "psd_biased_nm3": d["biased"],
                                   "noise_floor_nm3": d["floor"], "psd_unbiased_nm3": d["biased"] - d["floor"],
                                   "psd_model_nm3": model}))
    return pd.concat(parts, ignore_index=True)[cols]


def failures_table(meas) -> pd.DataFrame:
    return pd.DataFrame(meas.failures, columns=["image", "reason"])


def _versions():
    import matplotlib
    import scipy
    import skimage

    try:
        from importlib.metadata import version

        qe = version("quietedge")
    except Exception:   # running from a source tree that is not installed
        qe = "unknown"
    return {"quietedge": qe, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "scikit-image": skimage.__version__, "pandas": pd.__version__,
            "matplotlib": matplotlib.__version__}


def write_outputs(meas, out: Path, *, report: bool = True) -> Path:
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
                                "edge_position": "half-level point of the edge's mean profile"}}
    (out / "settings.json").write_text(json.dumps(settings, indent=1, default=float))
    if report:
        from .report import write_report

        write_report(meas, out / "report.html")
    return out
