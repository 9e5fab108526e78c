"""Benchmark of a batch (run by hand: python tests/benchmarks/bench_batch.py [--images 100]).

Prints one JSON line; every ratio is measured side by side in this run on this machine:

* ``images_per_s``: ``measure`` (all statistics, no report) on N virtual SEM images of
  1024 x 1024 read from TIFF files, one process;
* ``speedup_2_workers``: images per second with ``workers=2`` over one process;
* ``rss_ratio_400_vs_50``: peak resident memory of a fresh process measuring 400 files against
  one measuring 50 (512 x 512 images, hard links to 50 distinct files so that the files cost no
  disk; each is measured as its own image);
* ``fit_share``: share of ``measure``'s time per image spent in the batched solver
  (``solve_rows``, from a profile of three images);
* ``e2e_vs_curve_fit``: a per-row ``scipy.optimize.curve_fit`` analyser written as a user would
  (every row of every edge, an error-function step of free position, width, level and height, in
  a window around the located edge) over the time of ``measure`` on the same image.
Goals (issue "Scale"): speed-up >= 1.8 on 2 cores, memory ratio <= 1.2, fit share >= 0.7,
e2e_vs_curve_fit >= 30.
"""
import argparse
import cProfile
import json
import os
import pstats
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import optimize, special

from edges import locate_edges
from edges.io import read_micrograph, write_micrograph
from edges.render import SEMSettings
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
from roughness.synth import simulate_line_space

SETTINGS = MeasureSettings()          # defaults, as a user runs it (no report)


def _images(folder, n, size, seed=0):
    rng = np.random.default_rng(seed)
    paths = []
    for i in range(n):
        px, _ = simulate_line_space(n_rows=size, n_cols=size, settings=SEMSettings(dose_per_pixel=100), rng=rng)
        paths.append(write_micrograph(folder / f"img_{i:03d}.tif", px, pixel_size_nm=1.0))
    return paths


def _rss_child(folder, n):
    code = f"""
import resource, sys
from pathlib import Path
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
files = sorted(Path({str(folder)!r}).glob('*.tif'))[:{n}]
meas = measure(files, settings=MeasureSettings())
assert len(meas.images) == {n}, meas.failures[:3]
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return int(out.stdout.split()[-1])


def _curve_fit_analyser(path, half_window=12):
    """What a user writes: locate, then fit every row of every edge with curve_fit."""
    m = read_micrograph(path)
    lay = locate_edges(m)
    cols = np.arange(m.pixels.shape[1], dtype=float)

    def step(x, x0, w, a, b):
        return a + b * 0.5 * (1 + special.erf((x - x0) / w))

    out = np.full((len(lay.edges), m.pixels.shape[0]), np.nan)
    guess = lay.guess_columns(np.arange(m.pixels.shape[0]))
    for e in range(len(lay.edges)):
        for r in range(m.pixels.shape[0]):
            c = int(round(guess[e, r]))
            sl = slice(max(c - half_window, 0), c + half_window + 1)
            y = m.pixels[r, sl]
            rising = y[-3:].mean() > y[:3].mean()
            lo, hi = (y[:3].mean(), y[-3:].mean()) if rising else (y[-3:].mean(), y[:3].mean())
            p0 = [guess[e, r], 2.0, lo, hi - lo] if rising else [guess[e, r], -2.0, lo, hi - lo]
            try:
                out[e, r] = optimize.curve_fit(step, cols[sl], y, p0=p0, maxfev=2000)[0][0]
            except RuntimeError:
                pass
    return out


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--images", type=int, default=100)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        big = tmp / "big"
        big.mkdir()
        paths = _images(big, args.images, 1024)
        t = time.perf_counter()
        one = measure(paths, settings=SETTINGS)
        t_one = time.perf_counter() - t
        t = time.perf_counter()
        two = measure(paths, settings=SETTINGS, workers=2)
        t_two = time.perf_counter() - t
        assert len(one.images) == len(two.images) == args.images
        prof = cProfile.Profile()
        prof.enable()
        measure(paths[:3], settings=SETTINGS)
        prof.disable()
        stats = pstats.Stats(prof).stats
        total = sum(v[3] for k, v in stats.items() if k[2] == "measure")
        solver = sum(v[3] for k, v in stats.items() if k[2] == "solve_rows")
        t = time.perf_counter()
        _curve_fit_analyser(paths[0])
        t_cf = time.perf_counter() - t
        t = time.perf_counter()
        measure(paths[:1], settings=SETTINGS)
        t_meas1 = time.perf_counter() - t
        small = tmp / "small"
        small.mkdir()
        distinct = _images(small, 50, 512, seed=1)
        for k in range(50, 400):
            os.link(distinct[k % 50], small / f"img_{k:03d}.tif")
        rss50, rss400 = _rss_child(small, 50), _rss_child(small, 400)
    print(json.dumps({
        "images_per_s": round(args.images / t_one, 3),
        "speedup_2_workers": round(t_one / t_two, 2),
        "rss_ratio_400_vs_50": round(rss400 / rss50, 3),
        "fit_share": round(solver / total, 3),
        "e2e_vs_curve_fit": round(t_cf / t_meas1, 1),
        "n_images": args.images,
        "seconds_per_image": round(t_one / args.images, 3),
    }))


if __name__ == "__main__":
    main()
