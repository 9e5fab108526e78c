"""Coarse pass: orientation, tilt, polarity and each edge's approximate column.

The row-averaged profile (after following the tilt block by block) gives the levels of spaces and
line tops; crossings of the mid level give the edges.  Which regions are lines cannot be read from
a profile (a bright line with bright rims and a bright space between rimmed dark lines look the
same), so polarity "auto" takes the bright regions as lines and dark lines are asked for by name.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage

from ._types import MAX_NON_FINITE_SHARE, Micrograph

__all__ = ["EdgeGuess", "LineLayout", "LocateError", "locate_edges", "information_bar_rows", "MIN_HALF_WINDOW_PX",
           "MAX_TILT_DEG", "POLARITIES", "ORIENTATIONS"]

#: Smallest reach of a fit window on either side of an edge (pixels) that is still fitted: with
#: 2 px a side (5 pixels for position, gain and offset) edges 4 px apart, pitches of 8 px, are
#: measured.
MIN_HALF_WINDOW_PX = 2
#: Line polarities: "auto" (bright lines), "bright", "dark".
POLARITIES = ("auto", "bright", "dark")
#: Line directions: "auto", "vertical", "horizontal" (horizontal images are transposed).
ORIENTATIONS = ("auto", "vertical", "horizontal")
#: Largest tilt of the lines against the image columns that is measured (degrees); beyond it
#: the image is refused (rotate it first): the fit follows tilted edges row by row and the
#: detrend removes the tilt, but steeper lines stretch the profile across a row by 1 / cos and
#: move far from the window between block estimates.
MAX_TILT_DEG = 5.0
_TILT_SEARCH_DEG = 15.0      # how far the block cross-correlation looks (to name the angle)


class LocateError(ValueError):
    """No measurable lines in an image; the message names the image and the reason."""


@dataclass(frozen=True)
class EdgeGuess:
    """One edge's approximate place.

    Attributes
    ----------
    column_px : float
        Column of the edge at the layout's reference row.
    line_index : int
    side : str
        ``"left"`` or ``"right"`` side of its line.
    rising : bool
        Grey level increases to the right across the edge.
    reach_left_px, reach_right_px : int
        Pixels to the left and to the right of the edge that belong to this edge alone: half the
        distance to the neighbouring edge on that side (the local pitch and CD), or what the
        border leaves, at most half the requested window.
    flag : str
        ``""`` or ``"too_close"`` when a neighbour leaves less than
        :data:`MIN_HALF_WINDOW_PX` on a side.
    """

    column_px: float
    line_index: int
    side: str
    rising: bool
    reach_left_px: int
    reach_right_px: int
    flag: str = ""

    @property
    def half_window_px(self) -> int:
        """The larger reach (the extent of the window array)."""
        return max(self.reach_left_px, self.reach_right_px)


@dataclass(frozen=True)
class LineLayout:
    """Result of :func:`locate_edges`.

    Attributes
    ----------
    micrograph : Micrograph
        The image with lines vertical (``rotated`` set when it was turned) and ``polarity`` set.
    edges : tuple of EdgeGuess
        Whole lines only, left to right, left edge before right edge.
    tilt_px_per_row : float
        Column shift of every edge per row.
    reference_row : float
    dropped_partial_lines : int
        Lines cut by the image border and left out.
    profile : ndarray
        Tilt-aligned row-averaged profile (grey levels).
    levels : tuple of float
        (space level, line level) of the profile.
    bar_rows : tuple of int
        Rows of an information bar cut from the top and the bottom of the image before anything
        else (see :func:`information_bar_rows`); ``micrograph`` is the image without them.
    """

    micrograph: Micrograph
    edges: tuple
    tilt_px_per_row: float
    reference_row: float
    dropped_partial_lines: int
    profile: np.ndarray
    levels: tuple
    bar_rows: tuple = (0, 0)

    def guess_columns(self, rows) -> np.ndarray:
        """(n_edges, len(rows)) per-row guesses that follow the tilt."""
        rows = np.asarray(rows, float)
        c = np.array([e.column_px for e in self.edges])
        return c[:, None] + self.tilt_px_per_row * (rows[None, :] - self.reference_row)


def _validate(m: Micrograph) -> None:
    px = m.pixels
    if px.ndim != 2:
        raise LocateError(f"{m.source}: expected a 2-D image, got shape {px.shape}")
    if min(px.shape) < 16:
        raise LocateError(f"{m.source}: image of {px.shape[0]} x {px.shape[1]} pixels is too small (16 x 16 at least)")
    levels = np.unique(px[::2, ::2][np.isfinite(px[::2, ::2])]).size
    if levels <= 2:
        raise LocateError(f"{m.source}: the image holds only {levels} grey level(s) (blank, or binarised by a "
                          "threshold): edges cannot be placed within a pixel; use the original micrograph")
    bad = np.count_nonzero(~np.isfinite(px))
    if bad > MAX_NON_FINITE_SHARE * px.size:
        raise LocateError(f"{m.source}: {bad} pixels ({100 * bad / px.size:.0f}%) are NaN or infinite (at most "
                          f"{100 * MAX_NON_FINITE_SHARE:.0f}% can be left out as failed rows)")


def _slanted_grating_deg(pixels) -> float | None:
    """Angle (degrees from the columns) of a periodic pattern far from both image axes, or None.

    The strongest peak of the windowed 2-D power spectrum away from zero frequency is a grating's
    wave vector; it counts when it stands 100 times above the spectrum's median and points more
    than :data:`MAX_TILT_DEG` away from both axes (lines at 45 degrees, say).
    """
    px = np.where(np.isfinite(pixels), pixels, np.nanmedian(pixels))
    px = px - px.mean()
    wy, wx = np.hanning(px.shape[0]), np.hanning(px.shape[1])
    shape = tuple(min(4 * n, max(n, 1024)) for n in px.shape)      # zero-padded: a finer angle
    power = np.abs(np.fft.fft2(px * wy[:, None] * wx[None, :], s=shape)) ** 2
    fy = np.fft.fftfreq(shape[0])[:, None]
    fx = np.fft.fftfreq(shape[1])[None, :]
    radius = np.hypot(fy, fx)
    power = np.where(radius > 2.5 / min(px.shape), power, 0.0)
    k = np.unravel_index(int(np.argmax(power)), power.shape)
    if not power[k] > 100 * np.median(power[power > 0]):
        return None
    # the wave vector's angle from the row axis is the lines' angle from the columns
    angle = abs(math.degrees(math.atan2(float(fy[k[0], 0]), float(fx[0, k[1]])))) % 180
    angle = min(angle, 180 - angle)
    return angle if MAX_TILT_DEG < angle < 90 - MAX_TILT_DEG else None


def information_bar_rows(pixels: np.ndarray, *, max_share: float = 1 / 3) -> tuple[int, int]:
    """Rows to cut from the top and bottom of an image: an information bar (a solid band, with or
    without text, as SEMs write along the bottom of a micrograph).

    A row is foreign when its mean or its spread (log sd) lies more than 10 robust standard
    deviations (1.4826 MAD) from a quadratic trend through the middle half of the image's rows; the bar is the run
    of foreign rows that starts at the border (gaps of up to 2 rows bridged, 2 rows at least).
    Nothing is cut when the run would exceed ``max_share`` of the rows.
    Returns (rows at the top, rows at the bottom).
    """
    n = pixels.shape[0]
    if n < 32:
        return 0, 0
    mean = pixels.mean(axis=1)
    log_sd = np.log(np.maximum(pixels.std(axis=1), 1e-12))
    core = slice(n // 4, n - n // 4)

    t = np.linspace(-1.0, 1.0, n)

    def z(v):
        # against a quadratic through the middle half (vignetting and gradients are smooth; a
        # bar is abrupt), in robust standard deviations of the middle half about it
        trend = np.polyval(np.polyfit(t[core], v[core], 2), t)
        dev = v - trend
        mad = 1.4826 * np.median(np.abs(dev[core] - np.median(dev[core])))
        return np.abs(dev) / max(mad, 1e-9 * max(abs(float(np.median(v[core]))), 1.0))

    foreign = (z(mean) > 10) | (z(log_sd) > 10)

    def run(flags):
        k, gap, end = 0, 0, 0
        while k < flags.size:
            if flags[k]:
                end, gap = k + 1, 0
            else:
                gap += 1
                if gap > 2:
                    break
            k += 1
        return end if end >= 2 else 0

    top, bottom = run(foreign), run(foreign[::-1])
    if top + bottom > max_share * n:
        return 0, 0
    return top, bottom


def _block_shift(a: np.ndarray, b: np.ndarray, max_shift: int) -> float:
    """Subpixel shift s such that b(x) ~ a(x - s), by cross-correlating gradients."""
    ga, gb = np.gradient(a), np.gradient(b)
    ga -= ga.mean()
    gb -= gb.mean()
    lags = np.arange(-max_shift, max_shift + 1)
    n = a.size
    cc = np.array([np.dot(ga[max(0, -k):n - max(0, k)], gb[max(0, k):n - max(0, -k)]) for k in lags])
    i = int(np.argmax(cc))
    if 0 < i < lags.size - 1:
        den = cc[i - 1] - 2 * cc[i] + cc[i + 1]
        frac = 0.5 * (cc[i - 1] - cc[i + 1]) / den if den < 0 else 0.0
    else:
        frac = 0.0
    return float(lags[i] + frac)


def _tilt(px: np.ndarray) -> tuple[float, float]:
    """Column shift per row from the cross-correlation of the mean profiles of row blocks.

    Blocks are short enough that the largest tilt searched moves a block's profile by less
    than half a pitch (a periodic profile is ambiguous beyond that), and at least 8 rows.
    """
    n_rows = px.shape[0]
    period = _period_px(px[:min(n_rows, 32)].mean(axis=0))
    half = 0.5 * period - 1.0
    block_rows = max(n_rows // 16, 32)
    if np.isfinite(half):
        block_rows = max(8, min(block_rows, int(half / math.tan(math.radians(_TILT_SEARCH_DEG)))))
    n_blocks = int(min(128, n_rows // block_rows))
    ref = 0.5 * (n_rows - 1)
    if n_blocks < 3:
        return 0.0, ref
    edges_ = np.linspace(0, n_rows, n_blocks + 1).astype(int)
    prof = [ndimage.gaussian_filter1d(px[a:b].mean(axis=0), 1.0) for a, b in zip(edges_[:-1], edges_[1:])]
    centres = 0.5 * (edges_[:-1] + edges_[1:] - 1)
    step = np.diff(centres).max()
    max_shift = min(int(math.ceil(step * math.tan(math.radians(_TILT_SEARCH_DEG)))) + 2, px.shape[1] // 4,
                    max(1, int(half)) if np.isfinite(half) else px.shape[1])
    shifts = np.concatenate([[0.0], np.cumsum([_block_shift(prof[i], prof[i + 1], max_shift)
                                               for i in range(n_blocks - 1)])])
    slope = np.polyfit(centres, shifts, 1)[0]
    # a tilt is real when the blocks agree on it: the mean shift from block to block is many
    # standard errors from zero (4: one in a thousand for noise), and the drift exceeds a pixel
    steps = np.diff(shifts)
    se = float(np.std(steps, ddof=1)) / math.sqrt(steps.size) if steps.size > 1 else math.inf
    consistent = abs(float(np.mean(steps))) > 4 * se and abs(slope) * (centres[-1] - centres[0]) > 1.0
    if not consistent:
        slope = 0.0   # no consistent tilt (e.g. a featureless image or a straight one); report none
    return float(slope), ref


def _aligned_profile(px: np.ndarray, tilt: float, ref: float) -> np.ndarray:
    n_rows, n_cols = px.shape
    if tilt == 0.0:
        return px.mean(axis=0)
    block = max(1, int(1.0 / max(abs(tilt), 1e-9) / 4))      # rows per quarter-pixel of drift
    block = min(block, n_rows)
    cols = np.arange(n_cols, dtype=float)
    acc = np.zeros(n_cols)
    weight = np.zeros(n_cols)
    for start in range(0, n_rows, block):
        rows = px[start:start + block]
        shift = tilt * (start + 0.5 * (rows.shape[0] - 1) - ref)
        prof = np.interp(cols + shift, cols, rows.mean(axis=0), left=np.nan, right=np.nan)
        ok = np.isfinite(prof)
        acc[ok] += prof[ok] * rows.shape[0]
        weight[ok] += rows.shape[0]
    out = np.full(n_cols, np.nan)
    out[weight > 0] = acc[weight > 0] / weight[weight > 0]
    return out


def _period_px(profile: np.ndarray) -> float:
    """The dominant period of a profile (the pitch), from the highest peak of its power spectrum
    beyond the two lowest frequencies; infinite for a profile too short to tell."""
    z = profile - profile.mean()
    if z.size < 8:
        return math.inf
    power = np.abs(np.fft.rfft(z * np.hanning(z.size))) ** 2
    if power.size < 4:
        return math.inf
    k = 2 + int(np.argmax(power[2:]))
    return z.size / k


def _crossings(profile: np.ndarray, level: float) -> list[tuple[float, bool]]:
    """Subpixel columns where the profile crosses ``level`` and whether it rises there."""
    d = profile - level
    ok = np.isfinite(d[:-1]) & np.isfinite(d[1:])
    idx = np.flatnonzero(ok & (np.sign(d[:-1]) != np.sign(d[1:])) & (d[:-1] != 0))
    return [(k + d[k] / (d[k] - d[k + 1]), bool(d[k + 1] > d[k])) for k in idx]


def locate_edges(micrograph: Micrograph, *, polarity: str = "auto", orientation: str = "auto",
                 window_px: int = 31) -> LineLayout:
    """Find whole lines and their edges.

    Parameters
    ----------
    micrograph : Micrograph
    polarity : {"auto", "bright", "dark"}
        Whether lines are brighter or darker than the spaces; ``"auto"`` means bright.
    orientation : {"auto", "vertical", "horizontal"}
        Line direction in the image; horizontal images are transposed (``rotated=True``).
    window_px : int
        Largest fit window (odd, >= 2 * MIN_HALF_WINDOW_PX + 1); each edge's window is narrowed
        to half the distance to its neighbours on either side.

    Raises
    ------
    LocateError
        No whole line, or no contrast between lines and spaces.

    Examples
    --------
    >>> import numpy as np
    >>> from edges import Micrograph, render_micrograph
    >>> left = np.array([[30.0] * 64, [94.0] * 64])
    >>> pixels, _ = render_micrograph(left, left + 32, n_cols=160, rng=np.random.default_rng(0))
    >>> layout = locate_edges(Micrograph(pixels=pixels, pixel_size_nm=1.0))
    >>> [e.side for e in layout.edges]
    ['left', 'right', 'left', 'right']
    """
    if polarity not in POLARITIES:
        raise ValueError(f"polarity={polarity!r}: must be one of {POLARITIES}")
    if orientation not in ORIENTATIONS:
        raise ValueError(f"orientation={orientation!r}: must be one of {ORIENTATIONS}")
    if window_px % 2 != 1 or window_px < 2 * MIN_HALF_WINDOW_PX + 1:
        raise ValueError(f"window_px={window_px}: must be an odd integer >= {2 * MIN_HALF_WINDOW_PX + 1}")
    _validate(micrograph)
    # an information bar along the top or bottom of the image (as written by the SEM) is cut first
    bar = information_bar_rows(np.where(np.isfinite(micrograph.pixels), micrograph.pixels,
                                        np.nanmedian(micrograph.pixels)))
    if any(bar):
        micrograph = replace(micrograph, pixels=micrograph.pixels[bar[0]:micrograph.pixels.shape[0] - bar[1]])
    px = micrograph.pixels
    if not np.all(np.isfinite(px)):   # a few bad pixels: located around, flagged by the fit
        px = np.where(np.isfinite(px), px, np.nanmedian(px))
    if orientation == "auto":
        # spread (inter-quartile range) of the robust profiles along each axis: lines make the
        # profile across them vary; a few bright or saturated rows do not move an IQR
        def iqr(v):
            q1, q3 = np.percentile(v, [25, 75])
            return q3 - q1
        horizontal = iqr(np.median(px, axis=1)) > iqr(np.median(px, axis=0))
    else:
        horizontal = orientation == "horizontal"
    if horizontal:
        px = np.ascontiguousarray(px.T)
        micrograph = replace(micrograph, pixels=np.ascontiguousarray(micrograph.pixels.T),
                             rotated=not micrograph.rotated)
    n_rows, n_cols = px.shape
    tilt, ref = _tilt(px)
    profile = _aligned_profile(px, tilt, ref)
    finite = np.isfinite(profile)
    light = profile.copy()
    light[finite] = ndimage.gaussian_filter1d(profile[finite], 1.0)
    heavy = light.copy()
    # smoothing that keeps the lines: 3 px, or an eighth of the pitch at fine pitch
    heavy[finite] = ndimage.gaussian_filter1d(profile[finite], min(3.0, max(0.7, _period_px(light[finite]) / 8)))
    # profile noise: pixel noise from row-to-row differences, averaged over the rows
    pix_sd = np.median(np.abs(np.diff(px[:, ::4], axis=0))) / (0.6745 * math.sqrt(2))
    prof_sd = pix_sd / math.sqrt(n_rows)
    vals = heavy[finite]
    lo, hi = np.percentile(vals, 10), np.percentile(vals, 90)
    if not hi - lo > max(10 * prof_sd, 1e-12):
        slanted = _slanted_grating_deg(micrograph.pixels if not horizontal else micrograph.pixels.T)
        if slanted is not None:
            raise LocateError(f"{micrograph.source}: the image holds lines at about {slanted:.0f} degrees to its "
                              f"columns; up to {MAX_TILT_DEG:g} degrees from the columns or rows are measured: rotate "
                              "the image (or re-image with the lines aligned) first")
        raise LocateError(f"{micrograph.source}: no lines found (profile contrast {hi - lo:.3g} against "
                          f"noise {prof_sd:.3g} grey levels)")
    angle = math.degrees(math.atan(tilt))
    if abs(angle) > MAX_TILT_DEG:
        raise LocateError(f"{micrograph.source}: the lines are tilted by {angle:.1f} degrees against the image "
                          f"{'rows' if horizontal else 'columns'}; up to {MAX_TILT_DEG:g} degrees are measured: "
                          "rotate the image (or re-image with the lines aligned) first")
    mid = 0.5 * (lo + hi)
    coarse = _crossings(heavy, mid)
    if len(coarse) < 2:
        raise LocateError(f"{micrograph.source}: no lines found (fewer than two edges in the profile)")
    crossings = []
    for col, rising in coarse:   # refine on the lightly smoothed profile, nearest crossing
        fine = [c for c, r in _crossings(light[max(0, int(col) - 4):int(col) + 6], mid) if r == rising]
        crossings.append(((min(fine, key=lambda c: abs(c + max(0, int(col) - 4) - col)) + max(0, int(col) - 4))
                          if fine else col, rising))
    if polarity == "auto":
        # A blurred profile cannot tell a bright line with bright rims from a bright space
        # bounded by the rims of dark lines: both rise, overshoot and settle.  "auto" therefore
        # takes the brighter regions as the lines; dark lines need polarity="dark".
        polarity = "bright"
    # a line starts where the profile enters the line level: rising for bright lines
    starts_rising = polarity == "bright"
    half_req = window_px // 2
    drift = abs(tilt) * 0.5 * n_rows          # how far a tilted edge moves from its reference column
    border = MIN_HALF_WINDOW_PX + 1 + drift   # a whole line needs this much room at the border
    lines, dropped, i = [], 0, 0
    while i < len(crossings):
        col, rising = crossings[i]
        if rising == starts_rising and i + 1 < len(crossings) and crossings[i + 1][1] != starts_rising:
            left, right = col, crossings[i + 1][0]
            if left - border < 0 or right + border > n_cols - 1:
                dropped += 1
            else:
                lines.append((left, right))
            i += 2
        else:
            if rising != starts_rising and not lines and i == 0:
                dropped += 1      # a line cut by the left border
            i += 1
    if not lines:
        raise LocateError(f"{micrograph.source}: no whole line inside the image "
                          f"({dropped} cut by the border)")
    cols = [c for pair in lines for c in pair]
    every = sorted(x for x, _ in crossings)   # kept edges and those of dropped partial lines
    guesses = []
    for k, c in enumerate(cols):
        before = [c - x for x in every if x < c - 0.5]
        after = [x - c for x in every if x > c + 0.5]
        # half the distance to the neighbouring edge on each side (the local pitch and CD), or
        # what the border leaves beyond the tilt drift; at most half the requested window
        room_left = 0.5 * min(before) if before else c - drift - 1
        room_right = 0.5 * min(after) if after else (n_cols - 1) - c - drift - 1
        reach_l = int(min(half_req, math.floor(room_left + 0.5)))   # windows may share a midpoint pixel
        reach_r = int(min(half_req, math.floor(room_right + 0.5)))
        side = "left" if k % 2 == 0 else "right"
        rising = (side == "left") == (polarity == "bright")
        close = min(reach_l, reach_r) < MIN_HALF_WINDOW_PX
        guesses.append(EdgeGuess(column_px=float(c), line_index=k // 2, side=side, rising=rising,
                                 reach_left_px=max(reach_l, 0), reach_right_px=max(reach_r, 0),
                                 flag="too_close" if close else ""))
    micrograph = replace(micrograph, polarity=polarity)
    return LineLayout(micrograph=micrograph, edges=tuple(guesses), tilt_px_per_row=tilt,
                      reference_row=ref, dropped_partial_lines=dropped, profile=profile,
                      levels=(hi, lo) if polarity == "dark" else (lo, hi), bar_rows=tuple(int(b) for b in bar))
