"""The main job: SEM images in, unbiased roughness tables, PSDs and a report out.

``roughness.measure(images, pixel_size_nm=..., ...)`` takes file paths, folders, glob patterns, arrays or
:class:`edges.Micrograph` objects and returns a :class:`Measurement`; ``Measurement.write(out)``
writes the output contract of DESIGN.md (``summary.csv``, ``edges.csv``, ``psd.csv``,
``failures.csv`` when any image failed, ``settings.json``, ``report.html``).  One bad image never
stops a batch: it is recorded in ``failures`` with the reason and the rest are measured.
"""
from __future__ import annotations

import glob
import math
import os
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np

from edges._types import Micrograph
from edges.baselines import slope_edges, threshold_edges
from edges.fit import LOW_CONTRAST_CNR, fit_edges
from edges.io import read_micrograph

from .model import correlation_length_from_acf, fit_psd_model
from .noise import floors_disagree, plateau_floor
from .stats import analyse_traces, expected_measured_variance, summarize

__all__ = ["MeasureSettings", "ImageResult", "Measurement", "measure", "expand_inputs"]

IMAGE_SUFFIXES = (".tif", ".tiff", ".png")
REPORT_IMAGES = 12          # images that get their own section (and figures) in the report


@dataclass(frozen=True)
class MeasureSettings:
    """Everything that decides a measurement (written to settings.json).

    Attributes
    ----------
    pixel_size_nm : float or None
        None: from each file's TIFF resolution tags.
    detector : {"model", "threshold", "slope"}
        Per-row edge detector; "model" is the profile fit with calibrated uncertainties.
    profile_model : {"template", "parametric", "step"}
    window_px : int
        Fit window across each edge (odd).
    detrend : {"linear", "mean", "quadratic", "none"}
        Removed from every edge, width and centre trace before statistics.
    psd_window : {"hann", "boxcar"}
    polarity : {"auto", "bright", "dark"}
    orientation : {"auto", "vertical", "horizontal"}
    threshold_level : float
        Level of the threshold detector (fraction of the local plateau-to-plateau range).
    max_gap_rows : int
        Longest run of failed rows bridged by interpolation.
    max_invalid_fraction : float
        An edge with more failed rows is excluded.
    n_resamples : int
        Bootstrap resamples for confidence intervals.
    confidence : float
    model_resamples : int
        Bootstrap resamples for the PSD-model uncertainties.
    seed : int
        Seed of the resampling.
    """

    pixel_size_nm: float | None = None
    detector: str = "model"
    profile_model: str = "template"
    window_px: int = 31
    detrend: str = "linear"
    psd_window: str = "hann"
    polarity: str = "auto"
    orientation: str = "auto"
    threshold_level: float = 0.5
    max_gap_rows: int = 3
    max_invalid_fraction: float = 0.05
    n_resamples: int = 1000
    confidence: float = 0.95
    model_resamples: int = 50
    seed: int = 0

    def validate(self):
        if self.detector not in ("model", "threshold", "slope"):
            raise ValueError(f"detector={self.detector!r}: must be 'model', 'threshold' or 'slope'")
        if self.profile_model not in ("template", "parametric", "step"):
            raise ValueError(f"profile_model={self.profile_model!r}: must be 'template', 'parametric' or 'step'")
        if self.pixel_size_nm is not None and not self.pixel_size_nm > 0:
            raise ValueError(f"pixel_size_nm={self.pixel_size_nm}: must be > 0")
        if self.window_px % 2 != 1 or self.window_px < 9:
            raise ValueError(f"window_px={self.window_px}: must be an odd integer >= 9")
        if not 0 < self.confidence < 1:
            raise ValueError(f"confidence={self.confidence}: must be between 0 and 1")
        return self


@dataclass
class ImageResult:
    """Everything measured on one image (picklable, for worker processes)."""

    name: str
    traces: object
    roughness: object
    summary: object
    model: object
    acf_correlation_length_nm: float
    plateau_nm3: float
    plateau_sd_nm3: float
    floor_nm3: float
    floors_disagree: bool
    model_sigma_finite_nm: float = math.nan   # the model's expected sigma over this length, detrended
    warnings: list = field(default_factory=list)
    preview: np.ndarray | None = None      # the image (rows x cols, possibly cropped) for figures
    group: str = ""


@dataclass
class Measurement:
    """Results of :func:`measure`: per-image results, failures and the pooled set."""

    images: list
    failures: list
    settings: MeasureSettings
    overall: object = None
    overall_model: object = None
    psd: dict = field(default_factory=dict)

    # tables --------------------------------------------------------------------------------
    def summary_table(self):
        from ._tables import summary_table

        return summary_table(self)

    def edges_table(self):
        from ._tables import edges_table

        return edges_table(self)

    def psd_table(self):
        from ._tables import psd_table

        return psd_table(self)

    def failures_table(self):
        from ._tables import failures_table

        return failures_table(self)

    def write(self, out_dir, *, report: bool = True) -> Path:
        """Write the output folder (tables, settings, report) and return its path."""
        from ._tables import write_outputs

        return write_outputs(self, Path(out_dir), report=report)


def expand_inputs(items) -> list:
    """Paths, folders (their TIFF/PNG files) and glob patterns to a sorted list; arrays and
    Micrographs pass through.  A pattern or path that matches nothing is kept so that it is
    reported as a failure (never silently dropped)."""
    out = []
    for item in items:
        if isinstance(item, (np.ndarray, Micrograph)):
            out.append(item)
            continue
        text = os.fspath(item)
        p = Path(text)
        if p.is_dir():
            files = sorted(q for q in p.iterdir() if q.suffix.lower() in IMAGE_SUFFIXES)
            out.extend(files if files else [p])
        elif any(ch in text for ch in "*?["):
            hits = sorted(Path(h) for h in glob.glob(text))
            out.extend(hits if hits else [p])
        else:
            out.append(p)
    return out


def _name(item, k):
    if isinstance(item, Micrograph):
        return item.source if item.source != "<array>" else f"array_{k:03d}"
    if isinstance(item, np.ndarray):
        return f"array_{k:03d}"
    return str(item)


def _load(item, name, settings):
    if isinstance(item, Micrograph):
        m = item if settings.pixel_size_nm is None else replace(item, pixel_size_nm=settings.pixel_size_nm)
        return replace(m, source=name)
    if isinstance(item, np.ndarray):
        if settings.pixel_size_nm is None:
            raise ValueError(f"{name}: an array needs pixel_size_nm")
        from edges.io import MicrographError

        px = np.asarray(item, float)
        if px.ndim != 2 or px.size == 0:
            raise MicrographError(f"{name}: expected a non-empty 2-D array, got shape {px.shape}")
        return Micrograph(pixels=px, pixel_size_nm=settings.pixel_size_nm, source=name)
    return read_micrograph(item, pixel_size_nm=settings.pixel_size_nm)


def _warnings(res, s, traces, model):
    out = []
    v = res.values
    nf = v["edge_noise_fraction"]
    if np.isfinite(nf) and nf > 0.5:
        out.append(("noise_dominates", f"image noise is {100 * nf:.0f}% of the measured edge variance; "
                                       "the unbiased value leans heavily on the noise estimate"))
    if v["edge_status"] == "below_noise":
        out.append(("below_noise", "the unbiased edge roughness is below the noise: not measurable at this noise level"))
    if v["n_lines"] < 5:
        out.append(("few_lines", f"only {v['n_lines']} whole lines: confidence intervals are wide"))
    if model is not None and np.isfinite(model.correlation_length_nm):
        length = traces.n_rows * traces.row_spacing_nm
        ratio = length / model.correlation_length_nm
        if ratio < 50:
            out.append(("short_lines", f"lines are only {ratio:.0f} correlation lengths long: the measured sigma "
                                       f"is biased low by about {100 * 2.2 / ratio:.0f}% against an infinitely long line"))
    n_invalid = int(np.count_nonzero(~traces.valid))
    if n_invalid > 0.01 * traces.valid.size:
        reasons = ", ".join(f"{k} {n}" for k, n in traces.reason_counts().items())
        out.append(("failed_rows", f"{100 * n_invalid / traces.valid.size:.1f}% of row fits failed ({reasons})"))
    low = int(np.count_nonzero(traces.contrast_to_noise < LOW_CONTRAST_CNR))
    if low:
        out.append(("low_contrast", f"{low} edges have contrast-to-noise below {LOW_CONTRAST_CNR:g}: their "
                                    "uncertainties are under-stated and the noise floor is too low"))
    return out


#: Below this median contrast-to-noise the PSD model's noise floor is fitted, not fixed to the
#: covariance's: there the linearised covariance under-states the scatter by a few per cent,
#: and a floor 10% low pulls the roughness exponent down by ~0.15 (our checks, Whittle fit).
CALIBRATED_CNR = 5.0


def floor_mode(traces_list) -> str:
    cnr = np.concatenate([np.asarray(t.contrast_to_noise, float) for t in traces_list])
    cnr = cnr[np.isfinite(cnr)]
    return "free" if cnr.size == 0 or np.median(cnr) < CALIBRATED_CNR else "fixed"


def _measure_one(item, k, settings: MeasureSettings, group: str = ""):
    name = _name(item, k)
    m = _load(item, name, settings)
    if settings.detector == "model":
        traces = fit_edges(m, model=settings.profile_model, window_px=settings.window_px,
                           polarity=settings.polarity, orientation=settings.orientation)
    elif settings.detector == "threshold":
        traces = threshold_edges(m, level=settings.threshold_level, window_px=settings.window_px,
                                 polarity=settings.polarity, orientation=settings.orientation)
    else:
        traces = slope_edges(m, window_px=settings.window_px, polarity=settings.polarity,
                             orientation=settings.orientation)
    rough = analyse_traces(traces, detrend=settings.detrend, window=settings.psd_window,
                           max_gap_rows=settings.max_gap_rows, max_invalid_fraction=settings.max_invalid_fraction)
    if not np.any(np.isfinite(rough.edge_var_biased_nm2)):
        raise ValueError(f"{name}: no edge could be measured (" +
                         ", ".join(sorted(set(rough.edge_exclusion) - {""})) + ")")
    rng = np.random.default_rng(settings.seed)
    summ = summarize([rough], n_resamples=settings.n_resamples, confidence=settings.confidence, rng=rng)
    model = None
    try:
        model = fit_psd_model(rough.frequency_per_nm, rough.psd["edge"], rough.psd["edge_floor"],
                              window=settings.psd_window, n_resamples=settings.model_resamples,
                              floor=floor_mode([traces]), rng=rng)
    except (ValueError, RuntimeError):
        model = None
    finite = math.nan
    if model is not None and np.isfinite(model.roughness_exponent):
        finite = math.sqrt(expected_measured_variance(
            sigma_nm=model.sigma_nm, correlation_length_nm=model.correlation_length_nm,
            roughness_exponent=model.roughness_exponent, n_rows=rough.n_rows,
            row_spacing_nm=rough.row_spacing_nm, detrend=settings.detrend))
    floor = float(np.mean(rough.psd["edge_floor"]))
    tail = model.model_nm3(rough.frequency_per_nm) if model is not None else None
    plateau, plateau_sd = plateau_floor(rough.frequency_per_nm, rough.psd["edge"].mean(axis=0),
                                        n_traces=rough.psd["edge"].shape[0], row_spacing_nm=rough.row_spacing_nm,
                                        window=settings.psd_window, roughness_tail_nm3=tail)
    disagree = floors_disagree(plateau, plateau_sd, floor)
    xi_acf = correlation_length_from_acf(rough.acf_edge_nm2, noise_var_nm2=float(np.nanmean(rough.edge_var_noise_nm2)),
                                         row_spacing_nm=rough.row_spacing_nm)
    warns = _warnings(summ, settings, traces, model)
    if disagree:
        warns.append(("floors_disagree", f"the PSD's high-frequency plateau ({plateau:.3g} nm^3) and the fit-covariance "
                                         f"noise floor ({floor:.3g} nm^3) disagree: noise may be correlated between rows "
                                         "(smoothing, resampling, charging), or the fit's covariance is off"))
    if getattr(traces, "detector", "") in ("threshold", "slope"):
        warns.append(("baseline_detector", f"{traces.detector} detector: its noise floor is a linearised estimate, "
                                           "and at low contrast-to-noise it shrinks real roughness"))
    lay_rotated = traces.rotated
    if lay_rotated:
        warns.append(("scan_along_lines", "the lines run along the scan direction: noise correlated along the scan "
                                          "correlates neighbouring samples of each edge"))
    pixels = m.pixels.T if lay_rotated else m.pixels
    preview = pixels[: min(pixels.shape[0], 384)].astype(np.float16)   # for figures only
    return ImageResult(name=name, traces=traces, roughness=rough, summary=summ, model=model,
                       acf_correlation_length_nm=xi_acf, plateau_nm3=plateau, plateau_sd_nm3=plateau_sd,
                       floor_nm3=floor, floors_disagree=disagree, model_sigma_finite_nm=finite, warnings=warns,
                       preview=preview, group=group)


def _safe_measure(args):
    item, k, settings, group = args
    try:
        return _measure_one(item, k, settings, group), None
    except Exception as exc:       # one bad image never stops a batch: record why
        reason = str(exc) if isinstance(exc, (ValueError, OSError)) else f"{type(exc).__name__}: {exc}"
        return None, (_name(item, k), reason)


def _cache_key(name, group, settings) -> str:
    import hashlib
    import json

    text = json.dumps({"image": name, "group": group, "settings": asdict(settings)}, sort_keys=True)
    return hashlib.sha1(text.encode()).hexdigest()[:20]


class _Cache:
    """One pickle per measured image, written as soon as it is done (streaming), so that an
    interrupted batch loses nothing and ``resume`` measures only what is missing.  Keys hash
    the image name, its group and every setting, so a changed recipe is measured afresh."""

    def __init__(self, folder, resume):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.resume = resume

    def _path(self, job):
        item, k, settings, group = job
        return self.folder / f"{_cache_key(_name(item, k), group, settings)}.pkl"

    def load(self, job):
        import pickle

        path = self._path(job)
        if self.resume and path.exists():
            try:
                with open(path, "rb") as fh:
                    return pickle.load(fh)
            except Exception:      # a truncated file from a killed run: measure again
                return None
        return None

    def store(self, job, result):
        import pickle

        path = self._path(job)
        tmp = path.with_suffix(".tmp")
        with open(tmp, "wb") as fh:
            pickle.dump(result, fh, protocol=pickle.HIGHEST_PROTOCOL)
        tmp.replace(path)          # atomic: a reader never sees half a result


def measure(images, *, pixel_size_nm: float | None = None, groups: dict | None = None,
            workers: int = 1, progress: bool = False, settings: MeasureSettings | None = None,
            cache_dir=None, resume: bool = False, **options) -> Measurement:
    """Measure roughness on SEM images.

    Parameters
    ----------
    images : sequence of path, folder, glob pattern, ndarray or Micrograph
    pixel_size_nm : float, optional
        Pixel size in nm (overrides the TIFF tags; required for PNG files and arrays).
    groups : dict, optional
        ``{group name: [images...]}`` instead of ``images`` (pass ``images=None``): every
        image is measured and the report compares the groups.
    workers : int
        Processes; 1 measures in this process.
    progress : bool
        Show a progress bar (tqdm) on stderr.
    settings : MeasureSettings, optional
        A full recipe; keyword ``options`` (field names of MeasureSettings) override it.
    cache_dir : path, optional
        Store each image's result there as soon as it is measured (a pickle per image; about
        1-2 MB for a 1024 x 1024 image).
    resume : bool
        With ``cache_dir``: load the images already measured with the same settings instead of
        measuring them again.

    Returns
    -------
    Measurement
    """
    base = settings or MeasureSettings()
    if pixel_size_nm is not None:
        options["pixel_size_nm"] = pixel_size_nm
    unknown = set(options) - set(asdict(base))
    if unknown:
        raise ValueError(f"unknown options {sorted(unknown)}; see MeasureSettings")
    settings = replace(base, **options).validate()
    jobs = []
    if groups:
        for gname, items in groups.items():
            for item in expand_inputs(items):
                jobs.append((item, len(jobs), settings, str(gname)))
    else:
        if images is None or isinstance(images, (str, os.PathLike, np.ndarray, Micrograph)):
            images = [images] if images is not None else []
        for item in expand_inputs(images):
            jobs.append((item, len(jobs), settings, ""))
    if not jobs:
        raise ValueError("no images given")
    results, failures = [], []
    cache = _Cache(cache_dir, resume) if cache_dir is not None else None
    todo = []
    for job in jobs:
        hit = cache.load(job) if cache else None
        if hit is not None:
            results.append(hit)
        else:
            todo.append(job)
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=len(jobs), initial=len(jobs) - len(todo), unit="image", desc="measuring")

    def done(job, res, fail):
        if res is not None:
            results.append(res)
            if cache:
                cache.store(job, res)
        else:
            failures.append(fail)
        if bar:
            bar.update()

    try:
        if workers > 1 and len(todo) > 1:
            from concurrent.futures import ProcessPoolExecutor

            with ProcessPoolExecutor(max_workers=workers) as pool:
                for job, (res, fail) in zip(todo, pool.map(_safe_measure, todo)):
                    done(job, res, fail)
        else:
            for job in todo:
                done(job, *_safe_measure(job))
    finally:
        if bar:
            bar.close()
    order = {_name(j[0], j[1]): i for i, j in enumerate(jobs)}
    results.sort(key=lambda r: order.get(r.name, 0))
    for r in results[REPORT_IMAGES:]:
        r.preview = None            # only the first images get figures; keeps big batches small
    meas = Measurement(images=results, failures=failures, settings=settings)
    _pool(meas)
    return meas


def _pool(meas: Measurement):
    """Set-level summary (images resampled) and averaged PSDs on the commonest grid."""
    if not meas.images:
        return
    s = meas.settings
    rough = [r.roughness for r in meas.images]
    meas.overall = summarize(rough, n_resamples=s.n_resamples, confidence=s.confidence,
                             rng=np.random.default_rng(s.seed))
    keys = [(r.n_rows, round(r.row_spacing_nm, 9)) for r in rough]
    common = max(set(keys), key=keys.count)
    same = [r for r, k in zip(rough, keys) if k == common]
    f = same[0].frequency_per_nm
    psd = {"frequency_per_nm": f, "n_images": len(same), "n_images_skipped": len(rough) - len(same)}
    for q in ("edge", "width", "centre"):
        blocks = [r.psd[q] for r in same if r.psd[q].shape[0]]
        floors = [r.psd[q + "_floor"] for r in same if r.psd[q].shape[0]]
        if blocks:
            p = np.concatenate(blocks)
            fl = np.concatenate(floors)
            psd[q] = {"biased": p.mean(axis=0), "floor": float(fl.mean()), "n_traces": p.shape[0], "all": p,
                      "floors": fl}
    meas.psd = psd
    if "edge" in psd:
        try:
            meas.overall_model = fit_psd_model(f, psd["edge"]["all"], psd["edge"]["floors"], window=s.psd_window,
                                               n_resamples=s.model_resamples,
                                               floor=floor_mode([r.traces for r in meas.images]),
                                               rng=np.random.default_rng(s.seed))
        except (ValueError, RuntimeError):
            meas.overall_model = None
