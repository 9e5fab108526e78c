"""Image side of quietedge: SEM micrographs in, edge traces with calibrated uncertainties out.

This package never imports ``roughness``.
"""
from ._noise import NoiseModel
from ._types import REASONS, EdgeTraces, Micrograph
from .baselines import slope_edges, threshold_edges
from .fit import LOW_CONTRAST_CNR, fit_edges
from .io import MicrographError, read_micrograph, read_truth, write_micrograph, write_truth
from .locate import LineLayout, LocateError, locate_edges
from .profiles import PROFILE_MODELS, EdgeShape
from .render import SEMSettings, expected_row_profile, render_micrograph

__all__ = [
    "Micrograph", "EdgeTraces", "REASONS", "NoiseModel", "PROFILE_MODELS", "EdgeShape",
    "MicrographError", "read_micrograph", "write_micrograph", "read_truth", "write_truth",
    "SEMSettings", "render_micrograph", "expected_row_profile",
    "LineLayout", "LocateError", "locate_edges",
    "fit_edges", "LOW_CONTRAST_CNR", "threshold_edges", "slope_edges",
]
