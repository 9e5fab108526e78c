"""Noise floor, unbiased LER/LWR, left/right correlation, finite length and interval coverage,
on synthetic traces of known roughness plus white noise of known per-row sigma."""
import math

import numpy as np
import pytest
from scipy import signal

from roughness.noise import floors_disagree, plateau_floor
from roughness.psd import detrend
from roughness.stats import analyse_traces, expected_measured_variance, frames_for_noise_fraction, \
    sampling_plan, summarize
from roughness.synth import edge_pairs, rough_edges

from .._traces import make_traces

KW = dict(sigma_nm=1.5, correlation_length_nm=8.0, roughness_exponent=0.6)


def _noisy(rng, n_lines=250, n_rows=512, rho=0.0, noise=None, row_correlation=0.0):
    left, right = edge_pairs(n_lines, n_rows, 1.0, lr_correlation=rho, rng=rng, **KW)
    right = right + 30.0
    # heteroscedastic per-row noise: sigma rises along the edge from 0.5 to 1.0 nm
    s = np.linspace(0.5, 1.0, n_rows) if noise is None else noise
    e = rng.standard_normal((2, n_lines, n_rows))
    if row_correlation:
        a = row_correlation
        e = signal.lfilter([math.sqrt(1 - a * a)], [1, -a], e, axis=-1, zi=(1 - math.sqrt(1 - a * a)) * e[..., :1])[0]
    clean = make_traces(left, right, 0.0 * s, 0.0 * s)
    noisy = make_traces(left + s * e[0], right + s * e[1], s, s)
    return clean, noisy, s


def test_unbiased_sigma_recovers_the_realised_roughness(rng):
    clean, noisy, s = _noisy(rng)
    truth = summarize([analyse_traces(clean).lines], n_resamples=0 or 10)
    est = summarize([analyse_traces(noisy).lines], n_resamples=200)
    # unbiased within 2% of the realised sigma (its own sampling error over 500 edges: ~0.4%)
    assert est.edge.sigma_unbiased_nm == pytest.approx(truth.edge.sigma_biased_nm, rel=0.02)
    # biased^2 = truth^2 + noise^2 (noise share after a line detrend: sum s_i^2 (1 - P_ii) / N)
    keep = 1 - 2 / s.size     # (N - p)/N for p = 2 removed columns, to first order
    assert est.edge.sigma_biased_nm ** 2 == pytest.approx(
        truth.edge.sigma_biased_nm ** 2 + np.mean(s ** 2) * keep, rel=0.01)
    assert est.width.sigma_unbiased_nm == pytest.approx(truth.width.sigma_biased_nm, rel=0.02)


def test_noise_floor_matches_the_noise_spectrum_and_the_plateau(rng):
    clean, noisy, s = _noisy(rng)
    im_noisy, im_clean = analyse_traces(noisy), analyse_traces(clean)
    pure_noise = im_noisy.edge.psd_nm3 - im_clean.edge.psd_nm3
    # the noise alone (cross terms average out): its mean level at f > 0.1/nm against the
    # covariance floor (Hann-weighted mean of s^2); 500 traces x 200 bins: se ~ 0.4%
    f = im_noisy.frequency_per_nm
    sel = (f > 0.1) & (f < 0.49)
    floor = im_noisy.edge.floor_nm3.mean()
    assert pure_noise[:, sel].mean() == pytest.approx(floor, rel=0.03)
    # plateau of the noisy PSD less the roughness tail (known here from the clean PSD)
    level, sd = plateau_floor(f, im_noisy.edge.psd_nm3.mean(0), n_traces=500, row_spacing_nm=1.0,
                              roughness_tail_nm3=im_clean.edge.psd_nm3.mean(0))
    assert not floors_disagree(level, sd, floor)


def test_disagreement_flag_fires_for_noise_correlated_between_rows(rng):
    # AR(1) noise between rows (a = 0.6) with the same marginal variance: the covariance floor
    # is right for the variance but the spectrum is not white
    clean, noisy, s = _noisy(rng, noise=np.full(512, 0.8), row_correlation=0.6)
    im_noisy, im_clean = analyse_traces(noisy), analyse_traces(clean)
    level, sd = plateau_floor(im_noisy.frequency_per_nm, im_noisy.edge.psd_nm3.mean(0), n_traces=500,
                              row_spacing_nm=1.0, roughness_tail_nm3=im_clean.edge.psd_nm3.mean(0))
    assert floors_disagree(level, sd, im_noisy.edge.floor_nm3.mean())


def test_coloured_floor_matches_noise_correlated_between_rows(rng):
    # AR(1) between rows, a = 0.6: rho_l = a^l and the noise spectrum is white * (1 - a^2) /
    # (1 - 2 a cos w + a^2) (any signal-processing text), which the lag sum 1 + 2 sum a^l cos(l w)
    # reproduces; with the fit's row correlation given, floor and plateau agree again
    import dataclasses
    clean, noisy, s = _noisy(rng, noise=np.full(512, 0.8), row_correlation=0.6)
    rho = tuple(0.6 ** np.arange(1, 25))
    noisy = dataclasses.replace(noisy, noise_model=dataclasses.replace(noisy.noise_model, row_correlation=rho))
    im_noisy, im_clean = analyse_traces(noisy), analyse_traces(clean)
    f = im_noisy.frequency_per_nm
    w = 2 * np.pi * f
    exact = 2 * 0.8 ** 2 * (1 - 0.36) / (1 - 1.2 * np.cos(w) + 0.36)
    floor = im_noisy.edge.floor_spectrum_nm3.mean(axis=0)
    np.testing.assert_allclose(floor, exact, rtol=1e-4)     # 24 lags: truncation ~ 0.6^25 ~ 3e-6
    only = analyse_traces(dataclasses.replace(noisy, position_nm=noisy.position_nm - clean.position_nm))
    pure_noise = only.edge.psd_nm3.mean(axis=0)
    # two bands, 500 traces x ~50 bins each: se ~ 1% (Hann neighbours correlate); 4% allowed
    for band in ((f > 0.02) & (f < 0.12), (f > 0.35) & (f < 0.49)):
        assert pure_noise[band].mean() == pytest.approx(floor[band].mean(), rel=0.04)
    level, sd = plateau_floor(f, im_noisy.edge.psd_nm3.mean(0), n_traces=500, row_spacing_nm=1.0,
                              roughness_tail_nm3=im_clean.edge.psd_nm3.mean(0))
    hf, _ = plateau_floor(f, floor, n_traces=1, row_spacing_nm=1.0)
    assert not floors_disagree(level, sd, hf)
    # the noise variance (what the unbiased sigma subtracts) does not depend on the colour
    assert np.nanmean(im_noisy.edge_var_noise_nm2) == pytest.approx(0.64 * (1 - 2 / 512), rel=1e-6)


def test_width_centre_and_correlation_with_correlated_edges(rng):
    # Truth: the same edges without noise.  Tolerance: 4 x the bootstrap standard error.
    clean, noisy, _ = _noisy(rng, rho=0.4)
    truth = summarize([analyse_traces(clean).lines], n_resamples=10)
    est = summarize([analyse_traces(noisy).lines], n_resamples=400)
    for q in ("width", "centre"):
        e, t = est.quantity(q), truth.quantity(q)
        se = (e.sigma_unbiased_high_nm - e.sigma_unbiased_low_nm) / (2 * 1.96)
        assert abs(e.sigma_unbiased_nm - t.sigma_biased_nm) < 4 * se
    se = (est.lr_correlation_unbiased_high - est.lr_correlation_unbiased_low) / (2 * 1.96)
    assert abs(est.lr_correlation_unbiased - truth.lr_correlation_biased) < 4 * se
    assert est.lr_correlation_biased < truth.lr_correlation_biased - 4 * se   # diluted by noise
    # sigma_w^2 = sigma_L^2 + sigma_R^2 - 2 cov (exact identity, same detrend everywhere)
    v = est
    rho = v.lr_correlation_unbiased
    assert v.width.var_unbiased_nm2 == pytest.approx(2 * v.edge.var_unbiased_nm2 * (1 - rho), rel=0.03)


@pytest.mark.parametrize("l_over_xi,h", [(20, 0.5), (100, 0.5), (30, 0.8)])
def test_finite_length_variance_matches_trace_formula(rng, l_over_xi, h):
    # E[|(I-P) x|^2 / N] = tr((I-P) C) / N; 3000 non-periodic edges, 4 se.
    # C is the generator's own ACF (the Riemann sum of the PSD on the 8x longer periodic grid:
    # Thorsos edges lack the spectrum beyond Nyquist), so the check is of the trace
    # formula alone; the continuous model's value is larger by about that missing tail.
    from roughness._selfaffine import self_affine_psd

    xi, n = 6.0, int(l_over_xi * 6)
    kw = dict(sigma_nm=1.0, correlation_length_nm=xi, roughness_exponent=h)
    x = rough_edges(3000, n, 1.0, rng=rng, **kw)
    v = np.mean(detrend(x, "linear") ** 2, axis=1)
    s2 = self_affine_psd(np.abs(np.fft.fftfreq(8 * n, 1.0)), sided="two", **kw)
    acf_gen = np.real(np.fft.ifft(s2)) / 1.0
    expect = expected_measured_variance(n_rows=n, row_spacing_nm=1.0, acf_nm2=acf_gen)
    assert abs(v.mean() - expect) < 4 * v.std(ddof=1) / math.sqrt(v.size)
    model = expected_measured_variance(n_rows=n, row_spacing_nm=1.0, **kw)
    assert expect < model < 1.0              # detrending biases the finite line low


@pytest.mark.slow
def test_interval_coverage(rng):
    # 300 trials of 12 lines x 256 rows; truth = the expected measured sigma for that length.
    # Binomial sd of the coverage at 95%: 1.3%; the window [0.90, 0.99].
    n_rows, hits = 256, 0
    truth = math.sqrt(expected_measured_variance(n_rows=n_rows, row_spacing_nm=1.0, **KW))
    trials = 300
    for _ in range(trials):
        _, noisy, _ = _noisy(rng, n_lines=12, n_rows=n_rows, noise=np.full(n_rows, 0.6))
        est = summarize([analyse_traces(noisy).lines], n_resamples=400, rng=rng)
        hits += est.edge.sigma_unbiased_low_nm <= truth <= est.edge.sigma_unbiased_high_nm
    assert 0.90 <= hits / trials <= 0.99, hits / trials


@pytest.mark.parametrize("seed", [1, 2, 3, 4])
def test_below_noise_is_reported_not_clipped(seed):
    # Negative by construction: straight edges (no roughness) with real noise sd 0.5 nm whose
    # fit covariance claims 1.0 nm.  E[var_b] = 0.25 k, var_n = 1.0 k with k = 1 - 2/128 (line
    # detrend), so the unbiased variance is -0.75 k = -0.738 nm^2 for every seed; its sampling
    # sd over 40 edges of 128 rows is 0.25 sqrt(2 / 5120) = 0.005 nm^2 (assert within 0.03).
    rng = np.random.default_rng(seed)
    n_rows, k = 128, 1 - 2 / 128
    s = np.full(n_rows, 1.0)
    left = 0.5 * rng.standard_normal((20, n_rows))
    right = 30 + 0.5 * rng.standard_normal((20, n_rows))
    est = summarize([analyse_traces(make_traces(left, right, s, s)).lines], n_resamples=200, rng=rng)
    assert est.edge.status == "below_noise" and math.isnan(est.edge.sigma_unbiased_nm)
    assert est.edge.var_unbiased_nm2 == pytest.approx(-0.75 * k, abs=0.03)     # kept signed, never clipped
    assert est.edge.var_unbiased_high_nm2 < 0 and est.edge.sigma_unbiased_high_nm == 0.0


def test_sampling_plan_and_frames():
    plan = sampling_plan(sigma_unbiased_nm=1.5, correlation_length_nm=8.0, roughness_exponent=0.5,
                         noise_sigma_nm=0.8, row_spacing_nm=1.0, line_length_nm=1000.0, target_relative_sd=0.02)
    # by hand, H = 1/2 (c = 1; the variance of a sample variance, Priestley 1981, sec. 5.3): M L = 2 [s^4 xi + 2 s^2 n^2 dy + n^4 dy] / (4 r^2 s^4)
    s2, n2 = 2.25, 0.64
    by_hand = 2 * (s2 * s2 * 8 + 2 * s2 * n2 + n2 * n2) / (4 * 0.02 ** 2 * s2 * s2)
    assert plan.total_length_nm == pytest.approx(by_hand)
    assert plan.lines_needed == math.ceil(by_hand / 1000)
    assert plan.lines_needed_noise_free <= plan.lines_needed
    # noise variance 1.0 nm^2 now, roughness 2.0 nm^2: fraction 1/3; to reach 10% needs
    # 1.0 * 0.9 / (0.1 * 2.0) = 4.5 frames
    assert frames_for_noise_fraction(noise_var_nm2=1.0, unbiased_var_nm2=2.0, target_fraction=0.1) == pytest.approx(4.5)
