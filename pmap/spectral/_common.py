"""Shared helpers of the spectral steps: input checks, spectrum loading, lazy mapping."""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import dask.array as da
import numpy as np
import xarray as xr

from ..conventions import CUBE_NAME, SPECTRAL_DIMS
from ..cube import spectral_dim
from ..errors import CubeValidationError, InputFileError, StepError
from ..noise import NOISE_ATTR
from ..provenance import with_step

_TEXT_SUFFIXES = (".txt", ".csv", ".tsv", ".dat", ".asc", ".spe.txt")


def check_cube(cube: Any) -> tuple[xr.DataArray, str]:
    """Check that ``cube`` is a cube-like DataArray; return it dask-backed and its spectral dim.

    The spectral axis is made a single chunk (steps need it whole); spatial chunks are kept.
    """
    if not isinstance(cube, xr.DataArray):
        raise StepError(
            f"expected a cube (xarray DataArray), got {type(cube).__name__}; "
            "use pmap.open_cube or pmap.make_cube first"
        )
    try:
        sdim = spectral_dim(cube)
    except CubeValidationError as exc:
        raise StepError(str(exc)) from None
    if cube.dtype.kind not in "iuf":
        raise StepError(f"cube data must be real numbers, got dtype {cube.dtype}")
    if not isinstance(cube.data, da.Array):
        cube = cube.chunk({sdim: -1})
    elif len(cube.chunks[cube.get_axis_num(sdim)]) > 1:
        cube = cube.chunk({sdim: -1})
    return cube, sdim


def float_dtype(dtype: np.dtype) -> np.dtype:
    """Floating dtype that holds ``dtype`` (float32 stays float32, ints become float32/64)."""
    return np.result_type(dtype, np.float32)


def finish(
    out: xr.DataArray,
    cube: xr.DataArray,
    name: str,
    params: Mapping[str, Any],
    attrs: Mapping[str, Any] | None = None,
    **results: Any,
) -> xr.DataArray:
    """Name the result ``intensity`` and record the step in its provenance."""
    base = dict(cube.attrs) if attrs is None else dict(attrs)
    if NOISE_ATTR in out.attrs:  # the step's update of the noise model (pmap.noise)
        base[NOISE_ATTR] = out.attrs[NOISE_ATTR]
    out.attrs = with_step(base, name, dict(params), **results)
    out.name = CUBE_NAME
    return out


def map_spectra(
    func: Callable[..., np.ndarray],
    cube: xr.DataArray,
    sdim: str,
    *,
    dtype: Any = None,
    kwargs: Mapping[str, Any] | None = None,
    extra: tuple = (),
) -> xr.DataArray:
    """Apply a batched core ``func(x (..., n), *extra, **kwargs) -> (..., n)`` lazily.

    ``extra`` are numpy arrays broadcast to every block (spectra, channel weights).
    """
    dtype = float_dtype(cube.dtype) if dtype is None else np.dtype(dtype)
    kw = dict(kwargs or {})

    def core(x: np.ndarray) -> np.ndarray:
        return np.asarray(func(x, *extra, **kw), dtype=dtype)

    return xr.apply_ufunc(
        core,
        cube,
        input_core_dims=[[sdim]],
        output_core_dims=[[sdim]],
        dask="parallelized",
        output_dtypes=[dtype],
        keep_attrs=True,
    )


def _read_two_columns(path: Path) -> tuple[np.ndarray, np.ndarray | None]:
    """Read a 1- or 2-column numeric text file (comma, tab, semicolon or space separated)."""
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        raise InputFileError(f"cannot read {path}: {exc}") from None
    rows: list[list[float]] = []
    for lineno, line in enumerate(text.splitlines(), 1):
        s = line.strip()
        if not s or s[0] in "#%;":
            continue
        parts = s.replace(",", " ").replace(";", " ").replace("\t", " ").split()
        try:
            rows.append([float(p) for p in parts])
        except ValueError:
            if not rows:  # a header line before the numbers
                continue
            raise InputFileError(f"{path}, line {lineno}: not a number in {s!r}") from None
    if not rows:
        raise InputFileError(f"{path} holds no numeric rows")
    ncol = {len(r) for r in rows}
    if len(ncol) != 1 or next(iter(ncol)) not in (1, 2):
        raise InputFileError(
            f"{path}: expected 1 or 2 numeric columns in every row, found {sorted(ncol)}"
        )
    arr = np.asarray(rows, dtype=float)
    if arr.shape[1] == 1:
        return arr[:, 0], None
    return arr[:, 1], arr[:, 0]


def load_spectrum(obj: Any, *, what: str, sdim: str = "wavelength") -> xr.DataArray | float:
    """A spectrum, cube or constant given as DataArray, number or file path.

    Text files hold one column (values per channel) or two (axis, values);
    other files are opened with :func:`pmap.io.open_cube`.
    Returns a DataArray (a 1-D spectrum has dim ``sdim`` when the file had an axis,
    else ``"channel"``) or a float.
    """
    if isinstance(obj, xr.Dataset):
        obj = obj[CUBE_NAME] if CUBE_NAME in obj else obj[next(iter(obj.data_vars))]
    if isinstance(obj, xr.DataArray):
        return obj
    if isinstance(obj, (int, float, np.integer, np.floating)) and not isinstance(obj, bool):
        return float(obj)
    if isinstance(obj, (str, os.PathLike)):
        path = Path(obj)
        if not path.exists():
            raise InputFileError(f"{what} file not found: {path}")
        if path.suffix.lower() in _TEXT_SUFFIXES and path.is_file():
            values, axis = _read_two_columns(path)
            if axis is None:
                return xr.DataArray(values, dims=("channel",), name=what)
            order = np.argsort(axis)
            if np.any(np.diff(axis[order]) == 0):
                raise InputFileError(f"{path}: repeated axis values in the first column")
            return xr.DataArray(
                values[order],
                dims=(sdim,),
                name=what,
                coords={sdim: (sdim, axis[order], {"units": SPECTRAL_DIMS[sdim]})},
            )
        from ..io import open_cube  # io is a lower layer; imported on use

        return open_cube(path)
    if isinstance(obj, (list, tuple, np.ndarray)):
        arr = np.asarray(obj, dtype=float)
        if arr.ndim == 2 and arr.shape[1] == 2:
            order = np.argsort(arr[:, 0])
            return xr.DataArray(
                arr[order, 1], dims=(sdim,), coords={sdim: arr[order, 0]}, name=what
            )
        if arr.ndim == 1:
            return xr.DataArray(arr, dims=("channel",), name=what)
    raise StepError(
        f"{what} must be a DataArray, a number, a file path or an (n, 2) array; "
        f"got {type(obj).__name__}"
    )


def spectrum_on_axis(
    spec: xr.DataArray, cube: xr.DataArray, sdim: str, *, what: str, interpolate: bool
) -> np.ndarray:
    """Values of a 1-D spectrum on the cube's channels (numpy, length n).

    With ``interpolate`` the spectrum is linearly interpolated on the cube's axis
    and must cover it; otherwise it must have the same number of channels.
    """
    n = cube.sizes[sdim]
    axis = np.asarray(cube[sdim].values, dtype=float)
    dims = [d for d in spec.dims if spec.sizes[d] > 1]
    if len(dims) != 1:
        raise StepError(f"{what} must be one spectrum, got dims {dict(spec.sizes)}")
    d = dims[0]
    vals = np.asarray(spec.squeeze().values, dtype=float)
    if not interpolate or d not in spec.coords or d == "channel":
        if vals.size != n:
            raise StepError(f"{what} has {vals.size} channels, the cube has {n}")
        return vals
    x = np.asarray(spec[d].values, dtype=float)
    order = np.argsort(x)
    x, vals = x[order], vals[order]
    tol = 1e-9 * max(abs(axis[-1]), 1.0)
    if x[0] > axis[0] + tol or x[-1] < axis[-1] - tol:
        raise StepError(
            f"{what} covers {x[0]:g}–{x[-1]:g} but the cube's {sdim} axis spans "
            f"{axis[0]:g}–{axis[-1]:g}: it must cover the whole axis"
        )
    return np.interp(axis, x, vals)


def region_slice(cube: xr.DataArray, region: Mapping[str, Any]) -> xr.DataArray:
    """Sub-cube of a region ``{"x": (x0, x1), "y": (y0, y1)}`` in the cube's spatial units."""
    sel: dict[str, slice] = {}
    for dim, bounds in region.items():
        if dim not in ("x", "y"):
            raise StepError(f"region keys must be 'x' and/or 'y', got {dim!r}")
        try:
            lo, hi = (float(b) for b in bounds)
        except (TypeError, ValueError):
            raise StepError(
                f"region[{dim!r}] must be a pair (start, stop), got {bounds!r}"
            ) from None
        sel[dim] = slice(min(lo, hi), max(lo, hi))
    sub = cube.sel(sel)
    if sub.sizes["x"] == 0 or sub.sizes["y"] == 0:
        raise StepError(
            f"region {dict(region)} holds no pixels (x spans {float(cube.x.min()):g}–"
            f"{float(cube.x.max()):g}, y spans {float(cube.y.min()):g}–{float(cube.y.max()):g})"
        )
    return sub
