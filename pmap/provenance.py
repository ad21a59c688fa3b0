"""Provenance: what was done to a cube or result, by which pmap, from which input.

Provenance lives in the attrs of every cube and result as a JSON string under
``pmap_provenance`` (a JSON string survives Zarr, NetCDF and xarray merges
unchanged). It holds ``{"pmap_version", "input": {...}, "steps": [...]}``.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ._version import __version__

__all__ = ["PROVENANCE_ATTR", "get_provenance", "with_step", "with_input", "with_medium",
           "fingerprint_path"]

PROVENANCE_ATTR = "pmap_provenance"


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        if value.size > 64:
            return f"<array shape={value.shape} dtype={value.dtype}>"
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    name = getattr(value, "name", None)
    shape = getattr(value, "shape", None)
    if shape is not None:
        return f"<{type(value).__name__} name={name!r} shape={tuple(shape)}>"
    return repr(value)


def get_provenance(attrs: dict) -> dict:
    """Decode the provenance record stored in ``attrs`` (empty record if none)."""
    raw = attrs.get(PROVENANCE_ATTR)
    if not raw:
        return {"pmap_version": __version__, "input": {}, "steps": []}
    if isinstance(raw, dict):
        return raw
    return json.loads(raw)


def _encode(record: dict) -> str:
    return json.dumps(_jsonable(record), sort_keys=False)


#: Statistics of the stored values (CF ``actual_range``; the finite count), written by
#: ``save_cube``: every processing step drops them from the attrs it passes on.
VALUE_STATS_ATTRS = ("actual_range", "pmap_finite_count")


def with_step(attrs: dict, name: str, params: dict | None = None, **results: Any) -> dict:
    """Return a copy of ``attrs`` with one processing step appended to the provenance.

    Parameters
    ----------
    attrs : dict
        Attributes of the input cube.
    name : str
        Registered step name (as used in pipeline TOML files).
    params : dict
        The step's parameters, as the user would write them.
    **results
        Small summary results of the step (counts, RMS), stored beside the params.
    """
    record = get_provenance(attrs)
    step = {"step": name, "params": params or {}, "pmap_version": __version__}
    if results:
        step["results"] = results
    record["steps"] = [*record.get("steps", []), step]
    record["pmap_version"] = __version__
    out = dict(attrs)
    out[PROVENANCE_ATTR] = _encode(record)
    for k in VALUE_STATS_ATTRS:  # the step may change the values: their stored range is stale
        out.pop(k, None)
    return out


def with_input(attrs: dict, path: str | os.PathLike, *, fmt: str) -> dict:
    """Return attrs with the input file's identity (path, format, fingerprint) recorded."""
    record = get_provenance(attrs)
    record["input"] = {
        "path": str(Path(path).resolve()),
        "format": fmt,
        "fingerprint": fingerprint_path(path),
        "read_at": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
    }
    out = dict(attrs)
    out[PROVENANCE_ATTR] = _encode(record)
    return out


def fingerprint_path(path: str | os.PathLike, *, sample_bytes: int = 1 << 20) -> str:
    """Cheap, stable fingerprint of a file or directory store (sha256, truncated hex).

    For a single file: its size plus the first and last ``sample_bytes``.
    For a directory store (Zarr): the relative name and size of every file and
    the full content of its small metadata files (``zarr.json``, ``.zarray``,
    ``.zattrs``...), so a multi-GB store is fingerprinted without reading its
    chunks, while any rewritten chunk (compressed size) or metadata changes it.
    """
    p = Path(path)
    h = hashlib.sha256()
    if p.is_dir():
        for f in sorted(f for f in p.rglob("*") if f.is_file()):
            rel = f.relative_to(p).as_posix()
            size = f.stat().st_size
            h.update(f"{rel}\0{size}\0".encode())
            if f.name.startswith(".z") or f.name == "zarr.json":
                h.update(f.read_bytes())
    else:
        size = p.stat().st_size
        h.update(f"{p.name}\0{size}\0".encode())
        with open(p, "rb") as fh:
            if size <= 2 * sample_bytes:
                h.update(fh.read())
            else:
                h.update(fh.read(sample_bytes))
                fh.seek(size - sample_bytes)
                h.update(fh.read(sample_bytes))
    return "sha256:" + h.hexdigest()[:32]


def with_medium(attrs: dict, source: str) -> dict:
    """Attrs with ``wavelength_medium_source`` set and the medium in the provenance input.

    The provenance record's ``input`` gains ``wavelength_medium`` and
    ``wavelength_medium_source``, so result stores keep whether the medium was
    stated after the axis has become energy.
    """
    out = dict(attrs)
    out["wavelength_medium_source"] = source
    record = get_provenance(out)
    if record.get("input"):
        record["input"]["wavelength_medium"] = out.get("wavelength_medium", "air")
        record["input"]["wavelength_medium_source"] = source
        out[PROVENANCE_ATTR] = json.dumps(record)
    return out
