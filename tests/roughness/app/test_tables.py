"""The output tables are projections with fixed columns, whatever the options."""
import numpy as np
import pandas as pd
import pytest

from edges.io import write_micrograph
from edges.render import SEMSettings
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
from roughness.app.tables import EDGE_COLUMNS, GROUP_COLUMNS, PSD_COLUMNS, SUMMARY_COLUMNS, edges_table, \
    groups_table, psd_table, summary_table
from roughness.synth import simulate_line_space


@pytest.fixture(scope="module")
def image(tmp_path_factory):
    folder = tmp_path_factory.mktemp("img")
    px, _ = simulate_line_space(n_rows=200, n_cols=330, settings=SEMSettings(dose_per_pixel=300),
                                rng=np.random.default_rng(5))
    return write_micrograph(folder / "one.tif", px, pixel_size_nm=1.0)


@pytest.mark.parametrize("detector", ["model", "threshold"])
def test_columns_do_not_change_with_options(image, detector):
    meas = measure([image], settings=MeasureSettings(detector=detector, n_resamples=50, model_resamples=0))
    assert list(summary_table(meas).columns) == SUMMARY_COLUMNS
    assert list(groups_table(meas).columns) == GROUP_COLUMNS
    assert list(edges_table(meas).columns) == EDGE_COLUMNS
    assert list(psd_table(meas).columns) == PSD_COLUMNS
    row = summary_table(meas).iloc[0]
    assert row["detector"] == detector and row["profile_model"] == ("template" if detector == "model" else "")
    a = meas.images[0].analysis
    # the table holds the typed result's values, 3 sigma derived from sigma
    assert row["edge_sigma_unbiased_nm"] == a.summary.edge.sigma_unbiased_nm
    assert row["ler_3sigma_unbiased_nm"] == pytest.approx(3 * a.summary.edge.sigma_unbiased_nm)
    assert row["noise_fraction"] == pytest.approx(a.summary.edge.var_noise_nm2 / a.summary.edge.var_biased_nm2)
    assert groups_table(meas)["group"].tolist() == ["all"]


def test_an_empty_measurement_still_has_its_columns(tmp_path):
    (tmp_path / "bad.tif").write_bytes(b"not a tiff")
    meas = measure([tmp_path / "bad.tif"], settings=MeasureSettings(pixel_size_nm=1.0))
    assert meas.overall is None and len(meas.failures) == 1
    for table, cols in ((summary_table, SUMMARY_COLUMNS), (edges_table, EDGE_COLUMNS), (psd_table, PSD_COLUMNS),
                        (groups_table, GROUP_COLUMNS)):
        df = table(meas)
        assert isinstance(df, pd.DataFrame) and list(df.columns) == cols and len(df) == 0
