"""Noise floor from the fit covariance, and the high-frequency plateau as a cross-check.

Independent per-row edge errors of variance s_i^2 give a white one-sided floor
``2 dy sum_i w_i^2 s_i^2 / sum_i w_i^2`` (the w^2-weighted mean; the plain mean for the boxcar
window).  A detrended trace keeps the noise share ``sigma_n^2 = (1/N) sum_i s_i^2 (1 - P_ii)``,
P the detrend projection: subtracting the plain mean of s^2 would add a bias of
-(p/N) mean(s^2).
"""
from __future__ import annotations

import math

import numpy as np

from .psd import detrend_basis, window_values

__all__ = ["noise_floor_nm3", "noise_variance_nm2", "floor_shape", "plateau_floor", "floors_disagree"]


def noise_floor_nm3(sigma_nm, *, row_spacing_nm: float, window: str = "hann") -> np.ndarray:
    """One-sided white floor per trace, nm^3, from per-row 1-sigma errors ((..., n_rows)).

    Examples
    --------
    White noise of sd 0.5 nm at 2 nm spacing: one-sided level 2 dy s^2 = 1 nm^3.

    >>> import numpy as np
    >>> noise_floor_nm3(np.full(64, 0.5), row_spacing_nm=2.0).item()
    1.0
    """
    s2 = np.asarray(sigma_nm, float) ** 2
    w2 = window_values(s2.shape[-1], window) ** 2
    return 2.0 * row_spacing_nm * (s2 @ w2) / w2.sum()


def floor_shape(frequency_per_nm, row_correlation, *, row_spacing_nm: float) -> np.ndarray:
    """Factor on the white floor for edge errors correlated between rows.

    A stationary error of correlation ``rho_l`` at lag ``l`` rows has the spectrum
    ``S(f) = 2 dy s^2 (1 + 2 sum_l rho_l cos(2 pi f l dy))`` (Wiener-Khinchin), i.e. the white
    floor times this factor; its mean over the band is 1, so the noise *variance* is unchanged
    and only its distribution over frequency moves (to low frequencies for positive rho).
    Floored at 0 (an estimate of rho may make the sum slightly negative near Nyquist).

    Examples
    --------
    >>> import numpy as np
    >>> f = np.fft.rfftfreq(8, 1.0)
    >>> floor_shape(f, (0.5,), row_spacing_nm=1.0)
    array([2.        , 1.70710678, 1.        , 0.29289322, 0.        ])
    """
    f = np.asarray(frequency_per_nm, float)
    out = np.ones_like(f)
    for lag, r in enumerate(row_correlation, start=1):
        out += 2.0 * float(r) * np.cos(2 * np.pi * f * lag * row_spacing_nm)
    return np.clip(out, 0.0, None)


def noise_variance_nm2(sigma_nm, *, detrend: str = "linear") -> np.ndarray:
    """Noise variance left in each detrended trace, sum s_i^2 (1 - P_ii) / N (nm^2).

    Examples
    --------
    >>> import numpy as np
    >>> round(noise_variance_nm2(np.ones(100), detrend="linear").item(), 3)   # 1 - 2/100
    0.98
    """
    s2 = np.asarray(sigma_nm, float) ** 2
    q = detrend_basis(s2.shape[-1], detrend)
    keep = 1.0 - np.sum(q * q, axis=1)                       # 1 - P_ii
    return (s2 @ keep) / s2.shape[-1]


def plateau_floor(frequency_per_nm, mean_psd_nm3, *, n_traces: int, row_spacing_nm: float,
                  window: str = "hann", start_fraction: float = 0.7, roughness_tail_nm3=None):
    """Noise floor read off the top of the averaged PSD, with its standard deviation.

    Mean of the bins above ``start_fraction`` of Nyquist, less the roughness tail still present
    there (``roughness_tail_nm3``, e.g. the fitted model, per bin), with sd
    ``level / sqrt(n_bins * n_traces)`` times 1.4 for Hann (neighbouring bins correlate).
    Returns ``(level_nm3, sd_nm3)``.

    Examples
    --------
    >>> import numpy as np
    >>> f = np.fft.rfftfreq(256, 1.0)
    >>> level, sd = plateau_floor(f, np.full(f.size, 2.0), n_traces=10, row_spacing_nm=1.0)
    >>> level
    2.0
    """
    f = np.asarray(frequency_per_nm)
    p = np.asarray(mean_psd_nm3, float)
    nyq = 0.5 / row_spacing_nm
    sel = (f > start_fraction * nyq) & (f < nyq)
    if not sel.any():
        return math.nan, math.nan
    tail = 0.0 if roughness_tail_nm3 is None else np.asarray(roughness_tail_nm3)[sel]
    level = float(np.mean(p[sel] - tail))
    inflate = 1.4 if window == "hann" else 1.0
    sd = inflate * float(np.mean(p[sel])) / math.sqrt(sel.sum() * max(n_traces, 1))
    return level, sd


def floors_disagree(plateau_nm3: float, plateau_sd_nm3: float, floor_nm3: float, *,
                    tail_sd_nm3: float = 0.0, n_sd: float = 3.0, one_sided: bool = False) -> bool:
    """True when the plateau and the covariance floor differ by more than ``n_sd`` combined sd.

    A sign of noise correlated between rows (smoothing, resampling, charging), of filtering in
    the SEM, of aliased roughness or of a fit whose covariance is wrong.  ``one_sided`` is for a
    plateau that still holds an unknown roughness tail (no model to subtract): only a floor
    *above* the plateau then disagrees.  False when either is not finite (the caller reports
    that the check could not be made).

    Examples
    --------
    >>> floors_disagree(1.0, 0.05, 1.1), floors_disagree(1.0, 0.01, 1.5)
    (False, True)
    >>> floors_disagree(2.0, 0.01, 1.0, one_sided=True), floors_disagree(1.0, 0.01, 2.0, one_sided=True)
    (False, True)
    """
    if not (np.isfinite(plateau_nm3) and np.isfinite(floor_nm3)):
        return False
    gap = floor_nm3 - plateau_nm3 if one_sided else abs(plateau_nm3 - floor_nm3)
    return bool(gap > n_sd * math.hypot(plateau_sd_nm3, tail_sd_nm3))
