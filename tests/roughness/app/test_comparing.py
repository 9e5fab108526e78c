"""compare(): groups measured or reused, differences written, errors in words."""
import json

import numpy as np
import pandas as pd
import pytest

from edges.io import write_micrograph
from edges.render import SEMSettings
from roughness.app.cli import main
from roughness.app.comparing import compare
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
from roughness.synth import simulate_line_space

FAST = MeasureSettings(n_resamples=200, model_resamples=0)


def _images(folder, rng, *, n, dose, sigma_nm=1.0, stem="img", n_rows=256, n_cols=320):
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n):
        pixels, _ = simulate_line_space(n_rows=n_rows, n_cols=n_cols, pitch_nm=40, cd_nm=20, sigma_nm=sigma_nm,
                                        correlation_length_nm=8, roughness_exponent=0.6,
                                        settings=SEMSettings(dose_per_pixel=dose, blur_nm=2.0), rng=rng)
        write_micrograph(folder / f"{stem}_{i}.tif", pixels, pixel_size_nm=1.0)
    return folder


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    rng = np.random.default_rng(7)
    root = tmp_path_factory.mktemp("study")
    a = _images(root / "a", rng, n=3, dose=30, stem="a")
    b = _images(root / "b", rng, n=3, dose=300, sigma_nm=1.3, stem="b")
    out = root / "cmp"
    code = main(["compare", "--group", f"A={a}", "--group", f"B={b}/*.tif", "--out", str(out), "--quiet",
                 "--resamples", "200"])
    return root, a, b, out, code


def test_compare_writes_differences_b_minus_a(study):
    root, a, b, out, code = study
    assert code == 0
    cmp = pd.read_csv(out / "compare.csv")
    for col in ("group_a", "group_b", "quantity", "difference_nm", "difference_low_nm", "difference_high_nm",
                "p_value", "p_value_adjusted", "significant"):
        assert col in cmp.columns
    groups = pd.read_csv(out / "groups.csv").set_index("group")
    row = cmp.set_index("quantity").loc["edge_sigma_unbiased_nm"]
    assert (row.group_a, row.group_b) == ("A", "B")
    # the difference is B - A of the groups' own values (each written to 6 significant digits), and
    # lies inside its interval
    assert row.difference_nm == pytest.approx(groups.loc["B", "edge_sigma_unbiased_nm"]
                                              - groups.loc["A", "edge_sigma_unbiased_nm"], abs=2e-5)
    assert row.difference_low_nm < row.difference_nm < row.difference_high_nm
    # B was rendered 30% rougher: found (0.3 nm on ~0.9 nm with 3 images of 7 lines each; the
    # realised sigma of an image scatters by ~5%)
    assert row.significant and row.difference_nm > 0
    assert set(cmp.quantity) == {f"{q}_sigma_{k}_nm" for q in ("edge", "width", "centre")
                                 for k in ("unbiased", "biased")}
    psd = pd.read_csv(out / "psd.csv")
    assert set(psd.group) == {"all", "A", "B"}
    html = (out / "report.html").read_text()
    assert html.index("Comparison of groups") < html.index("All images together")
    assert "B is rougher than A" in html


def test_an_output_folder_is_reused_without_fitting_again(study, monkeypatch, tmp_path):
    root, a, b, out, _ = study
    # measure group A on its own, then compare that folder against B's images
    out_a = tmp_path / "a_out"
    assert main(["measure", str(a), "--out", str(out_a), "--quiet", "--no-report", "--resamples", "200"]) == 0
    import roughness.app.runner as rm

    first = pd.read_csv(out / "groups.csv").set_index("group")
    meas_b = measure(groups={"B": sorted(b.glob("*.tif"))}, settings=replace_resamples())
    monkeypatch.setattr(rm, "detect_edges", lambda *a, **k: (_ for _ in ()).throw(AssertionError("fitted")))
    meas = compare({"A": out_a, "B": [out]}, settings=replace_resamples())
    got = {g.name: g.summary.edge.sigma_unbiased_nm for g in meas.groups}
    assert got["A"] == pytest.approx(first.loc["A", "edge_sigma_unbiased_nm"], rel=1e-6)     # CSV: 6 digits
    # the whole earlier comparison folder as group B holds A's and B's images: noted as shared
    assert any(code == "shared_images" for code, _ in meas.comparison.notes)
    assert meas_b.groups[0].n_images == 3


def replace_resamples():
    return MeasureSettings(n_resamples=200, model_resamples=0)


def test_a_listing_pointing_outside_its_folder_is_refused(study, tmp_path):
    root, a, b, out, _ = study
    bad = tmp_path / "bad"
    bad.mkdir()
    settings = json.loads((out / "settings.json").read_text())
    settings["results"] = [["x", "A", "../../etc/passwd"]]
    (bad / "settings.json").write_text(json.dumps(settings))
    meas = compare({"A": bad, "B": b}, settings=FAST)
    assert meas.comparison is None and "outside the folder" in meas.failures[0][1]


@pytest.mark.parametrize("groups, message", [
    (["A=x", "A=y"], "given twice"),
    (["A=x"], "at least two"),
    (["all=x", "B=y"], "'all'"),
    (["A", "B=y"], "NAME=PATTERN"),
])
def test_compare_usage_errors_exit_2(groups, message, capsys, tmp_path):
    args = ["compare"] + [x for g in groups for x in ("--group", g)] + ["--out", str(tmp_path / "o")]
    assert main(args) == 2
    assert message in capsys.readouterr().err


def test_an_empty_group_is_named(study, capsys, tmp_path):
    root, a, b, out, _ = study
    assert main(["compare", "--group", f"A={a}", "--group", f"B={tmp_path}/nothing_*.tif",
                 "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "group 'B'" in err and "no images found" in err


def test_frames_advice_follows_one_over_frames():
    """The same edges imaged at dose D and at 4 D (four frames averaged: Poisson counts add): the
    noise variance predicted for four frames from the single frame, var_noise / 4, matches the
    one measured at 4 D, and so does the biased variance, unbiased + var_noise / 4.

    At 50 counts per pixel the measured ratio is 4.03.  At 25 it is 4.5: below ~30 counts the
    scatter carries a non-linear excess that more dose removes faster than 1/frames, so the
    advice is conservative there (the biased prediction still held within 0.5%)."""
    images = {}
    for dose in (50.0, 200.0):
        images[dose] = [simulate_line_space(n_rows=512, n_cols=320, pitch_nm=40, cd_nm=20, sigma_nm=1.0,
                                            correlation_length_nm=8, roughness_exponent=0.6,
                                            settings=SEMSettings(dose_per_pixel=dose, blur_nm=2.0),
                                            rng=np.random.default_rng(seed))[0] for seed in range(3)]
    one, four = (measure(images[d], settings=MeasureSettings(pixel_size_nm=1.0, n_resamples=50, model_resamples=0))
                 .overall.summary.edge for d in (50.0, 200.0))
    # noise variance: 1/frames within 10% (the floor's own calibration error is a few per cent
    # at each dose)
    assert one.var_noise_nm2 / four.var_noise_nm2 == pytest.approx(4.0, rel=0.10)
    # the biased variance at four frames, predicted from one frame; the edges are identical, so
    # only the noise realisations differ: ~0.02 nm^2 sd on ~0.9 nm^2 (measured within 1%)
    predicted = one.var_unbiased_nm2 + one.var_noise_nm2 / 4
    assert four.var_biased_nm2 == pytest.approx(predicted, rel=0.04)


def test_groups_at_different_pixel_sizes_are_compared_with_a_note(tmp_path):
    rng = np.random.default_rng(11)
    imgs = {}
    for name, px in (("fine", 0.8), ("coarse", 1.2)):
        imgs[name] = [simulate_line_space(n_rows=256, n_cols=320, pitch_nm=40 * px, cd_nm=20 * px, sigma_nm=px,
                                          correlation_length_nm=8 * px, roughness_exponent=0.6,
                                          settings=SEMSettings(pixel_size_nm=px, dose_per_pixel=200, blur_nm=2 * px),
                                          rng=rng)[0] for _ in range(2)]
    from edges import Micrograph

    groups = {n: [Micrograph(pixels=p, pixel_size_nm=px, source=f"{n}{k}") for k, p in enumerate(v)]
              for (n, v), px in zip(imgs.items(), (0.8, 1.2))}
    meas = compare(groups, settings=FAST, out=tmp_path / "o")
    codes = [c for c, _ in meas.comparison.notes]
    assert "pixel_size_differs" in codes
    g = pd.read_csv(tmp_path / "o" / "groups.csv").set_index("group")
    # the band every group covers: from the coarsest resolution to the lowest Nyquist frequency
    assert g.loc["fine", "band_high_per_nm"] == pytest.approx(0.5 / 1.2, rel=0.02)
    assert g.loc["fine", "band_low_per_nm"] == pytest.approx(1 / (256 * 0.8), rel=0.02)
    assert (g["rows"] == 512).all() and (g["edge_sigma_biased_low_nm"] < g["edge_sigma_biased_nm"]).all()
