"""Baseline edge detectors, for comparison with the model fit and for matching older recipes.

* **threshold**: the crossing of ``lo + level * (hi - lo)``, ``lo``/``hi`` the means of the
  ``n_plateau_px`` outermost pixels on either side of the row's window, linearly interpolated
  between the two pixels that straddle it; the crossing nearest the window centre is taken.
* **slope**: a straight line fitted to the pixels between 20% and 80% of the step within 3 px of
  the threshold crossing, intersected with the 50% level.

Uncertainties are the linearised ones (high contrast-to-noise): for the threshold,
``sigma_x^2 = (sigma_n / slope)^2 [2/3 + (1 - q)^2 / n_b + q^2 / n_b]`` (the 2/3 is the
interpolation noise averaged over sub-pixel phase); for the slope fit, the regression variance
of the intersection.  At low contrast-to-noise both detectors shrink toward their starting
guess (the crossing nearest the centre), which removes real roughness: judge them by error
against truth, not by scatter.
"""
from __future__ import annotations

import numpy as np

from ._nanstats import nanmean, nanmedian
from ._types import REASON_CODES, EdgeTraces, Micrograph
from ._noise import NoiseModel
from ._windows import centre_lines, cut_windows, saturation_level
from .locate import LineLayout, locate_edges

__all__ = ["threshold_edges", "slope_edges"]


def _plateaus(win, n_b):
    y, m = win.y, win.mask
    idx = np.cumsum(m, axis=1)
    first = m & (idx <= n_b)
    rev = np.cumsum(m[:, ::-1], axis=1)[:, ::-1]
    last = m & (rev <= n_b)
    with np.errstate(invalid="ignore", divide="ignore"):
        a = (y * first).sum(1) / first.sum(1)
        b = (y * last).sum(1) / last.sum(1)
    return a, b, first, last


def _crossing(win, level, centre):
    y, m = win.y, win.mask
    d = y - level[:, None]
    pair = m[:, :-1] & m[:, 1:] & (np.sign(d[:, :-1]) != np.sign(d[:, 1:])) & (y[:, 1:] != y[:, :-1])
    k = np.arange(y.shape[1] - 1)
    dist = np.where(pair, np.abs(win.cols[:, :-1] + 0.5 - centre[:, None]), np.inf)
    j = np.argmin(dist, axis=1)
    found = np.isfinite(dist[np.arange(y.shape[0]), j])
    r = np.arange(y.shape[0])
    y0, y1 = y[r, j], y[r, j + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        x = win.cols[r, j] + (level - y0) / (y1 - y0)
    return np.where(found, x, np.nan), np.where(found, np.abs(y1 - y0), np.nan), found, k


def _noise_var(win, first, last, n_rows, n_edges):
    """Pixel noise variance at the two plateaus of each edge from row-to-row differences."""
    out = []
    for sel in (first, last):
        vals = np.where(sel, win.y, np.nan).reshape(n_edges, n_rows, -1)
        dif = np.diff(vals, axis=1)
        out.append(0.5 * nanmean(dif ** 2, axis=(1, 2)))
    return out


def _detect(micrograph, *, mode, level, window_px, n_plateau_px, polarity, orientation, layout):
    if not 0 < level < 1:
        raise ValueError(f"level={level}: must be between 0 and 1")
    if n_plateau_px < 1:
        raise ValueError(f"n_plateau_px={n_plateau_px}: must be >= 1")
    if layout is None:
        layout = locate_edges(micrograph, polarity=polarity, orientation=orientation, window_px=window_px)
    m: Micrograph = layout.micrograph
    n_rows = m.pixels.shape[0]
    n_all = len(layout.edges)
    fitted = np.array([g.flag == "" for g in layout.edges])
    idx = np.flatnonzero(fitted)
    pos = np.full((n_all, n_rows), np.nan)
    sig = np.full((n_all, n_rows), np.nan)
    reason = np.zeros((n_all, n_rows), np.int8)
    reason[~fitted] = REASON_CODES["too_close"]
    cnr = np.full(n_all, np.nan)
    if idx.size:
        reach_l = np.array([layout.edges[i].reach_left_px for i in idx])
        reach_r = np.array([layout.edges[i].reach_right_px for i in idx])
        guess = layout.guess_columns(np.arange(n_rows))[idx]
        sat = saturation_level(m)
        win = cut_windows(m.pixels, guess, reach_l, reach_r, sat)
        for _ in range(2):   # second round on windows re-centred on the first round's line
            a, b, first, last = _plateaus(win, n_plateau_px)
            lo, hi = np.minimum(a, b), np.maximum(a, b)
            lev = lo + level * (hi - lo)
            centre = np.rint(guess).ravel()
            x, step, found, _ = _crossing(win, lev, centre)
            guess = centre_lines(x.reshape(idx.size, n_rows), found.reshape(idx.size, n_rows), guess)
            win = cut_windows(m.pixels, guess, reach_l, reach_r, sat)
        a, b, first, last = _plateaus(win, n_plateau_px)
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        lev = lo + level * (hi - lo)
        x, step, found, _ = _crossing(win, lev, guess.ravel())
        v_a, v_b = _noise_var(win, first, last, n_rows, idx.size)
        e_idx = np.repeat(np.arange(idx.size), n_rows)
        rising = b > a
        v_lo = np.where(rising, v_a[e_idx], v_b[e_idx])
        v_hi = np.where(rising, v_b[e_idx], v_a[e_idx])
        noise_var = v_lo + level * (v_hi - v_lo)
        slope_med = np.array([nanmedian(step[e_idx == e]) for e in range(idx.size)])[e_idx]
        q = level
        var_x = noise_var / slope_med ** 2 * (2 / 3 + ((1 - q) ** 2 + q ** 2) / n_plateau_px)
        code = np.where(found, 0, REASON_CODES["low_contrast"]).astype(np.int8)
        if mode == "slope":
            x, var_x, ok = _slope_fit(win, lo, hi, x, noise_var, n_plateau_px)
            code[(code == 0) & ~ok] = REASON_CODES["low_contrast"]
        code[win.saturated] = REASON_CODES["saturated"]
        code[win.non_finite] = REASON_CODES["non_finite"]
        valid = code == 0
        p = m.pixel_size_nm
        pos[idx] = np.where(valid, x * p, np.nan).reshape(idx.size, n_rows)
        sig[idx] = np.where(valid, np.sqrt(var_x) * p, np.nan).reshape(idx.size, n_rows)
        reason[idx] = code.reshape(idx.size, n_rows)
        for j, e in enumerate(idx):
            sel = e_idx == j
            cnr[e] = float(nanmedian((hi - lo)[sel]) / np.sqrt(nanmedian(noise_var[sel])))
    flags = np.array(["" if f else "too_close" for f in fitted], dtype=object)
    return EdgeTraces(
        position_nm=pos, sigma_nm=sig, valid=reason == 0, reason=reason,
        line_index=np.array([g.line_index for g in layout.edges]),
        side=np.array([g.side for g in layout.edges]), row_spacing_nm=m.pixel_size_nm,
        reduced_chi2=np.full((n_all, n_rows), np.nan), iterations=np.zeros((n_all, n_rows), np.int64),
        contrast_to_noise=cnr, edge_flags=flags.astype(str), detector=mode, profile_model="", source=m.source,
        noise_model=NoiseModel(), rotated=m.rotated, bar_rows=layout.bar_rows)


def _slope_fit(win, lo, hi, x_thr, noise_var, n_b, low=0.2, high=0.8, reach_px=3.0):
    with np.errstate(invalid="ignore", divide="ignore"):
        t = (win.y - lo[:, None]) / (hi - lo)[:, None]
    use = win.mask & (t >= low) & (t <= high) & (np.abs(win.cols - x_thr[:, None]) <= reach_px)
    n = use.sum(1)
    c = np.where(use, win.cols, 0.0)
    y = np.where(use, win.y, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        cm = c.sum(1) / n
        ym = y.sum(1) / n
        sxx = (np.where(use, (win.cols - cm[:, None]) ** 2, 0.0)).sum(1)
        sxy = (np.where(use, (win.cols - cm[:, None]) * (win.y - ym[:, None]), 0.0)).sum(1)
        beta = sxy / sxx
        l50 = lo + 0.5 * (hi - lo)
        x = cm + (l50 - ym) / beta
        # regression variance of the intersection plus the plateau levels' noise
        var = noise_var / beta ** 2 * (1 / n + (x - cm) ** 2 / sxx + 0.5 / n_b)
    # a slope below a quarter of the step per pixel is no edge (guards the 1/slope blow-up)
    ok = (n >= 2) & np.isfinite(x) & (np.abs(beta) > 0.05 * (hi - lo)) & (np.abs(x - x_thr) < reach_px)
    return np.where(ok, x, np.nan), np.where(ok, var, np.nan), ok


def threshold_edges(micrograph: Micrograph, *, level: float = 0.5, window_px: int = 31,
                    n_plateau_px: int = 4, polarity: str = "auto", orientation: str = "auto",
                    layout: LineLayout | None = None) -> EdgeTraces:
    """Edge positions where each row crosses ``level`` of its local plateau-to-plateau range.

    Examples
    --------
    >>> import numpy as np
    >>> from edges import Micrograph, SEMSettings, render_micrograph
    >>> left = np.array([[40.0] * 64, [104.0] * 64])
    >>> pixels, _ = render_micrograph(left, left + 32, n_cols=176, rng=np.random.default_rng(1),
    ...                               settings=SEMSettings(dose_per_pixel=500, edge_peak=0.0))
    >>> traces = threshold_edges(Micrograph(pixels=pixels, pixel_size_nm=1.0))
    >>> traces.detector, np.round(np.nanmean(traces.position_nm, axis=1)).tolist()
    ('threshold', [40.0, 72.0, 104.0, 136.0])
    """
    return _detect(micrograph, mode="threshold", level=level, window_px=window_px,
                   n_plateau_px=n_plateau_px, polarity=polarity, orientation=orientation, layout=layout)


def slope_edges(micrograph: Micrograph, *, window_px: int = 31, n_plateau_px: int = 4,
                polarity: str = "auto", orientation: str = "auto",
                layout: LineLayout | None = None) -> EdgeTraces:
    """Edge positions from a straight line through the 20-80% part of each row's edge.

    Examples
    --------
    >>> import numpy as np
    >>> from edges import Micrograph, SEMSettings, render_micrograph
    >>> left = np.array([[40.0] * 64, [104.0] * 64])
    >>> pixels, _ = render_micrograph(left, left + 32, n_cols=176, rng=np.random.default_rng(1),
    ...                               settings=SEMSettings(dose_per_pixel=500, edge_peak=0.0))
    >>> slope_edges(Micrograph(pixels=pixels, pixel_size_nm=1.0)).position_nm.shape
    (4, 64)
    """
    return _detect(micrograph, mode="slope", level=0.5, window_px=window_px, n_plateau_px=n_plateau_px,
                   polarity=polarity, orientation=orientation, layout=layout)
