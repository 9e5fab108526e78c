"""Biased, noise and unbiased roughness of edges, widths (LWR) and centres (placement), with
confidence intervals from resampling lines and images.

Per trace (METHODS 2.2, 3): ``var_b = |(I - P) x|^2 / N`` (divide by N, as Parseval needs),
``var_n = sum_i s_i^2 (1 - P_ii) / N``, ``var_u = var_b - var_n``.  Widths ``w = xR - xL`` carry
noise ``s_L^2 + s_R^2`` per row and centres ``(xL + xR)/2`` carry ``(s_L^2 + s_R^2)/4`` (separate
fits: no covariance between the two edges of a row).  Group values average *variances* (a
quadratic mean), never sigmas; a negative unbiased variance is kept signed in every average and
reported as ``below_noise`` with sigma NaN, never clipped to zero.

Intervals: bootstrap over lines (a line's two edges stay together) within images and over images
within a group, as a Student-t interval with the bootstrap's standard error.  Rows are never resampled: that destroys the correlation along the
edge and makes intervals far too narrow.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import t as student_t

from edges._types import EdgeTraces

from ._selfaffine import matern_acf
from .noise import noise_floor_nm3, noise_variance_nm2
from .psd import bridge_gaps, cross_periodogram, detrend_basis, periodogram
from .psd import detrend as detrend_traces

__all__ = ["ImageRoughness", "analyse_traces", "RoughnessSummary", "summarize", "expected_measured_variance",
           "sampling_plan", "frames_for_noise_fraction", "QUANTITIES"]

QUANTITIES = ("edge", "width", "centre")


@dataclass(frozen=True)
class ImageRoughness:
    """Per-trace statistics of one image.

    Attributes
    ----------
    source : str
    row_spacing_nm : float
    n_rows : int
    edge_var_biased_nm2, edge_var_noise_nm2 : (n_edges,) ndarray (NaN where excluded)
    edge_line, edge_side, edge_exclusion : (n_edges,) ndarrays
    units : dict of (n_lines,) ndarrays
        Per line (the resampling unit): ``left_b``, ``left_n``, ``right_b``, ``right_n``,
        ``width_b``, ``width_n``, ``centre_b``, ``centre_n``, ``cov_b`` (left/right covariance),
        ``cd_nm``; NaN where a line lacks a usable edge.
    frequency_per_nm : ndarray
    psd : dict
        ``edge``, ``width``, ``centre``: (n_traces, n_freq) one-sided PSDs of usable traces;
        ``edge_floor`` ... per-trace noise floors (nm^3); ``cross``: (n_pairs, n_freq) real
        cross-PSD of the pairs.
    acf_edge_nm2 : ndarray
        Mean biased autocorrelation of the usable detrended edges (lags 0..n_rows-1).
    detrend, window : str
    bridged_rows : int
    invalid_rows : dict
        Reasons of invalid rows in the traces, counted.
    """

    source: str
    row_spacing_nm: float
    n_rows: int
    edge_var_biased_nm2: np.ndarray
    edge_var_noise_nm2: np.ndarray
    edge_line: np.ndarray
    edge_side: np.ndarray
    edge_exclusion: np.ndarray
    units: dict
    frequency_per_nm: np.ndarray
    psd: dict
    acf_edge_nm2: np.ndarray
    detrend: str
    window: str
    bridged_rows: int
    invalid_rows: dict = field(default_factory=dict)

    @property
    def n_lines(self) -> int:
        return int(np.count_nonzero(np.isfinite(self.units["width_b"])))


def _biased_var(z):
    return np.mean(z * z, axis=-1)


def analyse_traces(traces: EdgeTraces, *, detrend: str = "linear", window: str = "hann",
                   max_gap_rows: int = 3, max_invalid_fraction: float = 0.05) -> ImageRoughness:
    """Variances, PSDs and noise floors of every edge, width and centre of one image.

    ``detrend`` is applied to every trace (edges, widths, centres alike, so that
    var_w = var_L + var_R - 2 cov holds exactly).  Edges flagged ``too_close`` or with too many
    invalid rows are excluded with their reason.
    """
    prep = bridge_gaps(traces.position_nm, traces.sigma_nm, traces.valid, max_gap_rows=max_gap_rows,
                       max_invalid_fraction=max_invalid_fraction)
    usable = prep.usable.copy()
    exclusion = prep.exclusion.astype(object)
    for e, flag in enumerate(traces.edge_flags):
        if "too_close" in flag:
            usable[e], exclusion[e] = False, "too_close"
    dy, n = traces.row_spacing_nm, traces.n_rows
    x, s = prep.position_nm, prep.sigma_nm
    z = np.where(usable[:, None], detrend_traces(np.where(usable[:, None], x, 0.0), detrend), np.nan)
    var_b = np.where(usable, _biased_var(np.nan_to_num(z)), np.nan)
    var_n = np.where(usable, noise_variance_nm2(np.nan_to_num(s), detrend=detrend), np.nan)
    keep = 1.0 - np.sum(detrend_basis(n, detrend) ** 2, axis=1)
    lines = np.unique(traces.line_index)
    u = {k: np.full(lines.size, np.nan) for k in ("left_b", "left_n", "right_b", "right_n", "width_b", "width_n",
                                                   "centre_b", "centre_n", "cov_b", "cd_nm")}
    pairs = []
    for j, line in enumerate(lines):
        li = np.flatnonzero((traces.line_index == line) & (traces.side == "left"))
        ri = np.flatnonzero((traces.line_index == line) & (traces.side == "right"))
        li = li[0] if li.size and usable[li[0]] else None
        ri = ri[0] if ri.size and usable[ri[0]] else None
        if li is not None:
            u["left_b"][j], u["left_n"][j] = var_b[li], var_n[li]
        if ri is not None:
            u["right_b"][j], u["right_n"][j] = var_b[ri], var_n[ri]
        if li is not None and ri is not None:
            zw, zc = z[ri] - z[li], 0.5 * (z[ri] + z[li])
            s2w = s[li] ** 2 + s[ri] ** 2
            u["width_b"][j], u["width_n"][j] = _biased_var(zw), np.mean(s2w * keep)
            u["centre_b"][j], u["centre_n"][j] = _biased_var(zc), np.mean(0.25 * s2w * keep)
            u["cov_b"][j] = np.mean(z[li] * z[ri])
            u["cd_nm"][j] = float(np.mean(x[ri] - x[li]))
            pairs.append((li, ri))
    ue = np.flatnonzero(usable)
    f, pe = periodogram(z[ue], row_spacing_nm=dy, window=window)
    psd = {"edge": pe, "edge_floor": noise_floor_nm3(s[ue], row_spacing_nm=dy, window=window)}
    if pairs:
        L, R = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
        psd["width"] = periodogram(z[R] - z[L], row_spacing_nm=dy, window=window)[1]
        psd["centre"] = periodogram(0.5 * (z[R] + z[L]), row_spacing_nm=dy, window=window)[1]
        psd["width_floor"] = noise_floor_nm3(np.sqrt(s[L] ** 2 + s[R] ** 2), row_spacing_nm=dy, window=window)
        psd["centre_floor"] = 0.25 * psd["width_floor"]
        psd["cross"] = cross_periodogram(z[L], z[R], row_spacing_nm=dy, window=window)
    else:
        empty = np.zeros((0, f.size))
        psd.update(width=empty, centre=empty, cross=empty, width_floor=np.zeros(0), centre_floor=np.zeros(0))
    if ue.size:
        spec = np.abs(np.fft.rfft(z[ue], n=2 * n, axis=1)) ** 2
        acf = np.fft.irfft(spec, axis=1)[:, :n].mean(axis=0) / n          # biased estimator (/N)
    else:
        acf = np.full(n, np.nan)
    return ImageRoughness(source=traces.source, row_spacing_nm=dy, n_rows=n, edge_var_biased_nm2=var_b,
                          edge_var_noise_nm2=var_n, edge_line=traces.line_index, edge_side=traces.side,
                          edge_exclusion=exclusion.astype(str), units=u, frequency_per_nm=f, psd=psd,
                          acf_edge_nm2=acf, detrend=detrend, window=window,
                          bridged_rows=int(prep.bridged_rows.sum()), invalid_rows=traces.reason_counts())


# ------------------------------------------------------------------------------------------
def _group_values(units_list):
    """Quadratic-mean statistics from a list of per-image unit dicts (possibly resampled)."""
    cat = {k: np.concatenate([u[k] for u in units_list]) for k in units_list[0]}
    eb = np.concatenate([cat["left_b"], cat["right_b"]])
    en = np.concatenate([cat["left_n"], cat["right_n"]])
    ok = np.isfinite(eb)
    out = {"edge_b": np.mean(eb[ok]) if ok.any() else np.nan, "edge_n": np.mean(en[ok]) if ok.any() else np.nan}
    w = np.isfinite(cat["width_b"])
    for q in ("width", "centre"):
        out[q + "_b"] = np.mean(cat[q + "_b"][w]) if w.any() else np.nan
        out[q + "_n"] = np.mean(cat[q + "_n"][w]) if w.any() else np.nan
    if w.any():
        lu = np.sum(cat["left_b"][w] - cat["left_n"][w])
        ru = np.sum(cat["right_b"][w] - cat["right_n"][w])
        cov = np.sum(cat["cov_b"][w])
        lb, rb = np.sum(cat["left_b"][w]), np.sum(cat["right_b"][w])
        out["rho_b"] = cov / math.sqrt(lb * rb)
        out["rho_u"] = cov / math.sqrt(lu * ru) if lu > 0 and ru > 0 else np.nan
        out["cd"] = np.mean(cat["cd_nm"][w])
    else:
        out.update(rho_b=np.nan, rho_u=np.nan, cd=np.nan)
    return out


def _bootstrap_one_image(u, n_resamples, rng):
    """Vectorised version of the resampling of lines for a single image."""
    n = u["left_b"].size
    idx = rng.integers(0, n, (n_resamples, n))
    g = {k: v[idx] for k, v in u.items()}

    def mean(a, ok):
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(ok, a, 0.0).sum(1) / ok.sum(1)

    eb = np.concatenate([g["left_b"], g["right_b"]], axis=1)
    en = np.concatenate([g["left_n"], g["right_n"]], axis=1)
    ok = np.isfinite(eb)
    w = np.isfinite(g["width_b"])
    out = {"edge_b": mean(eb, ok), "edge_n": mean(en, ok)}
    for q in ("width", "centre"):
        out[q + "_b"], out[q + "_n"] = mean(g[q + "_b"], w), mean(g[q + "_n"], w)

    def total(a):
        return np.where(w, a, 0.0).sum(1)

    lu, ru = total(g["left_b"] - g["left_n"]), total(g["right_b"] - g["right_n"])
    lb, rb, cov = total(g["left_b"]), total(g["right_b"]), total(g["cov_b"])
    with np.errstate(invalid="ignore", divide="ignore"):
        out["rho_b"] = cov / np.sqrt(lb * rb)
        out["rho_u"] = np.where((lu > 0) & (ru > 0), cov / np.sqrt(np.abs(lu * ru)), np.nan)
    out["cd"] = mean(g["cd_nm"], w)
    return out


@dataclass(frozen=True)
class RoughnessSummary:
    """Group (or single-image) roughness, 1-sigma values in nm.

    Attributes
    ----------
    values : dict
        For each quantity q in ("edge", "width", "centre"): ``q_sigma_biased_nm``,
        ``q_sigma_noise_nm``, ``q_sigma_unbiased_nm`` (NaN when below noise),
        ``q_var_unbiased_nm2`` (signed), ``q_noise_fraction``, ``q_status`` ("ok" or
        "below_noise"), ``q_sigma_unbiased_low_nm`` / ``_high_nm`` (confidence interval);
        also ``lr_correlation_biased``, ``lr_correlation_unbiased`` (+ interval), ``cd_nm``
        (+ interval), ``n_images``, ``n_lines``, ``n_edges``.
    confidence : float
    n_resamples : int
    """

    values: dict
    confidence: float
    n_resamples: int

    def __getitem__(self, key):
        return self.values[key]


def summarize(images, *, n_resamples: int = 1000, confidence: float = 0.95,
              rng: np.random.Generator | None = None) -> RoughnessSummary:
    """Pool images (variances averaged over edges/lines) with bootstrap intervals.

    Lines are resampled within each image and, when there are several, images within the group.
    """
    images = list(images)
    if not images:
        raise ValueError("images: at least one ImageRoughness is needed")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence={confidence}: must be between 0 and 1")
    rng = np.random.default_rng(0) if rng is None else rng
    units = [im.units for im in images]
    point = _group_values(units)
    if len(units) == 1:
        boot = _bootstrap_one_image(units[0], n_resamples, rng)
    else:
        boot = {k: np.empty(n_resamples) for k in point}
    for b in (range(n_resamples) if len(units) > 1 else ()):
        pick = rng.integers(0, len(units), len(units)) if len(units) > 1 else [0]
        sample = []
        for i in pick:
            n = units[i]["left_b"].size
            idx = rng.integers(0, n, n)
            sample.append({k: v[idx] for k, v in units[i].items()})
        for k, v in _group_values(sample).items():
            boot[k][b] = v
    # Interval: point +- t_(n-1) x bootstrap sd x sqrt(n / (n - 1)), n the number of resampled
    # units at the top level (lines of one image, or images).  Plain percentile intervals
    # under-cover with the 5-20 lines of a typical image (87% for a nominal 95% at 12 lines in
    # our coverage check); the t factor and the n/(n-1) correction for the bootstrap's
    # divide-by-n variance restore it.
    n_units = len(images) if len(images) > 1 else int(np.count_nonzero(
        np.isfinite(images[0].units["left_b"]) | np.isfinite(images[0].units["right_b"])))
    t = float(student_t.ppf(0.5 * (1 + confidence), max(n_units - 1, 1)))
    scale = t * math.sqrt(n_units / max(n_units - 1, 1))

    def interval(arr, centre):
        arr = arr[np.isfinite(arr)]
        if arr.size < 10 or not np.isfinite(centre):
            return math.nan, math.nan
        half = scale * float(np.std(arr, ddof=1))
        return centre - half, centre + half

    v = {}
    for q in QUANTITIES:
        vb, vn = point[q + "_b"], point[q + "_n"]
        vu = vb - vn
        v[f"{q}_sigma_biased_nm"] = math.sqrt(vb) if vb >= 0 else math.nan
        v[f"{q}_sigma_noise_nm"] = math.sqrt(vn) if vn >= 0 else math.nan
        v[f"{q}_var_unbiased_nm2"] = vu
        v[f"{q}_sigma_unbiased_nm"] = math.sqrt(vu) if vu > 0 else math.nan
        v[f"{q}_status"] = "ok" if vu > 0 else ("below_noise" if np.isfinite(vu) else "not_measured")
        v[f"{q}_noise_fraction"] = vn / vb if vb > 0 else math.nan
        lo, hi = interval(boot[q + "_b"] - boot[q + "_n"], vu)
        v[f"{q}_sigma_unbiased_low_nm"] = math.sqrt(max(lo, 0.0)) if np.isfinite(lo) else math.nan
        v[f"{q}_sigma_unbiased_high_nm"] = math.sqrt(max(hi, 0.0)) if np.isfinite(hi) else math.nan
    v["lr_correlation_biased"] = point["rho_b"]
    v["lr_correlation_unbiased"] = point["rho_u"]
    v["lr_correlation_unbiased_low"], v["lr_correlation_unbiased_high"] = interval(boot["rho_u"], point["rho_u"])
    v["cd_nm"] = point["cd"]
    v["cd_low_nm"], v["cd_high_nm"] = interval(boot["cd"], point["cd"])
    v["n_images"] = len(images)
    v["n_lines"] = int(sum(im.n_lines for im in images))
    v["n_edges"] = int(sum(np.count_nonzero(np.isfinite(im.edge_var_biased_nm2)) for im in images))
    return RoughnessSummary(values=v, confidence=confidence, n_resamples=n_resamples)


# ------------------------------------------------------------------------------------------
def expected_measured_variance(*, sigma_nm=None, correlation_length_nm=None, roughness_exponent=None,
                               n_rows, row_spacing_nm, detrend: str = "linear", acf_nm2=None) -> float:
    """E[|(I - P) x|^2 / N] = tr((I - P) C) / N for the self-affine model's covariance C.

    The variance a detrended line of finite length shows on average: below sigma^2 by about
    p g(H) sigma^2 xi / L (p removed polynomial terms), METHODS 1.6.
    """
    if acf_nm2 is not None:     # any stationary ACF at lags 0..n_rows-1 (rows)
        r = np.asarray(acf_nm2, float)[:n_rows]
    else:
        lags = np.arange(n_rows) * row_spacing_nm
        r = matern_acf(lags, sigma_nm=sigma_nm, correlation_length_nm=correlation_length_nm,
                       roughness_exponent=roughness_exponent)
    q = detrend_basis(n_rows, detrend)
    # tr(C) - tr(Q^T C Q), with C Toeplitz; C q via the explicit matrix (n_rows is modest)
    c = r[np.abs(np.subtract.outer(np.arange(n_rows), np.arange(n_rows)))]
    return float((np.trace(c) - np.sum(q * (c @ q))) / n_rows)


def sampling_plan(*, sigma_unbiased_nm, correlation_length_nm, roughness_exponent, noise_sigma_nm,
                  row_spacing_nm, line_length_nm, target_relative_sd):
    """Lines (of the given length) needed for a target relative sd of the unbiased sigma.

    var(sigma_u^2) ~ (2 / (M L)) [c(H) sigma^4 xi + 2 sigma^2 s^2 dy + s^4 dy] (METHODS 6; s the
    per-row edge noise), and rel sd(sigma_u) = sd(sigma_u^2) / (2 sigma_u^2).  Returns a dict with
    the total line length and the number of lines needed, and the same with the noise removed
    (what more frames could at best achieve).
    """
    s2, n2 = sigma_unbiased_nm ** 2, noise_sigma_nm ** 2
    h = roughness_exponent
    c = (2 * math.sqrt(math.pi) * math.gamma(h + 0.5) ** 2 * math.gamma(2 * h + 0.5)
         / (math.gamma(h) ** 2 * math.gamma(2 * h + 1)))
    r = target_relative_sd

    def length(noise2):
        return 2 * (c * s2 * s2 * correlation_length_nm + 2 * s2 * noise2 * row_spacing_nm
                    + noise2 * noise2 * row_spacing_nm) / (4 * r * r * s2 * s2)

    total = length(n2)
    ideal = length(0.0)
    return {"total_length_nm": total, "lines_needed": math.ceil(total / line_length_nm),
            "total_length_noise_free_nm": ideal, "lines_needed_noise_free": math.ceil(ideal / line_length_nm)}


def frames_for_noise_fraction(*, noise_var_nm2: float, unbiased_var_nm2: float, target_fraction: float,
                              frames_now: int = 1) -> float:
    """Frames needed so that noise / biased variance falls to ``target_fraction``.

    The noise variance of an edge position falls as 1 / frames under shot noise (common
    practice; it assumes no drift between frames and no resist damage).
    """
    if not 0 < target_fraction < 1:
        raise ValueError(f"target_fraction={target_fraction}: must be between 0 and 1")
    if not unbiased_var_nm2 > 0:
        return math.inf
    factor = noise_var_nm2 * (1 - target_fraction) / (target_fraction * unbiased_var_nm2)
    return max(1.0, frames_now * factor) if factor > 1 else float(frames_now)
