"""Batched variable-projection Levenberg-Marquardt for one edge position per row.

Each row ``y`` (a window of pixels) is modelled as ``a + b * mu(col - x0)``.  For any trial
``x0`` the gain ``b`` and offset ``a`` are solved exactly by 2 x 2 weighted least squares; the
position alone takes Levenberg-Marquardt steps with per-row damping.  Everything is written in
terms of seven weighted sums per row, so no (rows, window) array outlives an iteration.

With J = d model / d x0 = -b mu', the Gauss-Newton step is (J^T W r) / (J_p^T W J_p), J_p the
part of J that is W-orthogonal to the nuisance columns (1, mu); ``1 / (J_p^T W J_p)`` is the
Schur complement of the (x0, a, b) normal matrix, i.e. the x0 variance for absolute weights.
"""
from __future__ import annotations

import numpy as np

__all__ = ["RowFit", "solve_rows"]


class RowFit:
    """Per-row results of :func:`solve_rows` (plain arrays, filled chunk by chunk)."""

    def __init__(self, n):
        self.x0 = np.full(n, np.nan)
        self.offset = np.full(n, np.nan)     # absolute offset (row-window mean added back)
        self.gain = np.full(n, np.nan)
        self.rss = np.full(n, np.nan)        # weighted residual sum of squares
        self.info = np.full(n, np.nan)       # J_p^T W J_p (px^-2 in weight units)
        self.n_used = np.zeros(n, np.int64)
        self.iterations = np.zeros(n, np.int64)
        self.converged = np.zeros(n, bool)
        self.lag_sums = None                 # (n, n_lags + 1) sums of q_i var_i q_(i+l), q = w J_p

    def replaced(self, rows, other: "RowFit") -> "RowFit":
        """A copy with the results of ``rows`` (bool mask) taken from ``other`` (fitted on them)."""
        out = RowFit(self.x0.size)
        for name, value in vars(self).items():
            if value is None:
                continue
            merged = value.copy()
            merged[rows] = getattr(other, name)
            setattr(out, name, merged)
        return out


def _sums(y, cols, w, table, edge, x0, with_slope=True):
    u = cols - x0[:, None]
    mu, dmu = table.evaluate(edge, u, with_slope=with_slope)
    wm = w * mu
    out = {"Sm": wm.sum(1), "Smm": np.einsum("ij,ij->i", wm, mu), "Smy": np.einsum("ij,ij->i", wm, y)}
    if with_slope:
        wd = w * dmu
        out.update(Sd=wd.sum(1), Smd=np.einsum("ij,ij->i", wd, mu), Sdd=np.einsum("ij,ij->i", wd, dmu),
                   Sdy=np.einsum("ij,ij->i", wd, y))
    return out


def _linear(s, Sw, Sy, Syy):
    det = Sw * s["Smm"] - s["Sm"] ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        b = (Sw * s["Smy"] - s["Sm"] * Sy) / det
        a = (Sy - b * s["Sm"]) / Sw
        rss = Syy - a * Sy - b * s["Smy"]          # NaN where det = 0: replaced by inf below
    return a, b, np.where(det > 0, rss, np.inf), det


def _gauss_newton(s, a, b, det, Sw):
    SJ, SmJ = -b * s["Sd"], -b * s["Smd"]
    with np.errstate(divide="ignore", invalid="ignore"):
        beta = (Sw * SmJ - s["Sm"] * SJ) / det
        alpha = (SJ - beta * s["Sm"]) / Sw
    g = -b * (s["Sdy"] - a * s["Sd"] - b * s["Smd"])
    info = b * b * s["Sdd"] - alpha * SJ - beta * SmJ
    return g, info, alpha, beta


def solve_rows(y, cols, w, table, edge, x_init, *, max_iterations=30, tolerance_px=1e-4,
               grid_offsets_px=None, max_step_px=2.0, n_lags=0, lag_variance=None,
               chunk_rows=4096) -> RowFit:
    """Fit x0, gain and offset of every row.

    Parameters
    ----------
    y, cols, w : (n, width) ndarrays
        Pixel values, their column coordinates (px) and weights (0 for pixels not used).
    table : ProfileTable
    edge : (n,) int ndarray
        Which tabulated shape each row uses.
    x_init : (n,) ndarray
        Starting positions (px).
    grid_offsets_px : sequence of float, optional
        Try these offsets from ``x_init`` first and start from the best (coarse pass).
    n_lags : int
        Also return sums of q_i var_i q_(i+l), q = w J_p, l = 0..n_lags, for the sandwich
        covariance of a causally filtered noise, Cov(e_i, e_(i+l)) = a^l var_i.
    lag_variance : (n, width) ndarray
        The pixel noise variances ``var`` for those sums (required with ``n_lags``).
    """
    n = y.shape[0]
    out = RowFit(n)
    if n_lags:
        out.lag_sums = np.full((n, n_lags + 1), np.nan)
    for start in range(0, n, chunk_rows):
        sl = slice(start, min(n, start + chunk_rows))
        _solve_chunk(y[sl], cols[sl], w[sl], table, edge[sl], x_init[sl], out, sl,
                     max_iterations, tolerance_px, grid_offsets_px, max_step_px, n_lags,
                     None if lag_variance is None else lag_variance[sl])
    return out


def _solve_chunk(y, cols, w, table, edge, x_init, out, sl, max_iterations, tolerance_px,
                 grid_offsets_px, max_step_px, n_lags, lag_variance):
    Sw = w.sum(1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ymean = np.einsum("ij,ij->i", w, y) / Sw
    yc = np.where(w > 0, y - ymean[:, None], 0.0)
    Sy = np.einsum("ij,ij->i", w, yc)
    Syy = np.einsum("ij,ij->i", w * yc, yc)
    x = np.asarray(x_init, float).copy()
    if grid_offsets_px is not None:
        best = np.full(x.size, np.inf)
        bx = x.copy()
        for off in grid_offsets_px:
            s = _sums(yc, cols, w, table, edge, x + off, with_slope=False)
            _, b, rss, _ = _linear(s, Sw, Sy, Syy)
            better = rss < best
            best[better], bx[better] = rss[better], x[better] + off
        x = bx
    s = _sums(yc, cols, w, table, edge, x)
    a, b, rss, det = _linear(s, Sw, Sy, Syy)
    lam = np.full(x.size, 1e-3)
    n_used = np.count_nonzero(w > 0, axis=1)
    done = ~np.isfinite(rss) | (n_used <= 3)
    conv = np.zeros(x.size, bool)
    iters = np.zeros(x.size, np.int64)
    for _ in range(max_iterations):
        act = np.flatnonzero(~done)
        if act.size == 0:
            break
        sa = {k: v[act] for k, v in s.items()}
        g, info, _, _ = _gauss_newton(sa, a[act], b[act], det[act], Sw[act])
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = g / info
            step = np.clip(newton / (1.0 + lam[act]), -max_step_px, max_step_px)
        bad = ~np.isfinite(step)
        step[bad] = 0.0
        xt = x[act] + step
        st = _sums(yc[act], cols[act], w[act], table, edge[act], xt)
        at, bt, rt, dt = _linear(st, Sw[act], Sy[act], Syy[act])
        iters[act] += 1
        ok = (rt <= rss[act]) & ~bad
        acc = act[ok]
        x[acc], a[acc], b[acc], rss[acc], det[acc] = xt[ok], at[ok], bt[ok], rt[ok], dt[ok]
        for k in s:
            s[k][acc] = st[k][ok]
        lam[acc] = np.maximum(lam[acc] * 0.1, 1e-7)
        lam[act[~ok]] *= 10.0
        # converged: an accepted step below tolerance, or a rejected one whose undamped
        # Gauss-Newton step is within 10 x tolerance (the interpolated profile's own resolution),
        # or damping that can no longer find a decrease
        # (the tolerance is also met when the step is below 1% of the row's own statistical
        # uncertainty sqrt(s^2 / info): further digits would be noise)
        with np.errstate(divide="ignore", invalid="ignore"):
            tol = np.maximum(tolerance_px, 0.01 * np.sqrt(rss[act] / (n_used[act] - 3) / info))
        fin = (ok & (np.abs(step) < tol)) | (~ok & ~bad & (np.abs(newton) < 10 * tol))
        fin |= ~ok & (lam[act] > 1e6)
        conv[act[fin & ~bad]] = True
        done[act[fin | bad]] = True
    g, info, alpha, beta = _gauss_newton(s, a, b, det, Sw)
    out.x0[sl], out.gain[sl], out.offset[sl] = x, b, a + ymean
    out.rss[sl], out.info[sl] = rss, info
    out.n_used[sl] = np.count_nonzero(w > 0, axis=1)
    out.iterations[sl], out.converged[sl] = iters, conv
    if n_lags:
        mu, dmu = table.evaluate(edge, cols - x[:, None])
        jp = -b[:, None] * dmu - alpha[:, None] - beta[:, None] * mu
        q = w * jp
        qv = q * lag_variance
        out.lag_sums[sl] = np.stack([np.einsum("ij,ij->i", qv[:, :q.shape[1] - l], q[:, l:])
                                     for l in range(n_lags + 1)], axis=1)
