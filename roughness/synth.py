"""Random rough edges with a prescribed PSD (Thorsos' method) and virtual SEM studies.

References
----------
Thorsos, E. I. (1988). The validity of the Kirchhoff approximation for rough surface scattering
using a Gaussian roughness spectrum. J. Acoust. Soc. Am. 83, 78-92.  doi:10.1121/1.396188
Mack, C. A. (2013). Generating random rough edges, surfaces, and volumes. Appl. Opt. 52, 1472.
"""
from __future__ import annotations

import math

import numpy as np

from edges.render import SEMSettings, render_micrograph

from ._selfaffine import self_affine_psd

__all__ = ["thorsos_edges", "rough_edges", "edge_pairs", "simulate_line_space"]


def _validate_model(sigma_nm, correlation_length_nm, roughness_exponent):
    if not sigma_nm >= 0:
        raise ValueError(f"sigma_nm={sigma_nm}: must be >= 0")
    if not correlation_length_nm > 0:
        raise ValueError(f"correlation_length_nm={correlation_length_nm}: must be > 0")
    if not 0 < roughness_exponent <= 2:
        raise ValueError(f"roughness_exponent={roughness_exponent}: must be in (0, 2]")


def thorsos_edges(n_edges: int, n_rows: int, row_spacing_nm: float, *, psd_two_sided,
                  rng: np.random.Generator) -> np.ndarray:
    """Periodic Gaussian edges whose expected two-sided periodogram equals ``psd_two_sided``.

    ``psd_two_sided(f)`` is a callable of frequency (cycles/nm) returning nm^3.  Returns
    (n_edges, n_rows) deviations in nm.  The realised variance is sum_k S(f_k) df, not the
    continuous model's sigma^2 (the tail beyond Nyquist is missing; Thorsos 1988).

    Examples
    --------
    >>> import numpy as np
    >>> x = thorsos_edges(3, 256, 1.0, psd_two_sided=lambda f: np.ones_like(f), rng=np.random.default_rng(0))
    >>> x.shape
    (3, 256)
    """
    f = np.fft.rfftfreq(n_rows, row_spacing_nm)
    amp = np.sqrt(psd_two_sided(f) * n_rows / row_spacing_nm)
    z = (rng.standard_normal((n_edges, f.size)) + 1j * rng.standard_normal((n_edges, f.size))) / math.sqrt(2)
    z[:, 0] = rng.standard_normal(n_edges)
    if n_rows % 2 == 0:
        z[:, -1] = rng.standard_normal(n_edges)
    return np.fft.irfft(amp * z, n=n_rows, axis=-1)


def rough_edges(n_edges: int, n_rows: int, row_spacing_nm: float, *, sigma_nm: float,
                correlation_length_nm: float, roughness_exponent: float,
                rng: np.random.Generator, oversample: int = 8) -> np.ndarray:
    """Non-periodic self-affine rough edges, (n_edges, n_rows) deviations in nm.

    Each edge is a random window of a periodic Thorsos edge ``oversample`` times longer, so it
    has the leakage and finite-length behaviour of a real edge.

    Parameters
    ----------
    sigma_nm : float
        Standard deviation of the infinitely long edge (the model's sigma).
    correlation_length_nm : float
        xi of the self-affine model.
    roughness_exponent : float
        H, in (0, 2].
    oversample : int
        Length factor of the periodic edge that is cropped (>= 1; 1 keeps periodic edges).

    Examples
    --------
    >>> import numpy as np
    >>> x = rough_edges(200, 1024, 1.0, sigma_nm=1.5, correlation_length_nm=5.0, roughness_exponent=0.5,
    ...                 rng=np.random.default_rng(0))
    >>> bool(1.35 < x.std() < 1.6)
    True
    """
    _validate_model(sigma_nm, correlation_length_nm, roughness_exponent)
    if oversample < 1:
        raise ValueError(f"oversample={oversample}: must be >= 1")

    def psd2(f):
        return self_affine_psd(f, sigma_nm=sigma_nm, correlation_length_nm=correlation_length_nm,
                               roughness_exponent=roughness_exponent, sided="two")

    n_long = oversample * n_rows
    long_edges = thorsos_edges(n_edges, n_long, row_spacing_nm, psd_two_sided=psd2, rng=rng)
    if oversample == 1:
        return long_edges
    start = rng.integers(0, n_long - n_rows + 1, size=n_edges)
    idx = start[:, None] + np.arange(n_rows)[None, :]
    return np.take_along_axis(long_edges, idx, axis=1)


def edge_pairs(n_lines: int, n_rows: int, row_spacing_nm: float, *, sigma_nm: float,
               correlation_length_nm: float, roughness_exponent: float, lr_correlation: float = 0.0,
               rng: np.random.Generator, oversample: int = 8):
    """Left and right edge deviations with correlation coefficient ``lr_correlation``.

    ``left = u``, ``right = rho u + sqrt(1 - rho^2) v`` with u, v independent edges of the
    same PSD, so the coherence is rho at every frequency.  Returns two (n_lines, n_rows) arrays.

    Examples
    --------
    >>> import numpy as np
    >>> left, right = edge_pairs(400, 512, 1.0, sigma_nm=1.0, correlation_length_nm=5.0, roughness_exponent=0.5,
    ...                          lr_correlation=0.5, rng=np.random.default_rng(0))
    >>> bool(0.4 < np.corrcoef(left.ravel(), right.ravel())[0, 1] < 0.6)
    True
    """
    if not -1 <= lr_correlation <= 1:
        raise ValueError(f"lr_correlation={lr_correlation}: must be in [-1, 1]")
    both = rough_edges(2 * n_lines, n_rows, row_spacing_nm, sigma_nm=sigma_nm,
                       correlation_length_nm=correlation_length_nm,
                       roughness_exponent=roughness_exponent, rng=rng, oversample=oversample)
    u, v = both[:n_lines], both[n_lines:]
    return u, lr_correlation * u + math.sqrt(1.0 - lr_correlation ** 2) * v


def simulate_line_space(*, n_rows: int = 1024, n_cols: int = 1024, pitch_nm: float = 64.0,
                        cd_nm: float = 32.0, sigma_nm: float = 1.5, correlation_length_nm: float = 10.0,
                        roughness_exponent: float = 0.6, lr_correlation: float = 0.0,
                        settings: SEMSettings = SEMSettings(), rng: np.random.Generator):
    """A virtual SEM image of a line/space pattern with self-affine rough edges.

    Lines are placed every ``pitch_nm`` so that every line lies whole inside the field with
    at least half a space to either border.  Returns ``(pixels, truth)`` from
    :func:`edges.render.render_micrograph`, the truth extended by the roughness model.

    Examples
    --------
    >>> import numpy as np
    >>> pixels, truth = simulate_line_space(n_rows=64, n_cols=256, rng=np.random.default_rng(0))
    >>> pixels.shape, truth["edge_nm"].shape
    ((64, 256), (6, 64))
    """
    if not 0 < cd_nm < pitch_nm:
        raise ValueError(f"cd_nm={cd_nm}: must be between 0 and pitch_nm={pitch_nm}")
    p = settings.pixel_size_nm
    field_nm = n_cols * p
    n_lines = int((field_nm - (pitch_nm - cd_nm)) // pitch_nm)
    if n_lines < 1:
        raise ValueError(f"a field of {field_nm:g} nm holds no whole line at pitch {pitch_nm:g} nm")
    span = n_lines * pitch_nm
    first_centre = 0.5 * (field_nm - span) + 0.5 * pitch_nm - 0.5 * p
    centres = first_centre + pitch_nm * np.arange(n_lines)
    dl, dr = edge_pairs(n_lines, n_rows, p, sigma_nm=sigma_nm, correlation_length_nm=correlation_length_nm,
                        roughness_exponent=roughness_exponent, lr_correlation=lr_correlation, rng=rng)
    left = centres[:, None] - 0.5 * cd_nm + dl
    right = centres[:, None] + 0.5 * cd_nm + dr
    pixels, truth = render_micrograph(left, right, n_cols=n_cols, settings=settings, rng=rng)
    truth.update(pitch_nm=pitch_nm, design_cd_nm=cd_nm, model_sigma_nm=sigma_nm,
                 correlation_length_nm=correlation_length_nm, roughness_exponent=roughness_exponent,
                 lr_correlation=lr_correlation)
    return pixels, truth
