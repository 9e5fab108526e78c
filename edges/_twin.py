"""Virtual twin of an image's own edges: the precision study and the calibrated noise floor.

The linearised covariance ``1 / (J_p^T W J_p)`` of a row's position is exact only when the
contrast-to-noise is high: at a few counts per pixel the fit's error distribution grows heavy
tails (a noisy row pulls the step to a noise feature) and the covariance under-states the
scatter.  The twin measures the real scatter instead.  From the image's own fitted imaging
model -- each edge's tabulated mean profile, each row's gain and offset, the pixel noise law
``var = c0 + c1 * signal``, its correlation along the scan -- it re-renders windows of sampled
rows with the edge at known places and fresh noise, refits them with the same passes as the
image (a grid-searched plain-step fit on windows about the centre line, the image's profile
from there, again on windows about that estimate, then the weighted fit), and compares fitted
with true positions.  (That is the order of :func:`edges.fit.fit_edges`'s passes, repeated here
by hand: a change there must be made here too.)

* the regression slope of fitted on true deviation is the detector's *shrinkage* (1 when it
  follows the edge; below 1 when noise pulls rows back toward the window centre);
* the residual variance about that line is the noise variance of a row's position, the floor;
* its ratio to the mean covariance of the same twin fits calibrates the image's covariance.

The Cramer-Rao bound of each twin row is evaluated at the truth from the same model (Fisher
information of (x0, offset, gain) under Gaussian noise of the fitted law and scan
correlation; Kay 1993, ch. 3).

References
----------
Kay, S. M. (1993). Fundamentals of Statistical Signal Processing, Vol. I: Estimation Theory.
Prentice Hall.
Villarrubia, J. S. & Bunday, B. D. (2005). Unbiased estimation of linewidth roughness. Proc.
SPIE 5752, 480-488.  doi:10.1117/12.600980 (noise-free roughness by modelling the imaging).
"""
from __future__ import annotations

import math
import numpy as np
from scipy import signal as _signal

from ._noise import NoiseModel, position_variance
from ._precision import PrecisionStudy
from ._solver import solve_rows
from ._windows import EdgeWindows, fit_reason_codes

__all__ = ["PrecisionStudy", "run_twin"]

#: Seed of the twin's row sample and noise: the same image always gives the same study.
_TWIN_SEED = 20261205
#: Samples (rows x repeats) per edge aimed at: 1024 gives the per-edge variance ratio to ~4.5%;
#: with many edges fewer per edge (at least 256), up to 6144 per image: the image's pooled
#: calibration to ~1.5-2%.
_SAMPLES_PER_EDGE = 1024
_SAMPLES_PER_IMAGE = 6144



def _windows(y_ext, ext_first, centres, reach_l, reach_r, n_cols, edge):
    """Windows about ``centres`` cut from the extended twin rows (same geometry as the image's)."""
    hmax = int(max(reach_l.max(), reach_r.max()))
    offs = np.arange(-hmax, hmax + 1)
    start = np.rint(centres).astype(np.int64)
    col = start[:, None] + offs[None, :]
    k = col - ext_first[:, None]
    inside = ((col >= 0) & (col < n_cols) & (offs[None, :] >= -reach_l[edge][:, None])
              & (offs[None, :] <= reach_r[edge][:, None]) & (k >= 0) & (k < y_ext.shape[1]))
    y = np.take_along_axis(y_ext, np.clip(k, 0, y_ext.shape[1] - 1), axis=1)
    n = centres.size
    left, right = reach_l[edge], reach_r[edge]
    return EdgeWindows(y=np.where(inside, y, 0.0), cols=col.astype(np.float64), mask=inside, edge=edge,
                       non_finite=np.zeros(n, bool), saturated=np.zeros(n, bool), first=start - left,
                       last=start + right, margin_px=np.where(np.minimum(left, right) < 4, 0.5, 1.0))


def _noise_rows(rng, mean, var, noise: NoiseModel):
    """Fresh noise of the image's law on rows of mean ``mean``: white noise of variance ``var``
    per pixel (Poisson-like, with the counts' own skew, where the law has a shot-noise term;
    Gaussian otherwise), then the detector's first-order filter along the scan with unit gain on
    the variance (stationary start), as the noise passes the detector chain."""
    c1 = noise.variance_per_signal
    if c1 > 0 and np.isfinite(c1):
        lam = var / (c1 * c1)
        white = c1 * (rng.poisson(lam) - lam)
    else:
        white = np.sqrt(var) * rng.standard_normal(mean.shape)
    a = noise.scan_correlation
    if a != 0.0:
        c = math.sqrt(1 - a * a)
        white, _ = _signal.lfilter([c], [1.0, -a], white, axis=1, zi=(1 - c) * white[:, :1])
    return mean + white


def _crlb(table, edge, u, gain, var, mask, a_scan):
    """Cramer-Rao bound (px^2) of x0 with offset and gain unknown, Gaussian noise of variance
    ``var`` per pixel and correlation ``a^|i-j|`` along the scan."""
    mu, dmu = table.evaluate(edge, u)
    X = np.stack([-gain[:, None] * dmu, np.ones_like(mu), mu], axis=2) * mask[:, :, None]
    if a_scan:
        w = u.shape[1]
        lag = np.abs(np.subtract.outer(np.arange(w), np.arange(w)))
        d = np.sqrt(np.where(mask, var, 1.0))
        cov = d[:, :, None] * (a_scan ** lag)[None] * d[:, None, :]
        cov = np.where(mask[:, :, None] & mask[:, None, :], cov, np.eye(w)[None] * (d[:, :, None] ** 2))
        fisher = np.swapaxes(X, 1, 2) @ np.linalg.solve(cov, X)
    else:
        fisher = np.swapaxes(X * np.where(mask, 1.0 / var, 0.0)[:, :, None], 1, 2) @ X
    good = np.abs(np.linalg.det(fisher)) > 0
    out = np.full(u.shape[0], np.nan)
    out[good] = np.linalg.inv(fisher[good])[:, 0, 0]
    out[~(out > 0)] = np.nan         # numerically singular (a window without the edge's slope)
    return out


def run_twin(*, var_px2, rounds: int = 2, **kw) -> PrecisionStudy:
    """Precision study of the fitted edges of one image (see the module docstring).

    Arrays are per fitted edge and row, ``(n_edges, n_rows)``; ``offset`` and ``gain`` the final
    fit's; ``var_px2`` its covariance.  The twin's roughness is the measured variance less the
    noise; as the noise is what the twin calibrates, the study is repeated (``rounds``) with the
    calibrated noise.  Returns a :class:`PrecisionStudy` in px.
    """
    study = _run_twin(var_px2=var_px2, **kw)
    for _ in range(rounds - 1):
        if study.applied_calibration == 1.0:     # the covariance holds: the roughness stands
            break
        study = _run_twin(var_px2=var_px2 * study.applied_calibration, **kw)
    return study


def _run_twin(*, n_cols, reach_left_px, reach_right_px, centres_px, x0_px, offset, gain, valid, var_px2,
              table, coarse_table, noise: NoiseModel, grid_offsets_px, n_lags, max_iterations, tolerance_px,
              chunk_rows) -> PrecisionStudy:
    rng = np.random.default_rng(_TWIN_SEED)
    n_e, n_rows = centres_px.shape
    # the centre lines on the positions' own reference (the half-level point of the profile,
    # which a bright rim may move from the plain-step crossing the centre lines were found on)
    with np.errstate(invalid="ignore"):
        shift = np.array([np.nanmedian(np.where(valid[e], x0_px[e] - centres_px[e], np.nan)) if valid[e].any()
                          else 0.0 for e in range(n_e)])
    shift = np.nan_to_num(shift)
    coarse_centres = centres_px
    centres_px = centres_px + shift[:, None]
    reach_l = np.asarray(reach_left_px, np.int64)
    reach_r = np.asarray(reach_right_px, np.int64)
    hmax = int(max(reach_l.max(), reach_r.max()))
    # the truth: the centre line plus deviations of the edge's own roughness (its measured
    # variance less the covariance), kept inside the window's reach
    rows, truth_dev, edge = [], [], []
    per_edge = int(max(256, min(_SAMPLES_PER_EDGE, _SAMPLES_PER_IMAGE // max(n_e, 1))))
    for e in range(n_e):
        ok = np.flatnonzero(valid[e])
        if ok.size < 20:
            continue
        dev = x0_px[e, ok] - centres_px[e, ok]
        rough = math.sqrt(max(float(np.var(dev) - np.mean(var_px2[e, ok])), 0.0))
        reps = max(1, math.ceil(per_edge / ok.size))
        take = ok if ok.size * reps <= 2 * per_edge else rng.choice(ok, per_edge, replace=False)
        take = np.tile(take, reps if ok.size * reps <= 2 * per_edge else 1)
        limit = max(min(reach_l[e], reach_r[e]) - 1.0, 0.5)
        rows.append(take)
        truth_dev.append(np.clip(rng.normal(0.0, max(rough, 0.25), take.size), -limit, limit))
        edge.append(np.full(take.size, e))
    samples = np.zeros(n_e, np.int64)
    nan = np.full(n_e, np.nan)
    if not rows:
        return PrecisionStudy(samples=samples, covariance_sd=nan, achieved_sd=nan.copy(), crlb_sd=nan.copy(),
                              shrinkage=nan.copy(), bias=nan.copy(), lost_fraction=nan.copy(),
                              calibration=1.0, calibration_se=math.inf)
    rows, d, edge = np.concatenate(rows), np.concatenate(truth_dev), np.concatenate(edge)
    centre = centres_px[edge, rows]
    x_true = centre + d
    # each edge's median step and offset (a row's own fitted gain carries its noise, and a
    # noisier truth would inflate the twin's scatter: E[1/b^2] > 1/E[b]^2)
    with np.errstate(invalid="ignore"):
        a_edge = np.array([np.nanmedian(np.where(valid[e], offset[e], np.nan)) if valid[e].any() else np.nan
                           for e in range(n_e)])
        b_edge = np.array([np.nanmedian(np.where(valid[e], gain[e], np.nan)) if valid[e].any() else np.nan
                           for e in range(n_e)])
    a_row, b_row = a_edge[edge], b_edge[edge]
    # extended rows wide enough for every window the passes may cut
    ext_first = np.rint(centre).astype(np.int64) - 2 * hmax - 2
    cols_ext = ext_first[:, None] + np.arange(4 * hmax + 5)[None, :]
    mu, _ = table.evaluate(edge, cols_ext - x_true[:, None], with_slope=False)
    mean = a_row[:, None] + b_row[:, None] * mu
    var_true = noise.variance_scale * noise.variance(mean)
    y_ext = _noise_rows(rng, mean, var_true, noise)
    solve = dict(max_iterations=max_iterations, tolerance_px=tolerance_px, chunk_rows=chunk_rows)
    # 1. the coarse pass: a plain step, grid-searched, on windows about the (plain-step) centre
    # line; then the image's profile from there, moved by the edge's offset between the two
    # references (a rim moves the profile's half-level point off the plain-step crossing)
    plain = coarse_centres[edge, rows]
    win = _windows(y_ext, ext_first, plain, reach_l, reach_r, n_cols, edge)
    fit = solve_rows(win.y, win.cols, win.mask.astype(float), coarse_table, edge, plain,
                     grid_offsets_px=grid_offsets_px, tolerance_px=1e-2, max_iterations=max_iterations,
                     chunk_rows=chunk_rows)
    start = np.where(np.isfinite(fit.x0) & win.inside(fit.x0), fit.x0, plain) + shift[edge]
    fit = solve_rows(win.y, win.cols, win.mask.astype(float), table, edge, start, **solve)
    # 2. unweighted on windows about that estimate (the realigned pass)
    start = np.where(np.isfinite(fit.x0) & win.inside(fit.x0), fit.x0, centre)
    win = _windows(y_ext, ext_first, start, reach_l, reach_r, n_cols, edge)
    fit = solve_rows(win.y, win.cols, win.mask.astype(float), table, edge, start, **solve)
    # 3. weighted with the noise law at the fitted signal, as the image's final pass
    x1 = np.where(np.isfinite(fit.x0), fit.x0, start)
    mu1, _ = table.evaluate(edge, win.cols - x1[:, None], with_slope=False)
    pix_var = noise.variance(np.nan_to_num(fit.offset)[:, None] + np.nan_to_num(fit.gain)[:, None] * mu1)
    final = solve_rows(win.y, win.cols, win.mask / pix_var, table, edge, x1, n_lags=n_lags,
                       lag_variance=pix_var if n_lags else None, **solve)
    var_cov = position_variance(final, noise, n_lags)
    code = fit_reason_codes(final, win, var_cov, n_e)
    good = code == 0
    crlb = _crlb(table, edge, win.cols - x_true[:, None], b_row, noise.variance_scale *
                 noise.variance(a_row[:, None] + b_row[:, None] * table.evaluate(
                     edge, win.cols - x_true[:, None], with_slope=False)[0]), win.mask, noise.scan_correlation)
    cov_sd, achieved, bound, slope, bias, lost = (nan.copy() for _ in range(6))
    num = den = 0.0
    num_var = 0.0
    for e in range(n_e):
        sel = edge == e
        if not sel.any():
            continue
        g = sel & good
        samples[e] = int(g.sum())
        lost[e] = 1.0 - g.sum() / sel.sum()
        if g.sum() < 10:
            continue
        t = d[g]
        f_dev = final.x0[g] - centre[g]
        tc = t - t.mean()
        s = float(np.dot(tc, f_dev - f_dev.mean()) / np.dot(tc, tc)) if np.dot(tc, tc) > 0 else 1.0
        resid = f_dev - f_dev.mean() - s * tc
        v = float(np.dot(resid, resid) / max(g.sum() - 2, 1))
        c = float(np.mean(var_cov[g]))
        cov_sd[e], achieved[e], slope[e] = math.sqrt(c), math.sqrt(v), s
        m = float(np.nanmean(crlb[g]))
        bound[e] = math.sqrt(m) if m > 0 else math.nan       # no information left in the window: no bound
        bias[e] = float(np.mean(final.x0[g] - x_true[g]))
        num += v * g.sum()
        den += c * g.sum()
        # variance of a sample variance from its fourth moment (heavy tails at low counts)
        num_var += float(np.var(resid ** 2)) * g.sum()
    calibration = num / den if den > 0 else 1.0
    calibration_se = math.sqrt(num_var) / den if den > 0 else math.inf
    return PrecisionStudy(samples=samples, covariance_sd=cov_sd, achieved_sd=achieved, crlb_sd=bound,
                          shrinkage=slope, bias=bias, lost_fraction=lost, calibration=float(calibration),
                          calibration_se=float(calibration_se))
