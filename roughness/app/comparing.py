"""Compare groups (recipes, resists, doses): measure or reuse each group, reduce, and compare.

``compare({"A": "a/*.tif", "B": "earlier-output/"}, out="cmp")`` measures the image groups,
reuses the per-image results of groups given as an earlier ``measure`` output folder (read
without pickle, never re-fitted), and attaches a :class:`roughness.differences.Comparison` to
the :class:`Measurement`; the tables, the report and the console sentences project it.
"""
from __future__ import annotations

import json
import os
from dataclasses import replace
from pathlib import Path

import numpy as np

from edges import Micrograph

from ..differences import compare_groups
from .runner import Measurement, _check, _collect, expand_inputs, reduce_results
from .settings import MeasureSettings
from .sentences import comparison_sentences, noise_sentences, power_sentences
from .store import StoreError, load_result

__all__ = ["compare", "is_measure_output", "comparison_sentences", "noise_sentences", "power_sentences"]

def is_measure_output(path) -> bool:
    """A folder written by ``measure`` or ``compare`` (it lists its stored per-image results)."""
    p = Path(path)
    if not (p.is_dir() and (p / "settings.json").is_file()):
        return False
    try:
        return "results" in json.loads((p / "settings.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False


def _load_output(folder: Path, group: str):
    """The stored results of an earlier output folder, relabelled to ``group``."""
    listed = json.loads((folder / "settings.json").read_text(encoding="utf-8"))["results"]
    results, failures = [], []
    root = folder.resolve()
    for name, _, rel in listed:
        path = (folder / rel).resolve()
        if root not in path.parents:          # a listing never points outside its folder
            failures.append((name, f"{folder}: stored result {rel!r} lies outside the folder; ignored"))
            continue
        try:
            results.append(replace(load_result(path), group=group))
        except (StoreError, TypeError) as exc:
            failures.append((name, f"{folder}: stored result unreadable ({exc}); measure the image again"))
    return results, failures


def compare(groups: dict, *, settings: MeasureSettings | None = None, pixel_size_nm: float | None = None,
            out=None, effect_3sigma_nm: float | None = None, workers: int = 1, progress: bool = False,
            resume: bool = False, report: bool = True, dask: str | None = None) -> Measurement:
    """Measure (or reuse) groups of images and compare their roughness.

    Parameters
    ----------
    groups : dict
        ``{name: images}``, at least two, in the order to report; ``images`` is anything
        :func:`roughness.measure` takes, or an earlier ``measure`` / ``compare`` output folder
        whose per-image results are reused without re-fitting.
    settings : MeasureSettings, optional
        The recipe for the images measured now, and the resampling, confidence, noise-share
        target and frames of the comparison.
    pixel_size_nm : float, optional
        Overrides the TIFF tags of the images measured now.
    out : path, optional
        Output folder (tables, compare.csv, report); per-image results are kept in
        ``out/per_image`` as they finish.
    effect_3sigma_nm : float, optional
        Difference of unbiased 3-sigma to plan the sample size for (default 10% of the mean
        unbiased 3-sigma LER).
    workers, progress, resume, dask
        As for :func:`roughness.measure`.
    report : bool
        Write report.html with ``out``.

    Returns
    -------
    Measurement
        With ``groups`` and ``comparison`` (None when fewer than two groups have a measured
        image; ``failures`` says why).

    Raises
    ------
    ValueError
        Fewer than two groups, an empty name, or a group with nothing to measure.
    """
    settings = _check(settings, pixel_size_nm, workers)
    if not isinstance(groups, dict) or len(groups) < 2:
        raise ValueError(f"a comparison needs at least two groups, got {len(groups) if isinstance(groups, dict) else groups!r}")
    names = [str(g) for g in groups]
    if any(not n.strip() for n in names):
        raise ValueError("every group needs a name")
    to_measure, reused = {}, {}
    for name, items in zip(names, groups.values()):
        single = isinstance(items, (str, os.PathLike, np.ndarray, Micrograph))
        items = [items] if single else list(items or [])
        folders = [i for i in items if isinstance(i, (str, os.PathLike)) and is_measure_output(i)]
        rest = [i for i in items if not any(i is f for f in folders)]
        if not folders and not any(not isinstance(i, (str, os.PathLike)) or Path(i).is_file()
                                   for i in expand_inputs(rest)):
            shown = ", ".join(repr(os.fspath(i)) for i in rest if isinstance(i, (str, os.PathLike))) or "nothing"
            raise ValueError(f"group {name!r}: no images found in {shown} (a folder must hold .tif, .tiff or .png "
                             "files, or be an earlier quietedge output folder)")
        if rest:
            to_measure[name] = rest
        reused[name] = [Path(f) for f in folders]
    results, failures = [], []
    if to_measure:
        cache = Path(out) / "per_image" if out is not None else None
        results, failures = _collect(to_measure, settings, workers=workers, progress=progress, cache_dir=cache,
                                     resume=resume, dask=dask)
    for name, folders in reused.items():
        for folder in folders:
            got, bad = _load_output(folder, name)
            results += got
            failures += bad
    order = {n: i for i, n in enumerate(names)}
    results.sort(key=lambda r: order[r.group])       # stable: the order within a group is kept
    meas = reduce_results(results, failures, settings, names)
    members = {g.name: [r.analysis for r in results if r.group == g.name] for g in meas.groups}
    if len(members) >= 2:
        comparison = compare_groups(members, settings.analysis, analyses={g.name: g for g in meas.groups},
                                    effect_3sigma_nm=effect_3sigma_nm)
        meas = replace(meas, comparison=comparison)
    if out is not None:
        meas.write(out, report=report)
    return meas
