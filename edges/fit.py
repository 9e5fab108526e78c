"""Model-based edge positions for every row, with calibrated uncertainties.

Passes over all rows of all edges at once (batched, no loop over rows):

1. **coarse**: a plain blurred step, starting from the located guesses after a grid search
   over the window; gives rough positions and each edge's straight centre line;
2. **shape**: one shape per side (left edges, right edges; pooled over the image's lines) from
   the mean profile aligned on the centre lines, with the roughness blur removed; an unweighted
   pass with it; then each row's window is re-centred on that row's estimate and the shape is
   refitted on the self-aligned profile, corrected for the sharpening that self-alignment
   causes (:func:`edges.profiles.adjust_blur`);
3. **unweighted** pass with the final shape: its residuals give the image's noise model
   ``var = c0 + c1 * signal`` (shot noise makes the variance follow the signal) and the noise
   correlation along the scan;
4. **weighted** pass, weights ``1 / var(model of pass 3)``; each position's variance is
   ``1 / (J_p^T W J_p)``, or the sandwich ``q^T C q / (J_p^T W J_p)^2`` (q = W J_p) when the
   noise is correlated along the scan, C that of a first-order detector filter,
   C_(i,i+l) = a^l var_i, with a estimated from the residuals by the method of moments (the
   projection of the fit on the residuals is undone exactly in expectation).

Edges whose median contrast-to-noise falls below :data:`LOW_CONTRAST_CNR` are flagged
``low_contrast``: there the linearised covariance under-states the real scatter.

References
----------
Kay, S. M. (1993). Fundamentals of Statistical Signal Processing, Vol. I: Estimation Theory.
Prentice Hall (Fisher information, Cramer-Rao bound).
Golub, G. & Pereyra, V. (2003). Separable nonlinear least squares: the variable projection
method and its applications. Inverse Problems 19, R1.  doi:10.1088/0266-5611/19/2/201
"""
from __future__ import annotations

import math

import numpy as np
from scipy import signal

from ._nanstats import nanmean, nanmedian
from ._solver import solve_rows
from ._types import REASON_CODES, EdgeTraces, Micrograph
from .locate import LineLayout, locate_edges
from .profiles import (EdgeShape, adjust_blur, fit_shape, fit_shift, half_level_offset,
                       parametric_profile,
                       smoothed_correction, tabulate)

__all__ = ["fit_edges", "LOW_CONTRAST_CNR", "EdgeWindows", "gather_windows"]

#: Below this contrast-to-noise (step height over noise sd at mid-step) an edge is flagged.
LOW_CONTRAST_CNR = 3.0
_MODELS = ("template", "parametric", "step")
_BIN_PX = 0.25


class EdgeWindows:
    """Pixel windows of every row of every fitted edge, stacked as (n_edges * n_rows, width)."""

    def __init__(self, pixels, centres_px, half_px, saturation_level=None):
        n_e, n_r = centres_px.shape
        hmax = int(half_px.max())
        offs = np.arange(-hmax, hmax + 1)
        start = np.rint(centres_px).astype(np.int64)
        col = start[:, :, None] + offs[None, None, :]
        n_cols = pixels.shape[1]
        inside = (col >= 0) & (col < n_cols) & (np.abs(offs)[None, None, :] <= half_px[:, None, None])
        colc = np.clip(col, 0, n_cols - 1)
        rows = np.broadcast_to(np.arange(n_r)[None, :, None], col.shape)
        y = pixels[rows, colc].reshape(n_e * n_r, -1)
        self.y = y
        self.cols = col.reshape(n_e * n_r, -1).astype(np.float64)
        self.mask = inside.reshape(n_e * n_r, -1)
        self.edge = np.repeat(np.arange(n_e), n_r)
        self.non_finite = np.any(~np.isfinite(y) & self.mask, axis=1)
        self.y = np.where(np.isfinite(y), y, 0.0)
        self.mask &= np.isfinite(y)
        self.saturated = (np.any((y >= saturation_level) & self.mask, axis=1)
                          if saturation_level is not None else np.zeros(n_e * n_r, bool))
        self.first = start.reshape(-1) - half_px.repeat(n_r)
        self.last = start.reshape(-1) + half_px.repeat(n_r)


def gather_windows(micrograph, centres_px, half_px):
    """Public helper for baselines: windows around per-row centres."""
    return EdgeWindows(micrograph.pixels, centres_px, np.asarray(half_px), _saturation(micrograph))


def _saturation(m: Micrograph):
    if m.saturation_level is not None:
        return m.saturation_level
    px = m.pixels
    top = px.max()
    # a clipped detector leaves many pixels at exactly the maximum
    return float(top) if np.count_nonzero(px == top) > 0.005 * px.size else None


def _centre_lines(x, ok, fallback):
    """Robust straight line through each edge's positions; the fallback where too few rows."""
    n_e, n_r = x.shape
    rows = np.arange(n_r, dtype=float)
    out = fallback.copy()
    for e in range(n_e):
        good = ok[e] & np.isfinite(x[e])
        for _ in range(2):
            if good.sum() < 8:
                break
            coef = np.polyfit(rows[good], x[e, good], 1)
            res = x[e] - np.polyval(coef, rows)
            mad = np.median(np.abs(res[good])) + 1e-9
            good = good & (np.abs(res) < 5 * 1.4826 * mad + 0.5)
        if good.sum() >= 8:
            out[e] = np.polyval(np.polyfit(rows[good], x[e, good], 1), rows)
    return out


def _aligned_profiles(win, res, ok, hmax):
    """Per-edge mean of (y - offset) / gain against u = col - x0 in bins of _BIN_PX."""
    n_e = int(win.edge.max()) + 1
    edges_u = np.arange(-(hmax + 1), hmax + 1 + 1e-9, _BIN_PX)
    centres = 0.5 * (edges_u[:-1] + edges_u[1:])
    nb = centres.size
    use = ok[:, None] & win.mask
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (win.y - res.offset[:, None]) / res.gain[:, None]
    u = win.cols - res.x0[:, None]
    k = np.floor((u + hmax + 1) / _BIN_PX).astype(np.int64)
    use &= (k >= 0) & (k < nb) & np.isfinite(z)
    flat = (win.edge[:, None] * nb + k)[use]
    total = np.bincount(flat, weights=z[use], minlength=n_e * nb).reshape(n_e, nb)
    count = np.bincount(flat, minlength=n_e * nb).reshape(n_e, nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count >= 3, total / count, np.nan)
    return centres, mean


def _shapes(centres, mean, kind, groups, starts=None, blur_change_px2=None):
    """One shape per group of edges (left: +1, right: -1), fitted on the group's pooled profile.

    The beam and material are common to the image, so pooling the edges of one side cuts the
    noise of the shape; each edge then gets only its own shift of the step centre, with the
    shape fixed (a free peak beside a free step centre trades one against the other).
    Returns per-edge callables for the table, per-edge shapes and per-edge shifts.
    """
    n_e = mean.shape[0]
    funcs, shapes, shifts = [None] * n_e, [None] * n_e, np.zeros(n_e)
    for g in np.unique(groups):
        members = np.flatnonzero(groups == g)
        pooled = nanmean(mean[members], axis=0) if members.size else None
        start = None if starts is None else starts[members[0]]
        try:
            fitted, _ = fit_shape(centres, pooled, kind="step" if kind == "step" else "parametric", start=start,
                                  peak_side=int(g))
            own = np.zeros(members.size)
            for _ in range(2):   # re-pool with each edge moved onto the common reference
                prof = lambda u, sh=fitted: parametric_profile(u, sh)
                own = np.array([_safe_shift(centres, mean[e], prof) for e in members])
                pooled = nanmean([np.interp(centres, centres - sh_, mean[e], left=np.nan, right=np.nan)
                                     for e, sh_ in zip(members, own)], axis=0)
                fitted, extra = fit_shape(centres, pooled, kind="step" if kind == "step" else "parametric",
                                          start=fitted, peak_side=int(g))
                own = own + extra
        except (RuntimeError, ValueError):
            fitted, own = (start or EdgeShape(2.0)), np.zeros(members.size)
        shape = fitted
        if blur_change_px2 is not None:
            shape = adjust_blur(fitted, float(nanmean(blur_change_px2[members])))
        corr = None
        if kind == "template":
            aligned = nanmean([np.interp(centres, centres - sh_, mean[e], left=np.nan, right=np.nan)
                                  for e, sh_ in zip(members, own)], axis=0)
            mu = parametric_profile(centres, fitted)
            good = np.isfinite(aligned)
            gain, offset = np.polyfit(mu[good], aligned[good], 1)   # the pooled z is not exactly 0..1
            corr = smoothed_correction(centres, (aligned - offset) / gain - mu)
        if corr is None:
            full = lambda u, derivative=False, s_=shape: parametric_profile(u, s_, derivative=derivative)
        else:
            full = (lambda u, derivative=False, s_=shape, c=corr:
                    parametric_profile(u, s_, derivative=derivative) + c(u, derivative=derivative))
        ref = half_level_offset(full)
        for e, sh_ in zip(members, own):
            funcs[e] = lambda u, derivative=False, f=full, r=ref: f(u + r, derivative=derivative)
            shapes[e], shifts[e] = shape, sh_ + ref
    return funcs, shapes, shifts


def _safe_shift(centres, z, profile):
    try:
        return fit_shift(centres, z, profile)
    except (RuntimeError, ValueError):
        return 0.0


def _noise_model(win, res, ok, table, scan_filter=0.0):
    """var(signal) = c0 + c1 * signal from unweighted residuals, pooled over the image.

    Each squared residual is divided by (1 - h_ii), h the row's hat matrix for (x0, offset,
    gain), so that pixels of high leverage (on the edge) are not under-counted.  With a
    first-order detector filter of coefficient a along the scan (left to right), a pixel's
    noise variance follows the *filtered* signal (1 - a^2) sum_k a^(2k) m_(n-k), which is what
    is regressed on then (shot noise from a bright side spills into the dark side).
    Returns c0, c1 and the signal that the variance is a function of, per pixel.
    """
    mu, dmu = table.evaluate(win.edge, win.cols - res.x0[:, None])
    model = res.offset[:, None] + res.gain[:, None] * mu
    X = np.stack([-res.gain[:, None] * dmu, np.ones_like(mu), mu], axis=2) * win.mask[:, :, None]
    G = np.swapaxes(X, 1, 2) @ X
    good_rows = ok & (np.abs(np.linalg.det(G)) > 0)
    Ginv = np.zeros_like(G)
    Ginv[good_rows] = np.linalg.inv(G[good_rows])
    lev = np.einsum("nia,nab,nib->ni", X, Ginv, X)
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = (win.y - model) ** 2 / (1.0 - lev)
    ok = good_rows
    if scan_filter > 0:
        a2 = scan_filter ** 2
        model, _ = signal.lfilter([1 - a2], [1.0, -a2], model, axis=1, zi=a2 * model[:, :1])
    use = ok[:, None] & win.mask & (lev < 0.95)
    m, v = model[use], r2[use]
    if m.size < 50:
        return 0.0, 1.0, model
    q = np.quantile(m, np.linspace(0, 1, 21))
    k = np.clip(np.searchsorted(q, m, side="right") - 1, 0, 19)
    cnt = np.bincount(k, minlength=20)
    good = cnt > 10
    mb = np.bincount(k, weights=m, minlength=20)[good] / cnt[good]
    vb = np.bincount(k, weights=v, minlength=20)[good] / cnt[good]
    wts = cnt[good] / np.maximum(vb, 1e-300) ** 2
    if good.sum() >= 3 and np.ptp(mb) > 0:
        c1, c0 = np.polyfit(mb, vb, 1, w=np.sqrt(wts))
    else:
        c0, c1 = float(np.mean(v)), 0.0
    floor = 0.05 * float(np.median(v))
    if c0 + c1 * m.min() < floor or c0 + c1 * m.max() < floor:
        c0, c1 = float(np.mean(v)), 0.0
    return float(c0), float(c1), model


def _scan_correlation(win, res, ok, var, table, rng_seed=0):
    """Noise correlation along the scan, R_ij = gamma0 * a^|i-j| (first-order detector filter).

    Normalised residuals e = D^(-1/2) r of the unweighted fit have E[e e^T] = M R M^T with
    M = D^(-1/2) (I - H) D^(1/2) and H the rows' hat matrices, so the lag sums
    c_k = sum_n e_n e_(n+k) have expectations tr(B_k R), B_k = sum_rows M^T S_k M.  (gamma0, a)
    are fitted to c_0..c_K by least squares.  A non-parametric R is not identifiable here: the
    fit removes the offset, so a constant added to every lag leaves the residuals unchanged.
    Returns gamma0 (variance scale of the noise model), a, and its standard error.
    """
    width = win.y.shape[1]
    full = np.flatnonzero(ok & (win.mask.sum(1) == width))
    if full.size < 200:
        return 1.0, 0.0, np.inf
    sample = full if full.size <= 1500 else np.random.default_rng(rng_seed).choice(full, 1500, replace=False)
    sample.sort()
    mu, dmu = table.evaluate(win.edge[sample], win.cols[sample] - res.x0[sample, None])
    X = np.stack([-res.gain[sample, None] * dmu, np.ones_like(mu), mu], axis=2)
    Xt = np.swapaxes(X, 1, 2)
    H = X @ np.linalg.solve(Xt @ X, Xt)
    d = np.sqrt(var[sample])
    M = (np.eye(width)[None] - H) * d[:, None, :] / d[:, :, None]
    e = (win.y[sample] - res.offset[sample, None] - res.gain[sample, None] * mu) / d
    n_k = min(10, width - 4)
    c_hat = np.array([np.sum(e[:, :width - k] * e[:, k:]) for k in range(n_k + 1)])
    B = [M[:, :width - k, :].reshape(-1, width).T @ M[:, k:, :].reshape(-1, width) for k in range(n_k + 1)]
    lag = np.abs(np.subtract.outer(np.arange(width), np.arange(width)))

    def expected(a):
        R = a ** lag
        return np.array([np.sum(Bk * R.T) for Bk in B])

    def misfit(a):
        ex = expected(a)
        g0 = ex @ c_hat / (ex @ ex)
        return np.sum((c_hat - g0 * ex) ** 2), g0

    grid = np.linspace(-0.3, 0.95, 26)
    a0 = grid[int(np.argmin([misfit(a)[0] for a in grid]))]
    from scipy.optimize import minimize_scalar

    opt = minimize_scalar(lambda a: misfit(a)[0], bounds=(max(-0.35, a0 - 0.06), min(0.97, a0 + 0.06)),
                          method="bounded")
    a = float(opt.x)
    gamma0 = float(misfit(a)[1])
    # lag-1 correlation of n independent normalised pairs has sd ~ 1/sqrt(n)
    se = 1.0 / math.sqrt(sample.size * (width - 3))
    return gamma0, a, se


def fit_edges(micrograph: Micrograph, *, model: str = "template", window_px: int = 31,
              polarity: str = "auto", orientation: str = "auto", noise_correlation: str = "auto",
              max_iterations: int = 30, tolerance_px: float = 1e-4, chunk_rows: int = 4096,
              layout: LineLayout | None = None) -> EdgeTraces:
    """Fit every row of every edge of a micrograph.

    Parameters
    ----------
    micrograph : Micrograph
    model : {"template", "parametric", "step"}
        Edge-profile model (see :mod:`edges.profiles`); positions refer to the step centre.
    window_px : int
        Odd window width in pixels, centred on each edge (narrowed where neighbours are close).
    polarity, orientation : str
        Passed to :func:`edges.locate.locate_edges`.
    noise_correlation : {"auto", "none"}
        ``"auto"`` estimates noise correlation along the scan and uses a sandwich covariance
        when it is present; ``"none"`` assumes independent pixels.
    max_iterations, tolerance_px : int, float
        Levenberg-Marquardt cap and step tolerance (px).
    chunk_rows : int
        Rows solved together (memory stays near chunk_rows x window).
    layout : LineLayout, optional
        A location already made (skips :func:`locate_edges`).

    Returns
    -------
    EdgeTraces
        Positions and 1-sigma uncertainties in nm; rows that failed are NaN with a reason.
    """
    if model not in _MODELS:
        raise ValueError(f"model={model!r}: must be one of {_MODELS}")
    if noise_correlation not in ("auto", "none"):
        raise ValueError(f"noise_correlation={noise_correlation!r}: must be 'auto' or 'none'")
    if layout is None:
        layout = locate_edges(micrograph, polarity=polarity, orientation=orientation, window_px=window_px)
    m = layout.micrograph
    n_rows = m.pixels.shape[0]
    n_all = len(layout.edges)
    fitted = np.array([g.flag == "" for g in layout.edges])
    idx = np.flatnonzero(fitted)
    reason = np.zeros((n_all, n_rows), np.int8)
    reason[~fitted] = REASON_CODES["too_close"]
    pos = np.full((n_all, n_rows), np.nan)
    sig = np.full((n_all, n_rows), np.nan)
    chi2 = np.full((n_all, n_rows), np.nan)
    iters = np.zeros((n_all, n_rows), np.int64)
    cnr = np.full(n_all, np.nan)
    flags = np.array(["too_close" if not f else "" for f in fitted], dtype=object)
    noise_info = {}
    if idx.size:
        half = np.array([layout.edges[i].half_window_px for i in idx])
        hmax = int(half.max())
        guess = layout.guess_columns(np.arange(n_rows))[idx]
        e_idx = np.repeat(np.arange(idx.size), n_rows)
        sat = _saturation(m)
        # 1. coarse pass with a plain step
        win = EdgeWindows(m.pixels, guess, half, sat)
        table = tabulate([lambda u, derivative=False: parametric_profile(u, EdgeShape(2.0), derivative=derivative)]
                         * idx.size, 3 * hmax + 6)
        res = solve_rows(win.y, win.cols, win.mask.astype(float), table, e_idx, guess.ravel(),
                         grid_offsets_px=np.arange(-(hmax - 3), hmax - 2, 2), max_iterations=max_iterations,
                         tolerance_px=1e-2, chunk_rows=chunk_rows)
        inside = (res.x0 > win.first + 1) & (res.x0 < win.last - 1)
        ok = np.isfinite(res.x0) & inside & (np.abs(res.gain) > 0)
        centres = _centre_lines(res.x0.reshape(idx.size, n_rows), ok.reshape(idx.size, n_rows), guess)
        win = EdgeWindows(m.pixels, centres, half, sat)
        # 2. shape from the mean profile aligned on the smooth centre lines: blurred by the
        #    roughness, but free of the distortion that self-alignment on a wrong (plain-step)
        #    model leaves, which can favour a step hidden under a bright rim
        x_coarse = res.x0.copy()
        # roughness variance about the centre line: scatter of the coarse positions less their
        # own noise (their unweighted variance s^2 / info), removed from the profile's blur
        s2 = res.rss / np.clip(res.n_used - 3, 1, None)
        with np.errstate(divide="ignore", invalid="ignore"):
            dev = np.where(ok, res.x0 - centres.ravel(), np.nan).reshape(idx.size, n_rows)
            noise_a = nanmedian(np.where(ok, s2 / res.info, np.nan).reshape(idx.size, n_rows), axis=1)
        rough_var = np.clip(nanmean(dev ** 2, axis=1) - noise_a, 0.0, None)
        res.x0 = centres.ravel().copy()
        ub, mean = _aligned_profiles(win, res, ok, hmax)
        groups = np.array([1 if layout.edges[i].side == "left" else -1 for i in idx])
        funcs, shapes, shift = _shapes(ub, mean, model, groups, blur_change_px2=-np.nan_to_num(rough_var))
        table = tabulate(funcs, 3 * hmax + 6)
        # 3. unweighted pass; shape again with the alignment scatter removed; unweighted pass
        #    with that shape, whose residuals give the noise model and the scan correlation
        x_start = np.where(ok, x_coarse, centres.ravel()) + shift[e_idx]
        res = solve_rows(win.y, win.cols, win.mask.astype(float), table, e_idx, x_start,
                         max_iterations=max_iterations, tolerance_px=tolerance_px, chunk_rows=chunk_rows)
        ok = _row_ok(res, win)
        s2 = res.rss / np.clip(res.n_used - 3, 1, None)
        with np.errstate(divide="ignore", invalid="ignore"):
            align_var = np.array([nanmean(np.where(ok, s2 / res.info, np.nan)[e_idx == e])
                                  for e in range(idx.size)])
        # from here on each row's window is centred on that row's own estimate: a window that
        # stays on the centre line truncates the edge on one side when the edge wanders, and at
        # low contrast-to-noise the fit then drifts toward the window centre (shrinkage)
        own = np.where(ok, res.x0, centres.ravel()).reshape(idx.size, n_rows)
        win = EdgeWindows(m.pixels, own, half, sat)
        res.offset = np.where(ok, res.offset, np.nan)
        ok = ok & np.isfinite(res.x0)
        ub, mean = _aligned_profiles(win, res, ok, hmax)
        funcs, shapes, shift2 = _shapes(ub, mean, model, groups, starts=shapes,
                                        blur_change_px2=np.nan_to_num(align_var))
        table = tabulate(funcs, 3 * hmax + 6)
        x_start = np.where(ok, res.x0, centres.ravel()) + shift2[e_idx]
        res = solve_rows(win.y, win.cols, win.mask.astype(float), table, e_idx, x_start,
                         max_iterations=max_iterations, tolerance_px=tolerance_px, chunk_rows=chunk_rows)
        ok = _row_ok(res, win)
        c0, c1, model_c = _noise_model(win, res, ok, table)
        var = np.maximum(c0 + c1 * model_c, 1e-12)
        gamma0, a_scan, a_se = 1.0, 0.0, np.inf
        if noise_correlation == "auto":
            gamma0, a_scan, a_se = _scan_correlation(win, res, ok, var, table)
            if a_scan > 4 * a_se:     # refit the variance on the filtered signal, then R again
                c0, c1, model_c = _noise_model(win, res, ok, table, scan_filter=a_scan)
                var = np.maximum(c0 + c1 * model_c, 1e-12)
                gamma0, a_scan, a_se = _scan_correlation(win, res, ok, var, table)
        correlated = abs(a_scan) > 4 * a_se
        n_lags = 2 * hmax if correlated else 0
        # 4. weighted pass
        weight = win.mask / var
        x_start = np.where(ok, res.x0, centres.ravel())
        res = solve_rows(win.y, win.cols, weight, table, e_idx, x_start, max_iterations=max_iterations,
                         tolerance_px=tolerance_px, chunk_rows=chunk_rows, n_lags=n_lags,
                         lag_variance=var if correlated else None)
        with np.errstate(divide="ignore", invalid="ignore"):
            if correlated:
                # sandwich for a causal first-order filter: Cov(e_i, e_(i+l)) = a^l var_i
                ls = res.lag_sums
                num = ls[:, 0] + 2 * (ls[:, 1:] * a_scan ** np.arange(1, n_lags + 1)).sum(1)
                var_x = gamma0 * num / res.info ** 2
            else:
                var_x = gamma0 / res.info
        code = _reason_codes(res, win, var_x, e_idx, idx.size)
        valid = code == 0
        p = m.pixel_size_nm
        pos[idx] = np.where(valid, res.x0 * p, np.nan).reshape(idx.size, n_rows)
        sig[idx] = np.where(valid, np.sqrt(np.abs(var_x)) * p, np.nan).reshape(idx.size, n_rows)
        chi2[idx] = (res.rss / np.clip(res.n_used - 3, 1, None)).reshape(idx.size, n_rows)
        iters[idx] = res.iterations.reshape(idx.size, n_rows)
        reason[idx] = code.reshape(idx.size, n_rows)
        cnr[idx] = _edge_cnr(res, valid, e_idx, idx.size, c0, c1)
        flags[idx[~(cnr[idx] >= LOW_CONTRAST_CNR)]] = "low_contrast"
        noise_info = {"variance_intercept": c0, "variance_per_signal": c1,
                      "scan_correlation": float(a_scan) if correlated else 0.0,
                      "scan_correlation_measured": float(a_scan),
                      "variance_scale": float(gamma0),
                      "shapes_px": [vars(s) for s in shapes]}
    valid_all = reason == 0
    return EdgeTraces(
        position_nm=pos, sigma_nm=sig, valid=valid_all, reason=reason,
        line_index=np.array([g.line_index for g in layout.edges]),
        side=np.array([g.side for g in layout.edges]),
        row_spacing_nm=m.pixel_size_nm, reduced_chi2=chi2, iterations=iters,
        contrast_to_noise=cnr, edge_flags=flags.astype(str), detector=model, source=m.source,
        noise_model=noise_info, rotated=m.rotated)


def _reason_codes(res, win, var_x, e_idx, n_edges):
    """Why each row of the final pass is not valid (0 where it is); never a silent drop."""
    code = np.zeros(res.x0.size, np.int8)
    code[~res.converged] = REASON_CODES["no_convergence"]
    inside = (res.x0 > win.first + 1) & (res.x0 < win.last - 1)
    code[~inside & res.converged] = REASON_CODES["left_window"]
    med_gain = np.array([nanmedian(res.gain[e_idx == e]) for e in range(n_edges)])
    rel = res.gain / med_gain[e_idx]
    code[(code == 0) & ~(rel > 0.3)] = REASON_CODES["low_contrast"]      # step too small or reversed
    code[win.saturated] = REASON_CODES["saturated"]
    code[win.non_finite] = REASON_CODES["non_finite"]
    code[(code == 0) & ~(np.isfinite(var_x) & (var_x > 0))] = REASON_CODES["no_convergence"]
    return code


def _edge_cnr(res, valid, e_idx, n_edges, c0, c1):
    """Median over valid rows of step height over the noise sd at mid-step, per edge."""
    out = np.full(n_edges, np.nan)
    for e in range(n_edges):
        rows = (e_idx == e) & valid
        if rows.any():
            mid = res.offset[rows] + 0.5 * res.gain[rows]
            out[e] = float(np.median(np.abs(res.gain[rows]) / np.sqrt(np.maximum(c0 + c1 * mid, 1e-300))))
    return out


def _row_ok(res, win):
    inside = (res.x0 > win.first + 1) & (res.x0 < win.last - 1)
    return (res.converged & inside & np.isfinite(res.x0) & (res.n_used > 5)
            & ~win.saturated & ~win.non_finite)
