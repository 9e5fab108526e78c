"""One validated recipe: every setting checked against its vocabulary, TOML recipes, exit codes."""
import dataclasses

import pytest

from roughness.app.cli import build_parser, main
from roughness.app.settings import EXIT_USAGE, MeasureSettings, SettingsError

BAD = {"pixel_size_nm": [0, -1.0, float("nan"), "1"], "detector": ["fit"], "profile_model": ["gauss"],
       "window_px": [10, 7, "31", 31.0], "polarity": ["grey"], "orientation": ["diagonal"],
       "threshold_level": [0, 1.2], "detrend": ["cubic"], "psd_window": ["hamming"], "max_gap_rows": [-1],
       "max_invalid_fraction": [1.5], "n_resamples": [-1, 10.5], "confidence": [0, 1], "model_resamples": [-2],
       "seed": [-1], "calibrated_cnr": [-1], "noise_share_target": [0], "precision_target": [2],
       "report_image_sections": [-1], "frames": [0, 2.5], "crop_px": [(1, 2, 3), (-1, 0, 0, 0), "abcd", (1.5, 0, 0, 0)],
       "frame_stack": ["sum", None, 2]}


def test_every_setting_has_a_bad_value_that_is_refused():
    assert set(BAD) == set(MeasureSettings.field_names())
    for name, values in BAD.items():
        for value in values:
            with pytest.raises(SettingsError, match=f"^{name}="):
                MeasureSettings(**{name: value})


def test_argparse_choices_come_from_the_same_vocabularies():
    from edges.locate import ORIENTATIONS, POLARITIES
    from edges.io import FRAME_STACKS
    from edges.profiles import PROFILE_MODELS
    from roughness.app.settings import DETECTORS
    from roughness.psd import DETRENDS, WINDOWS

    measure = build_parser()._subparsers._group_actions[0].choices["measure"]
    choices = {a.dest: tuple(a.choices) for a in measure._actions if a.choices}
    assert choices == {"detector": DETECTORS, "profile_model": PROFILE_MODELS, "detrend": tuple(DETRENDS),
                       "psd_window": WINDOWS, "polarity": POLARITIES, "orientation": ORIENTATIONS,
                       "frame_stack": FRAME_STACKS}


@pytest.mark.parametrize("text,needle", [('window_px = "31"', "window_px='31'"), ('detrend = "cubic"', "detrend="),
                                         ("n_resamples = -1", "n_resamples=-1"), ("detectr = 1", "unknown settings"),
                                         ("window_px = ", "cannot read")])
def test_a_bad_recipe_is_a_one_line_usage_error(tmp_path, capsys, text, needle):
    recipe = tmp_path / "site.toml"
    recipe.write_text(text + "\n")
    with pytest.raises(SettingsError, match=needle):
        MeasureSettings.from_toml(recipe)
    rc = main(["measure", str(tmp_path), "--out", str(tmp_path / "out"), "--settings", str(recipe), "--quiet"])
    err = capsys.readouterr().err
    assert rc == EXIT_USAGE and needle.split("=")[0] in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1 and str(recipe) in err


def test_command_line_options_override_the_recipe(tmp_path):
    recipe = tmp_path / "site.toml"
    recipe.write_text('detector = "threshold"\nwindow_px = 25\n')
    s = MeasureSettings.from_toml(recipe, window_px=21)
    assert (s.detector, s.window_px) == ("threshold", 21)
    assert s.analysis.detrend == "linear" and dataclasses.is_dataclass(s.analysis)
