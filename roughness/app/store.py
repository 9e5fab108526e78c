"""A safe on-disk form for per-image results: NumPy ``.npz`` files read with
``allow_pickle=False`` and a JSON description of the result's structure.

Nothing read back can execute code: arrays are plain numeric, boolean or text arrays, and the
only objects rebuilt are the result dataclasses listed in :data:`ALLOWED` (by module and name),
from their fields.  Anything else in a file makes it unreadable (the image is measured again).
"""
from __future__ import annotations

import dataclasses
import hashlib
import importlib
import json
import os
from pathlib import Path

import numpy as np

__all__ = ["ALLOWED", "StoreError", "save_result", "load_result", "result_file_name", "content_key"]

#: The only types rebuilt from a file.
ALLOWED = {
    "roughness.app.runner": {"ImageResult"},
    "roughness.analysis": {"ImageAnalysis", "SpectrumSums", "EdgeDiagnostics", "SamplingAdvice"},
    "roughness.stats": {"RoughnessSummary", "QuantityRoughness", "LineVariances"},
    "roughness.psd_model": {"PSDModelFit"},
    "edges._types": {"EdgeTraces"},
    "edges._noise": {"NoiseModel"},
    "edges._precision": {"PrecisionStudy"},
    "edges.profiles": {"EdgeShape"},
}
_STRUCTURE = "__structure__"


class StoreError(ValueError):
    """A stored result that cannot be read back safely (the reason is in the message)."""


def _encode(value, arrays):
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        cls = type(value)
        if cls.__name__ not in ALLOWED.get(cls.__module__, ()):
            raise StoreError(f"{cls.__module__}.{cls.__name__} is not a stored result type")
        return {"__dc__": f"{cls.__module__}:{cls.__name__}",
                "f": {f.name: _encode(getattr(value, f.name), arrays) for f in dataclasses.fields(value)}}
    if isinstance(value, np.ndarray):
        key = f"a{len(arrays)}"
        arrays[key] = value.astype(str) if value.dtype == object else value
        return {"__nd__": key}
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, tuple):
        return {"__tuple__": [_encode(v, arrays) for v in value]}
    if isinstance(value, list):
        return [_encode(v, arrays) for v in value]
    if isinstance(value, dict):
        return {"__dict__": [[_encode(k, arrays), _encode(v, arrays)] for k, v in value.items()]}
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise StoreError(f"cannot store a value of type {type(value).__name__}")


def _decode(node, arrays):
    if isinstance(node, list):
        return [_decode(v, arrays) for v in node]
    if not isinstance(node, dict):
        return node
    if "__nd__" in node:
        return arrays[node["__nd__"]]
    if "__tuple__" in node:
        return tuple(_decode(v, arrays) for v in node["__tuple__"])
    if "__dict__" in node:
        return {_decode(k, arrays): _decode(v, arrays) for k, v in node["__dict__"]}
    if "__dc__" in node:
        module, _, name = str(node["__dc__"]).partition(":")
        if name not in ALLOWED.get(module, ()):
            raise StoreError(f"type {module}.{name} is not a stored result type")
        cls = getattr(importlib.import_module(module), name)
        return cls(**{k: _decode(v, arrays) for k, v in node["f"].items()})
    raise StoreError("unknown entry in the stored structure")


def content_key(item) -> str:
    """SHA-1 of an image's content: a file's bytes, or an array's pixels (with the pixel size of
    a Micrograph).  An image replaced under the same name gets a new key.  ``""`` for a path
    that cannot be read (it is reported when measured)."""
    h = hashlib.sha1()
    pixels = getattr(item, "pixels", item)
    if isinstance(pixels, np.ndarray):
        a = np.ascontiguousarray(pixels)
        h.update(f"{a.dtype.str}{a.shape}{getattr(item, 'pixel_size_nm', '')}".encode())
        h.update(a.tobytes())
        return h.hexdigest()
    try:
        with open(item, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    except (OSError, TypeError):
        return ""
    return h.hexdigest()


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("quietedge")
    except PackageNotFoundError:
        return "unknown"


def result_file_name(name: str, group: str, settings, content: str = "") -> str:
    """File name of an image's stored result: a hash of its content, name, group, every setting
    (a dataclass) and the quietedge version, so that a replaced image, a changed recipe or a
    new version is measured afresh."""
    text = json.dumps({"image": name, "group": group, "content": content, "version": _version(),
                       "settings": dataclasses.asdict(settings)}, sort_keys=True)
    return f"{hashlib.sha1(text.encode()).hexdigest()[:20]}.npz"


def save_result(path, result) -> Path:
    """Write ``result`` to ``path`` (``.npz``) atomically: a reader never sees half a file."""
    path = Path(path)
    arrays = {}
    structure = json.dumps(_encode(result, arrays))
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        np.savez(fh, **{_STRUCTURE: np.array(structure)}, **arrays)
    os.replace(tmp, path)
    return path


def load_result(path):
    """Read a result written by :func:`save_result`; :class:`StoreError` when the file is not one
    (truncated, foreign, or naming a type outside :data:`ALLOWED`)."""
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {k: data[k] for k in data.files}
    except (OSError, ValueError, EOFError) as exc:
        raise StoreError(f"{path}: not a readable result file ({exc})") from exc
    if _STRUCTURE not in arrays:
        raise StoreError(f"{path}: no result structure")
    try:
        return _decode(json.loads(str(arrays.pop(_STRUCTURE))), arrays)
    except (TypeError, KeyError, json.JSONDecodeError) as exc:
        raise StoreError(f"{path}: malformed result ({exc})") from exc
