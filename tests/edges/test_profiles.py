"""Profile models and their tables, checked against direct evaluation and finite differences."""
import numpy as np
import pytest
from scipy import integrate, special

from edges.profiles import EdgeShape, half_level_offset, parametric_profile, tabulate

SHAPES = [EdgeShape(1.5), EdgeShape(2.0, peak_height=0.6, peak_offset_px=-1.0, peak_width_px=1.2),
          EdgeShape(0.8, peak_height=-0.3, peak_offset_px=1.5, peak_width_px=0.7)]


@pytest.mark.parametrize("shape", SHAPES)
def test_parametric_profile_is_the_pixel_average_of_a_blurred_step_and_peak(shape):
    # Reference: scipy quad of the continuous model over each one-pixel box.
    def point(v):
        step = special.ndtr(v / shape.blur_px)
        peak = shape.peak_height * np.exp(-0.5 * ((v - shape.peak_offset_px) / shape.peak_width_px) ** 2)
        return step + peak

    u = np.linspace(-6, 6, 25)
    ref = [integrate.quad(point, x - 0.5, x + 0.5, epsabs=1e-12)[0] for x in u]
    np.testing.assert_allclose(parametric_profile(u, shape), ref, atol=1e-9)


@pytest.mark.parametrize("shape", SHAPES)
def test_table_matches_the_profile_and_its_derivative(shape):
    f = lambda u, derivative=False: parametric_profile(u, shape, derivative=derivative)   # noqa: E731
    table = tabulate([f, f], 12)
    u = np.random.default_rng(0).uniform(-8, 8, (2, 400))
    mu, dmu = table.evaluate(np.array([0, 1]), u)
    direct, slope = parametric_profile(u, shape), parametric_profile(u, shape, derivative=True)
    # cubic Hermite on a 1/32-px grid: error ~ h^4 |f''''| / 384 ~ 1e-9 for these smooth shapes
    np.testing.assert_allclose(mu, direct, atol=1e-7)
    np.testing.assert_allclose(dmu, slope, atol=1e-5)
    # and the tabulated derivative is that of the profile (central differences, h = 1e-5)
    h = 1e-5
    fd = (parametric_profile(u + h, shape) - parametric_profile(u - h, shape)) / (2 * h)
    np.testing.assert_allclose(slope, fd, atol=1e-6)


def test_half_level_point_of_a_plain_step_is_its_centre_and_a_rim_moves_it():
    plain = lambda u, derivative=False: parametric_profile(u, EdgeShape(2.0), derivative=derivative)   # noqa: E731
    assert half_level_offset(plain) == pytest.approx(0.0, abs=1e-6)
    rim = EdgeShape(2.0, peak_height=0.8, peak_offset_px=-1.0, peak_width_px=1.0)
    rimmed = lambda u, derivative=False: parametric_profile(u, rim, derivative=derivative)   # noqa: E731
    r = half_level_offset(rimmed)
    # by definition the profile sits half-way between its plateaus (0 and 1) there
    assert parametric_profile(np.array([r]), rim)[0] == pytest.approx(0.5, abs=1e-6)
    assert r != pytest.approx(0.0, abs=0.05)


def test_shapes_pinned_at_a_physical_bound_are_rejected():
    from edges.profiles import PEAK_HEIGHT_RANGE, fit_shape, is_physical
    assert is_physical(EdgeShape(1.5)) and all(is_physical(s, max_peak_offset_px=4) for s in SHAPES)
    # a dip below the lowest allowed halo (one that would absorb the neighbouring edge)
    assert not is_physical(EdgeShape(1.5, peak_height=PEAK_HEIGHT_RANGE[0], peak_offset_px=1.0, peak_width_px=1.0))
    # a peak outside the window (3 px reach: peak offset limit 3 px)
    assert not is_physical(EdgeShape(1.5, peak_height=0.5, peak_offset_px=-3.5, peak_width_px=1.0),
                           max_peak_offset_px=3.0)
    # a window holding a step and, 2.5 px away, the next (falling) edge: the free peak would take
    # the falling edge as a dip; the bounds keep the fit inside, and the result is flagged
    u = np.linspace(-3, 3, 61)
    z = parametric_profile(u, EdgeShape(0.8)) - parametric_profile(u - 2.5, EdgeShape(0.8))
    shape, _ = fit_shape(u, z, kind="parametric", peak_side=1, max_peak_offset_px=2.5)
    assert shape.peak_height >= PEAK_HEIGHT_RANGE[0] and abs(shape.peak_offset_px) <= 2.5
    assert not is_physical(shape, max_peak_offset_px=2.5)
