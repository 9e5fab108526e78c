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

__all__ = ["g_factor", "psd0_two_sided", "self_affine_psd", "matern_acf", "two_sided_from_one_sided"]


def g_factor(roughness_exponent: float) -> float:
    """g(H) = 2 sqrt(pi) Gamma(H + 1/2) / Gamma(H); 2 at H = 1/2, pi at H = 1.

    Examples
    --------
    >>> round(g_factor(0.5), 6), round(g_factor(1.0), 6)
    (2.0, 3.141593)
    """
    h = float(roughness_exponent)
    return 2.0 * math.sqrt(math.pi) * math.exp(special.gammaln(h + 0.5) - special.gammaln(h))


def psd0_two_sided(sigma_nm: float, correlation_length_nm: float, roughness_exponent: float) -> float:
    """Two-sided PSD(0) in nm^3 of the model with variance ``sigma_nm**2``.

    Examples
    --------
    >>> psd0_two_sided(1.0, 10.0, 0.5)
    20.0
    """
    return g_factor(roughness_exponent) * sigma_nm ** 2 * correlation_length_nm


def self_affine_psd(frequency_per_nm, *, sigma_nm, correlation_length_nm, roughness_exponent,
                    sided: str = "one"):
    """Model PSD in nm^3 at ``frequency_per_nm`` (cycles per nm).

    ``sided="one"`` gives S1 = 2 S2 (quietedge's convention), ``"two"`` the literature's S2.

    Examples
    --------
    >>> import numpy as np
    >>> self_affine_psd(np.array([0.0]), sigma_nm=1.0, correlation_length_nm=10.0, roughness_exponent=0.5).tolist()
    [40.0]
    """
    if sided not in ("one", "two"):
        raise ValueError(f"sided={sided!r}: must be 'one' or 'two'")
    f = np.asarray(frequency_per_nm, float)
    s0 = psd0_two_sided(sigma_nm, correlation_length_nm, roughness_exponent)
    s2 = s0 / (1.0 + (2 * math.pi * f * correlation_length_nm) ** 2) ** (roughness_exponent + 0.5)
    return 2.0 * s2 if sided == "one" else s2


def matern_acf(lag_nm, *, sigma_nm, correlation_length_nm, roughness_exponent):
    """Autocorrelation R(tau) = sigma^2 2^(1-H)/Gamma(H) (|tau|/xi)^H K_H(|tau|/xi), nm^2.

    Examples
    --------
    >>> import numpy as np
    >>> acf = matern_acf(np.array([0.0, 10.0]), sigma_nm=1.0, correlation_length_nm=10.0, roughness_exponent=0.5)
    >>> np.round(acf, 4).tolist()                    # exp(-|tau|/xi) at H = 1/2
    [1.0, 0.3679]
    """
    x = np.abs(np.asarray(lag_nm, float)) / correlation_length_nm
    h = roughness_exponent
    out = np.ones_like(x)
    pos = x > 1e-12
    xs = x[pos]
    out[pos] = 2.0 ** (1.0 - h) / special.gamma(h) * xs ** h * special.kv(h, xs)
    return sigma_nm ** 2 * out


def two_sided_from_one_sided(psd_one_sided):
    """S2 = S1 / 2: the literature's convention, for reports.

    Examples
    --------
    >>> two_sided_from_one_sided(40.0).item()
    20.0
    """
    return 0.5 * np.asarray(psd_one_sided, float)
