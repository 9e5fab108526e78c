"""The self-affine (K-correlation / Matern) roughness model and the PSD side conventions.

Two-sided model PSD, nm^3 against cycles per nm:

    S2(f) = S2(0) / [1 + (2 pi f xi)^2]^(H + 1/2),   S2(0) = g(H) sigma^2 xi,
    g(H) = 2 sqrt(pi) Gamma(H + 1/2) / Gamma(H),     sigma^2 = integral of S2 over all f.

quietedge reports one-sided PSDs (S1 = 2 S2 for f > 0, integrated over [0, inf) to sigma^2);
the literature usually quotes the two-sided PSD(0).  The conversion lives here and only here.

References
----------
Palasantzas, G. (1993). Roughness spectrum and surface width of self-affine fractal surfaces via
the K-correlation model. Phys. Rev. B 48, 14472.  doi:10.1103/PhysRevB.48.14472
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

__all__ = ["g_factor", "psd0_two_sided", "self_affine_psd", "matern_acf",
           "one_sided_from_two_sided", "two_sided_from_one_sided"]


def g_factor(roughness_exponent: float) -> float:
    """g(H) = 2 sqrt(pi) Gamma(H + 1/2) / Gamma(H); 2 at H = 1/2, pi at H = 1."""
    h = float(roughness_exponent)
    return 2.0 * math.sqrt(math.pi) * math.exp(special.gammaln(h + 0.5) - special.gammaln(h))


def psd0_two_sided(sigma_nm: float, correlation_length_nm: float, roughness_exponent: float) -> float:
    """Two-sided PSD(0) in nm^3 of the model with variance ``sigma_nm**2``."""
    return g_factor(roughness_exponent) * sigma_nm ** 2 * correlation_length_nm


def self_affine_psd(frequency_per_nm, *, sigma_nm, correlation_length_nm, roughness_exponent,
                    sided: str = "one"):
    """Model PSD in nm^3 at ``frequency_per_nm`` (cycles per nm).

    ``sided="one"`` gives S1 = 2 S2 (quietedge's convention), ``"two"`` the literature's S2.
    """
    if sided not in ("one", "two"):
        raise ValueError(f"sided={sided!r}: must be 'one' or 'two'")
    f = np.asarray(frequency_per_nm, float)
    s0 = psd0_two_sided(sigma_nm, correlation_length_nm, roughness_exponent)
    s2 = s0 / (1.0 + (2 * math.pi * f * correlation_length_nm) ** 2) ** (roughness_exponent + 0.5)
    return 2.0 * s2 if sided == "one" else s2


def matern_acf(lag_nm, *, sigma_nm, correlation_length_nm, roughness_exponent):
    """Autocorrelation R(tau) = sigma^2 2^(1-H)/Gamma(H) (|tau|/xi)^H K_H(|tau|/xi), nm^2."""
    x = np.abs(np.asarray(lag_nm, float)) / correlation_length_nm
    h = roughness_exponent
    out = np.ones_like(x)
    pos = x > 1e-12
    xs = x[pos]
    out[pos] = 2.0 ** (1.0 - h) / special.gamma(h) * xs ** h * special.kv(h, xs)
    return sigma_nm ** 2 * out


def one_sided_from_two_sided(psd_two_sided):
    """S1 = 2 S2 (for f > 0 and for the model's PSD(0) quoted on the one-sided axis)."""
    return 2.0 * np.asarray(psd_two_sided, float)


def two_sided_from_one_sided(psd_one_sided):
    """S2 = S1 / 2: the literature's convention, for reports."""
    return 0.5 * np.asarray(psd_one_sided, float)
