"""Shared pieces of the readers: format detection, read options, sidecars, axes.

Read options are plain keyword arguments (strings, numbers, lists) so that a
command line can express every one of them. The same keys may be stored in a
JSON sidecar next to an array file (see :mod:`pmap.io` for the schema);
keywords given to the call win over the sidecar.
"""

from __future__ import annotations

import importlib
import json
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..conventions import SPECTRAL_DIMS
from ..cube import METADATA_ATTRS, validate_cube
from ..errors import CubeValidationError, FormatError, InputFileError, PmapError
from ..provenance import with_input


@dataclass(frozen=True)
class FileFormat:
    """One entry of the format registry: how pmap recognises, reads and writes a format.

    Readers and writers are named as ``"module:function"`` and imported on first use
    (the registry stays importable without the readers' dependencies). A reader is
    called as ``reader(path, options, target_mib)`` and returns a raw DataArray or
    Dataset that :func:`finish_cube` turns into a cube.
    """

    name: str
    description: str
    extensions: tuple[str, ...]
    magic: tuple[bytes, ...] = ()  # first bytes of a file in this format
    directory_markers: tuple[str, ...] = ()  # files inside a directory store
    reader: str = ""
    writer: str | None = None  # writes a cube (pmap.io.save_cube's engine), if writable
    needs_axes: bool = False  # bare arrays (npy, TIFF): axes from a sidecar or options
    options: tuple[str, ...] = ()  # read options beyond the common metadata ones

    def matches_name(self, path: Path) -> bool:
        """True if the file name ends with one of this format's extensions."""
        return path.name.lower().endswith(self.extensions)

    def matches_content(self, path: Path) -> bool:
        """True if the content (directory markers or first bytes) is of this format."""
        if path.is_dir():
            return any((path / m).exists() for m in self.directory_markers)
        if not self.magic or not path.is_file():
            return False
        with open(path, "rb") as fh:
            head = fh.read(16)
        return any(head.startswith(m) for m in self.magic)

    def function(self, which: str = "reader") -> Callable[..., Any]:
        """The reader (or writer) function, imported now."""
        spec = getattr(self, which)
        if not spec:
            raise FormatError(f"pmap has no {which} for {self.name}")
        module, name = spec.split(":")
        return getattr(importlib.import_module(module), name)


#: The format registry: every format pmap reads or writes, in the order detection tries
#: them. open_cube, convert, save_cube, the command line's folder scan and the napari
#: reader all take their formats, endings and content tests from here.
FORMATS: dict[str, FileFormat] = {f.name: f for f in (
    FileFormat("zarr", "Zarr store (v2 or v3), directory", (".zarr",),
               directory_markers=("zarr.json", ".zgroup", ".zarray", ".zmetadata"),
               reader="pmap.io._readers:read_zarr", writer="pmap.io._write:write_zarr",
               options=("variable", "allow_missing_chunks")),
    FileFormat("netcdf", "NetCDF4 / HDF5 file", (".nc", ".nc4", ".h5", ".hdf5", ".he5", ".cdf"),
               magic=(b"\x89HDF\r\n\x1a\n",), reader="pmap.io._readers:read_netcdf",
               writer="pmap.io._write:_write_netcdf", options=("variable",)),
    FileFormat("npy", "NumPy array file (axes in a NAME.axes.json sidecar or options)",
               (".npy",), magic=(b"\x93NUMPY",), reader="pmap.io._readers:read_npy",
               needs_axes=True),
    FileFormat("tiff", "multi-page TIFF, one page per channel (axes in a sidecar or options)",
               (".tif", ".tiff"), magic=(b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"),
               reader="pmap.io._readers:read_tiff", needs_axes=True),
    FileFormat("text", "delimited text, long (x, y, wavelength, intensity) or wide table",
               (".csv", ".tsv", ".txt", ".dat"), reader="pmap.io._api:_read_text"),
)}
#: Format name -> file name endings that select it (from :data:`FORMATS`).
FORMAT_EXTENSIONS = {name: f.extensions for name, f in FORMATS.items()}
SUPPORTED_FORMATS = tuple(FORMATS)
#: Every file ending of a format pmap reads (folder scans).
READ_EXTENSIONS = tuple(e for f in FORMATS.values() for e in f.extensions)


def get_format(name: str) -> FileFormat:
    """The registry entry of format ``name`` (FormatError naming the supported ones)."""
    try:
        return FORMATS[name]
    except KeyError:
        raise FormatError(f"unknown format {name!r}; supported: {supported_formats_text()}") \
            from None


#: Axis options shared by the array readers (npy, TIFF) and their sidecars.
AXIS_OPTIONS = (
    "dims",
    "wavelength_nm",
    "energy_ev",
    "wavelength_start_nm",
    "wavelength_step_nm",
    "energy_start_ev",
    "energy_step_ev",
    "spectral_dim",
    "spectral_start",
    "spectral_step",
    "pixel_size_um",
    "pixel_size_x_um",
    "pixel_size_y_um",
    "x0_um",
    "y0_um",
    "units",
    "attrs",
    *METADATA_ATTRS,
)
#: Options every format accepts (they only add metadata).
META_OPTIONS = ("units", "attrs", *METADATA_ATTRS)


def supported_formats_text() -> str:
    """One line naming the supported formats and their file endings."""
    return "; ".join(f"{k} ({', '.join(v)})" for k, v in FORMAT_EXTENSIONS.items())


def check_input(path: str | os.PathLike) -> Path:
    """Return ``path`` as a Path, or raise InputFileError if it does not exist."""
    p = Path(path).expanduser()
    if not p.exists():
        raise InputFileError(f"input file not found: {p}")
    if p.is_file() and not os.access(p, os.R_OK):
        raise InputFileError(f"input file is not readable: {p}")
    return p


def detect_format(path: str | os.PathLike) -> str:
    """Name of the file format of ``path``: one of :data:`SUPPORTED_FORMATS`.

    Decided by the file name ending; a directory holding Zarr metadata is Zarr;
    a file with an unknown ending is recognised by its first bytes (HDF5, NumPy,
    TIFF) when possible.

    Raises
    ------
    InputFileError
        The path does not exist.
    FormatError
        The format is not one pmap reads; the message lists the supported ones.
    """
    p = check_input(path)
    for f in FORMATS.values():
        if f.matches_name(p):
            return f.name
    if p.is_dir():
        if FORMATS["zarr"].matches_content(p):
            return "zarr"
        raise FormatError(
            f"{p} is a directory but not a Zarr store; supported formats: {supported_formats_text()}"
        )
    for f in FORMATS.values():
        if f.matches_content(p):
            return f.name
    raise FormatError(
        f"cannot tell the format of {p.name!r} from its name or content; "
        f"supported formats: {supported_formats_text()}"
    )


def recognises(path: str | os.PathLike) -> bool:
    """True if ``path`` holds content pmap can read as a cube without further options.

    Stricter than :func:`detect_format` (which goes by the name): the content must be
    of the format its name says, a bare array (npy, TIFF) needs its axis sidecar, a
    text table a header pmap understands, a Zarr or NetCDF file an intensity variable
    on a spectral axis. Used by the napari reader, so that it claims only files it can
    open (an ordinary photo saved as .tif is left to other readers).
    """
    try:
        p = check_input(path)
        f = FORMATS[detect_format(p)]
        if f.name == "text":
            from ._text import inspect_text

            inspect_text(p)
            return True
        if not f.matches_content(p):
            return False
        if f.needs_axes:
            return sidecar_path(p).exists()
        from ._api import open_cube

        open_cube(p, fmt=f.name)  # lazy: metadata only
        return True
    except (PmapError, OSError, ValueError):
        return False


def check_options(options: Mapping[str, Any], allowed: tuple[str, ...], fmt: str) -> None:
    """Raise FormatError naming any read option the format does not understand."""
    bad = sorted(set(options) - set(allowed))
    if bad:
        raise FormatError(
            f"read option(s) {bad} not understood for {fmt} input; accepted: {sorted(set(allowed))}"
        )


def sidecar_path(path: Path) -> Path:
    """The JSON sidecar that belongs to an array file: ``sample.npy`` → ``sample.axes.json``."""
    return path.with_name(path.name.rsplit(".", 1)[0] + ".axes.json")


def read_sidecar(path: Path, explicit: str | os.PathLike | None = None) -> dict[str, Any]:
    """Load the axis sidecar of ``path`` (or ``explicit``); {} when there is none.

    Raises FormatError for invalid JSON, a non-object document or unknown keys.
    """
    sc = Path(explicit) if explicit is not None else sidecar_path(path)
    if not sc.exists():
        if explicit is not None:
            raise InputFileError(f"sidecar file not found: {sc}")
        return {}
    try:
        doc = json.loads(sc.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise FormatError(f"bad sidecar {sc.name}: not valid JSON ({exc})") from exc
    if not isinstance(doc, dict):
        raise FormatError(f"bad sidecar {sc.name}: expected a JSON object of axis options")
    version = doc.pop("pmap_axes", 1)
    if version != 1:
        raise FormatError(f"bad sidecar {sc.name}: pmap_axes version {version!r} (expected 1)")
    bad = sorted(set(doc) - set(AXIS_OPTIONS))
    if bad:
        raise FormatError(
            f"bad sidecar {sc.name}: unknown key(s) {bad}; accepted: {sorted(AXIS_OPTIONS)}"
        )
    return doc


def _float_array(value: Any, name: str) -> np.ndarray:
    if isinstance(value, str):
        value = [v for v in value.replace(";", ",").split(",") if v.strip()]
    try:
        arr = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise FormatError(f"{name} must be a list of numbers ({exc})") from exc
    return arr


def _number(value: Any, name: str) -> float:
    try:
        return float(value)
    except (TypeError, ValueError) as exc:
        raise FormatError(f"{name} must be a number, got {value!r}") from exc


def spectral_axis(opts: Mapping[str, Any], n: int, *, source: str) -> tuple[str, np.ndarray]:
    """Spectral dim name and channel values for ``n`` channels from axis options.

    Accepts ``wavelength_nm``/``energy_ev`` (lists), ``wavelength_start_nm`` +
    ``wavelength_step_nm``, ``energy_start_ev`` + ``energy_step_ev`` or
    ``spectral_start`` + ``spectral_step`` with ``spectral_dim``.
    """
    given = []
    for dim, key in (("wavelength", "wavelength_nm"), ("energy", "energy_ev")):
        if opts.get(key) is not None:
            given.append((dim, _float_array(opts[key], key)))
    for dim, k0, k1 in (
        ("wavelength", "wavelength_start_nm", "wavelength_step_nm"),
        ("energy", "energy_start_ev", "energy_step_ev"),
        (str(opts.get("spectral_dim", "wavelength")), "spectral_start", "spectral_step"),
    ):
        if opts.get(k0) is not None or opts.get(k1) is not None:
            if opts.get(k0) is None or opts.get(k1) is None:
                raise FormatError(f"give both {k0}= and {k1}=")
            start, step = _number(opts[k0], k0), _number(opts[k1], k1)
            given.append((dim, start + step * np.arange(n)))
    if not given:
        raise FormatError(
            f"{source}: no spectral axis; give wavelength_nm=[...] or energy_ev=[...], or "
            "wavelength_start_nm= and wavelength_step_nm= (energy_start_ev=/energy_step_ev=), "
            "or put them in a sidecar JSON file"
        )
    if len(given) > 1:
        raise FormatError(f"{source}: more than one spectral axis given; give exactly one")
    dim, vals = given[0]
    if dim not in SPECTRAL_DIMS:
        raise FormatError(f"spectral_dim must be one of {list(SPECTRAL_DIMS)}, got {dim!r}")
    if vals.size != n:
        raise FormatError(f"{source}: {vals.size} spectral values given for {n} channels")
    return dim, vals


def spatial_coords(opts: Mapping[str, Any], ny: int, nx: int) -> dict[str, Any]:
    """y/x coordinates (µm from pixel size options, else pixel indices) as xarray coords."""
    out: dict[str, Any] = {}
    common = opts.get("pixel_size_um")
    for dim, n in (("y", ny), ("x", nx)):
        step = opts.get(f"pixel_size_{dim}_um", common)
        if step is None:
            out[dim] = (dim, np.arange(n, dtype=float), {"units": "pixel"})
            continue
        step = _number(step, f"pixel_size_{dim}_um")
        if not step > 0:
            raise FormatError(f"pixel size must be positive, got {step} um")
        origin = _number(opts.get(f"{dim}0_um", 0.0), f"{dim}0_um")
        out[dim] = (dim, origin + step * np.arange(n), {"units": "um"})
    return out


def metadata_attrs(opts: Mapping[str, Any]) -> dict[str, Any]:
    """Cube attrs from ``units``, ``attrs`` and metadata options (excitation_wavelength_nm...)."""
    attrs: dict[str, Any] = {}
    extra = opts.get("attrs")
    if extra is not None:
        if not isinstance(extra, Mapping):
            raise FormatError("attrs must be a mapping of attribute names to values")
        attrs.update(extra)
    for key in METADATA_ATTRS:
        if opts.get(key) is not None:
            attrs[key] = opts[key]
    if opts.get("units") is not None:
        attrs["units"] = str(opts["units"])
    return attrs


def parse_dims(value: Any, ndim: int) -> tuple[str, ...]:
    """Dim names for an array of ``ndim`` dims from a ``dims=`` option (list or "y,x,wavelength")."""
    if isinstance(value, str):
        dims = tuple(d.strip() for d in value.split(",") if d.strip())
    else:
        dims = tuple(str(d) for d in value)
    if len(dims) != ndim:
        raise FormatError(f"dims={list(dims)} names {len(dims)} dims for a {ndim}-D array")
    return dims


def finish_cube(
    arr: xr.DataArray | xr.Dataset,
    path: Path,
    fmt: str,
    *,
    chunks: Mapping[str, int] | None,
    target_chunk_mib: float,
) -> xr.DataArray:
    """Validate a freshly read cube and record the input file in its provenance."""
    try:
        cube = validate_cube(arr, chunks=chunks, target_chunk_mib=target_chunk_mib, rechunk=True)
    except CubeValidationError as exc:
        raise CubeValidationError(f"{path.name}: {exc}") from exc
    cube.attrs = with_input(cube.attrs, path, fmt=fmt)
    return cube


def path_size_bytes(path: Path) -> int:
    """Size of a file, or the summed size of the files in a directory store, in bytes."""
    if path.is_dir():
        return sum(f.stat().st_size for f in path.rglob("*") if f.is_file())
    return path.stat().st_size
