"""How long must a line be?  Bias and scatter of the measured sigma against line length.

After the usual straight-line detrend, a line only a few correlation lengths long shows less
roughness than the edge really has (its longest wavelengths look like tilt), and one line's
sigma scatters widely.  Self-affine edges (sigma 1 nm, xi 10 nm, H 0.5) are measured at lengths
from 2 to 200 xi; the analytic expectation (the model's covariance through the detrend) and the
sampling-plan advice (lines needed for +-5% on sigma) are drawn beside the simulation.  The
advice uses the long-line variance of a sample variance, so below ~10 xi it asks for more lines
than strictly needed (on the safe side).
"""
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

import roughness


def main(out=Path(__file__).with_name("plot_line_length.png"), fast=False):
    sigma, xi, h = 1.0, 10.0, 0.5
    lengths = np.array([2, 5, 10, 20, 50, 100, 200]) * xi
    n_edges = 200 if fast else 2000
    rng = np.random.default_rng(3)
    mean, sd, expected, lines = [], [], [], []
    for length in lengths:
        n = int(length)
        z = roughness.rough_edges(n_edges, n, 1.0, sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=h,
                                  rng=rng)
        s = np.sqrt(np.mean(roughness.detrend(z, "linear") ** 2, axis=1))
        mean.append(np.sqrt(np.mean(s ** 2)))
        sd.append(s.std())
        expected.append(np.sqrt(roughness.expected_measured_variance(
            sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=h, n_rows=n, row_spacing_nm=1.0)))
        lines.append(roughness.sampling_plan(sigma_unbiased_nm=sigma, correlation_length_nm=xi, roughness_exponent=h,
                                             noise_sigma_nm=0.0, row_spacing_nm=1.0, line_length_nm=length,
                                             target_relative_sd=0.05).lines_needed)
        print(f"L = {length / xi:5.0f} xi: measured sigma (rms) {mean[-1]:.3f}, sd {sd[-1]:.3f} nm per line (expected "
              f"{expected[-1]:.3f}; truth {sigma}); lines for +-5%: {lines[-1]} (noise-free, so unbiased = biased)")
    fig = Figure(figsize=(10, 4))
    ax1, ax2 = fig.subplots(1, 2)
    r = lengths / xi
    ax1.errorbar(r, mean, yerr=sd, fmt="o", color="#1c4f9c", capsize=3, label="one line: mean and sd")
    ax1.plot(r, expected, "-", color="#111111", label="expected after the detrend")
    ax1.axhline(sigma, color="#7a7a7a", ls=":", label="sigma of the edge")
    ax1.set_xscale("log")
    ax1.set_xlabel("line length / correlation length")
    ax1.set_ylabel("measured sigma (nm)")
    ax1.legend(frameon=False, fontsize=8)
    ax2.loglog(r, lines, "s-", color="#111111", label="sampling-plan advice")
    ax2.loglog(r, (np.array(sd) / np.array(mean) / 0.05) ** 2, "o", color="#1c4f9c", label="from the simulated scatter")
    ax2.legend(frameon=False, fontsize=8)
    ax2.set_xlabel("line length / correlation length")
    ax2.set_ylabel("lines needed for ±5% (1 sd) on sigma")
    for ax in (ax1, ax2):
        ax.grid(True, which="both", alpha=0.2)
    fig.savefig(out, dpi=90, bbox_inches="tight")
    return out


if __name__ == "__main__":
    main()
