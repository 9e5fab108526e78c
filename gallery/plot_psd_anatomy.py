"""Anatomy of a PSD: what is measured, what is noise, what is roughness.

A virtual SEM image at 60 electrons per pixel.  The measured (biased) edge PSD flattens into a
plateau at high frequency: that is image noise.  The floor predicted from the fit covariance
(grey) should meet that plateau; subtracting it leaves the unbiased PSD, to which the
self-affine model is fitted: PSD(0) at the left, the knee at 1/(2 pi xi), the slope 1 + 2H after.
"""
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

import edges
import roughness
from roughness.app.report import plot_psd


def main(out=Path(__file__).with_name("plot_psd_anatomy.png"), fast=False):
    sigma, xi, h = 1.5, 10.0, 0.7
    pixels, truth = roughness.simulate_line_space(
        n_rows=512 if fast else 2048, n_cols=640, sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=h,
        settings=edges.SEMSettings(dose_per_pixel=60, blur_nm=3.0), rng=np.random.default_rng(4))
    image = roughness.analyse_image(edges.fit_edges(edges.Micrograph(pixels, pixel_size_nm=1.0)),
                                    roughness.AnalysisOptions(n_resamples=200, model_resamples=50 if not fast else 0))
    m, p, e = image.psd_model, image.edge_psd, image.summary.edge
    print(f"sigma: truth {sigma} nm (model), unbiased {e.sigma_unbiased_nm:.2f} nm measured over this length "
          f"(model expects {image.model_sigma_finite_nm:.2f}), biased {e.sigma_biased_nm:.2f} nm")
    print(f"correlation length: truth {xi} nm, fitted {m.correlation_length_nm:.1f} nm; "
          f"H: truth {h}, fitted {m.roughness_exponent:.2f}; PSD(0) one-sided {m.psd0_nm3:.1f} nm^3")
    print(f"noise floor {image.noise_floor_nm3:.3f} nm^3 from the fit covariance; plateau of the PSD "
          f"{image.plateau_nm3:.3f} nm^3 ({image.plateau_check})")
    fig = Figure(figsize=(7, 4.5))
    ax = fig.subplots()
    plot_psd(ax, p.frequency_per_nm, p.mean_psd_nm3, p.mean_floor_spectrum_nm3, m, title="edge PSD, anatomy")
    f = p.frequency_per_nm[1:]
    ax.annotate(f"PSD(0) {m.psd0_nm3:.0f} nm$^3$", (f[0], m.psd0_nm3), xytext=(f[0] * 1.5, m.psd0_nm3 * 4),
                arrowprops=dict(arrowstyle="->"), fontsize=8)
    knee = 1 / (2 * np.pi * m.correlation_length_nm)
    ax.axvline(knee, color="#111111", lw=0.8, ls=":")
    arrow = dict(arrowstyle="->", lw=0.8)
    box = dict(fc="white", ec="none", alpha=0.85)
    ax.annotate(f"knee at 1/(2$\\pi\\xi$): $\\xi$ {m.correlation_length_nm:.1f} nm", (knee, 3 * m.floor_nm3),
                xytext=(0.08, 0.3), textcoords="axes fraction", arrowprops=arrow, fontsize=8, bbox=box)
    ax.annotate(f"slope $-(1+2H)$: H {m.roughness_exponent:.2f}", (4 * knee, m.model_nm3(np.array([4 * knee]))[0]),
                xytext=(0.55, 0.88), textcoords="axes fraction", arrowprops=arrow, fontsize=8, bbox=box)
    ax.annotate("plateau of the measured PSD = noise", (0.7 * f[-1], image.plateau_nm3), xytext=(0.62, 0.45),
                textcoords="axes fraction", arrowprops=arrow, fontsize=8, bbox=box)
    fig.savefig(out, dpi=90, bbox_inches="tight")
    return out


if __name__ == "__main__":
    main()
