"""The measure command end to end: numbers against truth, the output contract, the report."""
import json
import math
from dataclasses import replace
import os
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from edges import Micrograph
from edges.io import write_micrograph, write_truth
from edges.render import SEMSettings
from roughness.app.cli import main
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
from roughness.synth import simulate_line_space

CONTRACT = ["image", "n_lines", "n_edges", "cd_nm", "edge_sigma_biased_nm", "edge_sigma_noise_nm",
            "edge_sigma_unbiased_nm", "width_sigma_biased_nm", "width_sigma_noise_nm", "width_sigma_unbiased_nm",
            "edge_correlation_length_nm", "edge_roughness_exponent", "noise_fraction", "status"]


def _write_images(folder, rng, doses, n_rows=1024, n_cols=544, stem="img"):
    folder.mkdir(parents=True, exist_ok=True)
    truths = {}
    for i, dose in enumerate(doses):
        px, truth = simulate_line_space(n_rows=n_rows, n_cols=n_cols, pitch_nm=64, cd_nm=32, sigma_nm=1.2,
                                        correlation_length_nm=8.0, roughness_exponent=0.6,
                                        settings=SEMSettings(dose_per_pixel=dose, blur_nm=3.0), rng=rng)
        path = write_micrograph(folder / f"{stem}_{i}.tif", px, pixel_size_nm=1.0)
        write_truth(path.with_suffix(".truth.json"), truth)
        truths[str(path)] = truth
    return truths


@pytest.mark.slow
def test_end_to_end_against_truth(tmp_path, rng):
    # 8 lines x 1024 rows per image; a high dose (CNR ~ 9) and a low dose (CNR ~ 3.4)
    truths = _write_images(tmp_path / "in", rng, doses=[400, 60])
    out = tmp_path / "out"
    assert main(["measure", str(tmp_path / "in"), "--out", str(out), "--quiet"]) == 0
    df = pd.read_csv(out / "summary.csv")
    assert len(df) == 2 and (df["n_lines"] == 8).all()
    for _, row in df.iterrows():
        t = truths[row["image"]]
        true_edge = math.sqrt(np.mean(t["edge_sigma_nm"] ** 2))
        true_width = math.sqrt(np.mean(t["width_sigma_nm"] ** 2))
        # 16 edges x 1024 rows at xi = 8: relative sd of the sigma estimate ~ sqrt(xi / (2 M L))
        # ~ 2% (Priestley 1981, 5.3); 10% is ~4 sd plus the finite-length bias (~2.2 xi / L)
        assert row["edge_sigma_unbiased_nm"] == pytest.approx(true_edge, rel=0.10)
        assert row["width_sigma_unbiased_nm"] == pytest.approx(true_width, rel=0.10)
    low = df.iloc[1]
    t = truths[low["image"]]
    true_edge = math.sqrt(np.mean(t["edge_sigma_nm"] ** 2))
    # the low dose inflates the raw number by what the noise floor predicts: b^2 = truth^2 + n^2
    assert low["edge_sigma_biased_nm"] > 1.1 * true_edge
    # variances: relative sd ~ 2 x the 2% above plus the noise estimate's ~2% (CNR 3.4
    # calibration, DEVELOPERS known limits): 6% is ~2.5 sd
    assert low["edge_sigma_biased_nm"] ** 2 == pytest.approx(true_edge ** 2 + low["edge_sigma_noise_nm"] ** 2,
                                                            rel=0.06)


def test_contract_failures_and_exit_status(tmp_path, rng):
    _write_images(tmp_path / "in", rng, doses=[300], n_rows=256, n_cols=330)
    (tmp_path / "in" / "broken.tif").write_bytes(b"II*\x00 not really a tiff")
    out = tmp_path / "out"
    rc = main(["measure", str(tmp_path / "in" / "*.tif"), "--out", str(out), "--quiet", "--resamples", "200"])
    assert rc == 3
    df = pd.read_csv(out / "summary.csv")
    assert set(CONTRACT) <= set(df.columns) and len(df) == 1
    assert df["noise_fraction"].between(0, 1).all()
    fail = pd.read_csv(out / "failures.csv")
    assert list(fail["image"]) == [str(tmp_path / "in" / "broken.tif")]
    assert "cannot be read" in fail["reason"][0]
    edges = pd.read_csv(out / "edges.csv")
    assert len(edges) == df["n_edges"][0] and {"sigma_unbiased_nm", "contrast_to_noise"} <= set(edges.columns)
    psd = pd.read_csv(out / "psd.csv")
    assert {"frequency_per_nm", "psd_biased_nm3", "noise_floor_nm3", "psd_unbiased_nm3", "psd_model_nm3"} <= set(psd.columns)
    settings = json.loads((out / "settings.json").read_text())
    assert settings["settings"]["detector"] == "model" and "numpy" in settings["versions"]
    # all good -> 0 (and the stale failures.csv is gone); bad usage -> 2
    assert main(["measure", str(tmp_path / "in" / "img_0.tif"), "--out", str(out), "--quiet", "--no-report",
                 "--resamples", "100"]) == 0
    assert not (out / "failures.csv").exists()
    assert main(["measure", "--out", str(out)]) == 2
    assert main(["measure", str(tmp_path / "in"), "--out", str(out), "--window-px", "10"]) == 2


def test_settings_file_and_workers(tmp_path, rng):
    _write_images(tmp_path / "in", rng, doses=[300, 300], n_rows=200, n_cols=330)
    recipe = tmp_path / "site.toml"
    recipe.write_text('detector = "threshold"\nn_resamples = 100\n')
    out = tmp_path / "out"
    assert main(["measure", str(tmp_path / "in"), "--out", str(out), "--settings", str(recipe), "--quiet",
                 "--workers", "2", "--no-report"]) == 0
    df = pd.read_csv(out / "summary.csv")
    assert (df["detector"] == "threshold").all() and len(df) == 2
    recipe.write_text('detectr = "threshold"\n')
    assert main(["measure", str(tmp_path / "in"), "--out", str(out), "--settings", str(recipe)]) == 2


class _Checker(HTMLParser):
    VOID = {"img", "br", "meta", "hr", "input", "link"}

    def __init__(self):
        super().__init__()
        self.stack, self.errors, self.srcs, self.hrefs = [], [], [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "src" in a:
            self.srcs.append(a["src"])
        if "href" in a:
            self.hrefs.append(a["href"])
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(tag)
        else:
            self.stack.pop()


def test_report_is_self_contained_and_escaped(tmp_path, rng):
    folder = tmp_path / "in"
    folder.mkdir()
    px, _ = simulate_line_space(n_rows=256, n_cols=330, settings=SEMSettings(dose_per_pixel=300), rng=rng)
    hostile = folder / "lot<script>alert(1)<script>&'.tif"
    write_micrograph(hostile, px, pixel_size_nm=1.0)
    meas = measure([hostile], settings=MeasureSettings(n_resamples=100))
    path = meas.write(tmp_path / "out") / "report.html"
    text = path.read_text()
    chk = _Checker()
    chk.feed(text)
    assert not chk.errors and chk.stack == []
    assert chk.srcs and all(s.startswith("data:image/png;base64,") for s in chk.srcs)
    # no link and no address outside the embedded images (base64 may spell "http" by chance)
    outside = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text).lower().replace("http-equiv", "")
    # in-page anchors only (#img0 ...)
    assert all(h.startswith("#") for h in chk.hrefs) and "http" not in outside and "//" not in outside.replace("<!--", "")
    # the one script is the report's own table sorter; the hostile name is escaped
    assert text.count("<script>") == 1 and "alert(" not in text.split("<script>")[1] and "lot&lt;script&gt;alert(1)&lt;script&gt;&amp;&#x27;.tif" in text


@pytest.mark.slow
def test_demo_runs_from_a_clean_directory(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["demo"]) == 0
    out = tmp_path / "quietedge-demo"
    assert (out / "report.html").exists()
    df = pd.read_csv(out / "summary.csv")
    assert len(df) == 6 and set(df["group"]) == {"low-dose", "high-dose"}
    g = pd.read_csv(out / "groups.csv").set_index("group")
    # noise inflates the raw low-dose number; the unbiased numbers of both doses agree within
    # their intervals
    assert g.loc["low-dose", "ler_3sigma_biased_nm"] > 1.1 * g.loc["high-dose", "ler_3sigma_biased_nm"]
    lo_hi = g.loc["low-dose", ["edge_sigma_unbiased_low_nm", "edge_sigma_unbiased_high_nm"]]
    assert lo_hi.iloc[0] <= g.loc["high-dose", "edge_sigma_unbiased_nm"] <= lo_hi.iloc[1]
    # part 2: ER-B is 12% rougher but imaged at 16x the dose: the raw difference points the
    # other way, the unbiased one finds ER-B rougher (seeded; its p-value was 0.004)
    c = pd.read_csv(out / "recipes" / "compare.csv").set_index("quantity")
    assert tuple(c.loc["edge_sigma_unbiased_nm", ["group_a", "group_b"]]) == ("ER-A", "ER-B")
    assert c.loc["edge_sigma_unbiased_nm", "significant"] and c.loc["edge_sigma_unbiased_nm", "difference_nm"] > 0
    assert c.loc["edge_sigma_biased_nm", "difference_nm"] < 0
    assert "the raw numbers point the other way" in (out / "recipes" / "report.html").read_text()
    assert "reports:" in capsys.readouterr().out


def test_results_stream_to_disk_and_resume(tmp_path, rng, monkeypatch):
    _write_images(tmp_path / "in", rng, doses=[300, 300], n_rows=200, n_cols=330)
    out = tmp_path / "out"
    args = ["measure", str(tmp_path / "in"), "--out", str(out), "--quiet", "--no-report", "--resamples", "100"]
    assert main(args) == 0
    stored = sorted((out / "per_image").glob("*.npz"))
    assert len(stored) == 2
    first = pd.read_csv(out / "summary.csv")
    # a resumed run measures nothing again: make measuring impossible and compare
    import roughness.app.runner as rm

    def refuse(*a, **k):
        raise AssertionError("measured again")

    monkeypatch.setattr(rm, "_measure_one", refuse)
    assert main(args + ["--resume"]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(out / "summary.csv"), first)
    # a changed recipe is not taken from the cache (the refusing measurer records failures)
    assert main(args + ["--resume", "--detrend", "mean"]) == 3
    # a file planted in the store is never executed: a pickle that would run code on loading,
    # put where a stored result was, makes that image be measured again (refused here: exit 3)
    import pickle

    class Planted:
        def __reduce__(self):
            return (os.system, ("touch " + str(tmp_path / "executed"),))

    stored[0].write_bytes(pickle.dumps(Planted()))
    assert main(args + ["--resume"]) == 3
    assert not (tmp_path / "executed").exists()


def test_set_and_group_statistics_are_computed_once_and_projected(tmp_path, rng, monkeypatch):
    import roughness.app.runner as runner
    import roughness.analysis as analysis

    _write_images(tmp_path / "a", rng, doses=[300], n_rows=200, n_cols=330, stem="a")
    _write_images(tmp_path / "b", rng, doses=[300, 300], n_rows=200, n_cols=330, stem="b")
    calls = []
    real = runner.analyse_group

    def counting(images, options, *, name=""):
        calls.append(name)
        return real(images, options, name=name)

    monkeypatch.setattr(runner, "analyse_group", counting)
    meas = measure(groups={"A": [tmp_path / "a"], "B": [tmp_path / "b"]},
                   settings=MeasureSettings(n_resamples=100, model_resamples=5))
    assert sorted(calls) == ["", "A", "B"]            # the set once, each group once
    assert [g.name for g in meas.groups] == ["A", "B"] and meas.overall.n_images == 3

    def refuse(*a, **k):
        raise AssertionError("a projection recomputed statistics")

    for mod, fn in ((analysis, "analyse_group"), (analysis, "summarize"), (analysis, "fit_psd_model"),
                    (analysis, "analyse_image"), (runner, "analyse_group"), (runner, "analyse_image")):
        monkeypatch.setattr(mod, fn, refuse)
    out = meas.write(tmp_path / "out")
    g = pd.read_csv(out / "groups.csv").set_index("group")
    assert list(g.index) == ["A", "B"] and g.loc["B", "n_images"] == 2
    # the CSV holds six significant digits: a relative rounding of up to 5e-6
    assert g.loc["A", "edge_sigma_unbiased_nm"] == pytest.approx(meas.groups[0].summary.edge.sigma_unbiased_nm,
                                                                 rel=1e-5)


def test_mixed_pixel_sizes_all_reach_psd_csv_whatever_the_order(tmp_path, rng):
    paths = []
    for k, (px, rows) in enumerate([(1.0, 256), (0.5, 512), (1.0, 200), (0.5, 512)]):
        pixels, _ = simulate_line_space(n_rows=rows, n_cols=int(330 / px), pitch_nm=64, cd_nm=32,
                                        settings=SEMSettings(dose_per_pixel=300, pixel_size_nm=px), rng=rng)
        paths.append(write_micrograph(tmp_path / f"img_{k}.tif", pixels, pixel_size_nm=px))
    settings = MeasureSettings(n_resamples=100, model_resamples=0)
    forward = measure(paths, settings=settings)
    backward = measure(paths[::-1], settings=settings)
    assert forward.overall.edge_psd.n_images == 4 and forward.overall.n_grids == 3
    np.testing.assert_array_equal(forward.overall.edge_psd.psd_biased_nm3, backward.overall.edge_psd.psd_biased_nm3)
    assert forward.overall.psd_model.correlation_length_nm == backward.overall.psd_model.correlation_length_nm
    psd = pd.read_csv(forward.write(tmp_path / "out", report=False) / "psd.csv")
    assert (psd.loc[psd["quantity"] == "edge", "n_images"] == 4).all()


def test_literal_names_duplicates_and_absurd_settings(tmp_path, rng):
    from roughness.app.runner import expand_inputs
    from roughness.app.settings import SettingsError
    px, _ = simulate_line_space(n_rows=64, n_cols=200, settings=SEMSettings(dose_per_pixel=300), rng=rng)
    odd = write_micrograph(tmp_path / "img[1].tif", px, pixel_size_nm=1.0)
    write_micrograph(tmp_path / "img1.tif", px, pixel_size_nm=1.0)
    # a file named like a pattern is itself, not the pattern's match ("img1.tif")
    assert expand_inputs([str(odd)]) == [odd]
    # the same file through a folder, a pattern and its own name is listed once
    listed = expand_inputs([tmp_path, str(tmp_path / "img1*.tif"), tmp_path / "img1.tif"])
    assert sorted(p.name for p in listed) == ["img1.tif", "img[1].tif"]
    with pytest.raises(SettingsError, match="pixel_size_nm=1000000000.0: outside 0.01-1000 nm"):
        MeasureSettings(pixel_size_nm=1e9)


def test_pixel_size_and_its_source_are_reported_and_an_override_warned(tmp_path, rng):
    px, _ = simulate_line_space(n_rows=128, n_cols=260, settings=SEMSettings(dose_per_pixel=300), rng=rng)
    path = write_micrograph(tmp_path / "half_nm.tif", px, pixel_size_nm=0.5)
    own = measure([path], settings=MeasureSettings(n_resamples=50)).images[0]
    assert own.pixel_size_nm == pytest.approx(0.5, rel=1e-6) and own.pixel_size_source == "file"
    assert "pixel_size_override" not in own.analysis.warning_codes
    forced = measure([path], settings=MeasureSettings(n_resamples=50, pixel_size_nm=1.0)).images[0]
    assert forced.pixel_size_source == "given, overriding the file's 0.5 nm"
    assert "pixel_size_override" in forced.analysis.warning_codes
    # every length doubles with the pixel size: the CD is the file's twice
    assert forced.analysis.summary.cd_nm == pytest.approx(2 * own.analysis.summary.cd_nm, rel=1e-9)


def test_two_workers_give_the_tables_of_one_and_a_dead_worker_is_one_failure(tmp_path, rng):
    from tests._killer import WorkerKiller

    pixels = [simulate_line_space(n_rows=200, n_cols=330, pitch_nm=64, cd_nm=32, sigma_nm=1.2,
                                  correlation_length_nm=8.0, roughness_exponent=0.6,
                                  settings=SEMSettings(dose_per_pixel=300, blur_nm=3.0), rng=rng)[0] for _ in range(3)]
    images = [Micrograph(pixels=p, pixel_size_nm=1.0, source=f"img{k}") for k, p in enumerate(pixels)]
    settings = MeasureSettings(n_resamples=100, model_resamples=0)
    one = measure(images, settings=settings)
    killer = WorkerKiller(pixels=pixels[0], pixel_size_nm=1.0, source="killer")
    two = measure(images[:2] + [killer] + images[2:], settings=settings, workers=2)
    # the image whose worker died is that image's failure, with the reason; the rest are measured
    assert [name for name, _ in two.failures] == ["killer"] and "worker process" in two.failures[0][1]
    assert [r.name for r in two.images] == ["img0", "img1", "img2"]
    # the same tables, up to the last bits: the workers run single-threaded BLAS, whose sums
    # come in another order (3e-17 relative in the variances); the PSD model's optimizer, which
    # stops at a tolerance, carries that to ~1e-6 in the correlation length
    from roughness.app.tables import groups_table, summary_table

    two_ok = replace(two, failures=())
    pd.testing.assert_frame_equal(summary_table(one), summary_table(two_ok), rtol=1e-5)
    pd.testing.assert_frame_equal(groups_table(one), groups_table(two_ok), rtol=1e-5)


def test_a_replaced_image_is_measured_again_on_resume(tmp_path, rng):
    _write_images(tmp_path / "in", rng, doses=[300], n_rows=200, n_cols=330)
    out = tmp_path / "out"
    args = ["measure", str(tmp_path / "in"), "--out", str(out), "--quiet", "--no-report", "--resamples", "100"]
    assert main(args) == 0
    first = pd.read_csv(out / "summary.csv")
    # the same name, other content (rougher edges): the store's key is the content, not the name
    px, _ = simulate_line_space(n_rows=200, n_cols=330, pitch_nm=64, cd_nm=32, sigma_nm=2.4,
                                correlation_length_nm=8.0, roughness_exponent=0.6,
                                settings=SEMSettings(dose_per_pixel=300, blur_nm=3.0), rng=rng)
    write_micrograph(tmp_path / "in" / "img_0.tif", px, pixel_size_nm=1.0)
    assert main(args + ["--resume"]) == 0
    again = pd.read_csv(out / "summary.csv")
    assert again["edge_sigma_biased_nm"].iloc[0] > 1.5 * first["edge_sigma_biased_nm"].iloc[0]


def test_outputs_are_written_as_a_set(tmp_path, rng, monkeypatch):
    _write_images(tmp_path / "in", rng, doses=[300, 300], n_rows=200, n_cols=330)
    out = tmp_path / "out"
    base = ["measure", "--out", str(out), "--quiet", "--resamples", "100"]
    assert main(base + [str(tmp_path / "in")]) == 0
    first = pd.read_csv(out / "summary.csv")
    report = (out / "report.html").read_text()
    # a second run of one image dies while writing its report: the folder keeps the first run's
    # complete set (summary, report and settings.json agree), no mixture
    import roughness.app.tables as tables

    def crash(*a, **k):
        raise KeyboardInterrupt("killed while writing the report")

    monkeypatch.setattr(tables, "write_report", crash)
    with pytest.raises(KeyboardInterrupt):
        main(base + [str(tmp_path / "in" / "img_0.tif")])
    pd.testing.assert_frame_equal(pd.read_csv(out / "summary.csv"), first)
    assert (out / "report.html").read_text() == report
    assert len(json.loads((out / "settings.json").read_text())["images"]) == 2
    assert not [p for p in out.iterdir() if p.name.startswith(".writing")]
    # a complete second run without a report removes the first run's report (it would mislead)
    monkeypatch.undo()
    assert main(base + ["--no-report", str(tmp_path / "in" / "img_0.tif")]) == 0
    assert len(pd.read_csv(out / "summary.csv")) == 1 and not (out / "report.html").exists()


def test_a_local_dask_cluster_gives_the_tables_of_one_process(tmp_path, rng):
    pytest.importorskip("dask.distributed", reason="the optional extra quietedge[dask] is not installed")
    truths = _write_images(tmp_path / "in", rng, doses=[300, 300, 300], n_rows=200, n_cols=330)
    settings = MeasureSettings(n_resamples=100, model_resamples=0)
    one = measure(sorted(truths), settings=settings)
    cluster = measure(sorted(truths), settings=settings, dask="local", workers=2)
    from roughness.app.tables import groups_table, summary_table

    # the same tables up to the last bits (single-threaded BLAS in the workers, see above)
    pd.testing.assert_frame_equal(summary_table(one), summary_table(cluster), rtol=1e-5)
    pd.testing.assert_frame_equal(groups_table(one), groups_table(cluster), rtol=1e-5)


def test_a_dask_cluster_without_workers_fails_the_images_instead_of_waiting(tmp_path, rng, monkeypatch):
    distributed = pytest.importorskip("dask.distributed", reason="the optional extra quietedge[dask] is not installed")
    import roughness.app.runner as runner

    monkeypatch.setattr(runner, "DASK_WORKERLESS_S", 1.0)
    truths = _write_images(tmp_path / "in", rng, doses=[300, 300], n_rows=64, n_cols=160)
    with distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address=None) as empty:
        meas = measure(sorted(truths), settings=MeasureSettings(n_resamples=100, model_resamples=0),
                       dask=empty.scheduler_address)
    assert not meas.images and len(meas.failures) == 2
    assert all("no worker for 1 s" in why for _, why in meas.failures)


@pytest.mark.slow
def test_a_batch_killed_midway_and_resumed_equals_an_uninterrupted_run(tmp_path, rng):
    import signal
    import subprocess
    import sys
    import time

    _write_images(tmp_path / "in", rng, doses=[300] * 6, n_rows=512, n_cols=512)
    args = ["measure", str(tmp_path / "in"), "--quiet", "--no-report", "--resamples", "100"]
    assert main(args + ["--out", str(tmp_path / "whole")]) == 0
    out = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-c", "import sys; from roughness.app.cli import main; "
                             f"sys.exit(main({args + ['--out', str(out)]!r}))"])
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and len(list((out / "per_image").glob("*.npz"))) < 2:
        time.sleep(0.02)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    done_before = len(list((out / "per_image").glob("*.npz")))
    assert 2 <= done_before < 6 and not (out / "summary.csv").exists()
    # records are written then renamed, so only complete ones count: the resume measures the rest
    assert main(args + ["--out", str(out), "--resume"]) == 0
    whole, resumed = pd.read_csv(tmp_path / "whole" / "summary.csv"), pd.read_csv(out / "summary.csv")
    assert len(resumed) == 6 and resumed["image"].is_unique
    pd.testing.assert_frame_equal(resumed, whole)


def test_crop_measures_the_region_of_interest_only(tmp_path, rng):
    px, _ = simulate_line_space(n_rows=256, n_cols=384, pitch_nm=64, cd_nm=32, sigma_nm=1.2, correlation_length_nm=8.0,
                                roughness_exponent=0.6, settings=SEMSettings(dose_per_pixel=300, blur_nm=3.0), rng=rng)
    dirty = px.copy()
    dirty[:, :20] = px.max() * 3          # a bright label strip at the left that is not a line
    path = write_micrograph(tmp_path / "label.tif", dirty, pixel_size_nm=1.0)
    settings = MeasureSettings(n_resamples=100, model_resamples=0)
    cropped = measure([path], settings=replace(settings, crop_px=(8, 8, 20, 0)))
    by_hand = measure([Micrograph(pixels=np.rint(px[8:-8, 20:]), pixel_size_nm=1.0)], settings=settings)
    assert cropped.images[0].analysis.summary == by_hand.images[0].analysis.summary
    assert cropped.images[0].analysis.n_rows == 240
    too_much = measure([path], settings=replace(settings, crop_px=(120, 130, 0, 0)))
    assert "leaves less than 16 x 16 pixels" in too_much.failures[0][1]
