"""Per-row pixel windows around each edge, and the row bookkeeping shared by every detector.

The model fit (:mod:`edges.fit`) and the baselines (:mod:`edges.baselines`) both cut, for every
edge, a window of pixels around a per-row centre column; flag rows with saturated or non-finite
pixels; follow each edge with a robust straight centre line; and give every invalid row a
reason code (:data:`edges._types.REASONS`).  Those steps live here, once.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._nanstats import nanmedian
from ._types import REASON_CODES, Micrograph

__all__ = ["EdgeWindows", "cut_windows", "saturation_level", "centre_lines", "fit_reason_codes",
           "rows_usable"]


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
