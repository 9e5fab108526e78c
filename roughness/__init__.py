"""Roughness side of quietedge: edge traces in; unbiased LER/LWR, PSDs, models, reports out."""
from ._measure import Measurement, MeasureSettings, measure
from .model import PSDModelFit, correlation_length_from_acf, fit_psd_model
from .noise import floors_disagree, noise_floor_nm3, noise_variance_nm2, plateau_floor
from .psd import detrend, periodogram
from .stats import (ImageRoughness, RoughnessSummary, analyse_traces, expected_measured_variance,
                    frames_for_noise_fraction, sampling_plan, summarize)
from .synth import edge_pairs, rough_edges, simulate_line_space, thorsos_edges

__all__ = [
    "measure", "Measurement", "MeasureSettings",
    "analyse_traces", "summarize", "ImageRoughness", "RoughnessSummary", "expected_measured_variance",
    "sampling_plan", "frames_for_noise_fraction",
    "periodogram", "detrend", "noise_floor_nm3", "noise_variance_nm2", "plateau_floor", "floors_disagree",
    "fit_psd_model", "PSDModelFit", "correlation_length_from_acf",
    "rough_edges", "edge_pairs", "thorsos_edges", "simulate_line_space",
]
