"""How image noise inflates roughness: the same edges imaged at five doses.

One set of rough edges (known truth) is rendered at 10 to 1000 electrons per pixel.  The raw
(biased) 3-sigma LER climbs as the dose falls; the unbiased value (biased minus the noise floor
the fit covariance predicts, calibrated by the virtual twin) stays on the truth until noise is
most of the variance, where quietedge says the value is not a confident number.
"""
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

import edges
import roughness


def main(out=Path(__file__).with_name("plot_noise_vs_dose.png"), fast=False):
    doses = [10, 30, 100, 300, 1000]
    n_rows = 256 if fast else 1024
    options = roughness.AnalysisOptions(n_resamples=200, model_resamples=0)
    biased, unbiased, low, high, status = [], [], [], [], []
    for dose in doses:
        rng = np.random.default_rng(11)                       # the same edges at every dose
        pixels, truth = roughness.simulate_line_space(
            n_rows=n_rows, n_cols=512, sigma_nm=1.2, correlation_length_nm=8.0, roughness_exponent=0.6,
            settings=edges.SEMSettings(dose_per_pixel=dose, blur_nm=3.0), rng=rng)
        image = roughness.analyse_image(edges.fit_edges(edges.Micrograph(pixels, pixel_size_nm=1.0)), options)
        e = image.summary.edge
        biased.append(3 * e.sigma_biased_nm)
        unbiased.append(3 * e.sigma_unbiased_nm)
        low.append(3 * e.sigma_unbiased_low_nm)
        high.append(3 * e.sigma_unbiased_high_nm)
        status.append(image.status)
        true3 = 3 * np.sqrt(np.mean(truth["edge_sigma_nm"] ** 2))
        print(f"{dose:5d} e/px: truth {true3:.2f} nm, biased {biased[-1]:.2f} nm, unbiased {unbiased[-1]:.2f} nm "
              f"(3-sigma LER; noise {100 * e.noise_fraction:.0f}% of the variance; {image.status})")
    fig = Figure(figsize=(6, 4))
    ax = fig.subplots()
    ax.plot(doses, biased, "o-", color="#d4700a", label="biased (as measured)")
    u = np.array(unbiased)
    ax.errorbar(doses, u, yerr=[u - np.array(low), np.array(high) - u], fmt="s-", color="#1c4f9c", capsize=3,
                label="unbiased, 95% interval")
    weak = [k for k, s in enumerate(status) if s in ("noise_dominated", "below_noise")]
    ax.plot([doses[k] for k in weak], u[weak], "s", ms=11, mfc="none", color="#7a7a7a",
            label="noise dominated: not a confident number")
    ax.axhline(true3, color="#111111", lw=1, ls=":", label="truth (realised edges)")
    ax.set_xscale("log")
    ax.set_xlabel("dose (electrons per pixel)")
    ax.set_ylabel("3-sigma LER (nm)")
    ax.legend(frameon=False)
    ax.grid(True, which="both", alpha=0.2)
    fig.savefig(out, dpi=90, bbox_inches="tight")
    return out


if __name__ == "__main__":
    main()
