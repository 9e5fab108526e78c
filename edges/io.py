"""Reading and writing SEM micrographs (TIFF, PNG) and truth records (JSON).

Pixel size: taken from the caller when given, else from the standard TIFF resolution tags
(XResolution with ResolutionUnit centimetre or inch).  A file with neither is refused with a
message naming it, never measured with a made-up scale.
"""
from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np

from ._types import MAX_NON_FINITE_SHARE, Micrograph

__all__ = ["MicrographError", "FRAME_STACKS", "read_micrograph", "write_micrograph", "read_truth", "write_truth",
           "MAX_PIXELS"]

_TIFF_SUFFIXES = {".tif", ".tiff"}
_PNG_SUFFIXES = {".png"}


class MicrographError(ValueError):
    """An image that cannot be measured; the message names the file and the reason."""



#: Largest image read (pixels): 64 megapixels, e.g. 8192 x 8192 (SEM micrographs are usually at
#: most 4096 x 4096); a header declaring more is refused before any pixel is decoded.
MAX_PIXELS = 64_000_000

def _pixel_size_from_tiff_tags(tif) -> float | None:
    page = tif.pages[0]
    tags = page.tags
    if "XResolution" not in tags:
        return None
    num, den = tags["XResolution"].value
    if num == 0 or den == 0:
        return None
    pixels_per_unit = num / den
    unit = int(tags["ResolutionUnit"].value) if "ResolutionUnit" in tags else 2
    nm_per_unit = {2: 2.54e7, 3: 1.0e7}.get(unit)   # 2 = inch, 3 = centimetre (TIFF 6.0)
    if nm_per_unit is None:
        return None
    size = nm_per_unit / pixels_per_unit
    # Writers that ignore resolution store 72 or 96 dpi: a "pixel" of 0.26 mm is no SEM scale.
    if not 1e-3 < size < 1e4:
        return None
    return float(size)


def _to_grey(data: np.ndarray, path: Path) -> np.ndarray:
    if data.ndim == 3 and data.shape[-1] in (3, 4):
        rgb = data[..., :3].astype(np.float64)
        if not (np.array_equal(rgb[..., 0], rgb[..., 1]) and np.array_equal(rgb[..., 1], rgb[..., 2])):
            warnings.warn(f"{path}: colour image converted to grey levels (ITU-R BT.601 luma); "
                          "SEM images are normally single-channel", stacklevel=3)
        else:
            warnings.warn(f"{path}: image stored as RGB with equal channels; using one channel",
                          stacklevel=3)
        return rgb @ np.array([0.299, 0.587, 0.114])
    return data


#: What to do with a multi-frame TIFF: refuse it (naming the frames), or average the frames
#: (pixel by pixel, without drift correction: for frames already aligned by the SEM).
FRAME_STACKS = ("refuse", "average")


def read_micrograph(path, *, pixel_size_nm: float | None = None, frame_stack: str = "refuse") -> Micrograph:
    """Read an 8/16-bit or float TIFF or PNG as a :class:`Micrograph`.

    Parameters
    ----------
    path : str or Path
    pixel_size_nm : float, optional
        Pixel size in nm.  Overrides the TIFF resolution tags.  Required for PNG files.
    frame_stack : {"refuse", "average"}
        A TIFF holding several frames of one field: refused with the reason, or averaged pixel by
        pixel (a ``UserWarning`` names the count; frames are not aligned first).

    Raises
    ------
    MicrographError
        Unreadable, empty, not 2-D (after RGB conversion), non-finite data, or no pixel size.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "flat.tif"
    >>> _ = write_micrograph(path, np.full((32, 48), 100.0), pixel_size_nm=0.8)
    >>> m = read_micrograph(path)
    >>> m.pixels.shape, round(m.pixel_size_nm, 3)
    ((32, 48), 0.8)
    """
    if frame_stack not in FRAME_STACKS:
        raise ValueError(f"frame_stack={frame_stack!r}: must be one of {', '.join(map(repr, FRAME_STACKS))}")
    path = Path(path)
    if not path.exists():
        raise MicrographError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise MicrographError(f"{path}: file is empty")
    suffix = path.suffix.lower()
    tag_size = None
    try:
        if suffix in _TIFF_SUFFIXES:
            import tifffile

            with tifffile.TiffFile(path) as tif:
                shape = tif.pages[0].shape if tif.pages else ()
                n_px = int(np.prod(shape[:2])) if len(shape) >= 2 else 0
                if n_px > MAX_PIXELS:
                    raise MicrographError(f"{path}: the file declares {shape[1]} x {shape[0]} pixels, more than the "
                                          f"{MAX_PIXELS / 1e6:.0f}-megapixel limit (a damaged or hostile header, "
                                          "or a stitched field: crop it first)")
                n_pages = len(tif.pages)
                if n_pages > 1 and n_px * n_pages > 4 * MAX_PIXELS:
                    raise MicrographError(f"{path}: {n_pages} frames of {shape[1]} x {shape[0]} pixels, more than "
                                          f"{4 * MAX_PIXELS / 1e6:.0f} megapixels in all: split the stack first")
                data = tif.asarray()
                tag_size = _pixel_size_from_tiff_tags(tif)
        elif suffix in _PNG_SUFFIXES:
            import imageio.v3 as iio

            data = iio.imread(path)
        elif suffix in (".jpg", ".jpeg", ".jpe", ".jfif"):
            raise MicrographError(f"{path}: JPEG is refused: its lossy compression smooths and correlates the pixel "
                                  "noise, so the noise floor (and with it every unbiased value) cannot be trusted; "
                                  "export the micrograph as TIFF or PNG")
        else:
            raise MicrographError(f"{path}: unsupported file type {suffix!r} (use .tif, .tiff or .png)")
    except MicrographError:
        raise
    except Exception as exc:  # any decoder failure is a corrupt file for the user
        raise MicrographError(f"{path}: cannot be read as an image ({type(exc).__name__}: {exc})") from exc
    data = np.asarray(data)
    if data.size == 0:
        raise MicrographError(f"{path}: image has no pixels")
    data = _to_grey(data, path)
    saturation = float(np.iinfo(data.dtype).max) if np.issubdtype(data.dtype, np.integer) else None
    if data.ndim == 3 and suffix in _TIFF_SUFFIXES:
        if frame_stack == "refuse":
            raise MicrographError(f"{path}: a stack of {data.shape[0]} frames; quietedge measures one frame per file: "
                                  "save the frames as separate files (each is then measured), or average them "
                                  "(--frame-stack average, frames already aligned) and give the total with --frames")
        n_frames = data.shape[0]
        data = data.astype(np.float64).mean(axis=0)
        warnings.warn(f"{path}: {n_frames} frames averaged pixel by pixel (not aligned first); give the total "
                      "frames with --frames for the frames advice", UserWarning, stacklevel=2)
    if data.ndim != 2:
        raise MicrographError(f"{path}: expected a 2-D grey-level image, got shape {data.shape}")
    pixels = data.astype(np.float64)
    n_bad = int(np.count_nonzero(~np.isfinite(pixels)))
    if n_bad > MAX_NON_FINITE_SHARE * pixels.size:
        raise MicrographError(f"{path}: {n_bad} pixels ({100 * n_bad / pixels.size:.0f}%) are NaN or infinite (at "
                              f"most {100 * MAX_NON_FINITE_SHARE:.0f}% can be left out as failed rows)")
    size = pixel_size_nm if pixel_size_nm is not None else tag_size
    if size is None:
        raise MicrographError(f"{path}: no pixel size in the file; give it (pixel_size_nm / --pixel-size)")
    if not (np.isfinite(size) and size > 0):
        raise MicrographError(f"{path}: pixel size {size!r} nm must be a positive number")
    return Micrograph(pixels=pixels, pixel_size_nm=float(size), source=str(path),
                      saturation_level=saturation, pixel_size_source="given" if pixel_size_nm is not None else "file",
                      file_pixel_size_nm=None if tag_size is None else float(tag_size))


def write_micrograph(path, pixels, *, pixel_size_nm: float, bit_depth: int = 16) -> Path:
    """Write grey levels as an integer TIFF (with resolution tags) or PNG.

    Values are rounded and clipped to the integer range of ``bit_depth`` (8 or 16); pass
    ``bit_depth=32`` for a float32 TIFF that keeps values exactly.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> write_micrograph(pathlib.Path(tempfile.mkdtemp()) / "a.png", np.zeros((8, 8)), pixel_size_nm=1.0).suffix
    '.png'
    """
    path = Path(path)
    pixels = np.asarray(pixels, dtype=np.float64)
    if bit_depth == 8:
        data = np.clip(np.rint(pixels), 0, 255).astype(np.uint8)
    elif bit_depth == 16:
        data = np.clip(np.rint(pixels), 0, 65535).astype(np.uint16)
    elif bit_depth == 32:
        data = pixels.astype(np.float32)
    else:
        raise ValueError(f"bit_depth={bit_depth}: must be 8, 16 or 32")
    suffix = path.suffix.lower()
    if suffix in _TIFF_SUFFIXES:
        import tifffile

        per_cm = 1.0e7 / pixel_size_nm
        tifffile.imwrite(path, data, resolution=(per_cm, per_cm), resolutionunit=3)
    elif suffix in _PNG_SUFFIXES:
        if bit_depth == 32:
            raise ValueError("PNG cannot hold float data: use bit_depth 8 or 16, or a .tif name")
        import imageio.v3 as iio

        iio.imwrite(path, data)
    else:
        raise ValueError(f"{path}: unsupported file type {suffix!r} (use .tif, .tiff or .png)")
    return path


def _jsonable(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    return value


def write_truth(path, truth: dict) -> Path:
    """Write a truth record (plain dict of numbers and arrays) as JSON.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> path = write_truth(pathlib.Path(tempfile.mkdtemp()) / "t.json", {"edge_nm": np.zeros((2, 3))})
    >>> read_truth(path)["edge_nm"].shape
    (2, 3)
    """
    path = Path(path)
    path.write_text(json.dumps(_jsonable(truth), indent=1))
    return path


def read_truth(path) -> dict:
    """Read a truth record; list values that were arrays come back as numpy arrays.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np
    >>> path = write_truth(pathlib.Path(tempfile.mkdtemp()) / "t.json", {"sigma": 1.5})
    >>> read_truth(path)["sigma"]
    1.5
    """
    raw = json.loads(Path(path).read_text())
    return {k: (np.asarray(v, dtype=float) if isinstance(v, list) else v) for k, v in raw.items()}
