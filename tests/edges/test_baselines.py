"""Bad pixels, saturation and the layering rule."""
from dataclasses import replace

import numpy as np

from edges._types import REASON_CODES
from edges.baselines import slope_edges, threshold_edges
from edges.fit import fit_edges

from .._images import line_space


def test_nan_and_saturated_rows_are_flagged_not_dropped(rng):
    m, truth, _ = line_space(rng, n_rows=300, n_cols=200, dose_per_pixel=400)
    px = m.pixels.copy()
    e0 = truth["edge_nm"][0]
    px[10, int(round(e0[10]))] = np.nan                       # one bad pixel on edge 0, row 10
    px[20:23, :] = 5000.0                                       # three saturated rows
    et = fit_edges(replace(m, pixels=px, saturation_level=5000.0))
    assert et.position_nm.shape == truth["edge_nm"].shape       # every row kept, none dropped
    assert et.reason[0, 10] == REASON_CODES["non_finite"] and not et.valid[0, 10]
    assert np.all(et.reason[:, 20:23] == REASON_CODES["saturated"])
    counts = et.reason_counts()
    assert counts["saturated"] == 3 * et.n_edges and counts["non_finite"] >= 1
    assert np.isnan(et.position_nm[~et.valid]).all()


def test_baselines_share_the_output_type(rng):
    m, truth, _ = line_space(rng, n_rows=200, n_cols=200, dose_per_pixel=2000, edge_peak=0)
    for det in (threshold_edges, slope_edges):
        et = det(m)
        assert et.position_nm.shape == truth["edge_nm"].shape and et.detector in ("threshold", "slope")
        err = et.position_nm - truth["edge_nm"]
        # dose 2000 (CNR ~ 60): linearised position sd ~ 0.05-0.1 px plus the detectors' known
        # sub-pixel interpolation bias (up to ~0.3 px peak to peak for a 3 nm blur, common
        # practice); 0.5 px bounds both
        assert np.nanstd(err) < 0.5 and np.all(np.isfinite(et.sigma_nm[et.valid]))


def test_threshold_agrees_with_scikit_image_contours(rng):
    # Reference library: skimage.measure.find_contours traces the 50% iso-line with the same
    # linear interpolation between pixel centres; on a noiseless image with flat plateaus the
    # local 50% level equals the global one, so the crossings must coincide.
    from skimage import measure

    m, truth, s = line_space(rng, n_rows=120, n_cols=200, shot_noise=False, edge_peak=0, black_level=0)
    level = 0.5 * (s.space_level + s.line_level) * s.dose_per_pixel
    et = threshold_edges(m)
    for contour in measure.find_contours(m.pixels, level):
        rows, cols = contour[:, 0], contour[:, 1]
        on_row = np.abs(rows - np.rint(rows)) < 1e-9
        r, c = np.rint(rows[on_row]).astype(int), cols[on_row]
        e = np.argmin(np.abs(truth["edge_nm"][:, 0][:, None] - c[None, :].mean()), axis=0)
        np.testing.assert_allclose(c, et.position_nm[e, r], atol=1e-3)
