"""The simulate loop: virtual SEM images of known roughness written with their truth."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from edges.io import write_micrograph, write_truth
from edges.render import SEMSettings

from ..synth import simulate_line_space

__all__ = ["SimulatedImage", "simulate_images"]


@dataclass(frozen=True)
class SimulatedImage:
    """One written virtual image.

    Attributes
    ----------
    image_path, truth_path : Path
    n_edges : int
    realised_edge_sigma_nm : float
        Quadratic mean of the rendered edges' own sigma (after their straight-line fit).
    """

    image_path: Path
    truth_path: Path
    n_edges: int
    realised_edge_sigma_nm: float


def simulate_images(out, *, n_images: int = 1, n_rows: int = 1024, n_cols: int = 1024, pitch_nm: float = 64.0,
                    cd_nm: float = 32.0, sigma_nm: float = 1.5, correlation_length_nm: float = 10.0,
                    roughness_exponent: float = 0.6, lr_correlation: float = 0.0,
                    settings: SEMSettings = SEMSettings(), file_format: str = "tif", bit_depth: int = 16,
                    prefix: str = "sim", seed: int = 0) -> list:
    """Write ``n_images`` virtual SEM images ``{prefix}_000.{file_format}`` with truth JSON beside each.

    Parameters
    ----------
    out : path
        Folder (created if missing).
    n_images, n_rows, n_cols : int
    pitch_nm, cd_nm, sigma_nm, correlation_length_nm, roughness_exponent, lr_correlation : float
        The pattern and its self-affine roughness (see :func:`roughness.synth.simulate_line_space`).
    settings : edges.SEMSettings
        The virtual SEM.
    file_format : {"tif", "png"}
    bit_depth : {8, 16, 32}
        32 writes float TIFF (not PNG).
    prefix : str
    seed : int
        Seed of the roughness and the noise.

    Returns
    -------
    list of SimulatedImage

    Examples
    --------
    >>> import tempfile
    >>> written = simulate_images(tempfile.mkdtemp(), n_rows=64, n_cols=256, seed=1)
    >>> written[0].image_path.name, written[0].n_edges
    ('sim_000.tif', 6)
    """
    if file_format not in ("tif", "png"):
        raise ValueError(f"file_format={file_format!r}: must be 'tif' or 'png'")
    if bit_depth not in (8, 16, 32) or (file_format == "png" and bit_depth == 32):
        raise ValueError(f"bit_depth={bit_depth!r}: must be 8 or 16 (or 32 for float TIFF)")
    if isinstance(n_images, bool) or not isinstance(n_images, int) or n_images < 1:
        raise ValueError(f"n_images={n_images!r}: must be an integer >= 1")
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    written = []
    for i in range(n_images):
        pixels, truth = simulate_line_space(
            n_rows=n_rows, n_cols=n_cols, pitch_nm=pitch_nm, cd_nm=cd_nm, sigma_nm=sigma_nm,
            correlation_length_nm=correlation_length_nm, roughness_exponent=roughness_exponent,
            lr_correlation=lr_correlation, settings=settings, rng=rng)
        stem = out / f"{prefix}_{i:03d}"
        image = write_micrograph(stem.with_suffix("." + file_format), pixels, pixel_size_nm=settings.pixel_size_nm,
                                 bit_depth=bit_depth)
        truth_path = write_truth(stem.with_suffix(".truth.json"), truth)
        written.append(SimulatedImage(image_path=Path(image), truth_path=Path(truth_path),
                                      n_edges=int(truth["edge_nm"].shape[0]),
                                      realised_edge_sigma_nm=float(np.sqrt(np.mean(truth["edge_sigma_nm"] ** 2)))))
    return written
