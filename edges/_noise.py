"""The image's noise model: pixel variance against signal, correlation along the scan, and the
variance of each fitted position (plain or sandwich).

Shot noise makes a pixel's variance follow its signal, ``var = c0 + c1 * signal``; the SEM's
detector chain filters the noise along the scan, modelled as a causal first-order filter of
coefficient ``a`` (``Cov(e_i, e_(i+l)) = a^l var_i``).  Both are estimated from the residuals
of an unweighted fit of every row; the weighted fit then uses ``1 / var`` as weights and, where
the scan correlation is significant, the sandwich variance
``q^T C q / (J_p^T W J_p)^2`` (q = W J_p) of its position.

References
----------
Kay, S. M. (1993). Fundamentals of Statistical Signal Processing, Vol. I: Estimation Theory.
Prentice Hall (weighted least squares, Fisher information).
White, H. (1980). A heteroskedasticity-consistent covariance matrix estimator and a direct test
for heteroskedasticity. Econometrica 48, 817-838.  doi:10.2307/1912934 (the sandwich form).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal
from scipy.optimize import minimize_scalar

__all__ = ["NoiseModel", "estimate_noise", "position_variance"]

#: Seed of the subsample of 1500 rows the scan correlation is estimated from (fixed so that the
#: same image always gives the same uncertainties).
_SUBSAMPLE_SEED = 0
#: Fewest counts per pixel (median over the windows, variance over the shot-noise slope
#: squared) at which the correlation along the scan is estimated.
_MIN_COUNTS_FOR_SCAN = 5.0


@dataclass(frozen=True)
class NoiseModel:
    """Noise model of one image, as used for the weights and the position uncertainties.

    Attributes
    ----------
    variance_intercept : float
        ``c0`` of ``var = c0 + c1 * signal`` (grey levels squared); NaN when not estimated.
    variance_per_signal : float
        ``c1`` (grey levels): shot noise makes the variance grow with the signal.
    scan_correlation : float
        Coefficient ``a`` of the first-order filter along the scan used in the sandwich
        variance; 0 when the measured value is not significant (below 4 standard errors).
    scan_correlation_measured : float
        The estimate of ``a`` before that test.
    variance_scale : float
        Factor on the modelled variance found by the correlation fit (1 when none).
    row_correlation : tuple of float
        Correlation of the noise between rows at lags 1, 2, ... (smoothed, resampled or
        drift-corrected frame averages), up to the last lag that is significant (4 standard
        errors); empty when the rows are independent.  With noise separable in rows and columns
        the fitted positions of neighbouring rows correlate by the same amount.
    row_correlation_measured : tuple of float
        Estimates at lags 1..4 before the test (empty when not estimated).
    row_correlation_se : float
        Standard error of those estimates.
    """

    variance_intercept: float = math.nan
    variance_per_signal: float = math.nan
    scan_correlation: float = 0.0
    scan_correlation_measured: float = math.nan
    variance_scale: float = 1.0
    row_correlation: tuple = ()
    row_correlation_measured: tuple = ()
    row_correlation_se: float = math.nan

    @property
    def correlated(self) -> bool:
        """Whether the sandwich (scan-correlated) variance is used."""
        return self.scan_correlation != 0.0

    def variance(self, signal_):
        """Pixel noise variance at the given signal (grey levels squared), floored at 1e-12."""
        return np.maximum(self.variance_intercept + self.variance_per_signal * signal_, 1e-12)


def estimate_noise(win, fit, ok, table, *, scan_correlation: bool = True):
    """Noise model from the residuals of an unweighted fit of every row.

    Parameters
    ----------
    win : EdgeWindows
    fit : RowFit
        Unweighted solver result on ``win``.
    ok : (n,) ndarray of bool
        Rows usable for the estimate.
    table : ProfileTable
    scan_correlation : bool
        Estimate the correlation along the scan (otherwise independent pixels).

    Returns
    -------
    noise : NoiseModel
    pixel_variance : (n, width) ndarray
        Modelled variance of every window pixel (for the weights).
    """
    c0, c1, signal_ = _variance_law(win, fit, ok, table)
    var = np.maximum(c0 + c1 * signal_, 1e-12)
    gamma0, a_scan, a_se = 1.0, 0.0, np.inf
    # below ~5 counts per pixel the skew of the counts dominates the residuals' lag sums: the
    # correlation along the scan is not estimated there (the twin calibrates what is left)
    counts = float(np.median(var[ok][win.mask[ok]])) / c1 ** 2 if c1 > 0 and ok.any() else np.inf
    if scan_correlation and counts >= _MIN_COUNTS_FOR_SCAN:
        gamma0, a_scan, a_se = _scan_correlation(win, fit, ok, var, table)
        if a_scan > 4 * a_se:     # refit the variance on the filtered signal, then the correlation again
            c0, c1, signal_ = _variance_law(win, fit, ok, table, scan_filter=a_scan)
            var = np.maximum(c0 + c1 * signal_, 1e-12)
            gamma0, a_scan, a_se = _scan_correlation(win, fit, ok, var, table)
        if not 0.5 < gamma0 < 2.0:
            # the variance law and the lag sums disagree by more than a factor 2: the
            # correlation model does not describe this noise; independent pixels are assumed
            c0, c1, signal_ = _variance_law(win, fit, ok, table)
            var = np.maximum(c0 + c1 * signal_, 1e-12)
            gamma0, a_scan, a_se = 1.0, 0.0, np.inf
    correlated = abs(a_scan) > 4 * a_se
    rho, rho_se = _row_correlation(win, fit, ok, var, table, a_scan if correlated else 0.0)
    significant = np.flatnonzero(np.abs(rho) > 4 * rho_se)
    kept = tuple(float(r) for r in rho[:significant[-1] + 1]) if significant.size else ()
    noise = NoiseModel(variance_intercept=c0, variance_per_signal=c1,
                       scan_correlation=float(a_scan) if correlated else 0.0,
                       scan_correlation_measured=float(a_scan), variance_scale=float(gamma0),
                       row_correlation=kept, row_correlation_measured=tuple(float(r) for r in rho),
                       row_correlation_se=float(rho_se))
    return noise, var


def _row_correlation(win, res, ok, var, table, scan_correlation: float, max_lag: int = 4):
    """Correlation of the noise between rows, lags 1..``max_lag``, from the fit residuals.

    Normalised residuals of every window pixel are put back at their (row, column) in the
    image; the systematic misfit of the profile (the mean residual of each edge against the
    distance from the fitted position, in 0.25 px bins) is removed first, since rows whose edges
    sit at similar places share it.  The correlation at lag l is the normalised sum of products
    of residuals l rows apart in the same column.  Each row's own fit removes three parameters
    from its residuals; neighbouring rows remove nearly the same ones, so the ratio is unbiased
    to first order.  Standard error: ``sqrt((1 + a^2) / (1 - a^2) / n_pairs)``, ``a`` the scan
    correlation (products of two first-order series of coefficient a).
    Returns (rho, se): rho of shape (max_lag,), zeros and infinite se when not estimable.
    """
    n_total = win.y.shape[0]
    n_edges = int(win.edge.max()) + 1 if n_total else 0
    none = np.zeros(max_lag), math.inf
    if n_edges == 0 or n_total % n_edges:
        return none
    n_rows = n_total // n_edges
    if n_rows < 4 * max_lag:
        return none
    mu, _ = table.evaluate(win.edge, win.cols - res.x0[:, None], with_slope=False)
    with np.errstate(invalid="ignore", divide="ignore"):
        e = (win.y - res.offset[:, None] - res.gain[:, None] * mu) / np.sqrt(var)
    use = ok[:, None] & win.mask & np.isfinite(e)
    if np.count_nonzero(use) < 1000:
        return none
    u = win.cols - res.x0[:, None]
    lo = float(np.nanmin(np.where(use, u, np.nan)))
    k = np.floor((u - lo) / 0.25).astype(np.int64)
    n_bins = int(k[use].max()) + 1
    key = (win.edge[:, None] * n_bins + k)[use]
    mean = np.bincount(key, weights=e[use], minlength=n_edges * n_bins) / \
        np.maximum(np.bincount(key, minlength=n_edges * n_bins), 1)
    resid = e[use] - mean[key]
    rows = np.broadcast_to((np.arange(n_total) % n_rows)[:, None], e.shape)[use]
    cols = win.cols[use].astype(np.int64)
    c0 = int(cols.min())
    image = np.full((n_rows, int(cols.max()) - c0 + 1), np.nan)
    image[rows, cols - c0] = resid
    rho, n_pairs = np.zeros(max_lag), np.zeros(max_lag)
    for lag in range(1, max_lag + 1):
        a, b = image[:-lag], image[lag:]
        both = np.isfinite(a) & np.isfinite(b)
        n_pairs[lag - 1] = np.count_nonzero(both)
        if n_pairs[lag - 1] < 500:
            return none
        aa, bb = a[both], b[both]
        rho[lag - 1] = float(np.sum(aa * bb) / math.sqrt(np.sum(aa * aa) * np.sum(bb * bb)))
    a2 = min(scan_correlation ** 2, 0.95)
    return rho, math.sqrt((1 + a2) / (1 - a2) / n_pairs.min())


def position_variance(fit, noise: NoiseModel, n_lags: int):
    """Variance (px^2) of each row's position from a weighted fit with weights ``1 / var``.

    ``variance_scale / info`` for independent pixels; with scan correlation ``a`` the sandwich
    ``variance_scale * (S_0 + 2 sum_l a^l S_l) / info^2``, ``S_l`` the solver's lag sums.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        if noise.correlated:
            ls = fit.lag_sums
            num = ls[:, 0] + 2 * (ls[:, 1:] * noise.scan_correlation ** np.arange(1, n_lags + 1)).sum(1)
            return noise.variance_scale * num / fit.info ** 2
        return noise.variance_scale / fit.info


def _variance_law(win, res, ok, table, scan_filter=0.0):
    """var(signal) = c0 + c1 * signal from unweighted residuals, pooled over the image.

    Each squared residual is divided by (1 - h_ii), h the row's hat matrix for (x0, offset,
    gain), so that pixels of high leverage (on the edge) are not under-counted; with noise
    correlated along the scan by [(I - H) R (I - H)]_ii, its expectation over the variance.  With a
    first-order detector filter of coefficient a along the scan (left to right), a pixel's
    noise variance follows the *filtered* signal (1 - a^2) sum_k a^(2k) m_(n-k), which is what
    is regressed on then (shot noise from a bright side spills into the dark side).
    Returns c0, c1 and the signal that the variance is a function of, per pixel.
    """
    mu, dmu = table.evaluate(win.edge, win.cols - res.x0[:, None])
    fitted = res.offset[:, None] + res.gain[:, None] * mu
    # the signal the variance follows, from each edge's median offset and step: a row's own
    # fitted values carry its noise, and noise in the regressor flattens the fitted law
    # (regression dilution), badly so at a few counts per pixel
    n_e = int(win.edge.max()) + 1
    use_rows = ok & np.isfinite(res.offset) & np.isfinite(res.gain)
    med = np.full((2, n_e), np.nan)
    for e in range(n_e):
        rows = use_rows & (win.edge == e)
        if rows.any():
            med[:, e] = np.median(res.offset[rows]), np.median(res.gain[rows])
    med_off = np.where(np.isfinite(med[0]), med[0], np.nanmedian(res.offset[use_rows]) if use_rows.any() else 0.0)
    med_gain = np.where(np.isfinite(med[1]), med[1], np.nanmedian(res.gain[use_rows]) if use_rows.any() else 0.0)
    model = med_off[win.edge][:, None] + med_gain[win.edge][:, None] * mu
    X = np.stack([-res.gain[:, None] * dmu, np.ones_like(mu), mu], axis=2) * win.mask[:, :, None]
    G = np.swapaxes(X, 1, 2) @ X
    good_rows = ok & np.all(np.isfinite(G), axis=(1, 2))
    good_rows[good_rows] = np.abs(np.linalg.det(G[good_rows])) > 0
    Ginv = np.zeros_like(G)
    Ginv[good_rows] = np.linalg.inv(G[good_rows])
    XG = X @ Ginv
    lev = np.einsum("nia,nia->ni", XG, X)
    keep = 1.0 - lev
    if scan_filter > 0:
        # E[r_i^2] = [(I - H) R (I - H)]_ii var_i for noise correlated as R = a^|i-j|: the fit's
        # offset takes up more of a correlated noise than 1 - h_ii says
        lag = np.abs(np.subtract.outer(np.arange(X.shape[1]), np.arange(X.shape[1])))
        R = scan_filter ** lag
        XtR = np.einsum("nwa,wv->nav", X, R)
        hr = np.einsum("nib,nbi->ni", XG, XtR)
        hrh = np.einsum("nid,nid->ni", XG @ (XtR @ X) @ Ginv, X)
        keep = 1.0 - 2.0 * hr + hrh
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = (win.y - fitted) ** 2 / keep
    ok = good_rows
    if scan_filter > 0:
        a2 = scan_filter ** 2
        model, _ = signal.lfilter([1 - a2], [1.0, -a2], model, axis=1, zi=a2 * model[:, :1])
    use = ok[:, None] & win.mask & (lev < 0.95) & (keep > 0.05)
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
    lo = float(np.min(mb)) if good.sum() >= 3 else float(m.min())
    if c1 < 0 or c0 + c1 * m.max() < floor:
        c0, c1 = float(np.mean(v)), 0.0          # no physical law (variance falling with signal)
    elif c0 + c1 * lo < floor:
        # shot noise near zero counts: the line through the bins dips below zero at the darkest
        # signal (a detector offset estimated from few counts); keep the slope, lift the line
        c0 = floor - c1 * lo
    return float(c0), float(c1), model


def _scan_correlation(win, res, ok, var, table):
    """Noise correlation along the scan, R_ij = gamma0 * a^|i-j| (first-order detector filter).

    Normalised residuals e = D^(-1/2) r of the unweighted fit have E[e e^T] = M R M^T with
    M = D^(-1/2) (I - H) D^(1/2) and H the rows' hat matrices, so the lag sums
    c_k = sum_n e_n e_(n+k) have expectations tr(B_k R), B_k = sum_rows M^T S_k M.  (gamma0, a)
    are fitted to c_0..c_K by least squares.  A non-parametric R is not identifiable here: the
    fit removes the offset, so a constant added to every lag leaves the residuals unchanged.
    Returns gamma0 (variance scale of the noise model), a, and its standard error.
    """
    # rows whose windows share the most common extent (edges reach differently to the left and
    # right, and windows at the border are cut), compressed to that extent
    cand = np.flatnonzero(ok)
    if cand.size < 200:
        return 1.0, 0.0, np.inf
    m = win.mask[cand]
    count = m.sum(1)
    key = np.argmax(m, axis=1) * (m.shape[1] + 1) + count        # (first pixel, pixels) of a window
    keys, counts = np.unique(key, return_counts=True)
    best = int(keys[np.argmax(counts)])
    first, width = divmod(best, m.shape[1] + 1)
    cols_used = np.arange(first, first + width)
    full = cand[(key == best) & m[:, first:first + width].all(axis=1)] if width else cand[:0]
    if full.size < 200 or width < 6 or np.ptp(cols_used) != width - 1:
        return 1.0, 0.0, np.inf
    sample = full if full.size <= 1500 else np.random.default_rng(_SUBSAMPLE_SEED).choice(full, 1500, replace=False)
    sample.sort()
    mu, dmu = table.evaluate(win.edge[sample], win.cols[sample][:, cols_used] - res.x0[sample, None])
    X = np.stack([-res.gain[sample, None] * dmu, np.ones_like(mu), mu], axis=2)
    Xt = np.swapaxes(X, 1, 2)
    H = X @ np.linalg.solve(Xt @ X, Xt)
    d = np.sqrt(var[sample][:, cols_used])
    M = (np.eye(width)[None] - H) * d[:, None, :] / d[:, :, None]
    e = (win.y[sample][:, cols_used] - res.offset[sample, None] - res.gain[sample, None] * mu) / d
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
    opt = minimize_scalar(lambda a: misfit(a)[0], bounds=(max(-0.35, a0 - 0.06), min(0.97, a0 + 0.06)),
                          method="bounded")
    a = float(opt.x)
    gamma0 = float(misfit(a)[1])
    # lag-1 correlation of n independent normalised pairs has sd ~ 1/sqrt(n)
    se = 1.0 / math.sqrt(sample.size * (width - 3))
    return gamma0, a, se
