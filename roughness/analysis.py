"""One computation path from edge traces to roughness numbers: per image, then per group.

:func:`analyse_image` turns one image's :class:`edges.EdgeTraces` into an
:class:`ImageAnalysis`: its biased / noise / unbiased roughness with intervals, PSD-model fit,
noise-floor cross-check, warnings, and *mergeable partial sums* (per-line variances, PSD sums
and counts).  :func:`analyse_group` reduces any number of image analyses, and nothing else, to a
:class:`GroupAnalysis`: no traces or images are needed, so a group of thousands of images is
reduced from stored per-image results.

Combining PSDs of different row counts or pixel sizes (one rule, independent of input order):
the common frequency grid has the coarsest resolution of the group (its shortest line,
``df = 1 / L_min``) and stops at the lowest Nyquist frequency; each image's mean PSD is
linearly interpolated onto it and the images are averaged with weights ``n_traces * L`` (total
edge length).  When all images share one grid this is the plain trace-weighted mean.
``n_grids`` records how many grids were combined.  Images are ordered by name before any
resampling, so the result never depends on the order they were given in.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from edges import LOW_CONTRAST_CNR, EdgeTraces

from .noise import floors_disagree, plateau_floor
from .psd import DETRENDS, WINDOWS
from .psd_model import PARAMETER_NAMES, PSDModelFit, correlation_length_from_acf, fit_psd_model
from .stats import (NOISE_DOMINATED_FRACTION, QUANTITIES, LineVariances, RoughnessSummary, analyse_traces,
                    expected_measured_variance, frames_for_noise_fraction, sampling_plan, summarize)

__all__ = ["AnalysisOptions", "SpectrumSums", "EdgeDiagnostics", "SamplingAdvice", "ImageAnalysis",
           "PooledSpectrum", "GroupAnalysis", "analyse_image", "analyse_group"]


@dataclass(frozen=True)
class AnalysisOptions:
    """How traces become statistics (validated on creation).

    Attributes
    ----------
    detrend : {"linear", "mean", "quadratic", "none"}
        Polynomial removed from every edge, width and centre trace.
    psd_window : {"hann", "boxcar"}
        Taper of the periodograms.
    max_gap_rows : int
        Longest run of failed rows bridged by interpolation.
    max_invalid_fraction : float
        An edge with a larger share of failed rows is excluded (0 to 1).
    n_resamples : int
        Bootstrap resamples for the confidence intervals (>= 0).
    confidence : float
        Level of the intervals (0 to 1).
    model_resamples : int
        Bootstrap resamples for the PSD-model standard errors (>= 0).
    seed : int
        Seed of every resampling: the same inputs always give the same intervals.
    calibrated_cnr : float
        Below this median contrast-to-noise the PSD model fits its own noise floor instead of
        fixing it to the fit covariance's (there the linearised covariance under-states the
        scatter by a few per cent, and a floor 10% low pulls H down by ~0.15).
    noise_share_target : float
        Noise share of the biased variance that the "frames needed" advice aims at (0 to 1).
    precision_target : float
        Relative standard deviation of the unbiased edge sigma that the "lines needed" advice
        aims at (0 to 1).
    frames : int
        Frames averaged into each image as acquired (the "frames needed" advice starts there).
    """

    detrend: str = "linear"
    psd_window: str = "hann"
    max_gap_rows: int = 8
    max_invalid_fraction: float = 0.05
    n_resamples: int = 1000
    confidence: float = 0.95
    model_resamples: int = 50
    seed: int = 0
    calibrated_cnr: float = 5.0
    noise_share_target: float = 0.10
    precision_target: float = 0.05
    frames: int = 1

    def __post_init__(self):
        _choice("detrend", self.detrend, tuple(DETRENDS))
        _choice("psd_window", self.psd_window, WINDOWS)
        _integer("max_gap_rows", self.max_gap_rows, 0)
        _integer("n_resamples", self.n_resamples, 0)
        _integer("model_resamples", self.model_resamples, 0)
        _integer("seed", self.seed, 0)
        _integer("frames", self.frames, 1)
        _fraction("max_invalid_fraction", self.max_invalid_fraction, closed=True)
        for name in ("confidence", "noise_share_target", "precision_target"):
            _fraction(name, getattr(self, name))
        _number("calibrated_cnr", self.calibrated_cnr, 0.0)


def _choice(name, value, allowed):
    if not isinstance(value, str) or value not in allowed:
        raise ValueError(f"{name}={value!r}: must be one of {', '.join(repr(a) for a in allowed)}")


def _integer(name, value, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name}={value!r}: must be an integer >= {minimum}")


def _number(name, value, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) or not value >= minimum:
        raise ValueError(f"{name}={value!r}: must be a number >= {minimum}")


def _fraction(name, value, closed=False):
    ok = (not isinstance(value, bool) and isinstance(value, (int, float, np.number))
          and (0 <= value <= 1 if closed else 0 < value < 1))
    if not ok:
        raise ValueError(f"{name}={value!r}: must be a number between 0 and 1")


@dataclass(frozen=True)
class SpectrumSums:
    """Mergeable PSD sums of one quantity of one image.

    Attributes
    ----------
    frequency_per_nm : (n_freq,) ndarray
    psd_sum_nm3 : (n_freq,) ndarray
        Sum of the one-sided biased PSDs of the image's traces.
    floor_sum_nm3 : float
        Sum of their white noise floors.
    n_traces : int
    line_length_nm : float
        Length of each trace (rows times row spacing).
    floor_shape : (n_freq,) ndarray
        Factor on the white floor per frequency (noise correlated between rows; ones when the
        rows are independent).
    """

    frequency_per_nm: np.ndarray
    psd_sum_nm3: np.ndarray
    floor_sum_nm3: float
    n_traces: int
    line_length_nm: float
    floor_shape: np.ndarray

    @property
    def mean_floor_spectrum_nm3(self) -> np.ndarray:
        """Mean noise floor per frequency (the white level times ``floor_shape``)."""
        return self.mean_floor_nm3 * self.floor_shape

    @property
    def mean_psd_nm3(self) -> np.ndarray:
        return self.psd_sum_nm3 / self.n_traces if self.n_traces else np.full(self.frequency_per_nm.size, np.nan)

    @property
    def mean_floor_nm3(self) -> float:
        return self.floor_sum_nm3 / self.n_traces if self.n_traces else math.nan


@dataclass(frozen=True)
class EdgeDiagnostics:
    """Per-edge facts of one image, all arrays of shape (n_edges,).

    Attributes
    ----------
    line, side : ndarray
        Line index and ``"left"``/``"right"``.
    mean_position_nm : ndarray
    var_biased_nm2, var_noise_nm2 : ndarray
        Detrended variance as measured and its noise share (NaN where excluded).
    fit_sigma_rms_nm : ndarray
        Root mean square of the per-row fit uncertainties.
    contrast_to_noise : ndarray
    valid_rows, invalid_rows : ndarray of int
    exclusion, flags : ndarray of str
        Why an edge was left out of the statistics, and the detector's flags.
    achieved_sd_nm, crlb_sd_nm, shrinkage : ndarray
        From the detector's precision study (virtual twin; NaN without one): the real scatter
        of a row's position, the Cramer-Rao bound, and the slope of fitted on true deviation.
    """

    line: np.ndarray
    side: np.ndarray
    mean_position_nm: np.ndarray
    var_biased_nm2: np.ndarray
    var_noise_nm2: np.ndarray
    fit_sigma_rms_nm: np.ndarray
    contrast_to_noise: np.ndarray
    valid_rows: np.ndarray
    invalid_rows: np.ndarray
    exclusion: np.ndarray
    flags: np.ndarray
    achieved_sd_nm: np.ndarray
    crlb_sd_nm: np.ndarray
    shrinkage: np.ndarray


#: Shrinkage (slope of fitted on true deviation, from the precision study) below which the
#: detector no longer follows the edge: the unbiased value is not reported as confident.
MIN_SHRINKAGE = 0.9


@dataclass(frozen=True)
class SamplingAdvice:
    """What would bring the numbers to the targets of :class:`AnalysisOptions`.

    Attributes
    ----------
    frames_for_noise_target : float
        Frames (averaged) that bring the noise share of the edge variance to
        ``noise_share_target``, noise variance falling as 1 / frames; NaN when undetermined.
    lines_for_precision_target : float
        Lines of the measured length that give the unbiased edge sigma a relative sd of
        ``precision_target``; NaN without a determined PSD model.
    """

    frames_for_noise_target: float = math.nan
    lines_for_precision_target: float = math.nan


def _advice(summary: RoughnessSummary, model, line_length_nm, row_spacing_nm, options) -> SamplingAdvice:
    edge = summary.edge
    vu, sn = edge.var_unbiased_nm2, edge.sigma_noise_nm
    if not (np.isfinite(vu) and vu > 0 and np.isfinite(sn)):
        return SamplingAdvice()
    frames = frames_for_noise_fraction(noise_var_nm2=sn ** 2, unbiased_var_nm2=vu,
                                       target_fraction=options.noise_share_target, frames_now=options.frames)
    lines = math.nan
    if _model_complete(model) and np.isfinite(line_length_nm):
        lines = sampling_plan(sigma_unbiased_nm=math.sqrt(vu), correlation_length_nm=model.correlation_length_nm,
                              roughness_exponent=model.roughness_exponent, noise_sigma_nm=sn,
                              row_spacing_nm=row_spacing_nm, line_length_nm=line_length_nm,
                              target_relative_sd=options.precision_target).lines_needed
    return SamplingAdvice(frames_for_noise_target=frames, lines_for_precision_target=lines)


@dataclass(frozen=True)
class ImageAnalysis:
    """Everything computed from one image's edge traces (see :func:`analyse_image`).

    Attributes
    ----------
    source : str
    n_rows : int
    row_spacing_nm : float
    detector, profile_model : str
        The edge detector and, for the model fit, its profile model.
    rotated : bool
        The lines ran along the scan (image turned).
    summary : RoughnessSummary
        Biased / noise / unbiased roughness with intervals (lines resampled).
    lines : LineVariances
        Mergeable per-line variances (the resampling unit of groups).
    edge_psd, width_psd, centre_psd : SpectrumSums
        Mergeable PSD sums.
    psd_model : PSDModelFit or None
        Self-affine fit of the edge PSD (None when it could not be fitted).
    model_sigma_finite_nm : float
        The model's expected sigma over this line length after detrending.
    acf_correlation_length_nm : float
        Model-free 1/e correlation length of the noise-corrected ACF.
    noise_floor_nm3, plateau_nm3, plateau_sd_nm3 : float
        Covariance floor (white level), the PSD's high-frequency plateau and its sd.
    floors_disagree : bool
        The plateau and the floor there (``floor_at_plateau_nm3``) differ by more than 3 sd.
    plateau_check : str
        How the plateau was checked: ``"model_tail"`` (model roughness tail subtracted,
        two-sided), ``"raw_tail"`` (no determined model: only a floor above the PSD fails) or
        ``"not_possible"`` (no high-frequency bins).
    floor_at_plateau_nm3 : float
        Mean of the (possibly coloured) floor over the plateau band.
    row_noise_correlation : tuple of float
        Correlation of the edge-position noise between neighbouring rows (lags 1, 2, ...)
        used to colour the floor; empty when rows are independent.
    precision_calibration : float
        Factor the precision study applied to the fit covariance (1 when none or not run).
    shrinkage : float
        The detector's pooled shrinkage from the precision study (NaN without one).
    edges : EdgeDiagnostics
    invalid_rows, bridged_rows, excluded_edges : int
    reason_counts : tuple of (str, int)
        Invalid rows per reason.
    advice : SamplingAdvice
    warnings : tuple of (code, text)
        Plain-language warnings, codes stable for scripts.
    """

    source: str
    n_rows: int
    row_spacing_nm: float
    detector: str
    profile_model: str
    rotated: bool
    summary: RoughnessSummary
    lines: LineVariances
    edge_psd: SpectrumSums
    width_psd: SpectrumSums
    centre_psd: SpectrumSums
    psd_model: PSDModelFit | None
    model_sigma_finite_nm: float
    acf_correlation_length_nm: float
    noise_floor_nm3: float
    plateau_nm3: float
    plateau_sd_nm3: float
    floors_disagree: bool
    plateau_check: str
    floor_at_plateau_nm3: float
    row_noise_correlation: tuple
    precision_calibration: float
    shrinkage: float
    edges: EdgeDiagnostics
    invalid_rows: int
    bridged_rows: int
    excluded_edges: int
    reason_counts: tuple
    advice: SamplingAdvice
    warnings: tuple

    @property
    def line_length_nm(self) -> float:
        return self.n_rows * self.row_spacing_nm

    @property
    def warning_codes(self) -> tuple:
        return tuple(code for code, _ in self.warnings)

    @property
    def status(self) -> str:
        """``"below_noise"``, ``"noise_dominated"`` (the edge's noise share is above
        :data:`roughness.stats.NOISE_DOMINATED_FRACTION`, or the detector shrinks the roughness:
        shrinkage below :data:`MIN_SHRINKAGE`), ``"warning"`` (see ``warnings``) or ``"ok"``."""
        if self.summary.edge.status in ("below_noise", "noise_dominated"):
            return self.summary.edge.status
        if self.shrinkage < MIN_SHRINKAGE:
            return "noise_dominated"
        return "warning" if self.warnings else "ok"

    def spectrum(self, quantity: str) -> SpectrumSums:
        if quantity not in QUANTITIES:
            raise ValueError(f"quantity={quantity!r}: must be one of {QUANTITIES}")
        return getattr(self, f"{quantity}_psd")


def _precision_columns(traces: EdgeTraces) -> dict:
    study = traces.precision
    if study is None:
        nan = np.full(traces.n_edges, np.nan)
        return {"achieved_sd_nm": nan, "crlb_sd_nm": nan.copy(), "shrinkage": nan.copy()}
    return {"achieved_sd_nm": np.asarray(study.achieved_sd, float), "crlb_sd_nm": np.asarray(study.crlb_sd, float),
            "shrinkage": np.asarray(study.shrinkage, float)}


def _model_complete(model) -> bool:
    """Whether a PSD model has sigma, xi and H all determined (extrapolations need all three)."""
    return model is not None and bool(np.isfinite([model.sigma_nm, model.correlation_length_nm,
                                                   model.roughness_exponent]).all())


def _floor_mode(contrast_to_noise, calibrated_cnr) -> str:
    cnr = np.asarray(contrast_to_noise, float)
    cnr = cnr[np.isfinite(cnr)]
    return "free" if cnr.size == 0 or np.median(cnr) < calibrated_cnr else "fixed"


def _sums(spectra, line_length_nm) -> SpectrumSums:
    return SpectrumSums(frequency_per_nm=spectra.frequency_per_nm, psd_sum_nm3=spectra.psd_nm3.sum(axis=0),
                        floor_sum_nm3=float(spectra.floor_nm3.sum()), n_traces=spectra.n_traces,
                        line_length_nm=line_length_nm, floor_shape=spectra.floor_shape)


def analyse_image(traces: EdgeTraces, options: AnalysisOptions = AnalysisOptions()) -> ImageAnalysis:
    """All statistics of one image from its edge traces.

    Parameters
    ----------
    traces : EdgeTraces
        Edge positions and uncertainties, (n_edges, n_rows), nm.
    options : AnalysisOptions

    Returns
    -------
    ImageAnalysis

    Raises
    ------
    ValueError
        No edge of the image can be measured (the message gives the exclusion reasons).

    Examples
    --------
    >>> import numpy as np
    >>> from edges import EdgeTraces
    >>> from roughness.synth import edge_pairs
    >>> rng = np.random.default_rng(3)
    >>> left, right = edge_pairs(10, 512, 1.0, sigma_nm=1.0, correlation_length_nm=8.0,
    ...                          roughness_exponent=0.7, rng=rng)
    >>> x = np.empty((20, 512)); x[0::2], x[1::2] = left, right + 30.0
    >>> traces = EdgeTraces(position_nm=x + rng.normal(0, 0.5, x.shape), sigma_nm=np.full(x.shape, 0.5),
    ...     valid=np.ones(x.shape, bool), reason=np.zeros(x.shape, np.int8),
    ...     line_index=np.repeat(np.arange(10), 2), side=np.tile(["left", "right"], 10),
    ...     row_spacing_nm=1.0, reduced_chi2=np.ones(x.shape), iterations=np.ones(x.shape, int),
    ...     contrast_to_noise=np.full(20, 10.0), edge_flags=np.array([""] * 20))
    >>> image = analyse_image(traces, AnalysisOptions(n_resamples=200, model_resamples=0))
    >>> 0.85 < image.summary.edge.sigma_unbiased_nm < 1.1, image.summary.n_lines
    (True, 10)
    """
    if not isinstance(options, AnalysisOptions):
        raise TypeError(f"options: expected AnalysisOptions, got {type(options).__name__}")
    rough = analyse_traces(traces, detrend=options.detrend, window=options.psd_window,
                           max_gap_rows=options.max_gap_rows, max_invalid_fraction=options.max_invalid_fraction)
    if not np.any(np.isfinite(rough.edge_var_biased_nm2)):
        counts = traces.reason_counts()
        total = max(sum(counts.values()), 1)
        rows = ", ".join(f"{name} {100 * k / total:.0f}%" for name, k in sorted(counts.items(), key=lambda kv: -kv[1]))
        hint = (" (saturated rows: the detector clipped the image; lower the contrast or brightness)"
                if counts.get("saturated", 0) > 0.5 * total else "")
        if set(rough.edge_exclusion) == {"too_close"}:
            hint = (" (the lines are too dense to resolve: a fit needs edges at least 4 px apart, a pitch of 8 px; "
                    "image at a smaller pixel size)")
        raise ValueError(f"{traces.source}: no edge could be measured (" +
                         ", ".join(_EXCLUSION_WORDS.get(k, k) for k in sorted(set(rough.edge_exclusion) - {""})) +
                         (f"; failed rows: {rows}" if rows else "") + ")" + hint)
    rng = np.random.default_rng(options.seed)
    summary = summarize([rough.lines], n_resamples=options.n_resamples, confidence=options.confidence, rng=rng)
    try:
        model = fit_psd_model(rough.frequency_per_nm, rough.edge.psd_nm3, rough.edge.floor_spectrum_nm3,
                              window=options.psd_window, n_resamples=options.model_resamples,
                              floor=_floor_mode(traces.contrast_to_noise, options.calibrated_cnr), rng=rng)
    except (ValueError, RuntimeError):
        model = None
    finite = math.nan
    if _model_complete(model):
        finite = math.sqrt(expected_measured_variance(
            sigma_nm=model.sigma_nm, correlation_length_nm=model.correlation_length_nm,
            roughness_exponent=model.roughness_exponent, n_rows=rough.n_rows,
            row_spacing_nm=rough.row_spacing_nm, detrend=options.detrend))
    floor = float(np.mean(rough.edge.floor_nm3))
    # the plateau check always runs: against the model's roughness tail where the model's
    # exponent is determined (two-sided), else against the raw tail (a floor above it is wrong)
    f = rough.frequency_per_nm
    floor_spectrum = rough.edge.floor_spectrum_nm3.mean(axis=0) if rough.edge.n_traces else np.full(f.size, np.nan)
    with_tail = model is not None and model.h_determined
    plateau, plateau_sd = plateau_floor(f, rough.edge.psd_nm3.mean(axis=0), n_traces=rough.edge.n_traces,
                                        row_spacing_nm=rough.row_spacing_nm, window=options.psd_window,
                                        roughness_tail_nm3=model.model_nm3(f) if with_tail else None)
    floor_hf, _ = plateau_floor(f, floor_spectrum, n_traces=1, row_spacing_nm=rough.row_spacing_nm,
                                window=options.psd_window)
    disagree = floors_disagree(plateau, plateau_sd, floor_hf, one_sided=not with_tail)
    check = ("not_possible" if not (np.isfinite(plateau) and np.isfinite(floor_hf))
             else "model_tail" if with_tail else "raw_tail")
    xi_acf = correlation_length_from_acf(rough.acf_edge_nm2,
                                         noise_var_nm2=float(np.nanmean(rough.edge_var_noise_nm2)),
                                         row_spacing_nm=rough.row_spacing_nm)
    length = rough.n_rows * rough.row_spacing_nm
    n_invalid = int(np.count_nonzero(~traces.valid))
    valid_any = traces.valid.any(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_pos = np.where(valid_any, np.nansum(traces.position_nm, axis=1) / traces.valid.sum(1), np.nan)
        rms = np.where(valid_any, np.sqrt(np.nansum(traces.sigma_nm ** 2, axis=1) / traces.valid.sum(1)), np.nan)
    edges = EdgeDiagnostics(line=traces.line_index, side=traces.side, mean_position_nm=mean_pos,
                            var_biased_nm2=rough.edge_var_biased_nm2, var_noise_nm2=rough.edge_var_noise_nm2,
                            fit_sigma_rms_nm=rms, contrast_to_noise=np.asarray(traces.contrast_to_noise, float),
                            valid_rows=traces.valid.sum(1), invalid_rows=(~traces.valid).sum(1),
                            exclusion=rough.edge_exclusion, flags=np.asarray(traces.edge_flags, str),
                            **_precision_columns(traces))
    study = traces.precision
    shrinkage = study.shrinkage_pooled if study is not None else math.nan
    warnings = _warnings(summary, model, traces, length, n_invalid)
    warnings += _floor_warnings(disagree, check, plateau, floor_hf, traces.noise_model)
    if shrinkage < MIN_SHRINKAGE:
        warnings.append(("detector_shrinks", f"at this noise level the edge fit follows only {100 * shrinkage:.0f}% of "
                                             "the edge's real excursions (precision study): the measured roughness is "
                                             "shrunk and is not reported as a confident value; more frames or dose "
                                             "would fix it"))
    if traces.detector in ("threshold", "slope"):
        warnings.append(("baseline_detector", f"{traces.detector} detector: its noise floor is a linearised "
                                              "estimate, and at low contrast-to-noise it shrinks real roughness"))
    if any(traces.bar_rows):
        top, bottom = traces.bar_rows
        where = " and ".join(w for w, k in ((f"{top} at the top", top), (f"{bottom} at the bottom", bottom)) if k)
        warnings.append(("information_bar", f"rows of an information bar were left out ({where}); the edges are "
                                            "measured on the rest of the image"))
    first, stop = rough.row_range
    if (first, stop) != (0, traces.n_rows):
        warnings.append(("rows_cut", f"{traces.n_rows - (stop - first)} rows left out where most edges could not be "
                                     f"fitted (a band across the image: a bar, scratch or missing rows); the "
                                     f"statistics use rows {first}-{stop - 1}"))
    excluded = rough.edge_exclusion[rough.edge_exclusion != ""]
    if excluded.size:
        why = ", ".join(f"{_EXCLUSION_WORDS.get(k, k)} {n}" for k, n in zip(*np.unique(excluded, return_counts=True)))
        lost = len(traces.line_pairs()) - int(np.count_nonzero(np.isfinite(rough.lines.width_biased_nm2)))
        warnings.append(("edges_excluded", f"{excluded.size} of {traces.n_edges} edges left out ({why})"
                                           + (f"; {lost} line{'s have' if lost > 1 else ' has'} no width" if lost else "")))
    if traces.rotated:
        warnings.append(("scan_along_lines", "the lines run along the scan direction: noise correlated along the "
                                             "scan correlates neighbouring samples of each edge"))
    return ImageAnalysis(
        source=traces.source, n_rows=rough.n_rows, row_spacing_nm=rough.row_spacing_nm, detector=traces.detector,
        profile_model=traces.profile_model, rotated=bool(traces.rotated), summary=summary, lines=rough.lines,
        edge_psd=_sums(rough.edge, length), width_psd=_sums(rough.width, length),
        centre_psd=_sums(rough.centre, length), psd_model=model, model_sigma_finite_nm=finite,
        acf_correlation_length_nm=xi_acf, noise_floor_nm3=floor, plateau_nm3=plateau, plateau_sd_nm3=plateau_sd,
        floors_disagree=disagree, plateau_check=check, floor_at_plateau_nm3=floor_hf,
        row_noise_correlation=tuple(traces.noise_model.row_correlation),
        precision_calibration=study.applied_calibration if study is not None else 1.0, shrinkage=shrinkage, edges=edges, invalid_rows=n_invalid, bridged_rows=rough.bridged_rows,
        excluded_edges=int(np.count_nonzero(rough.edge_exclusion != "")),
        reason_counts=tuple(traces.reason_counts().items()),
        advice=_advice(summary, model, length, rough.row_spacing_nm, options), warnings=tuple(warnings))


#: Exclusion reasons of edges in a process engineer's words.
_EXCLUSION_WORDS = {"too_many_invalid_rows": "too many rows failed", "gap_too_long": "a long run of failed rows",
                    "too_close": "too close to a neighbour to fit"}


def _warnings(summary: RoughnessSummary, model, traces: EdgeTraces, length_nm, n_invalid):
    out = []
    nf = summary.edge.noise_fraction
    if np.isfinite(nf) and nf >= 1:
        out.append(("below_noise", "the noise estimate is as large as the measured edge variance: the unbiased "
                                   "edge roughness is not measurable at this noise level"))
    elif np.isfinite(nf) and nf > NOISE_DOMINATED_FRACTION:
        out.append(("noise_dominated", f"image noise is {100 * nf:.0f}% of the measured edge variance: the unbiased "
                                       "value rests on a small difference of two large numbers and is not reported "
                                       "as a confident value; more frames or dose would fix it"))
    elif np.isfinite(nf) and nf > 0.5:
        out.append(("noise_large", f"image noise is {100 * nf:.0f}% of the measured edge variance; the unbiased "
                                   "value leans heavily on the noise estimate"))
    if summary.n_lines < 5:
        out.append(("few_lines", f"only {summary.n_lines} whole lines: confidence intervals are wide"))
    if model is not None and np.isfinite(model.correlation_length_nm):
        ratio = length_nm / model.correlation_length_nm
        if ratio < 50:
            out.append(("short_lines", f"lines are only {ratio:.0f} correlation lengths long: the measured sigma "
                                       f"is biased low by about {min(100.0, 100 * 2.2 / ratio):.0f}% against an "
                                       "infinitely long line"))
    if model is not None and model.not_determined:
        out.append(("model_not_determined", "PSD model: " + "; ".join(
            f"{PARAMETER_NAMES[name]} not determined ({why})" for name, why in model.not_determined)))
    if n_invalid > 0.01 * traces.valid.size:
        reasons = ", ".join(f"{k} {n}" for k, n in traces.reason_counts().items())
        out.append(("failed_rows", f"{100 * n_invalid / traces.valid.size:.1f}% of row fits failed ({reasons})"))
    close = int(sum("close_neighbour" in f for f in np.asarray(traces.edge_flags, str)))
    if close:
        out.append(("close_neighbour", f"{close} edges lie within a few pixels of their neighbours (fine pitch): the "
                                       "fit of one edge can feel the other, and LWR especially may be inflated by up "
                                       "to ~25% (or LER shrunk, in the narrowest windows); a smaller pixel helps"))
    low = int(np.count_nonzero(traces.contrast_to_noise < LOW_CONTRAST_CNR))
    if low:
        study = traces.precision
        if study is not None and study.applied_calibration != 1.0:
            fix = (f"the virtual twin measured the real scatter and scaled the floor by "
                   f"{study.applied_calibration:.2f}; more frames or dose would still tighten the numbers")
        elif study is not None:
            fix = "the virtual twin found the fit's uncertainties right at this dose"
        else:
            fix = "the linearised uncertainties under-state the scatter there and the noise floor is too low"
        out.append(("low_contrast", f"{low} edges have contrast-to-noise below {LOW_CONTRAST_CNR:g}: {fix}"))
    return out


def _floor_warnings(disagree, check, plateau, floor_hf, noise_model):
    out = []
    rho = tuple(noise_model.row_correlation)
    if rho:
        out.append(("rows_correlated", f"image noise is correlated between rows (lag-1 correlation {rho[0]:.2f}): "
                                       "the image was smoothed, resampled or frame-averaged with drift correction; "
                                       "the noise floor is coloured accordingly (low frequencies carry more noise)"))
    if check == "not_possible":
        out.append(("plateau_unchecked", "the noise floor could not be checked against the PSD's high-frequency "
                                         "plateau (no bins there)"))
    elif disagree and floor_hf > plateau:
        ratio = floor_hf / plateau if plateau > 0 else math.inf
        times = f"{ratio:.1f} times" if np.isfinite(ratio) else "far"
        out.append(("floor_above_data", f"the noise floor lies {times} above the measured PSD at high frequency "
                                        f"({floor_hf:.3g} against {plateau:.3g} nm^3): the noise is over-stated "
                                        "(noise correlated between rows that was not detected, a filtered image, "
                                        "or a fit covariance that is off), so the unbiased values and the noise "
                                        "share are not credible"))
    elif disagree:
        out.append(("floor_below_plateau", f"the PSD's high-frequency plateau ({plateau:.3g} nm^3) lies above the "
                                           f"noise floor ({floor_hf:.3g} nm^3) beyond the roughness model: noise the "
                                           "fit covariance does not see (charging, vibration, drift) or aliased "
                                           "roughness; the unbiased values may be too high"))
    return out


# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PooledSpectrum:
    """A group's averaged PSD of one quantity on the common grid.

    Attributes
    ----------
    frequency_per_nm : (n_freq,) ndarray
    psd_biased_nm3 : (n_freq,) ndarray
        Length-weighted mean one-sided PSD as measured.
    noise_floor_nm3 : float
        Length-weighted mean covariance floor (white level).
    n_traces, n_images : int
        Traces and images that contributed.
    noise_floor_spectrum_nm3 : (n_freq,) ndarray
        The floor per frequency (coloured where noise is correlated between rows); what
        ``psd_unbiased_nm3`` subtracts.
    """

    frequency_per_nm: np.ndarray
    psd_biased_nm3: np.ndarray
    noise_floor_nm3: float
    n_traces: int
    n_images: int
    noise_floor_spectrum_nm3: np.ndarray

    @property
    def psd_unbiased_nm3(self) -> np.ndarray:
        return self.psd_biased_nm3 - self.noise_floor_spectrum_nm3


@dataclass(frozen=True)
class GroupAnalysis:
    """Statistics of a group (or the whole set) reduced from image analyses alone.

    Attributes
    ----------
    name : str
        Group name (``""`` for the whole set).
    sources : tuple of str
        Member images, sorted.
    summary : RoughnessSummary
        Pooled roughness; whole images resampled for the intervals (lines for a group of one).
    edge_psd, width_psd, centre_psd : PooledSpectrum or None
        Averaged PSDs on the common grid (None when no trace of that quantity exists).
    n_grids : int
        Distinct (rows, row spacing) grids combined; above 1 the PSDs were interpolated.
    psd_model : PSDModelFit or None
        Self-affine fit of the pooled edge PSD; standard errors from resampling images (five
        images at least, otherwise NaN), or the image's own for a group of one.
    line_length_nm, row_spacing_nm : float
        Length-weighted means over the images.
    advice : SamplingAdvice
    """

    name: str
    sources: tuple
    summary: RoughnessSummary
    edge_psd: PooledSpectrum | None
    width_psd: PooledSpectrum | None
    centre_psd: PooledSpectrum | None
    n_grids: int
    psd_model: PSDModelFit | None
    line_length_nm: float
    row_spacing_nm: float
    advice: SamplingAdvice

    @property
    def n_images(self) -> int:
        return len(self.sources)

    def spectrum(self, quantity: str) -> PooledSpectrum | None:
        if quantity not in QUANTITIES:
            raise ValueError(f"quantity={quantity!r}: must be one of {QUANTITIES}")
        return getattr(self, f"{quantity}_psd")


def common_grid(spectra) -> np.ndarray:
    """The frequency grid images of different lengths and pixel sizes are averaged on.

    Resolution of the shortest line (``df = max 1 / L``), up to the lowest Nyquist frequency.
    """
    df = max(float(s.frequency_per_nm[1] - s.frequency_per_nm[0]) for s in spectra)
    f_top = min(float(s.frequency_per_nm[-1]) for s in spectra)
    return np.arange(int(math.floor(f_top / df * (1 + 1e-9))) + 1) * df


def _on_grid(s: SpectrumSums, f, values=None) -> np.ndarray:
    values = s.mean_psd_nm3 if values is None else values
    if s.frequency_per_nm.size == f.size and np.allclose(s.frequency_per_nm, f, rtol=1e-9, atol=0):
        return values
    return np.interp(f, s.frequency_per_nm, values)


def _pool(spectra, f) -> PooledSpectrum | None:
    use = [s for s in spectra if s.n_traces]
    if not use:
        return None
    w = np.array([s.n_traces * s.line_length_nm for s in use])
    w = w / w.sum()
    psd = np.sum([wi * _on_grid(s, f) for wi, s in zip(w, use)], axis=0)
    floor = float(np.sum([wi * s.mean_floor_nm3 for wi, s in zip(w, use)]))
    floor_spectrum = np.sum([wi * _on_grid(s, f, s.mean_floor_spectrum_nm3) for wi, s in zip(w, use)], axis=0)
    return PooledSpectrum(frequency_per_nm=f, psd_biased_nm3=psd, noise_floor_nm3=floor,
                          n_traces=int(sum(s.n_traces for s in use)), n_images=len(use),
                          noise_floor_spectrum_nm3=floor_spectrum)


def analyse_group(images, options: AnalysisOptions = AnalysisOptions(), *, name: str = "") -> GroupAnalysis:
    """Reduce per-image analyses to the statistics of their group.

    Parameters
    ----------
    images : sequence of ImageAnalysis
        The members (any order: they are sorted by source first).
    options : AnalysisOptions
        The same options the images were analysed with.
    name : str
        Group name.

    Returns
    -------
    GroupAnalysis

    Examples
    --------
    >>> import numpy as np
    >>> from edges import EdgeTraces
    >>> def image(seed, n_rows):
    ...     rng = np.random.default_rng(seed)
    ...     x = rng.normal(0, 1.0, (8, n_rows)) + np.arange(8)[:, None] * 30.0
    ...     return analyse_image(EdgeTraces(position_nm=x, sigma_nm=np.full(x.shape, 0.3),
    ...         valid=np.ones(x.shape, bool), reason=np.zeros(x.shape, np.int8),
    ...         line_index=np.repeat(np.arange(4), 2), side=np.tile(["left", "right"], 4),
    ...         row_spacing_nm=1.0, reduced_chi2=np.ones(x.shape), iterations=np.ones(x.shape, int),
    ...         contrast_to_noise=np.full(8, 10.0), edge_flags=np.array([""] * 8), source=f"img{seed}"),
    ...         AnalysisOptions(n_resamples=50, model_resamples=0))
    >>> a, b = image(1, 256), image(2, 512)
    >>> g1, g2 = analyse_group([a, b]), analyse_group([b, a])
    >>> g1.n_grids, g1.edge_psd.n_traces, bool(np.array_equal(g1.edge_psd.psd_biased_nm3, g2.edge_psd.psd_biased_nm3))
    (2, 16, True)
    """
    images = sorted(images, key=lambda im: (im.source, im.n_rows, im.row_spacing_nm))
    if not images:
        raise ValueError("images: a group needs at least one analysed image")
    summary = summarize([im.lines for im in images], n_resamples=options.n_resamples,
                        confidence=options.confidence, rng=np.random.default_rng(options.seed))
    edge_sums = [im.edge_psd for im in images]
    f = common_grid(edge_sums)
    pooled = {q: _pool([im.spectrum(q) for im in images], f) for q in QUANTITIES}
    n_grids = len({(im.n_rows, round(im.row_spacing_nm, 9)) for im in images})
    weights = np.array([im.edge_psd.n_traces * im.line_length_nm for im in images], float)
    line_length = float(np.average([im.line_length_nm for im in images], weights=weights)) if weights.sum() else math.nan
    spacing = float(np.average([im.row_spacing_nm for im in images], weights=weights)) if weights.sum() else math.nan
    if len(images) == 1:
        model = images[0].psd_model
    else:
        use = [im for im in images if im.edge_psd.n_traces]
        try:
            model = fit_psd_model(f, np.array([_on_grid(im.edge_psd, f) for im in use]),
                                  np.array([_on_grid(im.edge_psd, f, im.edge_psd.mean_floor_spectrum_nm3)
                                            for im in use]),
                                  weights=np.array([im.edge_psd.n_traces * im.line_length_nm for im in use]),
                                  window=options.psd_window, n_resamples=options.model_resamples,
                                  floor=_floor_mode(np.concatenate([im.edges.contrast_to_noise for im in use]),
                                                    options.calibrated_cnr),
                                  rng=np.random.default_rng(options.seed))
        except (ValueError, RuntimeError):
            model = None
    return GroupAnalysis(name=name, sources=tuple(im.source for im in images), summary=summary,
                         edge_psd=pooled["edge"], width_psd=pooled["width"], centre_psd=pooled["centre"],
                         n_grids=n_grids, psd_model=model, line_length_nm=line_length, row_spacing_nm=spacing,
                         advice=_advice(summary, model, line_length, spacing, options))
