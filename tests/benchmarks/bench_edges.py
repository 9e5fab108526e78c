"""Benchmark of the edge fit (run by hand: python tests/benchmarks/bench_edges.py).

Prints one JSON line; every ratio is measured side by side in this run on this machine:

* ``fits_per_s``: row fits per second of the whole ``fit_edges`` (all four passes, shapes and
  noise model) on a 1024 x 1024 virtual SEM image with 20 edges;
* ``pass_fits_per_s``: row fits per second of one batched pass (``solve_rows``);
* ``speedup_vs_curve_fit``: one batched pass against a loop of ``scipy.optimize.curve_fit``
  (3 free parameters, same rows, same start, same weights);
* ``time_vs_threshold``: ``fit_edges`` time over ``threshold_edges`` time on the image;
* ``scaling_131k_vs_16k``: pass fits per second at 131,072 rows over that at 16,384 rows;
* ``memory_vs_windows``: peak memory traced during a pass over the size of its window array;
* ``overhead_vs_fit``: read (TIFF) + locate + gather windows, over the ``fit_edges`` time (both
  on the same image; the fit given the location).
Goals (DESIGN.md, from a prototype): speedup >= 80, time_vs_threshold <= 15, scaling >= 0.9,
memory <= 2, overhead <= 0.25.
"""
import json
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
from scipy import optimize

from edges.baselines import threshold_edges
from edges._windows import cut_windows
from edges.fit import fit_edges
from edges.io import read_micrograph, write_micrograph
from edges.locate import locate_edges
from edges.profiles import EdgeShape, parametric_profile, tabulate
from edges._solver import solve_rows
from edges.render import SEMSettings
from roughness.synth import simulate_line_space


def _best(fn, repeat=3):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def _rows(n, rng, shape, width=31):
    cols = np.arange(width, dtype=float)[None, :] + np.zeros((n, 1))
    x = 15 + rng.normal(0, 1.5, n)
    y = 100 + 60 * parametric_profile(cols - x[:, None], shape) + 4 * rng.standard_normal((n, width))
    return y, cols, np.full((n, width), 1 / 16.0), np.rint(x) + 0.2


def main():
    rng = np.random.default_rng(7)
    settings = SEMSettings(dose_per_pixel=200)
    pixels, truth = simulate_line_space(n_rows=1024, n_cols=1024, pitch_nm=96, cd_nm=48,
                                        settings=settings, rng=rng)
    n_edges = truth["edge_nm"].shape[0]
    with tempfile.TemporaryDirectory() as tmp:
        path = write_micrograph(Path(tmp) / "bench.tif", pixels, pixel_size_nm=1.0)
        t_read, m = _best(lambda: read_micrograph(path))
    t_loc, lay = _best(lambda: locate_edges(m))
    t_fit, et = _best(lambda: fit_edges(m, layout=lay), repeat=2)
    t_thr, _ = _best(lambda: threshold_edges(m, layout=lay))
    reach_l = np.array([e.reach_left_px for e in lay.edges])
    reach_r = np.array([e.reach_right_px for e in lay.edges])
    guess = lay.guess_columns(np.arange(1024))
    t_win, win = _best(lambda: cut_windows(m.pixels, guess, reach_l, reach_r))
    shape = EdgeShape(2.0, 0.8, 2.0, 2.5)
    # one pass against curve_fit, same rows and start
    one = tabulate([lambda u, derivative=False: parametric_profile(u, shape, derivative=derivative)], 50)
    n_cf = 1500
    y, cols, w, x0 = _rows(n_cf, rng, shape)
    t_pass, _ = _best(lambda: solve_rows(y, cols, w, one, np.zeros(n_cf, int), x0))

    def loop():
        for i in range(n_cf):
            b0, a0 = np.polyfit(parametric_profile(cols[i] - x0[i], shape), y[i], 1)
            optimize.curve_fit(lambda c, xe, a, b: a + b * parametric_profile(c - xe, shape), cols[i], y[i],
                               p0=[x0[i], a0, b0], sigma=np.full(cols.shape[1], 4.0), absolute_sigma=True)
    t_cf, _ = _best(loop, repeat=1)
    # scaling and memory
    rates = {}
    for n in (16384, 131072):
        y, cols, w, x0 = _rows(n, rng, shape)
        t, _ = _best(lambda: solve_rows(y, cols, w, one, np.zeros(n, int), x0), repeat=2)
        rates[n] = n / t
    tracemalloc.start()
    solve_rows(y, cols, w, one, np.zeros(y.shape[0], int), x0)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    n_fits = n_edges * 1024
    print(json.dumps({
        "fits_per_s": round(n_fits / t_fit),
        "pass_fits_per_s": round(rates[131072]),
        "speedup_vs_curve_fit": round((n_cf / t_pass) / (n_cf / t_cf), 1),
        "time_vs_threshold": round(t_fit / t_thr, 2),
        "scaling_131k_vs_16k": round(rates[131072] / rates[16384], 3),
        "memory_vs_windows": round(peak / y.nbytes, 2),
        "overhead_vs_fit": round((t_read + t_loc + t_win) / t_fit, 3),
        "n_edges": int(n_edges), "valid_fraction": round(float(et.valid.mean()), 4),
    }))


if __name__ == "__main__":
    main()
