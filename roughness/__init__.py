"""Roughness side of quietedge: edge traces in; unbiased LER/LWR, PSDs, models, reports out.

Statistics (no files, tables or plots): :mod:`roughness.analysis` (one path from traces to
numbers, per image and per group), :mod:`roughness.differences` (between groups), :mod:`roughness.stats`, :mod:`roughness.psd`,
:mod:`roughness.noise`, :mod:`roughness.psd_model`, :mod:`roughness.synth`.  The application
(settings, batch runner, tables, report, command line, demo) is :mod:`roughness.app`.
"""
from .analysis import (AnalysisOptions, GroupAnalysis, ImageAnalysis, PooledSpectrum, SpectrumSums, analyse_group,
                       analyse_image)
from .app import Measurement, MeasureSettings, SettingsError, compare, measure, simulate_images
from .differences import Comparison, Difference, compare_groups
from .noise import floors_disagree, noise_floor_nm3, noise_variance_nm2, plateau_floor
from .psd import detrend, periodogram
from .psd_model import PSDModelFit, correlation_length_from_acf, fit_psd_model
from .stats import (ImageRoughness, LineVariances, QuantityRoughness, RoughnessSummary, SamplingPlan, analyse_traces,
                    expected_measured_variance, frames_for_noise_fraction, sampling_plan, summarize)
from .synth import edge_pairs, rough_edges, simulate_line_space, thorsos_edges

__all__ = [
    "analyse_image", "analyse_group", "AnalysisOptions", "ImageAnalysis", "GroupAnalysis", "SpectrumSums",
    "PooledSpectrum",
    "measure", "compare", "compare_groups", "Comparison", "Difference", "Measurement", "MeasureSettings", "SettingsError", "simulate_images",
    "analyse_traces", "summarize", "ImageRoughness", "LineVariances", "RoughnessSummary", "QuantityRoughness",
    "expected_measured_variance", "sampling_plan", "SamplingPlan", "frames_for_noise_fraction",
    "periodogram", "detrend", "noise_floor_nm3", "noise_variance_nm2", "plateau_floor", "floors_disagree",
    "fit_psd_model", "PSDModelFit", "correlation_length_from_acf",
    "rough_edges", "edge_pairs", "thorsos_edges", "simulate_line_space",
]
