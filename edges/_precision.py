"""The precision study's result (computed by :mod:`edges._twin`), apart so that the trace type
can hold it without importing the solver."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["PrecisionStudy"]


@dataclass(frozen=True)
class PrecisionStudy:
    """How precisely this image locates its edges, from its virtual twin (all per fitted edge,
    NaN where an edge had too few rows; lengths in px, see :meth:`in_nm`).

    Attributes
    ----------
    samples : (n_edges,) ndarray of int
        Twin rows fitted per edge (rows x repeats).
    covariance_sd : (n_edges,) ndarray
        Root mean square of the fit covariance's position sd on the twin (before calibration).
    achieved_sd : (n_edges,) ndarray
        Scatter of the twin's fitted positions about the line through the true ones.
    crlb_sd : (n_edges,) ndarray
        Root mean square of the Cramer-Rao bound at the truth: no unbiased detector does better.
    shrinkage : (n_edges,) ndarray
        Slope of fitted on true deviation from the centre line (1: no shrinkage).
    bias : (n_edges,) ndarray
        Mean of fitted minus true position.
    lost_fraction : (n_edges,) ndarray
        Twin rows the detector flagged invalid.
    calibration : float
        Image-wide ratio of the twin's position-noise variance to its mean covariance.
    calibration_se : float
        Its standard error.
    unit : str
        ``"px"`` or ``"nm"``.
    """

    samples: np.ndarray
    covariance_sd: np.ndarray
    achieved_sd: np.ndarray
    crlb_sd: np.ndarray
    shrinkage: np.ndarray
    bias: np.ndarray
    lost_fraction: np.ndarray
    calibration: float
    calibration_se: float
    unit: str = "px"

    @property
    def applied_calibration(self) -> float:
        """The factor applied to the covariances: ``calibration`` where it differs from 1 by
        more than three standard errors, else 1 (a factor known to a few per cent would only
        add its noise where the covariance is exact)."""
        c, se = self.calibration, self.calibration_se
        if not (np.isfinite(c) and c > 0):
            return 1.0
        return float(c) if abs(c - 1.0) > 3.0 * se else 1.0

    @property
    def efficiency(self) -> np.ndarray:
        """(CRLB / achieved)^2 per edge: 1 for a detector that attains the bound."""
        return (self.crlb_sd / self.achieved_sd) ** 2

    @property
    def shrinkage_pooled(self) -> float:
        """Sample-weighted mean shrinkage over the edges."""
        ok = np.isfinite(self.shrinkage) & (self.samples > 0)
        return float(np.average(self.shrinkage[ok], weights=self.samples[ok])) if ok.any() else math.nan

    def in_nm(self, pixel_size_nm: float) -> "PrecisionStudy":
        """The same study with lengths in nm."""
        if self.unit == "nm":
            return self
        p = float(pixel_size_nm)
        return PrecisionStudy(samples=self.samples, covariance_sd=self.covariance_sd * p,
                              achieved_sd=self.achieved_sd * p, crlb_sd=self.crlb_sd * p,
                              shrinkage=self.shrinkage, bias=self.bias * p, lost_fraction=self.lost_fraction,
                              calibration=self.calibration, calibration_se=self.calibration_se, unit="nm")

    def expand(self, fitted_index, n_all: int) -> "PrecisionStudy":
        """Per-edge arrays spread over all ``n_all`` located edges (NaN for unfitted ones)."""
        def spread(a, fill=np.nan):
            out = np.full(n_all, fill, dtype=float)
            out[fitted_index] = a
            return out
        return PrecisionStudy(samples=spread(self.samples, 0.0).astype(np.int64),
                              covariance_sd=spread(self.covariance_sd), achieved_sd=spread(self.achieved_sd),
                              crlb_sd=spread(self.crlb_sd), shrinkage=spread(self.shrinkage),
                              bias=spread(self.bias), lost_fraction=spread(self.lost_fraction),
                              calibration=self.calibration, calibration_se=self.calibration_se, unit=self.unit)
