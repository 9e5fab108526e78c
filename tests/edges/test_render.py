"""The virtual SEM against closed forms, quadrature and counting statistics."""
import math

import numpy as np
import pytest
from scipy import integrate, special

from edges.render import SEMSettings, expected_row_profile, render_micrograph


def _straight(n_rows, positions):
    return np.repeat(np.asarray(positions, float)[:, None], n_rows, axis=1)


def test_unblurred_edges_sit_at_their_pixel_fraction(rng):
    # With a sharp beam a pixel partly covered by the line holds exactly the covered fraction
    # (box integration).  The sampled profile is then a one-pixel ramp whose 50% point is the
    # edge: x = k + 1/2 - v_k for the first pixel k with v_k > 0 (rising edge).
    n_rows = 200
    left = 20.0 + rng.uniform(-3, 3, (1, n_rows))
    right = 45.0 + rng.uniform(-3, 3, (1, n_rows))
    s = SEMSettings(blur_nm=0, edge_peak=0, shot_noise=False, black_level=0, dose_per_pixel=1,
                    space_level=0.2, line_level=1.2)
    px, truth = render_micrograph(left, right, n_cols=70, settings=s, rng=rng)
    v = (px - 0.2) / 1.0
    k_left = np.argmax(v > 1e-12, axis=1)
    x_left = k_left + 0.5 - v[np.arange(n_rows), k_left]
    k_right = 69 - np.argmax(v[:, ::-1] > 1e-12, axis=1)
    x_right = k_right - 0.5 + v[np.arange(n_rows), k_right]
    # exact for a box-integrated unblurred step up to float rounding; 0.02 px allows the
    # renderer's 1e-3-level quadrature of the blur-free limit
    assert np.max(np.abs(x_left - truth["left_nm"][0])) < 0.02
    assert np.max(np.abs(x_right - truth["right_nm"][0])) < 0.02


def test_blurred_profile_matches_numerical_convolution():
    # closed-form pixel mean of a blurred step and edge peak versus scipy.integrate.quad of the
    # pointwise profile (Gaussian CDF step + Gaussian peak) over each pixel
    s = SEMSettings(pixel_size_nm=1.3, blur_nm=2.1, edge_peak=0.4, edge_peak_width_nm=1.2,
                    edge_peak_offset_nm=1.7)
    xl, xr = 10.3, 31.9
    sd = math.hypot(s.edge_peak_width_nm, s.blur_nm)

    def point(x):
        step = special.ndtr((x - xl) / s.blur_nm) - special.ndtr((x - xr) / s.blur_nm)
        area = s.edge_peak * s.edge_peak_width_nm * math.sqrt(2 * math.pi)
        pk = sum(np.exp(-0.5 * ((x - c) / sd) ** 2) / (sd * math.sqrt(2 * math.pi))
                 for c in (xl + s.edge_peak_offset_nm, xr - s.edge_peak_offset_nm))
        return s.space_level + (s.line_level - s.space_level) * step + area * pk

    cols = np.arange(32) * s.pixel_size_nm
    ref = [integrate.quad(point, c - 0.65, c + 0.65, epsabs=1e-12)[0] / 1.3 for c in cols]
    got = expected_row_profile(cols[:, None], np.array([xl]), np.array([xr]), s)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)


@pytest.mark.parametrize("gain", [1.0, 2.5])
def test_shot_noise_variance_equals_mean_count(rng, gain):
    # Poisson counts: variance = mean; scaled by the gain, var = gain * (mean - black level).
    s = SEMSettings(dose_per_pixel=60, gain=gain, black_level=50, edge_peak=0)
    n_rows = 2000
    px, _ = render_micrograph(_straight(n_rows, [40.0]), _straight(n_rows, [80.0]), n_cols=120,
                              settings=s, rng=rng)
    for cols in (slice(0, 25), slice(50, 70)):     # substrate and line top, far from edges
        region = px[:, cols]
        mean_counts = (region.mean() - s.black_level) / gain
        ratio = region.var() / (gain ** 2 * mean_counts)
        # var of a sample variance of n Poisson(~20-40) values: rel sd ~ sqrt(2/n)
        assert abs(ratio - 1) < 5 * math.sqrt(2 / region.size)


def test_scan_correlation_is_along_rows_only(rng):
    a = 0.6
    s = SEMSettings(dose_per_pixel=80, scan_correlation=a, edge_peak=0)
    n = 3000
    px, _ = render_micrograph(_straight(n, [60.0]), _straight(n, [90.0]), n_cols=40, settings=s, rng=rng)
    e = px - px.mean(axis=0)
    along = np.sum(e[:, 1:] * e[:, :-1]) / np.sum(e * e)
    across = np.sum(e[1:] * e[:-1]) / np.sum(e * e)
    se = 1 / math.sqrt(e.size)
    assert abs(along - a) < 6 * se * 2 and abs(across) < 6 * se
    # marginal variance kept (AR(1) filter with unit variance gain)
    assert e.var() / ((px.mean() - s.black_level)) == pytest.approx(1.0, abs=0.03)


def test_polarity_orientation_tilt_and_truth(rng):
    n = 64
    left, right = _straight(n, [20.0]), _straight(n, [40.0])
    base = dict(shot_noise=False, edge_peak=0, black_level=0)
    bright, _ = render_micrograph(left, right, n_cols=60, settings=SEMSettings(**base), rng=rng)
    dark, _ = render_micrograph(left, right, n_cols=60, settings=SEMSettings(polarity="dark", **base), rng=rng)
    assert bright[:, 30].mean() > bright[:, 5].mean() and dark[:, 30].mean() < dark[:, 5].mean()
    horiz, t = render_micrograph(left, right, n_cols=60, settings=SEMSettings(horizontal=True, **base), rng=rng)
    np.testing.assert_array_equal(horiz, bright.T)
    assert t["orientation"] == "horizontal"
    tilted, tt = render_micrograph(left, right, n_cols=60, settings=SEMSettings(tilt_deg=2.0, **base), rng=rng)
    slope = np.polyfit(np.arange(n), tt["left_nm"][0], 1)[0]
    assert slope == pytest.approx(math.tan(math.radians(2.0)))
    # realised sigma after a straight-line fit: a tilted straight edge has none
    assert np.all(tt["edge_sigma_nm"] < 1e-9)


def test_render_rejects_bad_input(rng):
    with pytest.raises(ValueError, match="right edge"):
        render_micrograph([[5.0]], [[4.0]], n_cols=20, rng=rng)
    with pytest.raises(ValueError, match="scan_correlation"):
        render_micrograph([[5.0, 5]], [[9.0, 9]], n_cols=20, settings=SEMSettings(scan_correlation=1.0), rng=rng)


def test_alternative_line_scan_families():
    from edges.render import SEMSettings, expected_row_profile, render_micrograph
    cols = np.arange(0.0, 80.0, 0.5)[:, None]
    base = SEMSettings(edge_peak=0.4)
    prof = lambda **kw: expected_row_profile(cols, np.array([20.0]), np.array([60.0]),   # noqa: E731
                                             SEMSettings(**{**base.__dict__, **kw}))
    # a trapezoid with a vanishing sidewall is the default step (the quadrature is consistent)
    np.testing.assert_allclose(prof(profile="trapezoid", sidewall_nm=1e-4), prof(), atol=1e-5)
    # a sloped sidewall reaches the half level later (half the sidewall, to first order)
    half = 0.5 * (base.space_level + base.line_level)
    def crossing(p):
        i = int(np.argmax(p > half))
        return float(np.interp(half, p[i - 1:i + 1], cols[i - 1:i + 1, 0]))
    no_peak = dict(edge_peak=0.0)
    assert crossing(prof(profile="trapezoid", sidewall_nm=6.0, **no_peak)) == pytest.approx(23.0, abs=0.1)
    # the halo dips below the space level outside the foot; the asymmetric right edge is blurrier
    assert prof(profile="halo").min() < base.space_level - 0.01
    sym, asym = prof(edge_peak=0.0), prof(profile="asymmetric", edge_peak=0.0)
    np.testing.assert_allclose(asym[:80], sym[:80], atol=1e-12)         # left edge unchanged
    assert not np.allclose(asym[80:], sym[80:])
    # 8-bit output is integral and clipped; vignetting darkens the corners by the stated share
    left = np.full((1, 64), 30.0)
    px, _ = render_micrograph(left, left + 30, n_cols=96, rng=np.random.default_rng(0),
                              settings=SEMSettings(quantise_bits=8, dose_per_pixel=400, gain=0.7))
    assert px.min() >= 0 and px.max() <= 255 and np.all(px == np.rint(px))
    flat = SEMSettings(shot_noise=False, edge_peak=0.0, black_level=0.0, vignetting=0.2)
    px, _ = render_micrograph(np.full((1, 65), 200.0), np.full((1, 65), 210.0), n_cols=65,
                              rng=np.random.default_rng(0), settings=flat)
    assert px[0, 0] / px[32, 32] == pytest.approx(0.8, rel=1e-6)
