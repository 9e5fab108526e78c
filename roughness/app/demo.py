"""The demo: a small invented resist-qualification study, end to end, on embedded defaults.

Scenario (fictional): a 32 nm line / 64 nm pitch pattern in an invented resist "NR-7" is imaged
at two electron doses, 45 and 450 electrons per pixel, three frames each.  The same roughness
is rendered in every image; only the image noise differs.  Raw (biased) LER is visibly higher
at the low dose; the unbiased values of both doses agree with each other and with the truth.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from edges.io import write_micrograph, write_truth
from edges.render import SEMSettings

from ..synth import simulate_line_space
from .runner import measure
from .settings import EXIT_OK, MeasureSettings

__all__ = ["run_demo", "DEMO_DOSES"]

DEMO_DOSES = {"low-dose": 45.0, "high-dose": 450.0}


def run_demo(out: Path, *, n_images: int = 3, n_rows: int = 1024, n_cols: int = 512, seed: int = 2026) -> int:
    """Simulate the fictional study into ``out/images``, measure it, write the report; exit status."""
    out = Path(out)
    t0 = time.time()
    img_dir = out / "images"
    img_dir.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    groups, truths = {}, []
    for name, dose in DEMO_DOSES.items():
        files = []
        for i in range(n_images):
            settings = SEMSettings(pixel_size_nm=1.0, dose_per_pixel=dose, blur_nm=3.0, edge_peak=0.5)
            pixels, truth = simulate_line_space(n_rows=n_rows, n_cols=n_cols, pitch_nm=64, cd_nm=32, sigma_nm=1.0,
                                                correlation_length_nm=9.0, roughness_exponent=0.6,
                                                settings=settings, rng=rng)
            path = write_micrograph(img_dir / f"nr7_{name}_{i + 1}.tif", pixels, pixel_size_nm=1.0)
            write_truth(path.with_suffix(".truth.json"), truth)
            files.append(path)
            truths.append(truth)
        groups[name] = files
    print(f"simulated {sum(len(v) for v in groups.values())} images of the fictional resist NR-7 in {img_dir}")
    meas = measure(groups=groups, progress=True, settings=MeasureSettings(n_resamples=400, model_resamples=30))
    meas.write(out)
    true_ler = np.sqrt(np.mean(np.concatenate([t["edge_sigma_nm"] ** 2 for t in truths])))
    print("\ngroup       LER 3sigma biased   LER 3sigma unbiased   noise fraction (of variance)")
    for g in meas.groups:
        e = g.summary.edge
        print(f"{g.name:<11} {3 * e.sigma_biased_nm:10.2f} nm {3 * e.sigma_unbiased_nm:14.2f} nm "
              f"{100 * e.noise_fraction:11.0f}%")
    print(f"truth (realised in the rendered edges): LER 3sigma {3 * true_ler:.2f} nm")
    print(f"\nreport: {out / 'report.html'}  (tables: summary.csv, groups.csv, edges.csv, psd.csv)")
    print("The low dose inflates the raw LER; once the noise floor from the fit covariance is removed, "
          f"both doses agree. Done in {time.time() - t0:.0f} s.")
    return EXIT_OK
