"""PSD conventions against scipy.signal and Parseval; gap bridging."""
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import signal

from roughness.psd import bridge_gaps, cross_periodogram, detrend, periodogram


@pytest.mark.parametrize("n", [256, 255])
def test_parseval_boxcar(rng, n):
    # Parseval: sum_k P1_k df = mean square of the detrended trace (one-sided convention)
    z = detrend(np.cumsum(rng.standard_normal(n)), "linear")
    f, p = periodogram(z, row_spacing_nm=1.7, window="boxcar")
    assert np.sum(p) / (n * 1.7) == pytest.approx(np.mean(z ** 2), rel=1e-12)


@pytest.mark.parametrize("window", ["boxcar", "hann"])
@pytest.mark.parametrize("n", [256, 255])
def test_matches_scipy_periodogram_and_welch(rng, window, n):
    # Reference library: scipy.signal.periodogram / welch with density scaling, one-sided
    z = detrend(rng.standard_normal((3, n)).cumsum(axis=1), "linear")
    f, p = periodogram(z, row_spacing_nm=0.8, window=window)
    fs, ps = signal.periodogram(z, fs=1 / 0.8, window=window, detrend=False, scaling="density")
    np.testing.assert_allclose(f, fs)
    np.testing.assert_allclose(p, ps, rtol=1e-10, atol=1e-14 * p.max())
    fw, pw = signal.welch(z, fs=1 / 0.8, window=window, nperseg=n, noverlap=0, detrend=False,
                          scaling="density")
    np.testing.assert_allclose(p, pw, rtol=1e-10, atol=1e-14 * p.max())


def test_cross_psd_matches_scipy_csd_and_covariance(rng):
    n = 512
    a = detrend(rng.standard_normal(n).cumsum(), "linear")
    b = detrend(0.5 * a + rng.standard_normal(n).cumsum(), "linear")
    c = cross_periodogram(a, b, row_spacing_nm=1.0, window="boxcar")
    _, ref = signal.csd(a, b, fs=1.0, window="boxcar", nperseg=n, noverlap=0, detrend=False)
    np.testing.assert_allclose(c, np.real(ref), rtol=1e-9, atol=1e-12 * np.abs(c).max())
    assert np.sum(c) / n == pytest.approx(np.mean(a * b), rel=1e-10)   # cross-Parseval


def test_white_noise_level_is_window_independent(rng):
    # E[P1] = 2 dy s^2 for white noise with density normalisation (sum w^2), any window;
    # 2000 traces x ~250 bins of exponential ordinates: relative se ~ 0.0014 (x1.4 for Hann)
    s, dy = 0.7, 1.3
    z = s * rng.standard_normal((2000, 512))
    for window in ("boxcar", "hann"):
        _, p = periodogram(z, row_spacing_nm=dy, window=window)
        level = p[:, 4:-4].mean() / (2 * dy * s * s)
        assert abs(level - 1) < 5 * 1.4 / math.sqrt(2000 * 248)


def test_bridge_gaps_interpolates_and_excludes_with_reasons():
    pos = np.tile(np.arange(20.0), (3, 1))
    sig = np.ones_like(pos)
    valid = np.ones(pos.shape, bool)
    valid[0, 5:7] = False            # short gap: bridged
    valid[1, 3:12] = False           # long gap: excluded
    valid[2, ::2] = False            # too many invalid rows (half)
    prep = bridge_gaps(np.where(valid, pos, np.nan), sig, valid, max_gap_rows=3, max_invalid_fraction=0.46)
    np.testing.assert_allclose(prep.position_nm[0], np.arange(20.0))
    # interpolated row between rows 4 and 7 at t = 1/3: sqrt((2/3)^2 + (1/3)^2) sigma
    assert prep.sigma_nm[0, 5] == pytest.approx(math.sqrt((2 / 3) ** 2 + (1 / 3) ** 2))
    assert list(prep.usable) == [True, False, False]
    assert list(prep.exclusion) == ["", "gap_too_long", "too_many_invalid_rows"]
    assert prep.bridged_rows[0] == 2


@settings(max_examples=60, deadline=None)
@given(arrays(np.float64, st.integers(8, 300), elements=st.floats(-1e3, 1e3)), st.floats(0.05, 20.0))
def test_parseval_holds_for_any_trace(z, dy):
    # Parseval (boxcar): sum_k P1_k df = mean(z^2) for every trace, any length and spacing
    f, p = periodogram(z, row_spacing_nm=dy, window="boxcar")
    assert np.isclose(p.sum() * f[1], np.mean(z ** 2), rtol=1e-9, atol=1e-9)
