"""The rough-edge generator against analytic results and scipy."""
import math

import numpy as np
import pytest
from scipy import integrate, signal, stats

from roughness._selfaffine import g_factor, psd0_two_sided, self_affine_psd
from roughness.synth import edge_pairs, rough_edges, thorsos_edges


@pytest.mark.parametrize("h", [0.3, 0.5, 0.75, 1.0, 1.5])
def test_psd0_normalisation_by_quadrature(h):
    # sigma^2 = integral of the two-sided model over all f (Palasantzas 1993 K-correlation
    # model; the integral done numerically with scipy.integrate.quad).
    sigma, xi = 1.7, 9.0
    val, err = integrate.quad(lambda f: self_affine_psd(f, sigma_nm=sigma, correlation_length_nm=xi,
                                                        roughness_exponent=h, sided="two"),
                              0, np.inf, limit=400)
    assert 2 * val == pytest.approx(sigma ** 2, rel=1e-6)
    # one-sided model integrated over [0, inf) gives the same variance
    assert self_affine_psd(0.0, sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=h) \
        == pytest.approx(2 * psd0_two_sided(sigma, xi, h))


def test_g_factor_known_values():
    # g(1/2) = 2 (Lorentzian), g(1) = pi, g(3/2) = 4: Gamma-function values (Abramowitz & Stegun 6.1)
    assert g_factor(0.5) == pytest.approx(2.0)
    assert g_factor(1.0) == pytest.approx(math.pi)
    assert g_factor(1.5) == pytest.approx(4.0)


def test_mean_periodogram_matches_model_within_chi_square_scatter(rng):
    # Periodic Thorsos edges have E[P2_k] = S(f_k) exactly (Thorsos 1988).  Periodogram taken with
    # scipy.signal.periodogram (reference library); each bin of the mean of M edges is Gamma(M)
    # distributed, so sum_k M (mean_k/S_k - 1)^2 is close to chi-square with n_bins dof.
    n, dy, m = 256, 1.5, 3000
    kw = dict(sigma_nm=2.0, correlation_length_nm=12.0, roughness_exponent=0.7)
    edges = rough_edges(m, n, dy, rng=rng, oversample=1, **kw)
    f, p1 = signal.periodogram(edges, fs=1 / dy, window="boxcar", detrend=False, scaling="density")
    ratio = p1.mean(axis=0)[1:-1] / self_affine_psd(f[1:-1], **kw)  # one-sided model, 0 < k < N/2
    chi2 = np.sum(m * (ratio - 1.0) ** 2)
    dof = ratio.size
    assert stats.chi2.sf(chi2, dof) > 1e-3, (chi2, dof)
    assert np.max(np.abs(ratio - 1)) < 5 / math.sqrt(m)


def test_variance_of_long_edges(rng):
    # E[mean x^2] of a periodic Thorsos edge is sum_k S(f_k) df (Parseval for the periodic synthesis), which for xi >> dy
    # is sigma^2 less the tail beyond Nyquist.  Standard error from the spread over edges.
    n, dy, m = 2 ** 15, 1.0, 48
    kw = dict(sigma_nm=1.3, correlation_length_nm=40.0, roughness_exponent=0.5)
    edges = rough_edges(m, n, dy, rng=rng, oversample=1, **kw)
    per_edge = np.mean(edges ** 2, axis=1)
    se = per_edge.std(ddof=1) / math.sqrt(m)
    f = np.abs(np.fft.fftfreq(n, dy))
    expected = np.sum(self_affine_psd(f, sided="two", **kw)) / (n * dy)
    assert abs(per_edge.mean() - expected) < 4 * se
    # and the grid value is sigma^2 less the Lorentzian tail beyond Nyquist (arctan integral)
    tail = kw["sigma_nm"] ** 2 * (1 - 2 / math.pi * math.atan(math.pi * kw["correlation_length_nm"] / dy))
    assert expected == pytest.approx(kw["sigma_nm"] ** 2 - tail, rel=2e-3)


def test_exponential_acf_for_h_one_half(rng):
    # H = 1/2: S is the Lorentzian 2 sigma^2 xi / (1 + (2 pi f xi)^2), whose Fourier pair is
    # R(tau) = sigma^2 exp(-|tau|/xi) (exponential/Lorentzian pair, any signal-processing text).
    n, dy, m, sigma, xi = 4096, 1.0, 400, 1.0, 20.0
    edges = thorsos_edges(m, n, dy, psd_two_sided=lambda f: self_affine_psd(
        f, sigma_nm=sigma, correlation_length_nm=xi, roughness_exponent=0.5, sided="two"), rng=rng)
    spec = np.abs(np.fft.rfft(edges, axis=1)) ** 2
    acf = np.fft.irfft(spec, n=n, axis=1) / n          # circular ACF, exact for periodic edges
    lags = np.arange(0, 61)
    mean = acf[:, lags].mean(axis=0)
    se = acf[:, lags].std(axis=0, ddof=1) / math.sqrt(m)
    # the generator lacks the spectrum beyond Nyquist: |R_gen - R| <= that tail's power
    tail = sigma ** 2 * (1 - 2 / math.pi * math.atan(math.pi * xi / dy))
    model = sigma ** 2 * np.exp(-lags * dy / xi)
    assert np.all(np.abs(mean - model) < 4 * se + tail)


def test_left_right_correlation(rng):
    rho = 0.4
    left, right = edge_pairs(400, 512, 1.0, sigma_nm=1.0, correlation_length_nm=5.0,
                             roughness_exponent=0.5, lr_correlation=rho, rng=rng)
    left = left - left.mean(axis=1, keepdims=True)
    right = right - right.mean(axis=1, keepdims=True)
    r = np.sum(left * right) / math.sqrt(np.sum(left ** 2) * np.sum(right ** 2))
    # per-line correlations scatter by about sqrt(xi g / L) ~ 0.14; over 400 lines ~ 0.007
    per_line = np.sum(left * right, 1) / np.sqrt(np.sum(left ** 2, 1) * np.sum(right ** 2, 1))
    assert abs(r - rho) < 4 * per_line.std() / math.sqrt(400)


def test_generator_rejects_bad_parameters(rng):
    with pytest.raises(ValueError, match="roughness_exponent=0"):
        rough_edges(1, 64, 1.0, sigma_nm=1, correlation_length_nm=5, roughness_exponent=0, rng=rng)
    with pytest.raises(ValueError, match="lr_correlation=2"):
        edge_pairs(1, 64, 1.0, sigma_nm=1, correlation_length_nm=5, roughness_exponent=0.5,
                   lr_correlation=2, rng=rng)
