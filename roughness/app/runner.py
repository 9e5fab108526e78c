"""The batch runner: load, detect, analyse, collect.  One bad image never stops a batch.

``measure(images, ...)`` takes file paths, folders, glob patterns, arrays or
:class:`edges.Micrograph` objects and returns a frozen :class:`Measurement`; the set and group
statistics are reduced once, here, by :func:`roughness.analysis.analyse_group`; the tables and
the report (``Measurement.write``) only project them.
"""
from __future__ import annotations

import contextlib
import glob
import os
import sys
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from edges import EdgeTraces, Micrograph, MicrographError, fit_edges, read_micrograph, slope_edges, threshold_edges

from ..analysis import GroupAnalysis, ImageAnalysis, analyse_group, analyse_image
from ..differences import Comparison
from .settings import MeasureSettings
from .store import StoreError, content_key, load_result, result_file_name, save_result
from .tables import write_outputs

__all__ = ["ImageResult", "Measurement", "measure", "expand_inputs", "IMAGE_SUFFIXES"]

#: Listed from folders; JPEG files are listed so that each is reported as refused, with the reason.
IMAGE_SUFFIXES = (".tif", ".tiff", ".png", ".jpg", ".jpeg")
_PREVIEW_ROWS = 384
#: Seconds a Dask cluster may have no worker (and finish nothing) before the images still waiting
#: are reported as not measured, instead of waiting for ever.
DASK_WORKERLESS_S = 120.0


@dataclass(frozen=True)
class ImageResult:
    """One measured image.

    Attributes
    ----------
    name : str
        File name (or ``array_NNN``).
    group : str
        Its group (``""`` without groups).
    analysis : ImageAnalysis
    traces : EdgeTraces or None
        Kept for the report's figures for the first ``report_image_sections`` images only.
    preview : (rows, cols) ndarray of float16 or None
        The image (lines vertical, first rows) for those figures.
    pixel_size_nm : float
        The pixel size measured with.
    pixel_size_source : str
        ``"file"`` (TIFF resolution tags), ``"given"`` (settings or API), or ``"given, overriding
        the file's X nm"``.
    content_key : str
        SHA-1 of the image's content (the result store's key, with name, group and settings).
    """

    name: str
    group: str
    analysis: ImageAnalysis
    traces: EdgeTraces | None = None
    preview: np.ndarray | None = None
    pixel_size_nm: float = float("nan")
    pixel_size_source: str = ""
    content_key: str = ""


@dataclass(frozen=True)
class Measurement:
    """Results of :func:`measure`, computed once; tables and report are projections of it.

    Attributes
    ----------
    images : tuple of ImageResult
        In the order given.
    failures : tuple of (name, reason)
    settings : MeasureSettings
    overall : GroupAnalysis or None
        All measured images together (None when none was measured).
    groups : tuple of GroupAnalysis
        One per group when groups were given, in the order given; empty otherwise.
    comparison : Comparison or None
        Differences between the groups (:func:`roughness.app.comparing.compare`); None from
        :func:`measure`.
    """

    images: tuple
    failures: tuple
    settings: MeasureSettings
    overall: GroupAnalysis | None
    groups: tuple = ()
    comparison: Comparison | None = None

    def write(self, out_dir, *, report: bool = True) -> Path:
        """Write the output folder (tables, settings, report) and return its path."""
        return write_outputs(self, Path(out_dir), report=report)


def expand_inputs(items) -> list:
    """Paths, folders (their TIFF/PNG files) and glob patterns to a sorted list; arrays and
    Micrographs pass through.  An existing file is taken as itself even if its name looks like a
    pattern; a file reached twice is listed once.  A pattern or path that matches nothing is kept
    so that it is reported as a failure (never silently dropped)."""
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
        elif p.exists():                    # a file named like a pattern ("img[1].tif") is itself
            out.append(p)
        elif any(ch in text for ch in "*?["):
            hits = sorted(Path(h) for h in glob.glob(text))
            out.extend(hits if hits else [p])
        else:
            out.append(p)
    # the same file given twice (a folder and a pattern, two spellings) is measured once
    seen, unique = set(), []
    for item in out:
        key = os.path.realpath(item) if isinstance(item, Path) and item.exists() else id(item)
        if key not in seen:
            seen.add(key)
            unique.append(item)
    return unique


def _name(item, k):
    if isinstance(item, Micrograph):
        return item.source if item.source != "<array>" else f"array_{k:03d}"
    if isinstance(item, np.ndarray):
        return f"array_{k:03d}"
    return str(item)


def _load(item, name, settings):
    m = _read(item, name, settings)
    if settings.crop_px is None or not any(settings.crop_px):
        return m
    top, bottom, left, right = settings.crop_px
    rows, cols = m.pixels.shape
    if rows - top - bottom < 16 or cols - left - right < 16:
        raise MicrographError(f"{name}: cropping {settings.crop_px} pixels (top, bottom, left, right) from a "
                              f"{cols} x {rows} image leaves less than 16 x 16 pixels")
    return replace(m, pixels=m.pixels[top:rows - bottom, left:cols - right])


def _read(item, name, settings):
    if isinstance(item, Micrograph):
        m = item if settings.pixel_size_nm is None else replace(item, pixel_size_nm=settings.pixel_size_nm)
        return replace(m, source=name)
    if isinstance(item, np.ndarray):
        if settings.pixel_size_nm is None:
            raise ValueError(f"{name}: an array needs pixel_size_nm")
        px = np.asarray(item, float)
        if px.ndim != 2 or px.size == 0:
            raise MicrographError(f"{name}: expected a non-empty 2-D array, got shape {px.shape}")
        return Micrograph(pixels=px, pixel_size_nm=settings.pixel_size_nm, source=name)
    return read_micrograph(item, pixel_size_nm=settings.pixel_size_nm, frame_stack=settings.frame_stack)


def detect_edges(micrograph: Micrograph, settings: MeasureSettings) -> EdgeTraces:
    """The settings' detector on one micrograph."""
    common = dict(window_px=settings.window_px, polarity=settings.polarity, orientation=settings.orientation)
    if settings.detector == "model":
        return fit_edges(micrograph, profile_model=settings.profile_model, **common)
    if settings.detector == "threshold":
        return threshold_edges(micrograph, level=settings.threshold_level, **common)
    return slope_edges(micrograph, **common)


def _measure_one(item, k, settings: MeasureSettings, group: str = "", key: str = "") -> ImageResult:
    name = _name(item, k)
    m = _load(item, name, settings)
    traces = detect_edges(m, settings)
    analysis = analyse_image(traces, settings.analysis)
    source = m.pixel_size_source
    file_size = m.file_pixel_size_nm
    if source == "given" and file_size is not None and abs(file_size / m.pixel_size_nm - 1) > 0.01:
        source = f"given, overriding the file's {file_size:.4g} nm"
        analysis = replace(analysis, warnings=analysis.warnings + (
            ("pixel_size_override", f"the pixel size given ({m.pixel_size_nm:.4g} nm) overrides the file's own "
                                    f"calibration ({file_size:.4g} nm): every length scales with it; check which "
                                    "is right"),))
    common = dict(name=name, group=group, analysis=analysis, pixel_size_nm=float(m.pixel_size_nm),
                  pixel_size_source=source, content_key=key)
    if k >= settings.report_image_sections:
        return ImageResult(**common)
    pixels = m.pixels.T if traces.rotated else m.pixels
    return ImageResult(**common, traces=traces, preview=pixels[: min(pixels.shape[0], _PREVIEW_ROWS)].astype(np.float16))


#: Thread counts of the BLAS and OpenMP libraries, set to 1 for worker processes: N workers each
#: running N BLAS threads oversubscribe the cores.
_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS",
                "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")
_WORKER_DIED = ("the worker process measuring this image died (killed, or out of memory); "
                "the other images were measured")


@contextlib.contextmanager
def _single_threaded_children():
    """Set the thread counts of :data:`_THREAD_VARS` to 1 for processes started inside, then
    restore them."""
    saved = {v: os.environ.get(v) for v in _THREAD_VARS}
    os.environ.update({v: "1" for v in _THREAD_VARS})
    try:
        yield
    finally:
        for v, value in saved.items():
            if value is None:
                os.environ.pop(v, None)
            else:
                os.environ[v] = value


def _watch_parent(parent_pid):
    """Worker initializer: end this process when the batch's main process is gone, so that a
    killed batch leaves no worker blocked on its queue."""
    import threading

    def watch():
        while True:
            time.sleep(1.0)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, daemon=True).start()


def _pool(n):
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    # spawned (not forked) so that each worker starts its BLAS with the single thread set below
    return ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_watch_parent, initargs=(os.getpid(),))


def _run_pool(todo, workers, done):
    """Measure ``todo`` on ``workers`` processes, calling ``done`` as each finishes.  A worker
    that dies breaks the pool: the images it left unfinished are retried one per fresh process,
    and one that kills its process again is recorded as that image's failure."""
    from concurrent.futures import as_completed
    from concurrent.futures.process import BrokenProcessPool

    with _single_threaded_children():
        suspects = []
        with _pool(workers) as pool:
            futures = {pool.submit(_safe_measure, job): job for job in todo}
            for fut in as_completed(futures):
                try:
                    res, fail = fut.result()
                except BrokenProcessPool:
                    suspects.append(futures[fut])
                    continue
                done(futures[fut], res, fail)
        for job in sorted(suspects, key=lambda j: j[1]):
            try:
                with _pool(1) as pool:
                    res, fail = pool.submit(_safe_measure, job).result()
            except BrokenProcessPool:
                res, fail = None, (_name(job[0], job[1]), _WORKER_DIED)
            done(job, res, fail)


def _run_dask(todo, address, workers, done):
    """Measure ``todo`` on a Dask distributed cluster (``"local"``: one started here on
    loopback with ``workers`` single-threaded processes, closed after), calling ``done`` as each
    image finishes.  The work per image is :func:`_safe_measure`, the same as in this process.
    File paths must be readable by the workers (a shared file system)."""
    try:
        from dask.distributed import Client, LocalCluster, wait
    except ImportError:
        raise ValueError("dask: the optional extra is not installed (pip install 'quietedge[dask]')") from None
    cluster = None
    with _single_threaded_children():
        if address == "local":
            cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                                   dashboard_address=None)
            client = Client(cluster)
        else:
            try:
                client = Client(address, timeout=30)
            except OSError as exc:
                raise ValueError(f"dask: cannot reach the scheduler at {address!r} ({exc})") from None
        try:
            futures = client.map(_safe_measure, todo, pure=False)
            jobs = {f.key: job for f, job in zip(futures, todo)}
            pending, idle_since = set(futures), time.monotonic()
            while pending:
                try:
                    finished = wait(pending, timeout=5, return_when="FIRST_COMPLETED").done
                except TimeoutError:
                    finished = set()
                if finished:
                    idle_since = time.monotonic()
                elif (time.monotonic() - idle_since > DASK_WORKERLESS_S
                      and not client.scheduler_info().get("workers")):
                    for fut in pending:            # no worker left to run them: say so, keep the rest
                        job = jobs[fut.key]
                        done(job, None, (_name(job[0], job[1]), "not measured: the Dask cluster has had no "
                                         f"worker for {DASK_WORKERLESS_S:.0f} s"))
                    break
                for fut in finished:
                    pending.discard(fut)
                    job = jobs[fut.key]
                    try:
                        res, fail = fut.result()
                    except Exception as exc:           # a worker lost or killed: that image's failure
                        res, fail = None, (_name(job[0], job[1]), f"the Dask worker measuring this image failed ({exc})")
                    done(job, res, fail)
        finally:
            client.close(timeout=30)
            if cluster is not None:
                cluster.close(timeout=30)


def _safe_measure(args):
    item, k, settings, group, key = args
    try:
        return _measure_one(item, k, settings, group, key), None
    except Exception as exc:       # one bad image never stops a batch: record why
        reason = str(exc) if isinstance(exc, (ValueError, OSError)) else f"{type(exc).__name__}: {exc}"
        return None, (_name(item, k), reason)


class _Cache:
    """One file per measured image, written as soon as it is done, so that an interrupted batch
    loses nothing and ``resume`` measures only what is missing.  Keys hash the image's content,
    name, group, every setting and the quietedge version, so a replaced image or a changed recipe
    is measured afresh.  Files are ``.npz`` read
    without pickle (:mod:`roughness.app.store`): nothing in the folder is ever executed, and a
    file that is not a stored result (or a leftover ``.pkl`` of an older version) is ignored."""

    def __init__(self, folder, resume):
        self.folder = Path(folder)
        self.folder.mkdir(parents=True, exist_ok=True)
        self.resume = resume

    def _path(self, job):
        item, k, settings, group, key = job
        return self.folder / result_file_name(_name(item, k), group, settings, key)

    def load(self, job):
        path = self._path(job)
        if self.resume and path.exists():
            try:
                return load_result(path)
            except StoreError:     # a truncated or foreign file: measure again
                return None
        return None

    def store(self, job, result):
        save_result(self._path(job), result)   # atomic: a reader never sees half a result


def measure(images=None, *, groups: dict | None = None, settings: MeasureSettings | None = None,
            pixel_size_nm: float | None = None, workers: int = 1, progress: bool = False,
            cache_dir=None, resume: bool = False, dask: str | None = None) -> Measurement:
    """Measure roughness on SEM images.

    Parameters
    ----------
    images : path, folder, glob pattern, ndarray, Micrograph, or a sequence of them
        The images (leave None when ``groups`` is given).
    groups : dict, optional
        ``{group name: [images...]}``: every image is measured and each group reduced.
    settings : MeasureSettings, optional
        The recipe (defaults otherwise).
    pixel_size_nm : float, optional
        Shorthand for ``replace(settings, pixel_size_nm=...)``: overrides the TIFF tags;
        required for PNG files and arrays.
    workers : int
        Processes (at most the cores available); 1 measures in this process.  Workers are
        spawned, so a script calling this with ``workers > 1`` needs the usual
        ``if __name__ == "__main__":`` guard.
    progress : bool
        Show a progress bar (tqdm) on stderr.
    cache_dir : path, optional
        Keep each image's result there as soon as it is measured.
    resume : bool
        With ``cache_dir``: reuse the images already measured with the same settings.
    dask : str, optional
        ``"local"`` (a Dask cluster of ``workers`` processes started here) or a scheduler
        address such as ``"tcp://scheduler:8786"``: the same per-image work runs there (optional
        extra ``quietedge[dask]``); results are stored and reduced exactly as without it.

    Returns
    -------
    Measurement

    Examples
    --------
    >>> import numpy as np
    >>> from edges import SEMSettings
    >>> from roughness.synth import simulate_line_space
    >>> pixels, truth = simulate_line_space(n_rows=256, n_cols=320, rng=np.random.default_rng(0),
    ...                                     settings=SEMSettings(dose_per_pixel=300))
    >>> meas = measure([pixels], settings=MeasureSettings(pixel_size_nm=1.0, n_resamples=100))
    >>> meas.overall.summary.n_lines, len(meas.failures)
    (4, 0)
    """
    settings = _check(settings, pixel_size_nm, workers)
    results, failures = _collect(groups if groups else {"": images}, settings, workers=workers, progress=progress,
                                 cache_dir=cache_dir, resume=resume, dask=dask)
    names = list(dict.fromkeys(str(g) for g in groups)) if groups else []
    return reduce_results(results, failures, settings, names)


def _check(settings, pixel_size_nm, workers) -> MeasureSettings:
    settings = settings or MeasureSettings()
    if not isinstance(settings, MeasureSettings):
        raise TypeError(f"settings: expected MeasureSettings, got {type(settings).__name__}")
    if pixel_size_nm is not None:
        settings = replace(settings, pixel_size_nm=pixel_size_nm)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers={workers!r}: must be an integer >= 1")
    return settings


def _collect(groups: dict, settings: MeasureSettings, *, workers=1, progress=False, cache_dir=None,
             resume=False, offset: int = 0, dask: str | None = None):
    """Measure ``{group: images}`` (group ``""`` without groups); (results in order, failures)."""
    workers = min(workers, os.cpu_count() or 1)          # never more processes than cores
    jobs = []
    for gname, items in groups.items():
        if items is None:
            items = []
        if isinstance(items, (str, os.PathLike, np.ndarray, Micrograph)):
            items = [items]
        for item in expand_inputs(items):
            jobs.append((item, offset + len(jobs), settings, str(gname), content_key(item)))
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

    t0 = time.monotonic()
    try:
        if dask and todo:
            _run_dask(todo, dask, max(workers, 1), done)
        elif workers > 1 and len(todo) > 1:
            _run_pool(todo, workers, done)
        else:
            for job in todo:
                done(job, *_safe_measure(job))
    finally:
        if bar:
            bar.close()
    if progress and todo:
        seconds = time.monotonic() - t0
        n_ok = len(todo) - len(failures)
        print(f"measured {n_ok} of {len(todo)} image(s) in {seconds:.1f} s ({len(todo) / max(seconds, 1e-9):.2f} images/s)"
              + (f", {len(jobs) - len(todo)} reused from the store" if len(jobs) > len(todo) else "")
              + (f"; {len(failures)} failed" if failures else ""), file=sys.stderr)
    order = {(_name(j[0], j[1]), j[3]): i for i, j in enumerate(jobs)}
    results.sort(key=lambda r: order.get((r.name, r.group), 0))
    return results, failures


def reduce_results(results, failures, settings: MeasureSettings, group_names=()) -> Measurement:
    """The set and group statistics of measured images, reduced once."""
    options = settings.analysis
    overall = analyse_group([r.analysis for r in results], options) if results else None
    group_results = tuple(analyse_group([r.analysis for r in results if r.group == g], options, name=g)
                          for g in group_names if any(r.group == g for r in results))
    return Measurement(images=tuple(results), failures=tuple(failures), settings=settings, overall=overall,
                       groups=group_results)
