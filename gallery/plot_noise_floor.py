"""Image noise inflates raw LER; the fit-covariance noise floor takes it out.

One virtual SEM image of known roughness is rendered at two electron doses.  The raw (biased)
edge roughness rises as the dose falls; the unbiased value, biased minus the noise floor taken
from each row's fit covariance, stays on the truth.  The figure shows both PSDs with their
floors.
"""
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

import edges
import roughness
from roughness.app.report import plot_psd


def main(out=Path(__file__).with_name("plot_noise_floor.png")):
    fig = Figure(figsize=(10, 4))
    axes = fig.subplots(1, 2, sharey=True)
    options = roughness.AnalysisOptions(n_resamples=300, model_resamples=0)
    for ax, dose in zip(axes, (40, 400)):
        rng = np.random.default_rng(11)                   # the same edges at both doses
        pixels, truth = roughness.simulate_line_space(
            n_rows=1024, n_cols=544, sigma_nm=1.2, correlation_length_nm=8.0, roughness_exponent=0.6,
            settings=edges.SEMSettings(dose_per_pixel=dose, blur_nm=3.0), rng=rng)
        traces = edges.fit_edges(edges.Micrograph(pixels, pixel_size_nm=1.0))
        image = roughness.analyse_image(traces, options)
        edge = image.summary.edge
        true_sigma = np.sqrt(np.mean(truth["edge_sigma_nm"] ** 2))
        print(f"dose {dose:4d} e/px: truth {true_sigma:.3f} nm, biased {edge.sigma_biased_nm:.3f} nm, "
              f"unbiased {edge.sigma_unbiased_nm:.3f} nm, noise fraction {100 * edge.noise_fraction:.0f}% "
              "of the variance")
        psd = image.edge_psd
        plot_psd(ax, psd.frequency_per_nm, psd.mean_psd_nm3, psd.mean_floor_nm3, image.psd_model,
                 title=f"{dose} electrons per pixel")
    fig.savefig(out, dpi=90, bbox_inches="tight")
    return out


if __name__ == "__main__":
    main()
