"""Edge-profile models, tabulated for the batched per-row fit.

Coordinates are in pixels: ``u = column - x0``, with ``x0`` the edge position.  Every model is a
shape ``mu(u)`` that goes from 0 far on one side to 1 far on the other; a row's model is
``offset + gain * mu(column - x0)``, the gain negative for an edge that falls to the right.

Parametric model (the pixel-integrated blurred step with an edge peak)::

    mu(u) = B(u; s) + h * sqrt(2 pi) w * [Phi((u - d + 1/2) / w) - Phi((u - d - 1/2) / w)]
    B(u; s) = [G(u + 1/2) - G(u - 1/2)],  G(v) = v Phi(v / s) + s phi(v / s)

i.e. a Gaussian-blurred unit step (blur ``s``) and a Gaussian peak (height ``h`` relative to the
step, width ``w``, centred ``d`` from the step), both averaged over the one-pixel-wide pixel.
**Reference point** (what a reported edge position means): the column where the edge's mean
profile is half-way between its two plateaus (:func:`half_level_offset`), the crossing nearest
the step.  For a plain blurred step this is the step centre, i.e. the physical edge of a
rendered step; with a bright rim it moves by a constant towards the rim.  The template model is
the parametric fit of the image's own aligned mean profile plus a smoothed correction for what
the parametric form misses; both models use the same reference.  (Parametrically, ``mu``'s
``u = 0`` is the centre of the blurred step, which is where the physical edge of
a rendered step lies whatever the peak.

Shapes are fitted once per edge (on the row-aligned mean profile); rows then fit only position,
gain and offset.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize, special

__all__ = ["PROFILE_MODELS", "PEAK_HEIGHT_RANGE", "is_physical", "EdgeShape", "ProfileTable", "parametric_profile", "fit_shape", "fit_shift", "tabulate",
           "adjust_blur", "half_level_offset"]

#: Profile models of the fit: the image's own mean profile (``template``), the parametric
#: blurred step with rim (``parametric``), and a plain blurred step (``step``).
PROFILE_MODELS = ("template", "parametric", "step")

_SQRT2PI = math.sqrt(2 * math.pi)
GRID_STEP_PX = 1.0 / 32.0


@dataclass(frozen=True)
class EdgeShape:
    """Shape parameters of one edge, pixels.  ``peak_height`` is relative to the step height."""

    blur_px: float
    peak_height: float = 0.0
    peak_offset_px: float = 0.0
    peak_width_px: float = 1.0


def _box_step(u, s):
    def prim(v):
        z = v / s
        return v * special.ndtr(z) + s * np.exp(-0.5 * z * z) / _SQRT2PI

    return prim(u + 0.5) - prim(u - 0.5)


def _box_step_slope(u, s):
    return special.ndtr((u + 0.5) / s) - special.ndtr((u - 0.5) / s)


def parametric_profile(u, shape: EdgeShape, *, derivative: bool = False):
    """mu(u) of the pixel-integrated parametric model (or d mu / du)."""
    u = np.asarray(u, float)
    s, h, d, w = shape.blur_px, shape.peak_height, shape.peak_offset_px, shape.peak_width_px
    if not derivative:
        out = _box_step(u, s)
        if h:
            out = out + h * _SQRT2PI * w * (special.ndtr((u - d + 0.5) / w) - special.ndtr((u - d - 0.5) / w))
        return out
    out = _box_step_slope(u, s)
    if h:
        g = lambda v: np.exp(-0.5 * (v / w) ** 2)
        out = out + h * (g(u - d + 0.5) - g(u - d - 0.5))
    return out


@dataclass(frozen=True)
class ProfileTable:
    """Shapes of several edges tabulated on one grid for fast batched evaluation.

    Attributes
    ----------
    start_px, step_px : float
        Grid ``u_k = start_px + k * step_px``.
    values, slopes : (n_edges, n_grid) ndarray
        mu and d mu / du.  Beyond the grid the profile is held at its end values.
    """

    start_px: float
    step_px: float
    values: np.ndarray
    slopes: np.ndarray

    def evaluate(self, edge, u, *, with_slope: bool = True):
        """mu (and d mu/du) for rows of edges ``edge`` ((n,) int) at ``u`` ((n, w)).

        Cubic Hermite interpolation of the tabulated values and slopes: the interpolant is
        continuously differentiable and its derivative is exactly the returned slope, so the
        Gauss-Newton steps see a smooth objective.
        """
        n_grid = self.values.shape[1]
        f = u - self.start_px
        f *= 1.0 / self.step_px
        np.clip(f, 0.0, n_grid - 1.000001, out=f)
        i = f.astype(np.intp)
        f -= i                                   # the fraction of the interval
        i += (edge * n_grid)[:, None]
        # the interval's power-basis coefficients (np.take: faster than fancy indexing), Horner
        c0, c1, c2, c3 = (np.take(c, i) for c in self._coefficients)
        mu = c3 * f
        mu += c2
        mu *= f
        mu += c1
        mu *= f
        mu += c0
        if not with_slope:
            return mu, None
        c3 *= 3.0
        c3 *= f
        c2 *= 2.0
        c3 += c2
        c3 *= f
        c3 += c1
        c3 *= 1.0 / self.step_px
        return mu, c3

    @property
    def _coefficients(self) -> tuple:
        """Four contiguous (n_edges * n_grid,) arrays: the power-basis coefficients of each
        interval's cubic Hermite polynomial in the fraction f of the interval (the last grid
        point holds the end value)."""
        cached = self.__dict__.get("_coef")
        if cached is None:
            v, sl = self.values, self.slopes * self.step_px
            dv = np.diff(v, axis=1, append=v[:, -1:])
            s0 = sl
            s1 = np.concatenate([sl[:, 1:], sl[:, -1:]], axis=1)
            cached = tuple(np.ascontiguousarray(a, dtype=np.float64).ravel()
                           for a in (v, s0, 3.0 * dv - 2.0 * s0 - s1, s0 + s1 - 2.0 * dv))
            object.__setattr__(self, "_coef", cached)
        return cached


def tabulate(functions, half_range_px: float) -> ProfileTable:
    """Tabulate callables ``f(u, derivative=False)`` on a common grid of +-half_range_px."""
    n = int(math.ceil(2 * half_range_px / GRID_STEP_PX)) + 1
    u = -half_range_px + GRID_STEP_PX * np.arange(n)
    values = np.stack([f(u) for f in functions])
    slopes = np.stack([f(u, derivative=True) for f in functions])
    return ProfileTable(start_px=-half_range_px, step_px=GRID_STEP_PX, values=values, slopes=slopes)


def _curve_fit(*args, **kwargs):
    """scipy.optimize.curve_fit without its covariance warning: only the parameters are used
    (a flat profile, where the covariance is undefined, is judged by the caller's checks)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", optimize.OptimizeWarning)
        return optimize.curve_fit(*args, **kwargs)


def _profile_model(uu, x0, a, b, s, h=0.0, d=0.0, w=1.0):
    """offset + gain * mu(u - x0); the peak offset d is measured from the step centre."""
    return a + b * parametric_profile(uu - x0, EdgeShape(s, h, d, w))


#: Physical range of an edge peak's height relative to the step: a bright bloom up to three
#: step heights, a dark halo down to one (common practice for secondary-electron profiles).
#: (A wider negative range, for the rims of falling edges of dark lines, let the peak wander into
#: wide, blurred optima in our benchmark; those edges fit with a step and their template.)
PEAK_HEIGHT_RANGE = (-1.0, 3.0)


def is_physical(shape: EdgeShape, *, max_peak_offset_px: float = np.inf) -> bool:
    """Whether a fitted shape lies strictly inside the physical bounds (not pinned at one).

    A fit pinned at a bound has taken a form no SEM edge has (a peak outside the window, a
    dip that swallows the neighbouring edge); the caller falls back to a plain step.
    """
    tol = 1e-3
    lo, hi = PEAK_HEIGHT_RANGE
    if not (0.2 + tol < shape.blur_px < 5 - tol):
        return False
    if shape.peak_height == 0.0:
        return True
    return bool(lo + tol < shape.peak_height < hi - tol and abs(shape.peak_offset_px) < max_peak_offset_px - tol
                and 0.3 + tol < shape.peak_width_px < min(8.0, max_peak_offset_px + 1.0) - tol)


def fit_shape(u, z, *, kind: str, start: EdgeShape | None = None, peak_side: int = 0,
              max_peak_offset_px: float = np.inf) -> tuple[EdgeShape, float]:
    """Fit a shape to an aligned, normalised mean profile z(u) (step from ~0 to ~1).

    Returns the shape and the shift of its step centre from u = 0 (to add to positions).
    ``kind`` is ``"parametric"`` (step and peak) or ``"step"`` (no peak).  Without ``start``
    the peaked model is fitted from several starts (step centre and peak on either side) and
    the best least-squares fit is kept: a bright rim beside a step has a second optimum with
    the step hidden under the rim.  ``peak_side`` (+1 or -1, 0 for free) keeps the peak on the
    side of the step where the line lies (+1 for a line's left edge, whose line is at larger
    columns), which rules that optimum out.  With ``start`` the fit starts there only.
    The peak stays within ``max_peak_offset_px`` of the step (inside the fit window) and its
    height within :data:`PEAK_HEIGHT_RANGE`; :func:`is_physical` tells whether a bound was hit.
    """
    ok = np.isfinite(z)
    u, z = u[ok], z[ok]
    step_lo, step_hi = [-8, -1, 0.2, 0.15], [8, 1, 5, 30]
    if start is not None and (kind == "step" or start.peak_height):
        p_init = [[0.0, 0.0, 1.0, start.blur_px] + ([start.peak_height, start.peak_offset_px,
                                                     start.peak_width_px] if kind != "step" else [])]
    else:
        sp, _ = _curve_fit(_profile_model, u, z, p0=[0.0, 0.0, 1.0, 2.0],
                                   bounds=(step_lo, step_hi), maxfev=4000)
        if kind == "step":
            return EdgeShape(float(sp[3])), float(sp[0])
        near = np.abs(u - sp[0]) < 3 * sp[3] + 4
        resid = np.where(near, z - _profile_model(u, *sp), 0.0)
        k = int(np.argmax(np.abs(resid)))
        p_init = [[*sp, resid[k] / sp[2], u[k] - sp[0], 1.0]]
        sides = (peak_side,) if peak_side else (-1, 1)
        for dx in (-3.0, 0.0, 3.0):
            for dd in (2.0,):
                for sd in sides:
                    p_init.append([sp[0] + dx, sp[1], sp[2], sp[3], 0.5, sd * dd, 1.5])
    best, best_cost = None, np.inf
    for p0 in p_init:
        if kind == "step":
            lower, upper = step_lo, step_hi
        else:
            reach = min(3 * p0[3] + 8, max_peak_offset_px)
            width = min(8.0, max_peak_offset_px + 1.0)
            lower = step_lo + [PEAK_HEIGHT_RANGE[0], 0.0 if peak_side > 0 else -reach, 0.3]
            upper = step_hi + [PEAK_HEIGHT_RANGE[1], 0.0 if peak_side < 0 else reach, width]
        p0 = np.clip(p0, np.add(lower, 1e-9), np.subtract(upper, 1e-9))
        try:
            popt, _ = _curve_fit(_profile_model, u, z, p0=p0, bounds=(lower, upper), maxfev=4000)
        except RuntimeError:
            continue
        cost = np.sum((z - _profile_model(u, *popt)) ** 2)
        if cost < best_cost:
            best, best_cost = popt, cost
    if best is None:
        raise RuntimeError("no shape fit converged")
    if kind == "step":
        return EdgeShape(float(best[3])), float(best[0])
    x0, _, _, s, h, d, w = (float(v) for v in best)
    return EdgeShape(s, h, d, w), x0


def half_level_offset(profile, *, reach_px: float = 12.0) -> float:
    """u where ``profile(u)`` (rising from 0 to 1) crosses 1/2, the crossing nearest u = 0.

    This is the edge's **reference point**.  It depends only on the profile, not on how a
    parametric form splits it into step and peak (a rim beside a step is nearly degenerate with
    a shifted step under the rim, yet both give the same half-level point).
    """
    u = np.linspace(-reach_px, reach_px, int(64 * reach_px) + 1)
    d = profile(u) - 0.5
    k = np.flatnonzero(np.sign(d[:-1]) != np.sign(d[1:]))
    if k.size == 0:
        return 0.0
    k = k[np.argmin(np.abs(u[k]))]
    return float(optimize.brentq(lambda x: float(profile(np.array([x]))[0]) - 0.5, u[k], u[k + 1]))


def fit_shift(u, z, profile) -> float:
    """Step-centre shift of a normalised mean profile for a fixed shape ``profile(u)``."""
    ok = np.isfinite(z)
    u, z = u[ok], z[ok]
    popt, _ = _curve_fit(lambda uu, x0, a, b: a + b * profile(uu - x0), u, z, p0=[0.0, 0.0, 1.0])
    return float(popt[0])


def adjust_blur(shape: EdgeShape, delta_variance_px2: float) -> EdgeShape:
    """Add ``delta_variance_px2`` (negative to remove) to the blur^2 and peak width^2.

    Two uses in the fit.  (1) A mean profile aligned on each row's *own* fitted position is
    sharper than the true profile by var(e), e the position error: to first order the aligned
    mean is mu + (1/2) var(e) mu'' (misalignment blurs) - var(e) mu'' (e is correlated with the
    row's own noise, which the alignment stacks coherently); so var(e) is added back (checked on
    renders: aligned blur 1.967 px against a true 2.000 px at var(e) = 0.107 px^2).  (2) A
    profile aligned on a smooth centre line is blurred by the edge's roughness, which is
    removed.  The peak keeps its area.
    """
    s = math.sqrt(max(shape.blur_px ** 2 + delta_variance_px2, 0.04))
    if not shape.peak_height:
        return EdgeShape(s)
    w = math.sqrt(max(shape.peak_width_px ** 2 + delta_variance_px2, 0.04))
    return EdgeShape(s, shape.peak_height * shape.peak_width_px / w, shape.peak_offset_px, w)


def smoothed_correction(u_bins, residual, *, smooth_px: float = 0.5):
    """Callable correction c(u) from binned residuals, smoothed, held constant beyond the data."""
    ok = np.isfinite(residual)
    r = np.where(ok, residual, 0.0)
    step = u_bins[1] - u_bins[0]
    r = ndimage.gaussian_filter1d(r, smooth_px / step)
    slope = np.gradient(r, step)
    lo, hi = u_bins[ok].min(), u_bins[ok].max()

    def corr(u, derivative=False):
        if derivative:
            return np.where((u < lo) | (u > hi), 0.0, np.interp(u, u_bins, slope))
        return np.interp(u, u_bins, r)      # held at its end values beyond the data

    return corr
