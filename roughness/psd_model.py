"""Fit of the self-affine PSD model: PSD(0), correlation length, roughness exponent.

The *biased* averaged PSD is fitted with ``S1(f; sigma, xi, H) + N``, N the noise floor from the
fit covariance (fixed, or free where the covariance is not claimed calibrated), by maximising the
Whittle likelihood of the averaged periodogram (Whittle 1953).  Bins
k = 0..3 are left out (detrending and window leakage).  PSD(0) is a model parameter, never read
from bin 0.  Reported one-sided (quietedge's convention) and two-sided (the literature's).
Uncertainties: bootstrap over the units averaged (the traces of one image, the images of a
group); curve_fit's covariance assumes independent bins, and Hann-windowed bins are not.

References
----------
Whittle, P. (1953). Estimation and information in stationary time series. Arkiv for Matematik
2, 423-434.  doi:10.1007/BF02590998
Palasantzas, G. (1993). Roughness spectrum and surface width of self-affine fractal surfaces via
the K-correlation model. Phys. Rev. B 48, 14472.  doi:10.1103/PhysRevB.48.14472

Identifiability: H needs the roughness tail to rise above the floor well beyond the knee at
1 / (2 pi xi).  A common rule of thumb asks for 2 pi xi f_max >~ 10 (f_max where the model meets
the floor); in our checks 500 edges gave H within its bootstrap error already at 2 pi xi f_max ~ 7, so the
rule here is 2 pi xi f_max >= 5 *and* a bootstrap standard error of H below 0.2; otherwise H is
reported as not determined (NaN).

Nothing beyond the data is reported as a number: a correlation length whose knee
1 / (2 pi xi) lies below the second frequency bin (xi > L / (4 pi), L the line length), or below
half a row spacing, is not determined, and then neither are PSD(0) and the sigma of an infinite
line (both extrapolate through the knee); nor is any parameter whose bootstrap standard error
exceeds its value, or an exponent stopped at a bound of the fit.  ``PSDModelFit.not_determined``
says which and why.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ._selfaffine import psd0_two_sided, self_affine_psd, two_sided_from_one_sided

__all__ = ["PSDModelFit", "fit_psd_model", "correlation_length_from_acf", "MAX_CORRELATION_FRACTION",
           "PARAMETER_NAMES"]

#: Plain names of the parameters in ``PSDModelFit.not_determined``.
PARAMETER_NAMES = {"sigma": "sigma of an infinitely long line", "correlation_length": "correlation length",
                   "roughness_exponent": "roughness exponent", "psd0": "PSD(0)"}
#: Bounds of the fit in (ln sigma, ln xi, H).
_LOWER, _UPPER = (-10.0, -5.0, 0.05), (10.0, 12.0, 2.0)
#: Largest correlation length reported, as a fraction of the line length: the knee of the PSD,
#: 1 / (2 pi xi), must lie at or above the second frequency bin 2 / L, else the PSD holds no
#: flattening to read xi (and PSD(0), and the sigma of an infinite line) from.
MAX_CORRELATION_FRACTION = 1.0 / (4 * math.pi)


@dataclass(frozen=True)
class PSDModelFit:
    """Self-affine model fitted to an averaged PSD.

    Attributes
    ----------
    sigma_nm : float
        sigma of the infinitely long line (the model's sigma^2 = integral of the PSD).
    correlation_length_nm, roughness_exponent : float
    psd0_nm3, psd0_two_sided_nm3 : float
        PSD(0), one-sided (quietedge) and two-sided (literature).
    *_se : float
        Bootstrap standard errors (NaN without resamples).
    h_determined : bool
    fit_min_per_nm, fit_max_per_nm : float
        Frequency range used.
    floor_nm3 : float
        Mean noise floor in the model over the fitted band (the covariance's, or the fitted one).
    floor_mode : str
        ``"fixed"`` or ``"free"``.
    not_determined : tuple of (str, str)
        Parameters reported as NaN and why: ``("correlation_length", "longer than ...")``.
        Values beyond the data (a correlation length beyond a fraction of the line length), a
        standard error larger than the value, or an exponent at a bound of the fit are never
        reported as numbers.
    fitted : tuple of float
        The raw (sigma, xi, H) of the fit, for drawing the curve over the fitted band only.
    """

    sigma_nm: float
    correlation_length_nm: float
    roughness_exponent: float
    psd0_nm3: float
    psd0_two_sided_nm3: float
    sigma_se_nm: float
    correlation_length_se_nm: float
    roughness_exponent_se: float
    psd0_se_nm3: float
    h_determined: bool
    fit_min_per_nm: float
    fit_max_per_nm: float
    floor_nm3: float = math.nan
    floor_mode: str = "fixed"
    not_determined: tuple = ()
    fitted: tuple = ()

    @property
    def determined(self) -> bool:
        """Whether every parameter was determined."""
        return not self.not_determined

    def reason(self, parameter: str) -> str:
        """Why ``parameter`` ("sigma", "correlation_length", "roughness_exponent", "psd0") is
        not determined; ``""`` when it is."""
        return "; ".join(r for p, r in self.not_determined if p == parameter)

    def model_nm3(self, frequency_per_nm):
        """One-sided model PSD (roughness only) at the given frequencies, from the fitted values
        (also where a parameter is not determined: the curve describes the fitted band)."""
        s, xi, h = self.fitted if self.fitted else (self.sigma_nm, self.correlation_length_nm,
                                                    self.roughness_exponent)
        return self_affine_psd(frequency_per_nm, sigma_nm=s, correlation_length_nm=xi, roughness_exponent=h)


def _fit_once(f, p, floor, start, free_floor=False, extra_starts=True):
    """Whittle fit: minimise sum_k [ln M_k + P_k / M_k] over (ln sigma, ln xi, H[, ln scale]).

    The Whittle likelihood is the exact likelihood of independent exponential (or averaged,
    Gamma) periodogram ordinates, so unlike least squares on logarithms it needs no correction
    for the mean of a log and stays unbiased with the few traces of one image (Whittle 1953).
    ``floor`` is the noise floor per bin; a free floor is that shape times a fitted scale.
    Returns (sigma, xi, H, floor scale).
    """
    def cost(theta):
        s, xi, h = math.exp(theta[0]), math.exp(theta[1]), theta[2]
        n = floor * math.exp(theta[3]) if free_floor else floor
        model = self_affine_psd(f, sigma_nm=s, correlation_length_nm=xi, roughness_exponent=h) + n
        return float(np.sum(np.log(model) + p / model))

    lo, hi = list(_LOWER), list(_UPPER)
    start = list(start)
    if free_floor:
        start, lo, hi = start + [0.0], lo + [-5.0], hi + [5.0]
    best = None
    for h0 in ((start[2], 0.4, 1.0) if extra_starts else (start[2],)):   # the cost is not convex in H
        r = optimize.minimize(cost, start[:2] + [h0] + start[3:], bounds=list(zip(lo, hi)), method="L-BFGS-B")
        if best is None or r.fun < best.fun:
            best = r
    scale = math.exp(best.x[3]) if free_floor else 1.0
    return np.array([math.exp(best.x[0]), math.exp(best.x[1]), best.x[2], scale])


def fit_psd_model(frequency_per_nm, psd_nm3, floor_nm3, *, weights=None, window: str = "hann",
                  skip_bins: int = 4, n_resamples: int = 100, floor: str = "fixed",
                  rng: np.random.Generator | None = None) -> PSDModelFit:
    """Fit sigma, xi, H to the biased PSDs of several traces.

    ``floor="fixed"`` holds the noise floor at ``floor_nm3`` (the fit covariance's);
    ``floor="free"`` fits it too, starting there.  Free is the choice where the covariance is
    not claimed calibrated (contrast-to-noise below about 5 it under-states the scatter by a
    few per cent, and a floor 10% low already pulls H down by ~0.1).

    Parameters
    ----------
    frequency_per_nm : (n_freq,) ndarray
        Cycles per nm.
    psd_nm3 : (n_units, n_freq) ndarray
        One-sided biased PSDs (nm^3) of the units averaged: traces of one image, or the mean
        PSDs of several images on a common grid.
    floor_nm3 : float, (n_units,) or (n_units, n_freq) ndarray
        Their noise floors (nm^3): white levels, or per frequency (noise correlated between rows).
    weights : (n_units,) ndarray, optional
        Weights of the units in the average (e.g. traces times line length); equal if None.
    window : {"hann", "boxcar"}
        Taper the periodograms were computed with.
    skip_bins : int
        Lowest bins left out (detrending and window leakage).
    n_resamples : int
        Bootstrap resamples of the units for the standard errors (none below 5 units).
    floor : {"fixed", "free"}
    rng : numpy.random.Generator, optional
        Source of the resampling; None draws fresh entropy.

    Returns
    -------
    PSDModelFit

    Examples
    --------
    >>> import numpy as np
    >>> from roughness.psd_model import fit_psd_model
    >>> from roughness._selfaffine import self_affine_psd
    >>> f = np.fft.rfftfreq(1024, 1.0)
    >>> p = self_affine_psd(f, sigma_nm=1.5, correlation_length_nm=10.0, roughness_exponent=0.7) + 0.02
    >>> m = fit_psd_model(f, p[None, :], 0.02, n_resamples=0)
    >>> round(m.correlation_length_nm, 1), round(m.roughness_exponent, 2)
    (10.0, 0.7)
    """
    f = np.asarray(frequency_per_nm, float)
    p = np.atleast_2d(np.asarray(psd_nm3, float))
    fl = np.asarray(floor_nm3, float)
    floors = np.broadcast_to(fl[:, None] if fl.ndim == 1 and fl.size == p.shape[0] else fl, p.shape)
    wts = np.ones(p.shape[0]) if weights is None else np.broadcast_to(np.asarray(weights, float), (p.shape[0],))
    if floor not in ("fixed", "free"):
        raise ValueError(f"floor={floor!r}: must be 'fixed' or 'free'")
    n_tr, n_f = p.shape
    if n_tr < 1 or n_f < skip_bins + 6:
        raise ValueError(f"psd_nm3 of shape {p.shape}: needs at least one trace and {skip_bins + 6} bins")
    sel = np.arange(n_f) >= skip_bins
    sel[-1] = False                        # the last bin may be Nyquist's (chi-square, 1 dof)
    rng = np.random.default_rng() if rng is None else rng

    def fit(rows, around=None):
        w = wts[rows] / wts[rows].sum()
        mean = w @ p[rows] if weights is not None else p[rows].mean(axis=0)
        floor_ = w @ floors[rows] if weights is not None else floors[rows].mean(axis=0)
        var0 = float(np.sum(mean[1:] - floor_[1:]) * (f[1] - f[0]))
        s0 = math.sqrt(max(var0, 1e-6))
        # xi start from the half-power point of the floor-corrected spectrum
        roughness = mean - floor_
        half = np.flatnonzero(roughness[sel] < 0.5 * np.max(roughness[sel][:3]))
        f_half = f[sel][half[0]] if half.size else f[sel][-1] / 4
        xi0 = 1.0 / (2 * math.pi * max(f_half, 1e-6))
        good = sel & (mean > 0) & (floor_ >= 0)
        start = [math.log(s0), math.log(xi0), 0.7] if around is None else \
            [math.log(around[0]), math.log(around[1]), around[2]]
        theta = _fit_once(f[good], mean[good], floor_[good], start, free_floor=floor == "free",
                          extra_starts=around is None)
        return theta, float(np.mean(floor_[sel]) * theta[3])

    theta, floor_used = fit(np.arange(n_tr))
    boots = []
    if n_resamples and n_tr >= 5:
        for _ in range(n_resamples):
            boots.append(fit(rng.integers(0, n_tr, n_tr), around=theta)[0][:3])   # resamples start at the fit
    boots = np.array(boots) if boots else np.full((1, 3), np.nan)
    se = np.nanstd(boots, axis=0, ddof=1) if boots.shape[0] > 1 else np.full(3, np.nan)
    s, xi, h, _ = theta
    model = self_affine_psd(f, sigma_nm=s, correlation_length_nm=xi, roughness_exponent=h)
    above = np.flatnonzero(model[1:] > floor_used)
    f_max = f[1:][above[-1]] if above.size else f[1]
    psd0_1 = 2 * psd0_two_sided(s, xi, h)
    psd0_boot = np.array([2 * psd0_two_sided(*b) for b in boots]) if np.all(np.isfinite(boots)) else np.array([np.nan])
    psd0_se = float(np.std(psd0_boot, ddof=1)) if psd0_boot.size > 1 else math.nan
    # what the data cannot tell (reported as not determined, never as a number)
    length = 1.0 / (f[1] - f[0])
    spacing = 0.5 / f[-1]                      # the row spacing (to within 1/N)
    why = []
    if xi > MAX_CORRELATION_FRACTION * length:
        why.append(("correlation_length", f"longer than {MAX_CORRELATION_FRACTION:.2f} of the line length "
                                          f"({length:.4g} nm): the PSD shows no flattening to read it from"))
    elif xi < 0.5 * spacing:
        why.append(("correlation_length", f"shorter than half a row spacing ({0.5 * spacing:.3g} nm)"))
    elif se[1] > xi:
        why.append(("correlation_length", f"its standard error ({se[1]:.3g} nm) exceeds the value"))
    if any(p_ == "correlation_length" for p_, _ in why):
        why.append(("sigma", "needs the correlation length"))
        why.append(("psd0", "needs the correlation length"))
    else:
        if se[0] > s:
            why.append(("sigma", "its standard error exceeds the value"))
        if psd0_se > psd0_1:
            why.append(("psd0", "its standard error exceeds the value"))
    if min(h - _LOWER[2], _UPPER[2] - h) < 0.01:
        why.append(("roughness_exponent", f"the fit stopped at the bound {(_LOWER[2] if h < 1 else _UPPER[2]):g}"))
    elif not 2 * math.pi * xi * f_max >= 5:
        why.append(("roughness_exponent", "the roughness does not rise above the noise well beyond the knee"))
    elif se[2] > 0.2:
        why.append(("roughness_exponent", f"its standard error ({se[2]:.2f}) exceeds 0.2"))
    bad = {p_ for p_, _ in why}
    nan = math.nan

    def keep(name, value):
        return nan if name in bad else float(value)

    return PSDModelFit(sigma_nm=keep("sigma", s), correlation_length_nm=keep("correlation_length", xi),
                       roughness_exponent=keep("roughness_exponent", h),
                       psd0_nm3=keep("psd0", psd0_1),
                       psd0_two_sided_nm3=keep("psd0", two_sided_from_one_sided(psd0_1)),
                       sigma_se_nm=keep("sigma", se[0]), correlation_length_se_nm=keep("correlation_length", se[1]),
                       roughness_exponent_se=keep("roughness_exponent", se[2]),
                       psd0_se_nm3=keep("psd0", psd0_se),
                       h_determined="roughness_exponent" not in bad, fit_min_per_nm=float(f[sel][0]),
                       fit_max_per_nm=float(f[sel][-1]), floor_nm3=floor_used, floor_mode=floor,
                       not_determined=tuple(why), fitted=(float(s), float(xi), float(h)))


def correlation_length_from_acf(acf_nm2, *, noise_var_nm2: float, row_spacing_nm: float) -> float:
    """Model-free correlation length: first 1/e crossing of the noise-corrected ACF (nm).

    The biased ACF's lag-0 value holds the noise variance too; it is normalised by
    ``R(0) - noise_var``, then linearly interpolated.  Biased low by detrending
    when L / xi < ~50.

    Examples
    --------
    >>> import numpy as np
    >>> acf = np.exp(-np.arange(100) / 8.0)          # exponential ACF, xi = 8 rows
    >>> round(correlation_length_from_acf(acf, noise_var_nm2=0.0, row_spacing_nm=1.0), 2)
    8.0
    """
    acf = np.asarray(acf_nm2, float)
    r0 = acf[0] - noise_var_nm2
    if not r0 > 0:
        return math.nan
    rho = acf[1:] / r0
    below = np.flatnonzero(rho < math.exp(-1))
    if below.size == 0:
        return math.nan
    k = below[0]                              # lag index k + 1
    prev = 1.0 if k == 0 else rho[k - 1]
    frac = (prev - math.exp(-1)) / (prev - rho[k])
    return float((k + frac) * row_spacing_nm)
