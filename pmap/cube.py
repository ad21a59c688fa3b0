"""The canonical cube model and its validation.

A *cube* is an :class:`xarray.DataArray` named ``intensity`` with dims
``(*stack, "y", "x", S)`` where ``S`` is one of :data:`pmap.conventions.SPECTRAL_DIMS`
(``"wavelength"`` in nm or ``"energy"`` in eV, usually), ``stack`` are optional
extra named dims (temperature, excitation power, time...), y and x are in µm
(``units="um"``) or pixel indices (``units="pixel"``), the spectral coordinate
is strictly ascending and finite, the data carry a CF-style ``units`` attr and
the array is dask-backed, chunked in space with the spectral axis whole.

Acquisition metadata, when known, live in attrs with units in their names:
``excitation_wavelength_nm``, ``temperature_K``, ``exposure_s``,
``excitation_power_W``, ``instrument_notes``, and for wavelength cubes
``wavelength_medium`` ("air" or "vacuum").
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import dask.array as da
import numpy as np
import xarray as xr

from ._layout import DEFAULT_CHUNK_MIB, METADATA_ATTRS, STACK_DIMS, choose_spatial_chunks
from .conventions import (
    CUBE_NAME,
    SPECTRAL_DIMS,
    length_to_um_factor,
    normalise_intensity_unit,
    normalise_length_unit,
)
from .errors import CubeValidationError, PmapNotice

__all__ = [
    "METADATA_ATTRS",
    "STACK_DIMS",
    "DEFAULT_CHUNK_MIB",
    "validate_cube",
    "make_cube",
    "spectral_dim",
    "choose_spatial_chunks",
    "rechunk_cube",
    "spread_blocks",
    "spread_indices",
]

_SPECTRAL_UNIT_FACTORS = {
    "wavelength": {"nm": 1.0, "nanometer": 1.0, "nanometre": 1.0, "um": 1e3, "µm": 1e3,
                   "micron": 1e3, "angstrom": 0.1, "Å": 0.1, "a": 0.1, "m": 1e9},
    "energy": {"ev": 1.0, "mev": 1e-3},
    "wavenumber": {"cm-1": 1.0, "1/cm": 1.0, "cm^-1": 1.0, "cm⁻¹": 1.0},
    "raman_shift": {"cm-1": 1.0, "1/cm": 1.0, "cm^-1": 1.0, "cm⁻¹": 1.0},
}


def spectral_dim(obj: xr.DataArray | xr.Dataset) -> str:
    """Name of the spectral dim of a cube or result ("wavelength", "energy", ...)."""
    found = [d for d in obj.dims if d in SPECTRAL_DIMS]
    if len(found) != 1:
        raise CubeValidationError(
            f"expected exactly one spectral dimension among {list(SPECTRAL_DIMS)}, "
            f"found dims {list(obj.dims)}"
        )
    return found[0]


def rechunk_cube(cube: xr.DataArray, *, target_mib: float = DEFAULT_CHUNK_MIB,
                 chunks: Mapping[str, int] | None = None) -> xr.DataArray:
    """Rechunk a cube in space (spectral axis whole) to ``chunks`` or a memory target in MiB.

    Chunks follow the stored chunking (``encoding["preferred_chunks"]``) when known.
    """
    sdim = spectral_dim(cube)
    if chunks is None:
        pref = cube.encoding.get("preferred_chunks") or {}
        align = (pref["y"], pref["x"]) if "y" in pref and "x" in pref else None
        cy, cx = choose_spatial_chunks(
            (cube.sizes["y"], cube.sizes["x"]), cube.sizes[sdim], cube.dtype.itemsize,
            target_mib=target_mib, align=align,
        )
        chunks = {"y": cy, "x": cx}
    full = {d: 1 for d in cube.dims if d not in ("y", "x", sdim)}
    full.update({"y": chunks.get("y", -1), "x": chunks.get("x", -1), sdim: -1})
    if cube.chunks is None:
        return cube.chunk(full)
    return cube.chunk(full)


def _fix_spatial(arr: xr.DataArray, dim: str) -> xr.DataArray:
    if dim not in arr.coords:
        warnings.warn(
            f"no {dim} coordinate: using pixel indices (units 'pixel')", PmapNotice, stacklevel=3
        )
        arr = arr.assign_coords({dim: (dim, np.arange(arr.sizes[dim], dtype=float),
                                       {"units": "pixel", "long_name": f"{dim} (pixel index)"})})
        return arr
    c = arr[dim]
    if c.dtype.kind not in "iuf":
        raise CubeValidationError(f"{dim} coordinate must be numeric, got dtype {c.dtype}")
    vals = np.asarray(c.values, dtype=float)
    if not np.all(np.isfinite(vals)):
        raise CubeValidationError(f"{dim} coordinate contains NaN or infinite values")
    unit = normalise_length_unit(c.attrs.get("units"))
    if "units" not in c.attrs:
        warnings.warn(f"{dim} coordinate has no units: assuming pixel indices", PmapNotice,
                      stacklevel=3)
    factor = length_to_um_factor(unit)
    if unit in ("nm", "mm"):
        vals = vals * factor
        unit = "um"
    if vals.size > 1:
        d = np.diff(vals)
        if np.all(d < 0):
            arr = arr.isel({dim: slice(None, None, -1)})
            vals = vals[::-1]
        elif not np.all(d > 0):
            raise CubeValidationError(
                f"{dim} coordinate is not strictly monotonic (duplicate or unordered positions)"
            )
    long = f"{dim} position" if unit != "pixel" else f"{dim} (pixel index)"
    return arr.assign_coords({dim: (dim, vals, {"units": unit, "long_name": long})})


def _fix_spectral(arr: xr.DataArray, sdim: str) -> xr.DataArray:
    if sdim not in arr.coords:
        raise CubeValidationError(f"spectral dimension {sdim!r} has no coordinate values")
    c = arr[sdim]
    if c.dtype.kind not in "iuf":
        raise CubeValidationError(f"{sdim} coordinate must be numeric, got dtype {c.dtype}")
    vals = np.asarray(c.values, dtype=float)
    if not np.all(np.isfinite(vals)):
        raise CubeValidationError(f"{sdim} coordinate contains NaN or infinite values")
    unit_raw = c.attrs.get("units", SPECTRAL_DIMS[sdim])
    factors = _SPECTRAL_UNIT_FACTORS[sdim]
    key = str(unit_raw).strip()
    fac = factors.get(key, factors.get(key.lower()))
    if fac is None:
        raise CubeValidationError(
            f"{sdim} unit {unit_raw!r} is not understood (expected {SPECTRAL_DIMS[sdim]})"
        )
    vals = vals * fac
    if sdim in ("wavelength", "energy") and np.any(vals <= 0):
        what = "wavelengths" if sdim == "wavelength" else "energies"
        raise CubeValidationError(f"non-positive {what} on the spectral axis (min {vals.min():g})")
    if vals.size > 1:
        d = np.diff(vals)
        if np.any(d == 0):
            i = int(np.flatnonzero(d == 0)[0])
            raise CubeValidationError(f"duplicate {sdim} value {vals[i]:g} at channels {i}, {i + 1}")
        if np.all(d < 0):
            arr = arr.isel({sdim: slice(None, None, -1)})
            vals = vals[::-1]
        elif not np.all(d > 0):
            raise CubeValidationError(f"{sdim} coordinate is not monotonic")
    attrs = {k: v for k, v in c.attrs.items() if k != "units"}
    attrs["units"] = SPECTRAL_DIMS[sdim]
    attrs.setdefault("long_name", {"wavelength": "wavelength", "energy": "photon energy",
                                   "wavenumber": "wavenumber",
                                   "raman_shift": "shift from excitation"}[sdim])
    return arr.assign_coords({sdim: (sdim, vals, attrs)})


def validate_cube(
    obj: Any,
    *,
    stack_dims: Sequence[str] = (),
    chunks: Mapping[str, int] | None = None,
    target_chunk_mib: float = DEFAULT_CHUNK_MIB,
    units: str | None = None,
    rechunk: bool = False,
) -> xr.DataArray:
    """Turn anything that claims to be a cube into the canonical form, or raise.

    Parameters
    ----------
    obj : xarray.DataArray or xarray.Dataset
        A DataArray, or a Dataset holding ``intensity`` (or exactly one variable).
        Dims must include one spectral dim (wavelength nm, energy eV, ...);
        y and x are optional (a spectrum or a line scan gets length-1 dims).
    stack_dims : sequence of str
        Extra dim names to accept as stacks of maps besides :data:`STACK_DIMS`.
    chunks : mapping, optional
        Spatial chunk sizes ``{"y": cy, "x": cx}``; default from ``target_chunk_mib``.
    target_chunk_mib : float
        Memory target of one chunk in MiB (spectral axis whole), default 64.
    rechunk : bool
        Rechunk a dask-backed input to ``target_chunk_mib`` even when its spectral
        axis is already whole. By default such an input keeps its spatial chunks;
        in-memory inputs and inputs with a split spectral axis are always rechunked.
    units : str, optional
        Intensity unit to assume when the data carry none (default "counts").

    Returns
    -------
    xarray.DataArray
        Named ``intensity``, dims ``(*stack, "y", "x", S)``, dask-backed. Computes nothing.

    Raises
    ------
    CubeValidationError
        Naming the problem: missing or wrong dims, bad coordinates, non-numeric
        data, empty axes, unknown units, non-positive wavelengths.
    """
    if isinstance(obj, xr.Dataset):
        if CUBE_NAME in obj.data_vars:
            obj = obj[CUBE_NAME]
        elif len(obj.data_vars) == 1:
            obj = obj[next(iter(obj.data_vars))]
        else:
            raise CubeValidationError(
                f"dataset has no {CUBE_NAME!r} variable (variables: {list(obj.data_vars)})"
            )
    if not isinstance(obj, xr.DataArray):
        raise CubeValidationError(
            f"expected an xarray DataArray or Dataset, got {type(obj).__name__}; "
            "wrap numpy arrays with pmap.make_cube(data, wavelength_nm=...)"
        )
    arr = obj
    if arr.dtype.kind not in "iuf":
        raise CubeValidationError(f"cube data must be real numbers, got dtype {arr.dtype}")
    sdims = [d for d in arr.dims if d in SPECTRAL_DIMS]
    if not sdims:
        raise CubeValidationError(
            f"no spectral dimension: dims are {list(arr.dims)}, one of "
            f"{list(SPECTRAL_DIMS)} is required"
        )
    if len(sdims) > 1:
        raise CubeValidationError(f"more than one spectral dimension: {sdims}")
    sdim = sdims[0]
    allowed_stack = set(STACK_DIMS) | set(stack_dims)
    extra = [d for d in arr.dims if d not in ("y", "x", sdim)]
    bad = [d for d in extra if d not in allowed_stack]
    if bad:
        raise CubeValidationError(
            f"unexpected dimension(s) {bad}: a cube has dims y, x, {sdim} and optional stack "
            f"dims such as temperature, excitation_power, time (pass stack_dims= to allow others)"
        )
    for d, n in arr.sizes.items():
        if n == 0:
            raise CubeValidationError(f"dimension {d!r} is empty")
    for d in ("y", "x"):
        if d not in arr.dims:
            arr = arr.expand_dims({d: 1})
            arr = arr.assign_coords({d: (d, [0.0], {"units": "pixel",
                                                   "long_name": f"{d} (pixel index)"})})
    arr = arr.transpose(*extra, "y", "x", sdim)
    arr = _fix_spectral(arr, sdim)
    arr = _fix_spatial(arr, "y")
    arr = _fix_spatial(arr, "x")
    for d in extra:
        if d in arr.coords and arr[d].dtype.kind in "f" and not np.all(np.isfinite(arr[d].values)):
            raise CubeValidationError(f"{d} coordinate contains NaN or infinite values")

    attrs = dict(arr.attrs)
    attrs["units"] = normalise_intensity_unit(attrs.get("units", units))
    attrs.setdefault("long_name", "PL intensity")
    if sdim == "wavelength":
        medium = str(attrs.get("wavelength_medium", "air")).lower()
        if medium not in ("air", "vacuum"):
            raise CubeValidationError(
                f"wavelength_medium must be 'air' or 'vacuum', got {attrs['wavelength_medium']!r}"
            )
        attrs["wavelength_medium"] = medium
    arr.attrs = attrs
    arr.name = CUBE_NAME
    if not isinstance(arr.data, da.Array):
        return rechunk_cube(arr.chunk(), target_mib=target_chunk_mib, chunks=chunks)
    spectral_whole = len(arr.chunks[arr.dims.index(sdim)]) == 1
    if rechunk or chunks is not None or not spectral_whole:
        return rechunk_cube(arr, target_mib=target_chunk_mib, chunks=chunks)
    return arr  # keep the caller's spatial chunking (e.g. set from a memory limit)


def make_cube(
    data: Any,
    *,
    wavelength_nm: Any = None,
    energy_ev: Any = None,
    y_um: Any = None,
    x_um: Any = None,
    units: str = "counts",
    attrs: Mapping[str, Any] | None = None,
    chunks: Mapping[str, int] | None = None,
) -> xr.DataArray:
    """Build a canonical cube from an array shaped (y, x, channels), (x, channels) or (channels,).

    Give exactly one of ``wavelength_nm`` or ``energy_ev`` (channel values).
    ``y_um``/``x_um`` are positions in µm; omitted ones become pixel indices.
    """
    if (wavelength_nm is None) == (energy_ev is None):
        raise CubeValidationError("give exactly one of wavelength_nm= or energy_ev=")
    sdim, spec = ("wavelength", wavelength_nm) if wavelength_nm is not None else ("energy", energy_ev)
    arr = data if isinstance(data, da.Array) else np.asarray(data)
    if arr.ndim not in (1, 2, 3):
        raise CubeValidationError(f"data must be 1-, 2- or 3-D, got {arr.ndim}-D")
    dims = ("y", "x", sdim)[3 - arr.ndim:]
    spec = np.asarray(spec, dtype=float)
    if spec.ndim != 1 or spec.size != arr.shape[-1]:
        raise CubeValidationError(
            f"{spec.size} spectral values given for {arr.shape[-1]} channels"
        )
    coords: dict[str, Any] = {sdim: (sdim, spec, {"units": SPECTRAL_DIMS[sdim]})}
    for name, vals in (("y", y_um), ("x", x_um)):
        if vals is not None and name in dims:
            coords[name] = (name, np.asarray(vals, dtype=float), {"units": "um"})
        elif name in dims:
            coords[name] = (name, np.arange(arr.shape[dims.index(name)], dtype=float),
                            {"units": "pixel"})
    a = dict(attrs or {})
    a.setdefault("units", units)
    xarr = xr.DataArray(arr, dims=dims, coords=coords, name=CUBE_NAME, attrs=a)
    return validate_cube(xarr, chunks=chunks)


def spread_blocks(data: Any, max_blocks: int) -> list:
    """At most ``max_blocks`` chunks of a dask array, spread evenly over its chunk grid.

    For the cheap whole-map looks that read a sample instead of the cube (noise
    estimate, empty-cube check, the medium notice). A numpy array is one block.
    """
    if not isinstance(data, da.Array):
        return [data]
    grid = [len(c) for c in data.chunks]
    pick = spread_indices(int(np.prod(grid)), max_blocks)
    return [data.blocks[np.unravel_index(int(k), grid)] for k in pick]


def spread_indices(n: int, m: int) -> np.ndarray:
    """At most ``m`` of the indices 0 … n−1, spread evenly (both ends included), ascending."""
    return np.unique(np.linspace(0, n - 1, min(int(m), n)).round().astype(int))
