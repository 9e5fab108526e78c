"""The quietedge application: settings, batch runner, output tables, HTML report, command line,
demo and simulate loop.  Everything here projects or drives the statistics of
:mod:`roughness.analysis`; nothing here computes a roughness number itself.
"""
from .comparing import compare
from .runner import ImageResult, Measurement, measure
from .sentences import comparison_sentences, noise_sentences, power_sentences
from .settings import EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, MeasureSettings, SettingsError
from .simulate import simulate_images

__all__ = ["measure", "compare", "comparison_sentences", "noise_sentences", "power_sentences", "Measurement", "ImageResult", "MeasureSettings", "SettingsError", "simulate_images",
           "EXIT_OK", "EXIT_USAGE", "EXIT_SOME_FAILED"]
