"""First contact: every entry of the catalogue of bad inputs, through the command line.

Each gives a documented exit status (0 measured, 3 the image failed, 2 bad usage) and a
message that names the file and the reason in words, never a traceback.  The README's
"When things go wrong" table lists the same entries.
"""
import re

import numpy as np
import pytest
from scipy import ndimage

from roughness.app.cli import main
from tests._images import line_space


def _u8(a):
    return np.clip((a - a.min()) / np.ptp(a) * 200 + 20, 0, 255).astype(np.uint8)


def _grating(rng, n_rows=128, n_cols=160, pitch_nm=32, cd_nm=16, sigma_nm=1.0, **kw):
    return line_space(rng, n_rows=n_rows, n_cols=n_cols, pitch_nm=pitch_nm, cd_nm=cd_nm, sigma_nm=sigma_nm,
                      **kw)[0].pixels


def _write(folder, name, rng):
    """Write catalogue entry ``name`` into ``folder``; returns the file name."""
    import imageio.v3 as iio
    import tifffile

    g = _grating(rng)
    if name == "zero-byte":
        (folder / "zero.tif").write_bytes(b"")
        return "zero.tif"
    if name == "truncated":
        tifffile.imwrite(folder / "full.tif", _u8(g))
        data = (folder / "full.tif").read_bytes()
        (folder / "truncated.tif").write_bytes(data[:len(data) // 3])
        return "truncated.tif"
    if name == "text-as-tiff":
        (folder / "notes.tif").write_text("this is a note, not an image\n" * 20)
        return "notes.tif"
    if name in ("rgb", "rgba"):
        rgb = np.stack([_u8(g)] * 3, axis=-1)
        if name == "rgba":
            rgb = np.concatenate([rgb, np.full(rgb.shape[:2] + (1,), 255, np.uint8)], axis=-1)
        iio.imwrite(folder / f"{name}.png", rgb)
        return f"{name}.png"
    if name == "16-bit-png":
        iio.imwrite(folder / "deep.png", _u8(g).astype(np.uint16) * 250)
        return "deep.png"
    arrays = {
        "1-d": lambda: _u8(g)[0],
        "frame-stack": lambda: np.stack([_u8(g)] * 4),
        "nan-and-inf": lambda: np.where(np.arange(128)[:, None] // 6 == 7, np.nan, g).astype(np.float32),
        "constant": lambda: np.full((128, 160), 77, np.uint8),
        "saturated": lambda: np.full((128, 160), 255, np.uint8),
        "clipped-tops": lambda: np.clip(_u8(g).astype(float) * 1.6, 0, 255).astype(np.uint8),
        "binarised": lambda: np.where(g > np.median(g), 255, 0).astype(np.uint8),
        "information-bar": lambda: np.vstack([_u8(_grating(rng, n_rows=216)), np.full((40, 160), 10, np.uint8)]),
        "no-lines": lambda: rng.poisson(50, (128, 160)).astype(np.uint16),
        "one-line": lambda: _u8(_grating(rng, n_cols=80, pitch_nm=48, cd_nm=20)),
        "too-dense": lambda: _u8(_grating(rng, pitch_nm=4, cd_nm=2, sigma_nm=0.2, blur_nm=0.6, edge_peak=0)),
        "45-degrees": lambda: _u8(ndimage.rotate(_grating(rng, n_rows=320, n_cols=320), 45, reshape=False,
                                                 order=1)[80:240, 80:240]),
        "very-small": lambda: _u8(g)[:10, :10],
        "very-thin": lambda: _u8(g)[:6, :],
    }
    fn = f"{name}.tif"
    data = arrays[name]()
    tifffile.imwrite(folder / fn, data, **({"photometric": "minisblack"} if data.ndim == 3 else {}))
    return fn


# entry, exit status, what the message must say (None: measured, and the words are checked in stdout)
CATALOGUE = [
    ("zero-byte", 3, r"file is empty"),
    ("truncated", 3, r"cannot be read as an image"),
    ("text-as-tiff", 3, r"cannot be read as an image .*not a TIFF"),
    ("rgb", 0, r"note: .*rgb\.png: image stored as RGB with equal channels"),
    ("rgba", 0, r"note: .*rgba\.png: image stored as RGB"),
    ("16-bit-png", 0, None),
    ("1-d", 3, r"expected a 2-D grey-level image"),
    ("frame-stack", 3, r"a stack of 4 frames; quietedge measures one frame per file"),
    ("nan-and-inf", 0, None),
    ("constant", 3, r"holds only 1 grey level"),
    ("saturated", 3, r"holds only 1 grey level"),
    ("clipped-tops", 3, r"the detector clipped the image"),
    ("binarised", 3, r"holds only 2 grey level.*binarised"),
    ("information-bar", 0, None),
    ("no-lines", 3, r"no lines found"),
    ("one-line", 0, None),
    ("too-dense", 3, r"too dense to resolve"),
    ("45-degrees", 3, r"lines at about 4[3-7] degrees to its columns.*rotate"),
    ("very-small", 3, r"10 x 10 pixels is too small"),
    ("very-thin", 3, r"6 x 160 pixels is too small"),
]


@pytest.mark.parametrize("entry, status, says", CATALOGUE, ids=[c[0] for c in CATALOGUE])
def test_catalogue_entry(tmp_path, rng, capsys, entry, status, says):
    (tmp_path / "in").mkdir()
    fn = _write(tmp_path / "in", entry, rng)
    code = main(["measure", str(tmp_path / "in" / fn), "--out", str(tmp_path / "out"), "--pixel-size", "1",
                 "--no-report"])
    out, err = capsys.readouterr()
    assert code == status, err
    assert "Traceback" not in err + out
    if says is not None:
        assert re.search(fn.replace(".", r"\.") + ".*" + says if status else says, err), err
    if status == 0:
        assert "all images: LER 3sigma unbiased" in out
    if entry == "information-bar":
        assert "information_bar" in out
    if entry == "nan-and-inf":          # the NaN rows are left out and the statistics use the rest
        assert "rows_cut" in out or "failed_rows" in out


@pytest.mark.parametrize("value", ["0", "-1", "nan", "1e9"])
def test_absurd_pixel_sizes_are_usage_errors(tmp_path, rng, capsys, value):
    (tmp_path / "in").mkdir()
    fn = _write(tmp_path / "in", "16-bit-png", rng)
    code = main(["measure", str(tmp_path / "in" / fn), "--out", str(tmp_path / "out"), f"--pixel-size={value}"])
    err = capsys.readouterr().err
    assert code == 2 and "pixel" in err.lower() and "Traceback" not in err


def test_a_frame_stack_is_averaged_when_asked(tmp_path, rng, capsys):
    import tifffile

    counts = _u8(_grating(rng)).astype(float) / 2            # 10-110 counts per pixel
    frames = np.stack([rng.poisson(counts) for _ in range(4)]).astype(np.uint16)   # four shots of one field
    (tmp_path / "in").mkdir()
    tifffile.imwrite(tmp_path / "in" / "stack.tif", frames, photometric="minisblack")
    code = main(["measure", str(tmp_path / "in" / "stack.tif"), "--out", str(tmp_path / "out"), "--pixel-size", "1",
                 "--no-report", "--frame-stack", "average"])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert re.search(r"note: .*stack\.tif: 4 frames averaged", err), err
    assert "all images: LER 3sigma unbiased" in out


def test_the_whole_catalogue_in_one_batch_with_a_good_image(tmp_path, rng, capsys):
    import pandas as pd
    import tifffile

    folder = tmp_path / "in"
    folder.mkdir()
    status = {_write(folder, entry, rng): (code, says) for entry, code, says in CATALOGUE}
    tifffile.imwrite(folder / "good.tif", _u8(_grating(rng)))
    status["good.tif"] = (0, None)
    status["full.tif"] = (0, None)          # written beside the truncated copy: a good image too
    code = main(["measure", str(folder), "--out", str(tmp_path / "out"), "--pixel-size", "1", "--no-report"])
    capsys.readouterr()
    assert code == 3                        # some images failed, the rest were measured
    failures = pd.read_csv(tmp_path / "out" / "failures.csv")
    failed = dict(zip(failures["image"].map(lambda s: s.split("/")[-1]), failures["reason"]))
    assert set(failed) == {fn for fn, (c, _) in status.items() if c == 3}
    for fn, reason in failed.items():
        assert re.search(status[fn][1], reason), (fn, reason)
    measured = set(pd.read_csv(tmp_path / "out" / "summary.csv")["image"].map(lambda s: s.split("/")[-1]))
    assert measured == {fn for fn, (c, _) in status.items() if c == 0}
