"""NaN-aware means and medians that return NaN for all-NaN input without a warning.

Rows or bins that hold no valid value are expected (flagged rows, bins beyond the data); they are
reported as NaN, never as a RuntimeWarning that would drown the user's own warnings.
"""
from __future__ import annotations

import warnings

import numpy as np

__all__ = ["nanmean", "nanmedian"]


def nanmean(a, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(a, axis=axis)


def nanmedian(a, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis)
