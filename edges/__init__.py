"""Image side of quietedge: SEM micrographs in, edge traces with uncertainties out.

This package never imports ``roughness``.
"""
from ._types import REASONS, EdgeTraces, Micrograph
from .io import MicrographError, read_micrograph, read_truth, write_micrograph, write_truth
from .render import SEMSettings, expected_row_profile, render_micrograph

__all__ = [
    "Micrograph", "EdgeTraces", "REASONS",
    "MicrographError", "read_micrograph", "write_micrograph", "read_truth", "write_truth",
    "SEMSettings", "render_micrograph", "expected_row_profile",
]
