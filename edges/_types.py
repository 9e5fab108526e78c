"""Core data types shared by the image side of quietedge.

Axes are (row, col): rows are SEM scan lines running across vertical lines, so the row index
runs *along* each line and an edge position is a column coordinate.  Column ``j`` has its centre
at ``j * pixel_size_nm`` nanometres.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from ._noise import NoiseModel
from ._precision import PrecisionStudy

__all__ = ["Micrograph", "EdgeTraces", "REASONS", "REASON_CODES", "MAX_NON_FINITE_SHARE"]

#: Reason codes for invalid rows of an edge (index = code stored in ``EdgeTraces.reason``).
REASONS = (
    "ok",
    "no_convergence",   # iteration cap reached before the step fell below tolerance
    "left_window",      # the fitted edge lies too close to (or beyond) the end of its window
    "saturated",        # a pixel of the window sits at the detector's saturation level
    "low_contrast",     # the row's fitted step is too small or of the wrong sign
    "non_finite",       # NaN or infinite pixel in the window
    "too_close",        # neighbouring edge too near for a fit window of the minimum width
    "unconstrained",    # the row's position uncertainty exceeds its window's reach: no information
    "outlier",          # the row's residual is far outside the noise model (a particle, a bridge, a scratch)
)
REASON_CODES = {name: code for code, name in enumerate(REASONS)}

#: Largest share of NaN or infinite pixels an image may hold (missing or blanked rows, left out
#: as failed rows); beyond it the image is refused.
MAX_NON_FINITE_SHARE = 0.25


@dataclass(frozen=True)
class Micrograph:
    """A grey-level SEM image with lines running down the columns.

    Attributes
    ----------
    pixels : (n_rows, n_cols) ndarray of float64
        Grey levels (or counts).  Lines are vertical after ``rotated`` is applied.
    pixel_size_nm : float
        Size of one pixel in nm (square pixels; rows are spaced by the same amount).
    source : str
        File name or description, used in every error message.
    rotated : bool
        True when the image was turned by 90 degrees to make horizontal lines vertical.  The
        SEM scan then ran *along* the lines, and noise correlated along the scan becomes
        correlation between neighbouring trace samples.
    polarity : str
        ``"bright"`` or ``"dark"`` lines, or ``"unknown"`` before location.
    saturation_level : float or None
        Grey level at which the detector clips (the integer type's maximum for integer files),
        or None when unknown.
    pixel_size_source : str
        ``"file"`` (TIFF resolution tags) or ``"given"`` (by the user or the caller).
    file_pixel_size_nm : float or None
        The file's own calibration when it has one (also when a given size overrides it).
    """

    pixels: np.ndarray
    pixel_size_nm: float
    source: str = "<array>"
    rotated: bool = False
    polarity: str = "unknown"
    saturation_level: float | None = None
    pixel_size_source: str = "given"
    file_pixel_size_nm: float | None = None

    @property
    def shape(self) -> tuple[int, int]:
        return self.pixels.shape


@dataclass(frozen=True)
class EdgeTraces:
    """Edge positions of one image, one row per scan line.

    Attributes
    ----------
    position_nm : (n_edges, n_rows) ndarray
        Fitted edge position (column coordinate times pixel size), NaN where invalid.
    sigma_nm : (n_edges, n_rows) ndarray
        1-sigma uncertainty of ``position_nm`` from the fit covariance, NaN where invalid.
    valid : (n_edges, n_rows) ndarray of bool
    reason : (n_edges, n_rows) ndarray of int8
        Code into :data:`REASONS` (0 where valid).
    line_index : (n_edges,) ndarray of int
        Which line an edge belongs to (0, 1, ... from the left).
    side : (n_edges,) ndarray of str
        ``"left"`` or ``"right"``.
    row_spacing_nm : float
        Distance between neighbouring rows along the line.
    reduced_chi2 : (n_edges, n_rows) ndarray
        Weighted residual sum of squares over degrees of freedom, per row.
    iterations : (n_edges, n_rows) ndarray of int
        Levenberg-Marquardt iterations of the final pass.
    contrast_to_noise : (n_edges,) ndarray
        Step height over noise sd at mid-step, median over rows.
    edge_flags : (n_edges,) ndarray of str
        ``""`` or a comma-separated list such as ``"low_contrast"``.
    detector : str
        ``"model"`` (the profile fit), ``"threshold"`` or ``"slope"``.
    profile_model : str
        Profile model of the ``"model"`` detector (``"template"``, ``"parametric"``,
        ``"step"``); ``""`` for the baselines.
    source : str
    noise_model : NoiseModel
        The image-level noise model used for the weights and uncertainties (NaN fields where a
        detector does not estimate them).
    rotated : bool
        The image was turned to make its lines vertical (the scan then ran along the lines).
    profile_shapes : tuple
        Per edge, the :class:`edges.profiles.EdgeShape` fitted by the model detector (None for
        edges not fitted and for the baselines).
    bar_rows : tuple of int
        Rows of an information bar cut from the top and bottom of the image before measuring
        (the traces' rows are the image's rows below the top ones).
    precision : PrecisionStudy or None
        The virtual twin's precision study in nm (model detector; None when not run).  Its
        ``applied_calibration`` has already been applied to ``sigma_nm``.
    """

    position_nm: np.ndarray
    sigma_nm: np.ndarray
    valid: np.ndarray
    reason: np.ndarray
    line_index: np.ndarray
    side: np.ndarray
    row_spacing_nm: float
    reduced_chi2: np.ndarray
    iterations: np.ndarray
    contrast_to_noise: np.ndarray
    edge_flags: np.ndarray
    detector: str = "model"
    profile_model: str = ""
    source: str = "<array>"
    noise_model: NoiseModel = field(default_factory=NoiseModel)
    rotated: bool = False
    profile_shapes: tuple = ()
    precision: PrecisionStudy | None = None
    bar_rows: tuple = (0, 0)

    @property
    def n_edges(self) -> int:
        return self.position_nm.shape[0]

    @property
    def n_rows(self) -> int:
        return self.position_nm.shape[1]

    def rows(self, start: int, stop: int) -> "EdgeTraces":
        """The same traces restricted to rows ``start:stop``."""
        sl = (slice(None), slice(start, stop))
        return replace(self, position_nm=self.position_nm[sl], sigma_nm=self.sigma_nm[sl], valid=self.valid[sl],
                       reason=self.reason[sl], reduced_chi2=self.reduced_chi2[sl], iterations=self.iterations[sl])

    def reason_counts(self) -> dict[str, int]:
        """Number of invalid rows per reason, over all edges (an invalid row without a reason code
        is counted as ``unspecified``)."""
        codes, counts = np.unique(self.reason[~self.valid], return_counts=True)
        out: dict[str, int] = {}
        for c, n in zip(codes, counts):
            name = REASONS[int(c)] if int(c) != 0 else "unspecified"
            out[name] = out.get(name, 0) + int(n)
        return out

    def line_pairs(self) -> list[tuple[int, int]]:
        """(left edge index, right edge index) for every line that has both edges."""
        pairs = []
        for line in np.unique(self.line_index):
            left = np.flatnonzero((self.line_index == line) & (self.side == "left"))
            right = np.flatnonzero((self.line_index == line) & (self.side == "right"))
            if left.size == 1 and right.size == 1:
                pairs.append((int(left[0]), int(right[0])))
        return pairs

    def to_frame(self):
        """Tidy table, one row per (edge, scan row); columns never change with options."""
        import pandas as pd

        n_e, n_r = self.position_nm.shape
        return pd.DataFrame({
            "edge": np.repeat(np.arange(n_e), n_r),
            "line": np.repeat(self.line_index, n_r),
            "side": np.repeat(self.side, n_r),
            "row": np.tile(np.arange(n_r), n_e),
            "position_nm": self.position_nm.ravel(),
            "sigma_nm": self.sigma_nm.ravel(),
            "valid": self.valid.ravel(),
            "reason": np.asarray(REASONS, dtype=object)[self.reason.ravel()],
            "reduced_chi2": self.reduced_chi2.ravel(),
        })
