"""Model-based edge positions for every row, with calibrated uncertainties.

:func:`fit_edges` runs five named passes over all rows of all edges at once (batched, no loop
over rows); each returns a small frozen result that the next one reads:

1. :func:`_coarse_pass`: a plain blurred step, started from the located guesses after a grid
   search over the window; rough positions, each edge's straight centre line, and the
   roughness variance about it;
2. :func:`_shape_pass`: one shape per side (left edges, right edges, pooled over the image's
   lines) from the mean profile aligned on the centre lines, with the roughness blur removed;
   an unweighted fit with it;
3. :func:`_realign_pass`: each row's window re-centred on that row's estimate, the shape
   refitted on the self-aligned profile (corrected for the sharpening self-alignment causes,
   :func:`edges.profiles.adjust_blur`) and an unweighted fit with the final shape;
4. :func:`_noise_pass`: the image's noise model from that fit's residuals
   (:func:`edges._noise.estimate_noise`: variance against signal, correlation along the scan);
5. :func:`_weighted_pass`: weights ``1 / var``; each position's variance from the Schur
   complement, or the sandwich form under scan correlation.

Reported positions are the half-level point of each edge's mean profile
(:func:`edges.profiles.half_level_offset`).  Edges whose median contrast-to-noise falls below
:data:`LOW_CONTRAST_CNR` are flagged ``low_contrast``: there the linearised covariance
under-states the real scatter.

References
----------
Kay, S. M. (1993). Fundamentals of Statistical Signal Processing, Vol. I: Estimation Theory.
Prentice Hall (Fisher information, Cramer-Rao bound).
Golub, G. & Pereyra, V. (2003). Separable nonlinear least squares: the variable projection
method and its applications. Inverse Problems 19, R1.  doi:10.1088/0266-5611/19/2/201
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._nanstats import nanmean, nanmedian
from ._noise import NoiseModel, estimate_noise, position_variance
from ._solver import RowFit, solve_rows
from ._twin import run_twin
from ._types import REASON_CODES, EdgeTraces, Micrograph
from ._windows import (EdgeWindows, centre_lines, cut_windows, fit_reason_codes, flag_outlier_rows, rows_usable,
                       saturation_level)
from .locate import LineLayout, locate_edges
from .profiles import (PROFILE_MODELS, EdgeShape, ProfileTable, adjust_blur, fit_shape,
                       half_level_offset, is_physical, parametric_profile, smoothed_correction, tabulate)

__all__ = ["fit_edges", "LOW_CONTRAST_CNR"]

#: Below this contrast-to-noise (step height over noise sd at mid-step) an edge is flagged.
LOW_CONTRAST_CNR = 3.0
_BIN_PX = 0.25
#: Reach (px a side) at or below which an edge is flagged ``close_neighbour``: its window holds
#: part of the neighbouring edge's profile, and the fit of one edge can feel the other (in our
#: benchmark: LWR +19-23% at pitches of 16-24 px with bright rims, LER -17% at 12 px).
CLOSE_NEIGHBOUR_PX = 6
#: Narrowest reach (px a side) at which a profile shape with a rim or halo is fitted; below it
#: the profile is a plain blurred step (fine pitch).
_MIN_SHAPE_REACH_PX = 4


@dataclass(frozen=True)
class _Solve:
    """Solver options shared by the passes."""

    max_iterations: int
    tolerance_px: float
    chunk_rows: int


@dataclass(frozen=True)
class _Frame:
    """What every pass needs of the image: pixels, windows' half widths, saturation, sides."""

    pixels: np.ndarray
    reach_left_px: np.ndarray
    reach_right_px: np.ndarray
    saturation: float | None
    sides: np.ndarray          # +1 left edge, -1 right edge
    n_rows: int

    @property
    def n_edges(self) -> int:
        return self.reach_left_px.size

    @property
    def reach_px(self) -> np.ndarray:
        """Each edge's smaller reach."""
        return np.minimum(self.reach_left_px, self.reach_right_px)

    @property
    def half_max_px(self) -> int:
        """The widest reach of any window (the extent of the window arrays)."""
        return int(max(self.reach_left_px.max(), self.reach_right_px.max()))

    @property
    def table_range_px(self) -> int:
        return 3 * self.half_max_px + 6

    def windows(self, centres_px) -> EdgeWindows:
        return cut_windows(self.pixels, centres_px, self.reach_left_px, self.reach_right_px, self.saturation)


@dataclass(frozen=True)
class CoarsePass:
    """Plain-step fit: positions, usable rows, centre lines, roughness variance (px, px^2)."""

    fit: RowFit
    ok: np.ndarray
    centres_px: np.ndarray
    roughness_var_px2: np.ndarray


@dataclass(frozen=True)
class ShapedPass:
    """An unweighted fit with per-side shapes on its windows."""

    windows: EdgeWindows
    table: ProfileTable
    shapes: tuple
    fit: RowFit
    ok: np.ndarray
    shape_fallback: np.ndarray


@dataclass(frozen=True)
class NoisePass:
    """The image's noise model and every window pixel's modelled variance."""

    noise: NoiseModel
    pixel_variance: np.ndarray


@dataclass(frozen=True)
class WeightedPass:
    """Final weighted fit and each row's position variance (px^2)."""

    fit: RowFit
    var_px2: np.ndarray


def _coarse_grid(frame: _Frame) -> np.ndarray:
    """Offsets of the coarse grid search: every 2 px up to 3 px from the narrowest window's
    ends, or every pixel in fine-pitch windows."""
    reach = int(min(frame.reach_left_px.min(), frame.reach_right_px.min()))
    return np.arange(-(reach - 3), reach - 2, 2) if reach > 4 else np.arange(-(reach - 1), reach)


def _coarse_table(frame: _Frame) -> ProfileTable:
    """A plain step of 2 px blur (at most half the narrowest reach) for every edge."""
    reach = int(min(frame.reach_left_px.min(), frame.reach_right_px.min()))
    blur = min(2.0, 0.5 * reach)
    step = [lambda u, derivative=False: parametric_profile(u, EdgeShape(blur), derivative=derivative)]
    return tabulate(step * frame.n_edges, frame.table_range_px)


def _coarse_pass(frame: _Frame, guess_px, solve: _Solve) -> CoarsePass:
    win = frame.windows(guess_px)
    # grid search inside the narrowest window; a plain step of 2 px blur (at most half the reach)
    table = _coarse_table(frame)
    grid = _coarse_grid(frame)
    fit = solve_rows(win.y, win.cols, win.mask.astype(float), table, win.edge, guess_px.ravel(),
                     grid_offsets_px=grid, max_iterations=solve.max_iterations,
                     tolerance_px=1e-2, chunk_rows=solve.chunk_rows)
    ok = np.isfinite(fit.x0) & win.inside(fit.x0) & (np.abs(fit.gain) > 0)
    shape2 = (frame.n_edges, frame.n_rows)
    centres = centre_lines(fit.x0.reshape(shape2), ok.reshape(shape2), guess_px)
    # roughness variance about the centre line: scatter of the coarse positions less their own
    # noise (their unweighted variance s^2 / info); it is removed from the profile's blur
    s2 = fit.rss / np.clip(fit.n_used - 3, 1, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        dev = np.where(ok, fit.x0 - centres.ravel(), np.nan).reshape(shape2)
        noise = nanmedian(np.where(ok, s2 / fit.info, np.nan).reshape(shape2), axis=1)
    rough_var = np.clip(nanmean(dev ** 2, axis=1) - noise, 0.0, None)
    return CoarsePass(fit=fit, ok=ok, centres_px=centres, roughness_var_px2=rough_var)


def _shape_pass(frame: _Frame, coarse: CoarsePass, model: str, solve: _Solve) -> ShapedPass:
    """Shapes from the profile aligned on the smooth centre lines: blurred by the roughness (that
    blur is removed), but free of the distortion that self-alignment on a wrong (plain-step)
    model leaves, which can favour a step hidden under a bright rim."""
    hmax = frame.half_max_px
    win = frame.windows(coarse.centres_px)
    centres = coarse.centres_px.ravel()
    ub, mean = _aligned_profiles(win, centres, coarse.fit.offset, coarse.fit.gain, coarse.ok, hmax)
    funcs, shapes, shift, fallback = _shapes(ub, mean, model, frame.sides, frame.reach_px,
                                             blur_change_px2=-np.nan_to_num(coarse.roughness_var_px2))
    table = tabulate(funcs, frame.table_range_px)
    x_start = np.where(coarse.ok, coarse.fit.x0, centres) + shift[win.edge]
    fit = solve_rows(win.y, win.cols, win.mask.astype(float), table, win.edge, x_start,
                     max_iterations=solve.max_iterations, tolerance_px=solve.tolerance_px, chunk_rows=solve.chunk_rows)
    return ShapedPass(windows=win, table=table, shapes=tuple(shapes), fit=fit, ok=rows_usable(fit, win),
                      shape_fallback=fallback)


def _realign_pass(frame: _Frame, coarse: CoarsePass, shaped: ShapedPass, model: str, solve: _Solve) -> ShapedPass:
    """Windows centred on each row's own estimate (a window that stays on the centre line
    truncates the edge on one side when the edge wanders, and at low contrast-to-noise the fit
    then drifts toward the window centre: shrinkage); shape refitted on the self-aligned
    profile with the alignment scatter removed; unweighted fit with it."""
    hmax = frame.half_max_px
    fit, ok, e_idx = shaped.fit, shaped.ok, shaped.windows.edge
    centres = coarse.centres_px.ravel()
    s2 = fit.rss / np.clip(fit.n_used - 3, 1, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        align_var = np.array([nanmean(np.where(ok, s2 / fit.info, np.nan)[e_idx == e])
                              for e in range(frame.n_edges)])
    own = np.where(ok, fit.x0, centres).reshape(frame.n_edges, frame.n_rows)
    win = frame.windows(own)
    offset = np.where(ok, fit.offset, np.nan)
    ok = ok & np.isfinite(fit.x0)
    ub, mean = _aligned_profiles(win, fit.x0, offset, fit.gain, ok, hmax)
    funcs, shapes, shift, fallback = _shapes(ub, mean, model, frame.sides, frame.reach_px, starts=shaped.shapes,
                                             blur_change_px2=np.nan_to_num(align_var))
    table = tabulate(funcs, frame.table_range_px)
    x_start = np.where(ok, fit.x0, centres) + shift[e_idx]
    refit = solve_rows(win.y, win.cols, win.mask.astype(float), table, e_idx, x_start,
                       max_iterations=solve.max_iterations, tolerance_px=solve.tolerance_px, chunk_rows=solve.chunk_rows)
    win, refit = _follow(frame, win, refit, table, solve)
    return ShapedPass(windows=win, table=table, shapes=tuple(shapes), fit=refit, ok=rows_usable(refit, win),
                      shape_fallback=fallback | shaped.shape_fallback)


def _follow(frame: _Frame, win: EdgeWindows, fit: RowFit, table, solve: _Solve, rounds: int = 2):
    """Rows whose converged position left their window get a window centred on it and are
    refitted (up to ``rounds`` times): an edge that wanders more than the window's margin, as
    at fine pitch where windows reach 2-3 px, is followed instead of lost."""
    for _ in range(rounds):
        moved = fit.converged & np.isfinite(fit.x0) & ~win.inside(fit.x0)
        if not moved.any():
            break
        centre = np.where(moved, fit.x0, win.first + frame.reach_left_px[win.edge])
        win = frame.windows(centre.reshape(frame.n_edges, frame.n_rows))
        sub = solve_rows(win.y[moved], win.cols[moved], win.mask[moved].astype(float), table, win.edge[moved],
                         fit.x0[moved], max_iterations=solve.max_iterations, tolerance_px=solve.tolerance_px,
                         chunk_rows=solve.chunk_rows)
        fit = fit.replaced(moved, sub)
    return win, fit


def _noise_pass(shaped: ShapedPass, noise_correlation: str) -> NoisePass:
    noise, var = estimate_noise(shaped.windows, shaped.fit, shaped.ok, shaped.table,
                                scan_correlation=noise_correlation == "auto")
    return NoisePass(noise=noise, pixel_variance=var)


def _weighted_pass(frame: _Frame, coarse: CoarsePass, shaped: ShapedPass, noise: NoisePass,
                   solve: _Solve) -> WeightedPass:
    win = shaped.windows
    n_lags = 2 * frame.half_max_px if noise.noise.correlated else 0
    x_start = np.where(shaped.ok, shaped.fit.x0, coarse.centres_px.ravel())
    fit = solve_rows(win.y, win.cols, win.mask / noise.pixel_variance, shaped.table, win.edge, x_start,
                     max_iterations=solve.max_iterations, tolerance_px=solve.tolerance_px,
                     chunk_rows=solve.chunk_rows, n_lags=n_lags,
                     lag_variance=noise.pixel_variance if n_lags else None)
    return WeightedPass(fit=fit, var_px2=position_variance(fit, noise.noise, n_lags))


def _aligned_profiles(win, x0, offset, gain, ok, hmax):
    """Per-edge mean of (y - offset) / gain against u = col - x0 in bins of _BIN_PX."""
    n_e = int(win.edge.max()) + 1
    edges_u = np.arange(-(hmax + 1), hmax + 1 + 1e-9, _BIN_PX)
    centres = 0.5 * (edges_u[:-1] + edges_u[1:])
    nb = centres.size
    use = ok[:, None] & win.mask
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (win.y - offset[:, None]) / gain[:, None]
    u = win.cols - x0[:, None]
    k = np.floor((u + hmax + 1) / _BIN_PX).astype(np.int64)
    use &= (k >= 0) & (k < nb) & np.isfinite(z)
    flat = (win.edge[:, None] * nb + k)[use]
    total = np.bincount(flat, weights=z[use], minlength=n_e * nb).reshape(n_e, nb)
    count = np.bincount(flat, minlength=n_e * nb).reshape(n_e, nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count >= 3, total / count, np.nan)
    return centres, mean


def _shapes(centres, mean, kind, groups, reach_px, starts=None, blur_change_px2=None):
    """One shape per group of edges (left: +1, right: -1), fitted on the group's pooled profile.

    The beam and material are common to the image, so pooling the edges of one side cuts the
    noise of the shape; each edge then gets only its own shift of the step centre, with the
    shape fixed (a free peak beside a free step centre trades one against the other).  A peak
    must lie inside the narrowest window of the group (``reach_px``: each edge's smaller
    reach); a shape pinned at a physical bound falls back to a plain blurred step.
    Returns per-edge callables for the table, per-edge shapes, per-edge shifts and whether
    the edge's shape fell back.
    """
    n_e = mean.shape[0]
    funcs, shapes, shifts = [None] * n_e, [None] * n_e, np.zeros(n_e)
    fallback = np.zeros(n_e, bool)
    for g in np.unique(groups):
        members = np.flatnonzero(groups == g)
        pooled = nanmean(mean[members], axis=0) if members.size else None
        start = None if starts is None else starts[members[0]]
        max_off = float(np.min(reach_px[members])) - 0.5
        # windows reaching less than _MIN_SHAPE_REACH_PX a side hold too little profile beside
        # the edge to tell a rim or halo from the neighbouring edge: a blurred step only
        narrow = max_off + 0.5 < _MIN_SHAPE_REACH_PX
        shape_kind = "step" if kind == "step" or narrow else "parametric"
        try:
            fitted, _ = fit_shape(centres, pooled, kind=shape_kind, start=start, peak_side=int(g),
                                  max_peak_offset_px=max_off)
            own = np.zeros(members.size)
            for _ in range(2):   # re-pool with each edge moved onto the common reference
                own = _shifts(centres, mean[members], fitted)
                pooled = nanmean([np.interp(centres, centres - sh_, mean[e], left=np.nan, right=np.nan)
                                     for e, sh_ in zip(members, own)], axis=0)
                fitted, extra = fit_shape(centres, pooled, kind=shape_kind, start=fitted, peak_side=int(g),
                                          max_peak_offset_px=max_off)
                own = own + extra
            if not is_physical(fitted, max_peak_offset_px=max_off):
                fitted, extra = fit_shape(centres, pooled, kind="step")
                own, fallback[members] = own + extra, True
        except (RuntimeError, ValueError):
            fitted, own = (start or EdgeShape(2.0)), np.zeros(members.size)
            fallback[members] = start is None
        shape = fitted
        if blur_change_px2 is not None:
            shape = adjust_blur(fitted, float(nanmean(blur_change_px2[members])))
        corr = None
        if kind == "template" and not narrow:
            aligned = nanmean([np.interp(centres, centres - sh_, mean[e], left=np.nan, right=np.nan)
                                  for e, sh_ in zip(members, own)], axis=0)
            mu = parametric_profile(centres, fitted)
            good = np.isfinite(aligned)
            if good.sum() >= 8 and np.ptp(mu[good]) > 0.1:      # enough of the profile to correct
                gain, offset = np.polyfit(mu[good], aligned[good], 1)   # the pooled z is not exactly 0..1
                corr = smoothed_correction(centres, (aligned - offset) / gain - mu)
        if corr is None:
            full = lambda u, derivative=False, s_=shape: parametric_profile(u, s_, derivative=derivative)
        else:
            full = (lambda u, derivative=False, s_=shape, c=corr:
                    parametric_profile(u, s_, derivative=derivative) + c(u, derivative=derivative))
        ref = half_level_offset(full, reach_px=min(12.0, max_off + 1.0))   # the crossing inside the window
        for e, sh_ in zip(members, own):
            funcs[e] = lambda u, derivative=False, f=full, r=ref: f(u + r, derivative=derivative)
            shapes[e], shifts[e] = shape, sh_ + ref
    return funcs, shapes, shifts, fallback


def _shifts(centres, z, shape: EdgeShape) -> np.ndarray:
    """Step-centre shift of each normalised mean profile (rows of ``z``, NaN where unknown) for
    the fixed ``shape``: the least-squares x0 of ``a + b mu(u - x0)``, all edges in one batched
    solve (the same optimum as :func:`edges.profiles.fit_shift`'s curve_fit, to the solver's
    tolerance); 0 where a profile has no solution (flat, or too few bins)."""
    ok = np.isfinite(z)
    n = z.shape[0]
    table = tabulate([lambda u, derivative=False: parametric_profile(u, shape, derivative=derivative)],
                     float(np.max(np.abs(centres))) + 4.0)
    fit = solve_rows(np.where(ok, z, 0.0), np.broadcast_to(np.asarray(centres, float), z.shape).copy(),
                     ok.astype(float), table, np.zeros(n, np.intp), np.zeros(n), max_iterations=50,
                     tolerance_px=1e-6, chunk_rows=4096)
    good = fit.converged & np.isfinite(fit.x0) & (ok.sum(axis=1) > 3)
    return np.where(good, fit.x0, 0.0)


def fit_edges(micrograph: Micrograph, *, profile_model: str = "template", window_px: int = 31,
              polarity: str = "auto", orientation: str = "auto", noise_correlation: str = "auto",
              max_iterations: int = 30, tolerance_px: float = 1e-4, chunk_rows: int = 4096,
              layout: LineLayout | None = None, precision_study: bool = True) -> EdgeTraces:
    """Fit an edge-profile model to every row of every edge of a micrograph.

    Parameters
    ----------
    micrograph : Micrograph
        Image with ``pixels`` of shape (n_rows, n_cols) and ``pixel_size_nm``.
    profile_model : {"template", "parametric", "step"}
        Edge-profile model (see :mod:`edges.profiles`).  Positions refer to the half-level
        point of each edge's mean profile.
    window_px : int
        Odd window width in pixels, centred on each edge (narrowed where neighbours are close).
    polarity, orientation : str
        Passed to :func:`edges.locate_edges`.
    noise_correlation : {"auto", "none"}
        ``"auto"`` estimates noise correlation along the scan and uses a sandwich covariance
        when it is present; ``"none"`` assumes independent pixels.
    max_iterations : int
        Levenberg-Marquardt iteration cap per row.
    tolerance_px : float
        Step size (px) below which a row has converged.
    chunk_rows : int
        Rows solved together (memory stays near chunk_rows x window).
    layout : LineLayout, optional
        A location already made (skips :func:`edges.locate_edges`).
    precision_study : bool
        Run the image's virtual twin (:mod:`edges._twin`): re-render sampled rows from the
        fitted imaging model at known positions, refit them, and scale the uncertainties by the
        ratio of the real scatter to the covariance (exact only at high contrast-to-noise).
        The study is returned in ``EdgeTraces.precision``.

    Returns
    -------
    EdgeTraces
        Positions and 1-sigma uncertainties in nm, shape (n_edges, n_rows); rows that failed
        are NaN with a reason code.

    References
    ----------
    Golub, G. & Pereyra, V. (2003). Separable nonlinear least squares: the variable projection
    method and its applications. Inverse Problems 19, R1.  doi:10.1088/0266-5611/19/2/201

    Examples
    --------
    >>> import numpy as np
    >>> from edges import Micrograph, SEMSettings, fit_edges, render_micrograph
    >>> left = np.array([[40.0] * 64, [104.0] * 64])
    >>> pixels, _ = render_micrograph(left, left + 32, n_cols=176, rng=np.random.default_rng(1),
    ...                               settings=SEMSettings(dose_per_pixel=200, edge_peak=0.0))
    >>> traces = fit_edges(Micrograph(pixels=pixels, pixel_size_nm=1.0))
    >>> traces.position_nm.shape
    (4, 64)
    >>> np.round(np.nanmean(traces.position_nm, axis=1)).tolist()   # no rim: the half-level point is the edge
    [40.0, 72.0, 104.0, 136.0]
    """
    if profile_model not in PROFILE_MODELS:
        raise ValueError(f"profile_model={profile_model!r}: must be one of {PROFILE_MODELS}")
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
    noise = NoiseModel()
    shapes_all = [None] * n_all
    study = None
    if idx.size:
        frame = _Frame(pixels=m.pixels, reach_left_px=np.array([layout.edges[i].reach_left_px for i in idx]),
                       reach_right_px=np.array([layout.edges[i].reach_right_px for i in idx]),
                       saturation=saturation_level(m), n_rows=n_rows,
                       sides=np.array([1 if layout.edges[i].side == "left" else -1 for i in idx]))
        solve = _Solve(max_iterations=max_iterations, tolerance_px=tolerance_px, chunk_rows=chunk_rows)
        coarse = _coarse_pass(frame, layout.guess_columns(np.arange(n_rows))[idx], solve)
        shaped = _realign_pass(frame, coarse, _shape_pass(frame, coarse, profile_model, solve), profile_model, solve)
        noise_pass = _noise_pass(shaped, noise_correlation)
        final = _weighted_pass(frame, coarse, shaped, noise_pass, solve)
        noise, res, win = noise_pass.noise, final.fit, shaped.windows
        code = fit_reason_codes(res, win, final.var_px2, idx.size)
        chi2_rows = res.rss / np.clip(res.n_used - 3, 1, None)
        code = flag_outlier_rows(chi2_rows.reshape(idx.size, n_rows), code.reshape(idx.size, n_rows),
                                 np.clip(res.n_used - 3, 1, None).reshape(idx.size, n_rows)).reshape(-1)
        valid = code == 0
        p = m.pixel_size_nm
        var_px2 = final.var_px2
        if precision_study:
            study = _study(frame, coarse, shaped, noise, res, valid, var_px2, solve)
            var_px2 = var_px2 * study.applied_calibration
            study = study.in_nm(p).expand(idx, n_all)
        pos[idx] = np.where(valid, res.x0 * p, np.nan).reshape(idx.size, n_rows)
        sig[idx] = np.where(valid, np.sqrt(np.abs(var_px2)) * p, np.nan).reshape(idx.size, n_rows)
        chi2[idx] = chi2_rows.reshape(idx.size, n_rows)
        iters[idx] = res.iterations.reshape(idx.size, n_rows)
        reason[idx] = code.reshape(idx.size, n_rows)
        cnr[idx] = _edge_cnr(res, valid, win.edge, idx.size, noise)
        flags[idx[~(cnr[idx] >= LOW_CONTRAST_CNR)]] = "low_contrast"
        for k in np.flatnonzero(shaped.shape_fallback):
            flags[idx[k]] = ",".join(f for f in (flags[idx[k]], "shape_fallback") if f)
        for k in np.flatnonzero(frame.reach_px <= CLOSE_NEIGHBOUR_PX):
            flags[idx[k]] = ",".join(f for f in (flags[idx[k]], "close_neighbour") if f)
        for k, i in enumerate(idx):
            shapes_all[i] = shaped.shapes[k]
    return EdgeTraces(
        position_nm=pos, sigma_nm=sig, valid=reason == 0, reason=reason,
        line_index=np.array([g.line_index for g in layout.edges]),
        side=np.array([g.side for g in layout.edges]),
        row_spacing_nm=m.pixel_size_nm, reduced_chi2=chi2, iterations=iters,
        contrast_to_noise=cnr, edge_flags=flags.astype(str), detector="model", profile_model=profile_model,
        source=m.source, noise_model=noise, rotated=m.rotated, profile_shapes=tuple(shapes_all), precision=study,
        bar_rows=layout.bar_rows)


def _study(frame: _Frame, coarse: CoarsePass, shaped: ShapedPass, noise: NoiseModel, res: RowFit, valid,
           var_px2, solve: _Solve):
    shape2 = (frame.n_edges, frame.n_rows)
    return run_twin(n_cols=frame.pixels.shape[1], reach_left_px=frame.reach_left_px,
                    reach_right_px=frame.reach_right_px, centres_px=coarse.centres_px,
                    x0_px=res.x0.reshape(shape2), offset=res.offset.reshape(shape2), gain=res.gain.reshape(shape2),
                    valid=valid.reshape(shape2), var_px2=var_px2.reshape(shape2), table=shaped.table, noise=noise,
                    coarse_table=_coarse_table(frame), grid_offsets_px=_coarse_grid(frame),
                    n_lags=2 * frame.half_max_px if noise.correlated else 0, max_iterations=solve.max_iterations,
                    tolerance_px=solve.tolerance_px, chunk_rows=solve.chunk_rows)


def _edge_cnr(res, valid, e_idx, n_edges, noise: NoiseModel):
    """Median over valid rows of step height over the noise sd at mid-step, per edge."""
    out = np.full(n_edges, np.nan)
    for e in range(n_edges):
        rows = (e_idx == e) & valid
        if rows.any():
            mid = res.offset[rows] + 0.5 * res.gain[rows]
            var = noise.variance_intercept + noise.variance_per_signal * mid
            out[e] = float(np.median(np.abs(res.gain[rows]) / np.sqrt(np.maximum(var, 1e-300))))
    return out
