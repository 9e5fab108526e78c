"""Correlated edges: how the left/right correlation sets LWR against LER and placement.

For the two edges of a line with the same roughness sigma and correlation rho, the width
varies with 2 sigma^2 (1 - rho) and the centre with sigma^2 (1 + rho) / 2: correlated edges make
a line wiggle (placement roughness) but keep its width.  Traces with rho from -0.5 to 0.9 and
0.4 nm of per-row noise go through quietedge's statistics; the unbiased values follow the lines.
"""
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

import edges
import roughness


def _traces(left, right, noise_nm, rng):
    n_lines, n_rows = left.shape
    pos = np.empty((2 * n_lines, n_rows))
    pos[0::2], pos[1::2] = left, right + 30.0
    pos += noise_nm * rng.standard_normal(pos.shape)
    n = 2 * n_lines
    return edges.EdgeTraces(position_nm=pos, sigma_nm=np.full(pos.shape, noise_nm), valid=np.ones(pos.shape, bool),
                            reason=np.zeros(pos.shape, np.int8), line_index=np.repeat(np.arange(n_lines), 2),
                            side=np.tile(["left", "right"], n_lines), row_spacing_nm=1.0,
                            reduced_chi2=np.ones(pos.shape), iterations=np.ones(pos.shape, np.int64),
                            contrast_to_noise=np.full(n, 10.0), edge_flags=np.array([""] * n))


def main(out=Path(__file__).with_name("plot_edge_correlation.png"), fast=False):
    sigma, rhos = 1.0, np.array([-0.5, -0.2, 0.0, 0.3, 0.6, 0.9])
    rng = np.random.default_rng(8)
    options = roughness.AnalysisOptions(n_resamples=100, model_resamples=0)
    got = {q: [] for q in ("edge", "width", "centre")}
    for rho in rhos:
        left, right = roughness.edge_pairs(40 if fast else 200, 1024, 1.0, sigma_nm=sigma, correlation_length_nm=10.0,
                                           roughness_exponent=0.6, lr_correlation=rho, rng=rng)
        s = roughness.analyse_image(_traces(left, right, 0.4, rng), options).summary
        for q in got:
            got[q].append(s.quantity(q).sigma_unbiased_nm)
        print(f"rho {rho:+.1f}: unbiased LER {s.edge.sigma_unbiased_nm:.3f}, LWR {s.width.sigma_unbiased_nm:.3f}, "
              f"placement {s.centre.sigma_unbiased_nm:.3f} nm; noise-corrected rho {s.lr_correlation_unbiased:+.2f}")
    fig = Figure(figsize=(6, 4))
    ax = fig.subplots()
    scale = float(np.mean(got["edge"])) / sigma          # the finite-length, detrended sigma of one edge
    r = np.linspace(-0.5, 0.9, 50)
    for q, model, colour, label in (("edge", np.ones_like(r), "#1c4f9c", "LER (edges)"),
                                    ("width", np.sqrt(2 * (1 - r)), "#d4700a", "LWR (widths)"),
                                    ("centre", np.sqrt((1 + r) / 2), "#8e44ad", "placement (centres)")):
        ax.plot(rhos, got[q], "o", color=colour, label=f"{label}, unbiased")
        ax.plot(r, scale * sigma * model, "-", color=colour, lw=1)
    ax.set_xlabel("correlation of a line's left and right edges")
    ax.set_ylabel("sigma (nm); lines: sigma sqrt(2(1-rho)), sqrt((1+rho)/2)")
    ax.legend(frameon=False, fontsize=8)
    ax.grid(True, alpha=0.2)
    fig.savefig(out, dpi=90, bbox_inches="tight")
    return out


if __name__ == "__main__":
    main()
