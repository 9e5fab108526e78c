"""The per-image result store: exact round trip, and nothing but the result types is rebuilt."""
import dataclasses
import json

import numpy as np
import pytest

from edges.io import write_micrograph
from edges.render import SEMSettings
from roughness.app.runner import measure
from roughness.app.settings import MeasureSettings
from roughness.app.store import StoreError, load_result, save_result
from roughness.synth import simulate_line_space


def _fields(obj):
    """Nested field values of a dataclass tree (arrays compared by np.testing.assert_equal)."""
    if dataclasses.is_dataclass(obj):
        return {f.name: _fields(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, tuple):
        return tuple(_fields(v) for v in obj)
    return obj


def test_result_round_trip_is_exact(tmp_path):
    px, _ = simulate_line_space(n_rows=200, n_cols=330, settings=SEMSettings(dose_per_pixel=200),
                                rng=np.random.default_rng(4))
    path = write_micrograph(tmp_path / "a.tif", px, pixel_size_nm=1.0)
    result = measure([path], settings=MeasureSettings(n_resamples=50)).images[0]
    assert result.traces is not None and result.traces.precision is not None   # the deepest tree
    back = load_result(save_result(tmp_path / "r.npz", result))
    assert type(back) is type(result)
    np.testing.assert_equal(_fields(back), _fields(result))     # NaN == NaN, arrays elementwise


def test_foreign_types_and_files_are_refused(tmp_path):
    # a structure naming a type outside the allow-list (here one that would run a command)
    bad = {"__dc__": "os:system", "f": {}}
    path = tmp_path / "bad.npz"
    np.savez(path, __structure__=np.array(json.dumps(bad)))
    with pytest.raises(StoreError, match="os.system is not a stored result type"):
        load_result(path)
    # an object array cannot even be read (allow_pickle=False)
    np.savez(tmp_path / "obj.npz", __structure__=np.array("{}"), a0=np.array([object()], dtype=object))
    with pytest.raises(StoreError):
        load_result(tmp_path / "obj.npz")
    (tmp_path / "text.npz").write_text("not a result")
    with pytest.raises(StoreError):
        load_result(tmp_path / "text.npz")
