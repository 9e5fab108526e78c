"""The command line, called as main([...]) with temporary folders."""
from dataclasses import fields

import pytest

from edges.io import read_micrograph, read_truth
from edges.render import SEMSettings
from roughness.app.cli import main


def test_simulate_writes_images_and_truth(tmp_path):
    rc = main(["simulate", "--out", str(tmp_path), "--images", "2", "--rows", "64", "--cols", "200",
               "--dose", "40", "--pixel-size-nm", "0.9", "--seed", "3"])
    assert rc == 0
    m = read_micrograph(tmp_path / "sim_001.tif")
    assert m.pixels.shape == (64, 200) and m.pixel_size_nm == pytest.approx(0.9, rel=1e-6)
    truth = read_truth(tmp_path / "sim_001.truth.json")
    assert truth["edge_nm"].shape[1] == 64
    assert truth["settings"]["dose_per_pixel"] == 40


def test_simulate_help_documents_every_setting(capsys):
    assert main(["simulate", "--help"]) == 0
    text = capsys.readouterr().out
    for opt in ("--pixel-size-nm", "--blur-nm", "--dose", "--gain", "--read-noise", "--scan-correlation",
                "--gradient", "--row-jitter", "--tilt-deg", "--polarity", "--horizontal", "--edge-peak",
                "--no-shot-noise", "--sigma-nm", "--correlation-length-nm", "--roughness-exponent"):
        assert opt in text
    assert "nm" in text and "degrees" in text
    # no SEMSettings field is left without an option (dest names of the simulate parser)
    from roughness.app.cli import build_parser

    sim = next(a for a in build_parser()._subparsers._group_actions[0].choices.values() if a.prog.endswith("simulate"))
    dests = {a.dest for a in sim._actions} | {"shot_noise"}      # shot_noise is --no-shot-noise
    assert {f.name for f in fields(SEMSettings)} <= dests


def test_bad_usage_exits_2(tmp_path, capsys):
    assert main(["simulate"]) == 2
    assert main(["simulate", "--out", str(tmp_path), "--cd-nm", "80"]) == 2
    assert "cd_nm=80" in capsys.readouterr().err


def test_no_images_found_is_a_usage_error_with_the_reason(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["measure", str(tmp_path / "empty"), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "no images found in" in err and "empty" in err and ".tif" in err
    assert main(["measure", str(tmp_path / "nothing_*.tif"), "--out", str(tmp_path / "out"), "--quiet"]) == 2


def test_numerical_warnings_and_tracebacks_only_with_debug(tmp_path, capsys, monkeypatch):
    import warnings

    import roughness.app.cli as cli

    def noisy(args, groups=None):
        warnings.warn("invalid value encountered", RuntimeWarning)
        raise ValueError("img.tif: something a user should read")

    monkeypatch.setattr(cli, "_run_measure", noisy)
    args = ["measure", "x.tif", "--out", str(tmp_path / "o")]
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        assert main(args) == 2
    assert not [w for w in seen if issubclass(w.category, RuntimeWarning)]
    assert "img.tif: something a user should read" in capsys.readouterr().err
    with warnings.catch_warnings(record=True) as seen, pytest.raises(ValueError, match="something a user"):
        warnings.simplefilter("always")
        main(["--debug"] + args)
    assert [w for w in seen if issubclass(w.category, RuntimeWarning)]      # shown with --debug


def test_version_and_every_column_in_the_data_dictionary(capsys):
    from roughness.app import tables
    from roughness.app.columns import TABLE_FILES, describe

    assert main(["--version"]) == 0
    assert capsys.readouterr().out.startswith("quietedge ")
    assert main(["columns"]) == 0
    text = capsys.readouterr().out
    for name, attr in TABLE_FILES.items():
        for col in getattr(tables, attr):
            unit, meaning = describe(col)            # KeyError: a column without an entry
            assert meaning and f"  {col} " in text
            # the unit in the name is the unit in the dictionary; no unit in the name, none there
            expected = next((u for suffix, u in (("_per_nm", "1/nm"), ("_nm3", "nm^3"), ("_nm2", "nm^2"),
                                                 ("_nm", "nm")) if col.endswith(suffix)), "")
            assert unit == expected, col
