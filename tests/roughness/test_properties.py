"""Property-based tests of the whole pipeline (image -> traces -> statistics).

Over random arrays and random virtual SEM images with random settings, the pipeline either
returns results or raises ``ValueError`` (the documented type: ``MicrographError`` and
``LocateError`` are its subclasses) with the image's name in the message; never anything else.
Every value it reports is finite where given, and inside its physical bounds, or the status
says why not.
"""
import math
import warnings

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from edges import Micrograph, SEMSettings, fit_edges, render_micrograph
from roughness.analysis import AnalysisOptions, analyse_image
from roughness.synth import edge_pairs

OPTIONS = AnalysisOptions(n_resamples=50, model_resamples=0)


def _measure(pixels, pixel_nm, name="random.tif"):
    """The pipeline, or the documented error (which must name the image)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)      # NaN rows are accounted for by reason codes
        try:
            return analyse_image(fit_edges(Micrograph(pixels=pixels, pixel_size_nm=pixel_nm, source=name)), OPTIONS)
        except ValueError as exc:
            assert name in str(exc), exc
            return None


def _check_bounds(a, pixel_nm):
    s = a.summary
    for q in (s.edge, s.width, s.centre):
        for v in (q.var_biased_nm2, q.var_noise_nm2):
            assert math.isnan(v) or (math.isfinite(v) and v >= 0)
        assert math.isnan(q.sigma_unbiased_nm) or q.sigma_unbiased_nm >= 0
        nf = q.noise_fraction
        assert math.isnan(nf) or 0 <= nf <= 1 or q.status == "below_noise"
    nf = s.edge.noise_fraction
    if math.isfinite(nf) and nf >= 1:
        assert a.status == "below_noise"
    m = a.psd_model
    length = a.n_rows * a.row_spacing_nm
    if m is not None and math.isfinite(m.correlation_length_nm):
        assert 0.5 * pixel_nm <= m.correlation_length_nm <= length
    if m is not None and math.isfinite(m.roughness_exponent):
        assert 0 < m.roughness_exponent < 2          # an exponent pinned at a bound is "not determined" (NaN)
    assert s.n_lines >= 0 and a.edges.valid_rows.min() >= 0


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(arrays(np.float64, st.tuples(st.integers(8, 48), st.integers(8, 64)),
              elements=st.one_of(st.floats(-1e3, 1e3), st.just(np.nan), st.just(np.inf))),
       st.sampled_from([0.5, 1.0, 3.0]))
def test_random_arrays_give_results_or_the_documented_error(pixels, pixel_nm):
    a = _measure(pixels, pixel_nm)
    if a is not None:
        _check_bounds(a, pixel_nm)


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(pitch_px=st.integers(6, 60), cd_share=st.floats(0.3, 0.7), dose=st.floats(0.5, 500),
       sigma_px=st.floats(0.1, 3.0), xi_px=st.floats(1.0, 40.0), h=st.floats(0.3, 1.0),
       n_rows=st.integers(32, 256), edge_peak=st.floats(0.0, 2.0), seed=st.integers(0, 2 ** 31))
def test_random_virtual_images_give_bounded_results(pitch_px, cd_share, dose, sigma_px, xi_px, h, n_rows, edge_peak,
                                                   seed):
    rng = np.random.default_rng(seed)
    cd = max(2.0, cd_share * pitch_px)
    n_cols = int(max(48, 4 * pitch_px))
    n_lines = int((n_cols - (pitch_px - cd)) // pitch_px)
    if n_lines < 1:
        return
    centres = 0.5 * (n_cols - n_lines * pitch_px) + 0.5 * pitch_px - 0.5 + pitch_px * np.arange(n_lines)
    sig = min(sigma_px, 0.15 * cd)          # keep the edges of a line apart
    dl, dr = edge_pairs(n_lines, n_rows, 1.0, sigma_nm=sig, correlation_length_nm=xi_px, roughness_exponent=h,
                        rng=rng)
    pixels, _ = render_micrograph(centres[:, None] - 0.5 * cd + dl, centres[:, None] + 0.5 * cd + dr, n_cols=n_cols,
                                  settings=SEMSettings(dose_per_pixel=dose, edge_peak=edge_peak), rng=rng)
    a = _measure(pixels, 1.0, name="virtual.tif")
    if a is not None:
        _check_bounds(a, 1.0)
