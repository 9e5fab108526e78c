"""Self-affine model: closed forms, recovery of xi and H, the model-free correlation length."""
import math

import numpy as np
import pytest

from roughness._selfaffine import self_affine_psd, two_sided_from_one_sided
from roughness.psd_model import MAX_CORRELATION_FRACTION, correlation_length_from_acf, fit_psd_model
from roughness.psd import detrend, periodogram
from roughness.synth import rough_edges


def test_h_one_half_is_the_lorentzian():
    # exponential ACF sigma^2 exp(-|tau|/xi) <-> Lorentzian 2 sigma^2 xi / (1 + (2 pi f xi)^2)
    # (two-sided; any signal-processing text); quietedge's one-sided PSD is twice that
    f = np.linspace(0, 0.5, 50)
    s, xi = 1.3, 7.0
    lor = 2 * s * s * xi / (1 + (2 * math.pi * f * xi) ** 2)
    np.testing.assert_allclose(self_affine_psd(f, sigma_nm=s, correlation_length_nm=xi, roughness_exponent=0.5,
                                               sided="two"), lor, rtol=1e-12)
    np.testing.assert_allclose(two_sided_from_one_sided(
        self_affine_psd(f, sigma_nm=s, correlation_length_nm=xi, roughness_exponent=0.5)), lor, rtol=1e-12)


@pytest.mark.slow
@pytest.mark.parametrize("h", [0.3, 0.5, 0.9])
def test_fit_recovers_xi_and_h_within_reported_uncertainty(rng, h):
    # noise-free, non-periodic traces (400 x 1024 rows, Hann); truth within 3 bootstrap se
    xi, sigma = 10.0, 1.5
    x = rough_edges(400, 1024, 1.0, sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=h, rng=rng)
    f, p = periodogram(detrend(x, "linear"), row_spacing_nm=1.0, window="hann")
    fit = fit_psd_model(f, p, 0.0, n_resamples=60, rng=rng)
    assert fit.h_determined
    assert abs(fit.correlation_length_nm - xi) < 3 * fit.correlation_length_se_nm + 0.02 * xi
    # + 2% of xi and 0.02 in H: the Whittle fit's known bias from Hann leakage at the lowest
    # fitted bins (our checks), beside the 3-se sampling allowance
    assert abs(fit.roughness_exponent - h) < 3 * fit.roughness_exponent_se + 0.02
    assert fit.psd0_nm3 == pytest.approx(2 * fit.psd0_two_sided_nm3)


def test_h_not_determined_when_noise_hides_the_tail(rng):
    # xi of 2 rows: the tail drops under a large floor right after the knee
    x = rough_edges(100, 512, 1.0, sigma_nm=1.0, correlation_length_nm=2.0, roughness_exponent=0.7, rng=rng)
    noise = 1.5
    f, p = periodogram(detrend(x + noise * rng.standard_normal(x.shape), "linear"), row_spacing_nm=1.0)
    fit = fit_psd_model(f, p, 2 * noise ** 2, n_resamples=30, rng=rng)
    assert not fit.h_determined and math.isnan(fit.roughness_exponent)


def test_values_beyond_the_data_are_not_determined(rng):
    # xi of 400 nm on 256 nm lines: the PSD is a pure power law over every measured bin, so xi,
    # PSD(0) and the sigma of an infinite line cannot be read (knee below the second bin, 2/L)
    x = rough_edges(60, 256, 1.0, sigma_nm=3.0, correlation_length_nm=400.0, roughness_exponent=0.5, rng=rng)
    f, p = periodogram(detrend(x + 0.3 * rng.standard_normal(x.shape), "linear"), row_spacing_nm=1.0)
    fit = fit_psd_model(f, p, 2 * 0.3 ** 2, n_resamples=20, rng=rng)
    assert fit.fitted[1] > MAX_CORRELATION_FRACTION * 256 or math.isnan(fit.correlation_length_nm)
    for name, value in (("correlation_length", fit.correlation_length_nm), ("psd0", fit.psd0_nm3),
                        ("sigma", fit.sigma_nm)):
        assert math.isnan(value) and fit.reason(name), name
    # the curve over the fitted band is still drawn from the fitted values
    assert np.all(np.isfinite(fit.model_nm3(f[4:])))


def test_exponent_at_a_bound_is_not_determined(rng):
    # an exponent pinned at the fit's lower bound (0.05) says the data hold no power law there:
    # white roughness (no correlation) under a small floor
    x = rng.normal(0, 1.0, (80, 512))
    f, p = periodogram(detrend(x, "linear"), row_spacing_nm=1.0)
    fit = fit_psd_model(f, p, 0.01, n_resamples=0, rng=rng)
    assert math.isnan(fit.roughness_exponent) and not fit.h_determined and fit.reason("roughness_exponent")


def test_acf_crossing_gives_xi_for_the_exponential(rng):
    # H = 1/2: the ACF falls to 1/e at tau = xi exactly; with L/xi = 200 the detrend bias is
    # ~1% (the detrend removes ~ xi/L of the variance); 300 edges give a sampling error of ~1%
    xi = 5.0
    x = rough_edges(300, 1000, 1.0, sigma_nm=1.0, correlation_length_nm=xi, roughness_exponent=0.5, rng=rng)
    z = detrend(x, "linear")
    n = z.shape[1]
    acf = np.fft.irfft(np.abs(np.fft.rfft(z, n=2 * n, axis=1)) ** 2, axis=1)[:, :n].mean(0) / n
    assert correlation_length_from_acf(acf, noise_var_nm2=0.0, row_spacing_nm=1.0) == pytest.approx(xi, rel=0.05)
