"""Every gallery script runs headless and saves its figure."""
import importlib.util
from pathlib import Path

import pytest

SCRIPTS = sorted((Path(__file__).resolve().parents[1] / "gallery").glob("plot_*.py"))


@pytest.mark.slow
@pytest.mark.parametrize("script", SCRIPTS, ids=[s.stem for s in SCRIPTS])
def test_gallery_script_runs(script, tmp_path, capsys):
    spec = importlib.util.spec_from_file_location(script.stem, script)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    out = mod.main(out=tmp_path / f"{script.stem}.png")
    assert Path(out).stat().st_size > 10_000
    assert "unbiased" in capsys.readouterr().out
