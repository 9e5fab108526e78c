"""Reading and writing micrographs: round trips and clear errors naming the file."""
import numpy as np
import pytest

from edges.io import MicrographError, read_micrograph, read_truth, write_micrograph, write_truth


def test_tiff_round_trip_keeps_data_and_pixel_size(tmp_path, rng):
    data = rng.integers(0, 65535, (37, 53)).astype(float)   # non-square: catches transposes
    path = write_micrograph(tmp_path / "a.tif", data, pixel_size_nm=0.8, bit_depth=16)
    m = read_micrograph(path)
    np.testing.assert_array_equal(m.pixels, data)
    assert m.pixel_size_nm == pytest.approx(0.8, rel=1e-6)
    assert m.saturation_level == 65535
    # the caller's pixel size wins over the tags
    assert read_micrograph(path, pixel_size_nm=1.25).pixel_size_nm == 1.25


def test_float_tiff_and_8bit_png(tmp_path, rng):
    data = rng.normal(100, 5, (20, 30))
    m = read_micrograph(write_micrograph(tmp_path / "f.tif", data, pixel_size_nm=2.0, bit_depth=32))
    np.testing.assert_allclose(m.pixels, data.astype(np.float32))
    assert m.saturation_level is None
    png = write_micrograph(tmp_path / "b.png", data, pixel_size_nm=2.0, bit_depth=8)
    with pytest.raises(MicrographError, match=r"b\.png: no pixel size"):
        read_micrograph(png)
    m8 = read_micrograph(png, pixel_size_nm=2.0)
    np.testing.assert_array_equal(m8.pixels, np.clip(np.rint(data), 0, 255))


def test_rgb_is_converted_with_a_warning(tmp_path):
    import imageio.v3 as iio

    rgb = np.zeros((10, 12, 3), np.uint8)
    rgb[..., 0] = 200
    iio.imwrite(tmp_path / "c.png", rgb)
    with pytest.warns(UserWarning, match="colour image converted"):
        m = read_micrograph(tmp_path / "c.png", pixel_size_nm=1.0)
    assert m.pixels.shape == (10, 12)
    assert m.pixels[0, 0] == pytest.approx(0.299 * 200)


def test_bad_files_name_file_and_reason(tmp_path):
    import tifffile

    (tmp_path / "empty.tif").write_bytes(b"")
    with pytest.raises(MicrographError, match=r"empty\.tif: file is empty"):
        read_micrograph(tmp_path / "empty.tif", pixel_size_nm=1)
    (tmp_path / "junk.tif").write_bytes(b"not a tiff at all" * 10)
    with pytest.raises(MicrographError, match=r"junk\.tif: cannot be read"):
        read_micrograph(tmp_path / "junk.tif", pixel_size_nm=1)
    tifffile.imwrite(tmp_path / "stack.tif", np.zeros((3, 8, 9), np.uint16), photometric="minisblack")
    with pytest.raises(MicrographError, match=r"stack\.tif: a stack of 3 frames"):
        read_micrograph(tmp_path / "stack.tif", pixel_size_nm=1)
    # a few NaN/Inf pixels (missing rows) are read and left to the row fits; a mostly blank one is refused
    bad = np.ones((8, 8), np.float32)
    bad[2, 3], bad[4, :] = np.nan, np.inf
    tifffile.imwrite(tmp_path / "nan.tif", bad)
    assert np.count_nonzero(~np.isfinite(read_micrograph(tmp_path / "nan.tif", pixel_size_nm=1).pixels)) == 9
    bad[:3] = np.nan
    tifffile.imwrite(tmp_path / "nan.tif", bad)
    with pytest.raises(MicrographError, match=r"nan\.tif: 32 pixels \(50%\) are NaN or infinite"):
        read_micrograph(tmp_path / "nan.tif", pixel_size_nm=1)
    with pytest.raises(MicrographError, match="no such file"):
        read_micrograph(tmp_path / "missing.tif", pixel_size_nm=1)
    (tmp_path / "x.bmp").write_bytes(b"BM")
    with pytest.raises(MicrographError, match="unsupported file type"):
        read_micrograph(tmp_path / "x.bmp", pixel_size_nm=1)


def test_truth_round_trip(tmp_path):
    truth = {"edge_nm": np.arange(6.0).reshape(2, 3), "cd_nm": 31.5, "orientation": "vertical"}
    back = read_truth(write_truth(tmp_path / "t.json", truth))
    np.testing.assert_array_equal(back["edge_nm"], truth["edge_nm"])
    assert back["cd_nm"] == 31.5 and back["orientation"] == "vertical"


def test_a_header_declaring_a_huge_image_is_refused_before_decoding(tmp_path, monkeypatch):
    import tifffile

    from edges.io import MAX_PIXELS, MicrographError, read_micrograph
    path = tmp_path / "huge.tif"
    tifffile.imwrite(path, np.zeros((16384, 8192), np.uint8), compression="zlib")   # 134 Mpx, ~0.15 MB
    assert path.stat().st_size < 1_000_000 and 16384 * 8192 > MAX_PIXELS

    def never(*a, **k):
        raise AssertionError("pixels decoded")

    monkeypatch.setattr(tifffile.TiffFile, "asarray", never)
    with pytest.raises(MicrographError, match=r"huge\.tif: the file declares 8192 x 16384 pixels"):
        read_micrograph(path, pixel_size_nm=1.0)


def test_jpeg_and_frame_stacks_are_refused_with_the_reason(tmp_path, rng):
    import imageio.v3 as iio
    import tifffile

    jpg = tmp_path / "lines.jpg"
    iio.imwrite(jpg, rng.integers(0, 255, (64, 64)).astype(np.uint8))
    with pytest.raises(MicrographError, match=r"lines\.jpg: JPEG is refused: its lossy compression"):
        read_micrograph(jpg, pixel_size_nm=1.0)
    stack = tmp_path / "stack.tif"
    tifffile.imwrite(stack, rng.integers(0, 4000, (5, 64, 80)).astype(np.uint16))
    with pytest.raises(MicrographError, match=r"stack\.tif: a stack of 5 frames"):
        read_micrograph(stack, pixel_size_nm=1.0)
    frames = tifffile.imread(stack)
    with pytest.warns(UserWarning, match=r"stack\.tif: 5 frames averaged"):
        m = read_micrograph(stack, pixel_size_nm=1.0, frame_stack="average")
    np.testing.assert_allclose(m.pixels, frames.astype(float).mean(axis=0), rtol=1e-12)   # numpy's own mean
    assert m.saturation_level == 65535.0
    with pytest.raises(ValueError, match="frame_stack='sum'"):
        read_micrograph(stack, pixel_size_nm=1.0, frame_stack="sum")


def test_sixteen_bit_png_keeps_its_levels(tmp_path, rng):
    data = rng.integers(0, 65535, (32, 48)).astype(np.uint16)
    path = write_micrograph(tmp_path / "a.png", data, pixel_size_nm=1.0, bit_depth=16)
    m = read_micrograph(path, pixel_size_nm=0.5)
    assert np.array_equal(m.pixels, data) and m.saturation_level == 65535
