"""Finding lines and edges: polarity, orientation, tilt, borders, dense lines, no lines."""
import math

import numpy as np
import pytest

from edges._types import Micrograph
from edges.locate import LocateError, locate_edges

from .._images import line_space


@pytest.mark.parametrize("polarity", ["bright", "dark"])
@pytest.mark.parametrize("edge_peak", [0.0, 0.5])
def test_edges_found_for_either_polarity(rng, polarity, edge_peak):
    m, truth, _ = line_space(rng, n_rows=256, n_cols=330, polarity=polarity, edge_peak=edge_peak,
                             dose_per_pixel=60)
    lay = locate_edges(m, polarity=polarity)
    guess = np.array([e.column_px for e in lay.edges])
    true = truth["edge_nm"].mean(axis=1)
    assert guess.size == true.size
    # the coarse guess need only lie within the fit's reach: the grid search of the coarse pass
    # covers +-(half window - 3) = +-12 px; a bright rim pulls the row-mean crossing by up to
    # ~rim offset + blur (3-4 px here), the roughness (1.5 nm sd) averages out over 256 rows
    assert np.max(np.abs(guess - true)) < 6
    assert [e.side for e in lay.edges[:2]] == ["left", "right"]
    assert lay.micrograph.polarity == polarity


def test_horizontal_lines_are_turned(rng):
    m, truth, _ = line_space(rng, n_rows=200, n_cols=260, horizontal=True, dose_per_pixel=60)
    assert m.pixels.shape == (260, 200)
    lay = locate_edges(m)
    assert lay.micrograph.rotated and lay.micrograph.pixels.shape == (200, 260)
    # same reach argument as above (no rim here: the mean profile's crossing is within ~1 px)
    np.testing.assert_allclose([e.column_px for e in lay.edges], truth["edge_nm"].mean(1), atol=4)


def test_tilt_is_followed(rng):
    m, truth, _ = line_space(rng, n_rows=512, n_cols=260, tilt_deg=2.0, dose_per_pixel=60)
    lay = locate_edges(m)
    # 16 blocks of 32 rows: each block shift has sd ~ roughness / sqrt(32 rows / xi) ~ 0.8 px over
    # a 480-row lever arm, i.e. ~2% of the 0.035 px/row slope (5% is ~2.5 sd)
    assert lay.tilt_px_per_row == pytest.approx(math.tan(math.radians(2.0)), rel=0.05)
    g = lay.guess_columns(np.arange(512))
    # per-row guesses follow the tilted edges to within the roughness and rim offset
    assert np.max(np.abs(g - truth["edge_nm"]).mean(axis=1)) < 3


def test_partial_lines_at_the_border_are_dropped(rng):
    m, truth, _ = line_space(rng, n_rows=128, n_cols=260, dose_per_pixel=60)
    cut = Micrograph(m.pixels[:, 60:], 1.0)          # cuts into the first line (49.5-81.5 nm)
    lay = locate_edges(cut)
    assert lay.dropped_partial_lines >= 1
    assert len(lay.edges) == truth["edge_nm"].shape[0] - 2


def test_pitch_of_eight_pixels_is_located_and_denser_is_flagged(rng):
    # pitch 8 px, CD 4 px: every edge has 2 px of its own on either side (MIN_HALF_WINDOW_PX)
    m, truth, _ = line_space(rng, n_rows=64, n_cols=120, pitch_nm=8.0, cd_nm=4.0, sigma_nm=0.2,
                             blur_nm=0.8, edge_peak=0, dose_per_pixel=400)
    lay = locate_edges(m)
    assert len(lay.edges) == truth["edge_nm"].shape[0] - 2 * lay.dropped_partial_lines
    assert lay.edges and not any(e.flag for e in lay.edges)
    assert all(min(e.reach_left_px, e.reach_right_px) == 2 for e in lay.edges)
    # pitch 5 px: edges 2.5 px apart leave 1 px a side, too little for a position, gain and offset
    m, _, _ = line_space(rng, n_rows=64, n_cols=120, pitch_nm=5.0, cd_nm=2.5, sigma_nm=0.1,
                         blur_nm=0.5, edge_peak=0, dose_per_pixel=400)
    lay = locate_edges(m)
    assert lay.edges and all(e.flag == "too_close" for e in lay.edges)


def test_image_without_lines_is_a_clear_error(rng):
    flat = Micrograph(100 + rng.normal(0, 3, (128, 128)), 1.0, source="flat.tif")
    with pytest.raises(LocateError, match=r"flat\.tif: no lines found"):
        locate_edges(flat)


def test_bad_options_are_refused(rng):
    m, _, _ = line_space(rng, n_rows=64, n_cols=200)
    with pytest.raises(ValueError, match="window_px=20"):
        locate_edges(m, window_px=20)
    with pytest.raises(ValueError, match="polarity='grey'"):
        locate_edges(m, polarity="grey")


def test_tilt_beyond_the_measured_range_is_refused_with_the_angle(rng):
    from edges.locate import MAX_TILT_DEG
    m, _, _ = line_space(rng, n_rows=512, n_cols=300, tilt_deg=MAX_TILT_DEG - 0.5, dose_per_pixel=60)
    lay = locate_edges(m)
    # same block statistics as test_tilt_is_followed: ~2% of the slope at 1 sd
    assert lay.tilt_px_per_row == pytest.approx(math.tan(math.radians(MAX_TILT_DEG - 0.5)), rel=0.06)
    m, _, _ = line_space(rng, n_rows=512, n_cols=300, tilt_deg=8.0, dose_per_pixel=60)
    with pytest.raises(LocateError, match=r"virtual: the lines are tilted by (7\.[6-9]|8\.[0-4]) degrees"):
        locate_edges(m)


def test_grating_ending_inside_the_image_is_measured(rng):
    # four lines in the left half, bare substrate in the right half: every line is whole, and the
    # last edge's window reaches into the substrate as far as the image allows
    from edges import SEMSettings, render_micrograph
    from roughness.synth import edge_pairs
    centres = 30.0 + 40.0 * np.arange(4)
    dl, dr = edge_pairs(4, 256, 1.0, sigma_nm=1.5, correlation_length_nm=10.0, roughness_exponent=0.6, rng=rng)
    px, truth = render_micrograph(centres[:, None] - 10 + dl, centres[:, None] + 10 + dr, n_cols=400,
                                  settings=SEMSettings(dose_per_pixel=100, edge_peak=0.0), rng=rng)
    lay = locate_edges(Micrograph(px, 1.0))
    assert len(lay.edges) == 8 and lay.dropped_partial_lines == 0
    # the coarse columns within the reach of the fit (roughness 1.5 nm averages out over 256 rows)
    np.testing.assert_allclose([e.column_px for e in lay.edges], truth["edge_nm"].mean(axis=1), atol=2)
    assert lay.edges[-1].reach_right_px == 15      # half the requested 31-px window: nothing beside it


def test_information_bar_is_cut_and_counted(rng):
    from edges.fit import fit_edges
    from edges.locate import information_bar_rows
    m, truth, _ = line_space(rng, n_rows=300, n_cols=300, dose_per_pixel=100)
    px = m.pixels.copy()
    px[-40:] = 20.0                                       # a dark band with white text
    px[-30:-20, 40:60] = 250.0
    px[-28:-22, 100:180] = 250.0
    assert information_bar_rows(px) == (0, 40)
    et = fit_edges(Micrograph(px, 1.0, source="bar.tif"))
    assert et.bar_rows == (0, 40) and et.n_rows == 260
    # every whole line measured on the rows above the bar, rows aligned with the truth
    assert et.valid.mean() > 0.99
    err = et.position_nm - truth["edge_nm"][:, :260]
    assert np.nanmax(np.abs(err - np.nanmean(err, axis=1, keepdims=True))) < 3   # noise ~0.4 nm: 7 sd
    # no bar found in clean images of any kind (also vignetted, jittered, low dose, turned)
    for kw in (dict(dose_per_pixel=2), dict(vignetting=0.5, gradient=0.3), dict(row_jitter=0.05),
               dict(horizontal=True), dict(quantise_bits=8, gain=0.6, black_level=20.0)):
        clean, _, _ = line_space(rng, n_rows=256, n_cols=300, **kw)
        assert information_bar_rows(clean.pixels) == (0, 0), kw


def test_binarised_images_are_refused_with_the_reason(rng):
    m, _, _ = line_space(rng, n_rows=128, n_cols=200, dose_per_pixel=100)
    binary = Micrograph((m.pixels > np.median(m.pixels)) * 255.0, 1.0, source="thresholded.png")
    with pytest.raises(LocateError, match=r"thresholded\.png: the image holds only 2 grey level"):
        locate_edges(binary)
