"""Per-row pixel windows around each edge, and the row bookkeeping shared by every detector.

The model fit (:mod:`edges.fit`) and the baselines (:mod:`edges.baselines`) both cut, for every
edge, a window of pixels around a per-row centre column; flag rows with saturated or non-finite
pixels; follow each edge with a robust straight centre line; and give every invalid row a
reason code (:data:`edges._types.REASONS`).  Those steps live here, once.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ._nanstats import nanmedian
from ._types import REASON_CODES, Micrograph

__all__ = ["EdgeWindows", "cut_windows", "saturation_level", "centre_lines", "fit_reason_codes",
           "rows_usable", "flag_outlier_rows"]

#: Rows averaged when looking for a run of outlying residuals, and the threshold in standard
#: errors of that average above the edge's median (a particle or bridge raises the residual of
#: tens of rows together; an isolated noisy row does not reach it).
OUTLIER_RUN_ROWS = 5
OUTLIER_THRESHOLD_SE = 6.0
#: ... and at least this many times the median: at high dose a profile the model does not
#: follow exactly gives a residual that rises with the edge's excursion (to ~2x the median for
#: a profile outside the model family, ~5x where a line pinches to 3 sd of its width and the
#: rims of its edges overlap, in our tests); flagging those rows would drop the largest
#: excursions and bias the roughness low.  A particle or bridge leaves far more.
OUTLIER_MIN_RATIO = 6.0
#: At most this share of an edge's rows is flagged as outliers; above it the residual is high
#: everywhere (a profile the model does not follow), which is not a local defect.
OUTLIER_MAX_SHARE = 0.2


@dataclass(frozen=True)
class EdgeWindows:
    """Pixel windows of every row of every edge, stacked as ``(n_edges * n_rows, width)``.

    Attributes
    ----------
    y : (n, width) ndarray
        Grey levels (0 where outside the image or not finite).
    cols : (n, width) ndarray
        Column coordinate of every pixel (px).
    mask : (n, width) ndarray of bool
        Pixel belongs to this edge's window and is finite.
    edge : (n,) ndarray of int
        Edge of each stacked row.
    non_finite, saturated : (n,) ndarray of bool
        A pixel of the row's window is NaN/infinite, or sits at the saturation level.
    first, last : (n,) ndarray of int
        First and last column of each row's window.
    margin_px : (n,) ndarray
        How far inside its window a position must lie: 1 px, or 0.5 px in windows that reach
        less than 4 px on a side (fine pitch).
    """

    y: np.ndarray
    cols: np.ndarray
    mask: np.ndarray
    edge: np.ndarray
    non_finite: np.ndarray
    saturated: np.ndarray
    first: np.ndarray
    last: np.ndarray
    margin_px: np.ndarray

    def inside(self, x0_px) -> np.ndarray:
        """Whether each row's position lies inside its window by at least ``margin_px``."""
        return (x0_px > self.first + self.margin_px) & (x0_px < self.last - self.margin_px)


def cut_windows(pixels, centres_px, reach_left_px, reach_right_px, saturation=None) -> EdgeWindows:
    """Windows from ``centre - reach_left`` to ``centre + reach_right`` columns, the centre
    ``centres_px[e, row]`` rounded.

    Parameters
    ----------
    pixels : (n_rows, n_cols) ndarray
    centres_px : (n_edges, n_rows) ndarray
        Window centre per edge and row, in columns.
    reach_left_px, reach_right_px : (n_edges,) ndarray of int
        Pixels of each edge's window left and right of the centre.
    saturation : float, optional
        Grey level of detector saturation.
    """
    n_e, n_r = centres_px.shape
    left = np.asarray(reach_left_px, np.int64)
    right = np.asarray(reach_right_px, np.int64)
    hmax = int(max(left.max(), right.max()))
    offs = np.arange(-hmax, hmax + 1)
    start = np.rint(centres_px).astype(np.int64)
    col = start[:, :, None] + offs[None, None, :]
    n_cols = pixels.shape[1]
    inside = ((col >= 0) & (col < n_cols) & (offs[None, None, :] >= -left[:, None, None])
              & (offs[None, None, :] <= right[:, None, None]))
    colc = np.clip(col, 0, n_cols - 1)
    rows = np.broadcast_to(np.arange(n_r)[None, :, None], col.shape)
    y = pixels[rows, colc].reshape(n_e * n_r, -1)
    mask = inside.reshape(n_e * n_r, -1)
    finite = np.isfinite(y)
    saturated = (np.any((y >= saturation) & mask, axis=1) if saturation is not None
                 else np.zeros(n_e * n_r, bool))
    return EdgeWindows(y=np.where(finite, y, 0.0), cols=col.reshape(n_e * n_r, -1).astype(np.float64),
                       mask=mask & finite, edge=np.repeat(np.arange(n_e), n_r),
                       non_finite=np.any(~finite & mask, axis=1), saturated=saturated,
                       first=start.reshape(-1) - left.repeat(n_r), last=start.reshape(-1) + right.repeat(n_r),
                       margin_px=np.where(np.minimum(left, right) < 4, 0.5, 1.0).repeat(n_r))


def saturation_level(m: Micrograph):
    """The detector's clipping level: the file's, or the maximum when >0.5% of pixels sit on it."""
    if m.saturation_level is not None:
        return m.saturation_level
    px = m.pixels
    top = px.max()
    return float(top) if np.count_nonzero(px == top) > 0.005 * px.size else None


def centre_lines(x, ok, fallback):
    """Robust straight line through each edge's positions; the fallback where too few rows.

    Two rounds of a least-squares line with rows beyond 5 robust sd (MAD x 1.4826) + 0.5 px
    dropped; at least 8 rows are needed.
    """
    n_e, n_r = x.shape
    rows = np.arange(n_r, dtype=float)
    out = np.array(fallback, float, copy=True)
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


def rows_usable(fit, win: EdgeWindows) -> np.ndarray:
    """Rows of a solver result that can feed the next pass (converged, inside, clean)."""
    return (fit.converged & win.inside(fit.x0) & np.isfinite(fit.x0) & (fit.n_used > 3)
            & ~win.saturated & ~win.non_finite)


def fit_reason_codes(fit, win: EdgeWindows, var_x, n_edges: int) -> np.ndarray:
    """Why each row of a final fit is not valid (0 where it is); never a silent drop."""
    code = np.zeros(fit.x0.size, np.int8)
    code[~fit.converged] = REASON_CODES["no_convergence"]
    code[~win.inside(fit.x0) & fit.converged] = REASON_CODES["left_window"]
    med_gain = np.array([nanmedian(fit.gain[win.edge == e]) for e in range(n_edges)])
    rel = fit.gain / med_gain[win.edge]
    code[(code == 0) & ~(rel > 0.3)] = REASON_CODES["low_contrast"]      # step too small or reversed
    code[win.saturated] = REASON_CODES["saturated"]
    code[win.non_finite] = REASON_CODES["non_finite"]
    code[(code == 0) & ~(np.isfinite(var_x) & (var_x > 0))] = REASON_CODES["no_convergence"]
    code[(code == 0) & (var_x > np.maximum(win.last - win.first, 1) ** 2 / 4)] = REASON_CODES["unconstrained"]
    return code


def flag_outlier_rows(reduced_chi2, code, dof):
    """Rows whose fit residual is far outside the rest of their edge, given reason ``outlier``.

    A particle on an edge, a bridge to the neighbouring line or a scratch adds signal the
    edge model does not have: the residual of a run of rows rises together and their
    positions are pulled (by nanometres) though the fits converge.  Per edge, the running
    median of the reduced chi-square over :data:`OUTLIER_RUN_ROWS` rows (more where a row has
    few degrees of freedom: 50 in all) is compared with its median
    plus :data:`OUTLIER_THRESHOLD_SE` standard errors (the robust sd, MAD x 1.4826, but at least
    the chi-square's own ``median * sqrt(2 / dof)``; 1.25 sd over the square root of the rows for
    a running median);
    and at least :data:`OUTLIER_MIN_RATIO` times the median; each run found is widened on both sides by half its length
    (at least 1 row), where the defect's fainter margins still pull the position.

    Parameters
    ----------
    reduced_chi2 : (n_edges, n_rows) ndarray
    code : (n_edges, n_rows) ndarray of int
        Reason codes so far (0 = valid); returned with outliers added.
    dof : (n_edges, n_rows) ndarray
        Degrees of freedom of each row's fit.
    """
    out = code.copy()
    n_e, n_r = reduced_chi2.shape
    if n_r < 4 * OUTLIER_RUN_ROWS:
        return out
    for e in range(n_e):
        ok = (code[e] == 0) & np.isfinite(reduced_chi2[e])
        if ok.sum() < 4 * OUTLIER_RUN_ROWS:
            continue
        r = reduced_chi2[e, ok]
        med = float(np.median(r))
        sd = max(1.4826 * float(np.median(np.abs(r - med))), med * np.sqrt(2.0 / float(np.median(dof[e, ok]))))
        if not sd > 0:
            continue
        filled = np.where(ok, reduced_chi2[e], med)
        # a running median: one wild row (a chi-square of few degrees of freedom has a long
        # tail) does not make a run; its standard error is ~1.25 sd / sqrt(rows).  Over at least
        # 50 degrees of freedom in all (fine-pitch windows hold only a few pixels).
        dof_e = float(np.median(dof[e, ok]))
        size = max(OUTLIER_RUN_ROWS, 2 * int(np.ceil(25.0 / max(dof_e, 1.0))) + 1)
        smooth = ndimage.median_filter(filled, size=size, mode="constant", cval=med)
        se = 1.25 * sd / np.sqrt(size)
        core = ok & (smooth > max(med + OUTLIER_THRESHOLD_SE * se, OUTLIER_MIN_RATIO * med))
        if not core.any():
            continue
        flagged = core.copy()
        change = np.diff(np.r_[0, core.astype(int), 0])
        for a, b in zip(np.flatnonzero(change == 1), np.flatnonzero(change == -1)):
            grow = max(1, (b - a) // 2)
            flagged[max(0, a - grow):min(n_r, b + grow)] = True
        flagged &= code[e] == 0
        if flagged.sum() <= OUTLIER_MAX_SHARE * ok.sum():
            out[e, flagged] = REASON_CODES["outlier"]
    return out
