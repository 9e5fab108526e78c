"""Edge-profile models, tabulated for the batched per-row fit.

Coordinates are in pixels: ``u = column - x0``, with ``x0`` the edge position.  Every model is a
shape ``mu(u)`` that goes from 0 far on one side to 1 far on the other; a row's model is
``offset + gain * mu(column - x0)``, the gain negative for an edge that falls to the right.

Parametric model (the pixel-integrated blurred step with an edge peak)::

    mu(u) = B(u; s) + h * sqrt(2 pi) w * [Phi((u - d + 1/2) / w) - Phi((u - d - 1/2) / w)]
    B(u; s) = [G(u + 1/2) - G(u - 1/2)],  G(v) = v Phi(v / s) + s phi(v / s)

i.e. a Gaussian-blurred unit step (blur ``s``) and a Gaussian peak (height ``h`` relative to the
step, width ``w``, centred ``d`` from the step), both averaged over the one-pixel-wide pixel.
**Reference point:** ``x0`` is the centre of the blurred step, which is where the physical edge of
a rendered step lies whatever the peak.  The template model keeps the same reference: it is the
parametric fit of the image's own aligned mean edge profile plus a smoothed correction for what
the parametric form misses, so both models report the same point of the profile.

Shapes are fitted once per edge (on the row-aligned mean profile); rows then fit only position,
gain and offset.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize, special

__all__ = ["EdgeShape", "ProfileTable", "parametric_profile", "fit_shape", "tabulate"]

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
        t = (u - self.start_px) / self.step_px
        np.clip(t, 0.0, n_grid - 1.000001, out=t)
        i = t.astype(np.intp)
        f = t - i
        flat = i + (edge * n_grid)[:, None]
        v, sl = self.values.ravel(), self.slopes.ravel()
        v0 = v[flat]
        dv = v[flat + 1] - v0
        s0 = sl[flat] * self.step_px
        s1 = sl[flat + 1] * self.step_px
        f2 = f * f
        mu = v0 + f2 * (3.0 - 2.0 * f) * dv + f * (1.0 - f) * ((1.0 - f) * s0 - f * s1)
        if not with_slope:
            return mu, None
        dmu = (6.0 * f * (1.0 - f) * dv + (1.0 - f) * (1.0 - 3.0 * f) * s0 + f * (3.0 * f - 2.0) * s1)
        return mu, dmu / self.step_px


def tabulate(functions, half_range_px: float) -> ProfileTable:
    """Tabulate callables ``f(u, derivative=False)`` on a common grid of +-half_range_px."""
    n = int(math.ceil(2 * half_range_px / GRID_STEP_PX)) + 1
    u = -half_range_px + GRID_STEP_PX * np.arange(n)
    values = np.stack([f(u) for f in functions])
    slopes = np.stack([f(u, derivative=True) for f in functions])
    return ProfileTable(start_px=-half_range_px, step_px=GRID_STEP_PX, values=values, slopes=slopes)


def fit_shape(u, z, *, kind: str, start: EdgeShape) -> tuple[EdgeShape, float]:
    """Fit a shape to an aligned, normalised mean profile z(u) (step from ~0 to ~1).

    Returns the shape and the shift of its step centre from u = 0 (to add to positions).
    ``kind`` is ``"parametric"`` (step and peak) or ``"step"`` (no peak).
    """
    ok = np.isfinite(z)
    u, z = u[ok], z[ok]

    def model(uu, x0, a, b, s, h=0.0, d=0.0, w=1.0):   # peak offset d measured from the step centre
        return a + b * parametric_profile(uu - x0, EdgeShape(s, h, d, w))

    step_p0 = [0.0, 0.0, 1.0, start.blur_px]
    step_lo, step_hi = [-5, -1, 0.2, 0.15], [5, 1, 5, 30]
    if kind == "step" or not start.peak_height:
        step_p, _ = optimize.curve_fit(model, u, z, p0=step_p0, bounds=(step_lo, step_hi), maxfev=4000)
        if kind == "step":
            return EdgeShape(float(step_p[3])), float(step_p[0])
        # peak start: the largest residual of the step fit near the edge
        near = np.abs(u - step_p[0]) < 3 * step_p[3] + 4
        resid = np.where(near, z - model(u, *step_p), 0.0)
        k = int(np.argmax(np.abs(resid)))
        p0 = [*step_p, resid[k] / step_p[2], u[k] - step_p[0], 1.0]
    else:
        p0 = [0.0, 0.0, 1.0, start.blur_px, start.peak_height, start.peak_offset_px, start.peak_width_px]
    reach = 3 * p0[3] + 4
    lower = [-5, -1, 0.2, 0.15, -5, -reach, 0.3]
    upper = [5, 1, 5, 30, 5, reach, 8]
    p0 = np.clip(p0, np.add(lower, 1e-9), np.subtract(upper, 1e-9))
    popt, _ = optimize.curve_fit(model, u, z, p0=p0, bounds=(lower, upper), maxfev=4000)
    x0, _, _, s, h, d, w = (float(v) for v in popt)
    return EdgeShape(s, h, d, w), x0


def correct_self_alignment(shape: EdgeShape, variance_px2: float) -> EdgeShape:
    """Undo the sharpening of a mean profile aligned on each row's own fitted position.

    To first order in the position error e of a row, the aligned mean is
    mu + (1/2) var(e) mu'' (misalignment blurs) - var(e) mu'' (e is correlated with the row's
    own noise, which the alignment therefore stacks coherently), i.e. *sharper* than the true
    profile by ``var(e)``: blur^2 and peak width^2 are increased by it (the peak keeps its area).
    Checked on renders: aligned blur 1.967 px against a true 2.000 px at var(e) = 0.107 px^2.
    """
    s = math.sqrt(max(shape.blur_px ** 2 + variance_px2, 0.04))
    if not shape.peak_height:
        return EdgeShape(s)
    w = math.sqrt(max(shape.peak_width_px ** 2 + variance_px2, 0.04))
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
