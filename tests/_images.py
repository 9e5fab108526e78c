"""Shared builders of virtual SEM images for the tests (known truth)."""
import numpy as np

from edges._types import Micrograph
from edges.render import SEMSettings, render_micrograph
from roughness.synth import edge_pairs


def line_space(rng, *, n_rows=256, n_cols=200, pitch_nm=64.0, cd_nm=32.0, sigma_nm=1.5, xi_nm=10.0,
               h=0.6, repeat=1, **settings):
    """Lines at ``pitch_nm``; the rough truth of ``n_rows`` rows is tiled ``repeat`` times
    down the image, so the rows of block k are noise realisations of the same edges."""
    s = SEMSettings(**settings)
    p = s.pixel_size_nm
    n_lines = int((n_cols * p - (pitch_nm - cd_nm)) // pitch_nm)
    centres = 0.5 * (n_cols * p - n_lines * pitch_nm) + 0.5 * pitch_nm - 0.5 * p + pitch_nm * np.arange(n_lines)
    dl, dr = edge_pairs(n_lines, n_rows, p, sigma_nm=sigma_nm, correlation_length_nm=xi_nm,
                        roughness_exponent=h, rng=rng)
    left = np.tile(centres[:, None] - 0.5 * cd_nm + dl, (1, repeat))
    right = np.tile(centres[:, None] + 0.5 * cd_nm + dr, (1, repeat))
    pixels, truth = render_micrograph(left, right, n_cols=n_cols, settings=s, rng=rng)
    return Micrograph(pixels=pixels, pixel_size_nm=p, source="virtual"), truth, s
