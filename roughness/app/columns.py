"""The data dictionary: every column of every table quietedge writes, with its unit and meaning.

``quietedge columns`` prints it; :func:`describe` gives one column's entry.  Families of columns
(one per quantity: edges = LER, widths = LWR, centres = LPR) are described by patterns.
"""
from __future__ import annotations

import re

__all__ = ["describe", "dictionary_text", "TABLE_FILES"]

_Q = {"edge": "the edges (LER)", "width": "the line widths (LWR)", "centre": "the line centres (LPR)"}
_TAG = {"ler": "edge", "lwr": "width", "lpr": "centre"}

#: column -> (unit, meaning)
_EXACT = {
    "image": ("", "image file (or the name given to an array)"),
    "group": ("", "group name (compare), or 'all' for every image together"),
    "pixel_size_nm": ("nm", "pixel size used"),
    "pixel_size_source": ("", "where the pixel size came from: file (TIFF tags), given, or given, overriding the file's value"),
    "n_lines": ("", "whole lines measured"),
    "n_edges": ("", "edges measured"),
    "n_images": ("", "images in the group"),
    "cd_nm": ("nm", "mean line width (CD) between the edges' half-level points"),
    "cd_low_nm": ("nm", "lower end of the CD confidence interval"),
    "cd_high_nm": ("nm", "upper end of the CD confidence interval"),
    "lr_correlation_biased": ("", "correlation of left and right edge deviations, as measured"),
    "lr_correlation_unbiased": ("", "the same with the noise removed from the variances"),
    "edge_correlation_length_nm": ("nm", "correlation length of the edges from the PSD model (empty: not determined)"),
    "edge_correlation_length_se_nm": ("nm", "its standard error"),
    "edge_roughness_exponent": ("", "roughness (Hurst) exponent H from the PSD model (empty: not determined)"),
    "edge_roughness_exponent_se": ("", "its standard error"),
    "edge_sigma_model_nm": ("nm", "edge sigma of the PSD model (an infinitely long line)"),
    "edge_sigma_model_finite_nm": ("nm", "what the PSD model expects a line of the measured length to show"),
    "edge_psd0_nm3": ("nm^3", "one-sided PSD at zero frequency from the PSD model"),
    "edge_psd0_se_nm3": ("nm^3", "its standard error"),
    "edge_psd0_two_sided_nm3": ("nm^3", "two-sided PSD(0) (half the one-sided value)"),
    "edge_correlation_length_acf_nm": ("nm", "correlation length where the noise-corrected autocorrelation falls to 1/e"),
    "edge_psd_floor_mode": ("", "how the PSD model treats the noise floor: fixed (the fit covariance's) or free (fitted too, at low contrast-to-noise)"),
    "noise_fraction": ("", "noise share of the measured edge variance (0 to 1)"),
    "width_noise_fraction": ("", "noise share of the measured width variance (0 to 1)"),
    "frames_for_noise_target": ("", "frames (or dose factor) that would bring the noise share under the target"),
    "lines_for_precision_target": ("", "lines needed for the precision target of the unbiased LER"),
    "noise_floor_nm3": ("nm^3", "mean noise floor of the edge PSD"),
    "plateau_nm3": ("nm^3", "measured high-frequency plateau of the edge PSD"),
    "floors_disagree": ("", "True when the noise floor and the measured plateau disagree"),
    "plateau_check": ("", "what the floor was checked against: model_tail, raw_tail or not_possible"),
    "row_noise_correlation": ("", "noise correlation between neighbouring rows, lags 1, 2, ... (empty: none)"),
    "precision_calibration": ("", "factor the virtual twin applied to the fit's position variances"),
    "shrinkage": ("", "slope of fitted on true edge excursions in the virtual twin (1: none)"),
    "rows": ("", "image rows analysed"),
    "invalid_rows": ("", "edge-rows whose fit failed (each with a reason in edges.csv and the report)"),
    "bridged_rows": ("", "failed edge-rows bridged by interpolation"),
    "excluded_edges": ("", "edges left out, each with its reason in edges.csv"),
    "detector": ("", "edge detector: model, threshold or slope"),
    "profile_model": ("", "edge-profile model of the model detector"),
    "status": ("", "ok, warning, noise_dominated or below_noise"),
    "warnings": ("", "warning codes, separated by ';' (explained in the report)"),
    "psd_grids": ("", "distinct frequency grids pooled (above 1: PSDs interpolated)"),
    "noise_flag": ("", "True when the noise share is above the target"),
    "frames": ("", "frames averaged per image, as given"),
    "resampled_unit": ("", "what the confidence intervals resample: images, or lines of a one-image group"),
    "n_resampled_units": ("", "how many of them"),
    "edge_sigma_unbiased_band_nm": ("nm", "unbiased edge sigma within the frequency band common to the groups"),
    "band_low_per_nm": ("1/nm", "lower end of that band"),
    "band_high_per_nm": ("1/nm", "upper end of that band"),
    "edge": ("", "edge number in the image, left to right"),
    "line": ("", "line number in the image, left to right"),
    "side": ("", "left or right edge of its line"),
    "mean_position_nm": ("nm", "mean edge position from the image's left border"),
    "sigma_biased_nm": ("nm", "edge sigma as measured"),
    "sigma_noise_nm": ("nm", "its noise part"),
    "sigma_unbiased_nm": ("nm", "edge sigma with the noise removed (empty: below the noise)"),
    "var_unbiased_nm2": ("nm^2", "unbiased variance (signed; negative when below the noise)"),
    "fit_sigma_rms_nm": ("nm", "rms position uncertainty of the row fits"),
    "contrast_to_noise": ("", "step height over the noise sd at mid-step, median over rows"),
    "valid_rows": ("", "rows measured"),
    "exclusion": ("", "why the edge was left out (empty: used)"),
    "flags": ("", "edge flags, e.g. low_contrast, close_neighbour"),
    "achieved_sd_nm": ("nm", "position precision the virtual twin achieved at this dose"),
    "crlb_sd_nm": ("nm", "Cramer-Rao bound on that precision"),
    "group_a": ("", "first group of the pair"),
    "group_b": ("", "second group of the pair"),
    "quantity": ("", "edge (LER), width (LWR) or centre (LPR)"),
    "value_a_nm": ("nm", "unbiased sigma of group a"),
    "value_b_nm": ("nm", "unbiased sigma of group b"),
    "difference_nm": ("nm", "b minus a"),
    "difference_low_nm": ("nm", "lower end of its confidence interval"),
    "difference_high_nm": ("nm", "upper end of its confidence interval"),
    "difference_3sigma_nm": ("nm", "the difference in 3-sigma terms"),
    "difference_3sigma_low_nm": ("nm", "lower end, 3 sigma"),
    "difference_3sigma_high_nm": ("nm", "upper end, 3 sigma"),
    "ratio": ("", "b over a"),
    "ratio_low": ("", "lower end of the ratio's interval"),
    "ratio_high": ("", "upper end of the ratio's interval"),
    "se_nm": ("nm", "standard error of the difference"),
    "df": ("", "Welch-Satterthwaite degrees of freedom"),
    "p_value": ("", "two-sided p-value of no difference"),
    "p_value_adjusted": ("", "Holm-adjusted p-value over the pairs"),
    "significant": ("", "True when the adjusted p-value is below 1 - confidence"),
    "confidence": ("", "confidence level of the intervals"),
    "test": ("", "the test used"),
    "n_units_a": ("", "resampled units of group a"),
    "n_units_b": ("", "resampled units of group b"),
    "effect_3sigma_nm": ("nm", "planned 3-sigma difference for the units-needed advice"),
    "power": ("", "power of the design for that difference"),
    "units_needed_per_group": ("", "units per group for 80% power at that difference"),
    "frequency_per_nm": ("1/nm", "spatial frequency along the line"),
    "psd_biased_nm3": ("nm^3", "one-sided PSD as measured"),
    "psd_unbiased_nm3": ("nm^3", "PSD with the noise floor subtracted"),
    "psd_model_nm3": ("nm^3", "the PSD model"),
    "n_traces": ("", "traces averaged"),
}

_PATTERNS = [
    (r"(edge|width|centre)_sigma_biased_nm", lambda q: ("nm", f"sigma of {_Q[q]} as measured (noise included)")),
    (r"(edge|width|centre)_sigma_noise_nm", lambda q: ("nm", f"noise part of the sigma of {_Q[q]}")),
    (r"(edge|width|centre)_sigma_unbiased_nm", lambda q: ("nm", f"sigma of {_Q[q]} with the noise removed")),
    (r"(edge|width|centre)_sigma_unbiased_(low|high)_nm",
     lambda q, e: ("nm", f"{'lower' if e == 'low' else 'upper'} end of the interval of the unbiased sigma of {_Q[q]}")),
    (r"(edge|width|centre)_sigma_biased_(low|high)_nm",
     lambda q, e: ("nm", f"{'lower' if e == 'low' else 'upper'} end of the interval of the biased sigma of {_Q[q]}")),
    (r"(edge|width|centre)_sigma_(unbiased|biased)_se_nm",
     lambda q, k: ("nm", f"standard error of the {k} sigma of {_Q[q]}")),
    (r"(edge|width|centre)_var_unbiased_nm2",
     lambda q: ("nm^2", f"unbiased variance of {_Q[q]} (signed: negative when below the noise)")),
    (r"(edge|width|centre)_status", lambda q: ("", f"ok, noise_dominated or below_noise for {_Q[q]}")),
    (r"(ler|lwr|lpr)_3sigma_(biased|unbiased)_nm",
     lambda t, k: ("nm", f"3 x the {k} sigma of {_Q[_TAG[t]]}")),
    (r"(ler|lwr|lpr)_3sigma_unbiased_(low|high)_nm",
     lambda t, e: ("nm", f"{'lower' if e == 'low' else 'upper'} end of the interval of the unbiased 3 sigma of "
                         f"{_Q[_TAG[t]]}")),
    (r"(ler|lwr|lpr)_noise_inflation", lambda t: ("", f"biased over unbiased 3 sigma of {_Q[_TAG[t]]}: how much noise "
                                                      "inflates the raw number")),
]

#: Which tables each output file holds (for the printed dictionary).
TABLE_FILES = {"summary.csv": "SUMMARY_COLUMNS", "groups.csv": "GROUP_COLUMNS", "edges.csv": "EDGE_COLUMNS",
               "compare.csv": "COMPARE_COLUMNS", "psd.csv": "PSD_COLUMNS"}


def describe(column: str) -> tuple[str, str]:
    """(unit, meaning) of an output column; KeyError for a column quietedge does not write."""
    if column in _EXACT:
        return _EXACT[column]
    for pattern, make in _PATTERNS:
        m = re.fullmatch(pattern, column)
        if m:
            return make(*m.groups())
    raise KeyError(column)


def dictionary_text() -> str:
    """The data dictionary as plain text, one section per output file."""
    from . import tables

    lines = []
    for name, attr in TABLE_FILES.items():
        lines.append(f"{name}")
        for col in getattr(tables, attr):
            unit, text = describe(col)
            lines.append(f"  {col:36s} {unit or '-':6s} {text}")
        lines.append("")
    lines.append("failures.csv")
    lines.append(f"  {'image':36s} {'-':6s} image that could not be measured")
    lines.append(f"  {'reason':36s} {'-':6s} why, in words")
    return "\n".join(lines)
