"""Air ↔ vacuum wavelengths (IAU standard and Ciddor 1996) and the to_vacuum/to_air steps."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..airvac import (
    AIR_METHODS,
    DEFAULT_AIR_METHOD,
    _check_method,
    air_to_vacuum,
    refractive_index_air,
    vacuum_to_air,
)
from ..conventions import HC_EV_NM
from ..cube import spread_blocks
from ..errors import StepError
from ..steps import register_step
from ._common import check_cube, finish

__all__ = [
    "AIR_METHODS",
    "refractive_index_air",
    "air_to_vacuum",
    "vacuum_to_air",
    "to_vacuum",
    "to_air",
    "vacuum_wavelength_nm",
    "medium_shift_mev",
    "MEDIUM_SOURCES",
    "sample_peak_wavelength_nm",
    "assumed_medium_notice",
    "medium_message",
]

#: Values of the ``wavelength_medium_source`` attr: where the medium came from.
MEDIUM_SOURCES = ("data", "sidecar", "option", "assumed")


def vacuum_wavelength_nm(cube: xr.DataArray, *, method: str = DEFAULT_AIR_METHOD) -> np.ndarray:
    """The cube's wavelength axis in vacuum nm (converted if ``wavelength_medium`` is air)."""
    lam = np.asarray(cube["wavelength"].values, dtype=float)
    medium = str(cube.attrs.get("wavelength_medium", "air")).lower()
    return air_to_vacuum(lam, method=method) if medium == "air" else lam


def medium_shift_mev(wavelength_nm, *, method: str = DEFAULT_AIR_METHOD):
    """Photon energy read as vacuum minus read as air, for the same axis value (meV).

    An axis value λ (nm) read as a vacuum wavelength gives E = hc/λ; read as an
    air wavelength it gives hc/λ_vac with λ_vac = n·λ > λ, so the difference is
    positive: the amount by which energies are too low when a vacuum axis is
    taken for air (about E·(n − 1)).

    Parameters
    ----------
    wavelength_nm : float or array_like
        Axis wavelength(s) in nm.
    method : {"ciddor", "iau"}
        Dispersion formula of air, see :func:`refractive_index_air`.

    Returns
    -------
    float or numpy.ndarray
        Energy difference in meV (positive).
    """
    lam = np.asarray(wavelength_nm, dtype=float)
    if np.any(~np.isfinite(lam)) or np.any(lam <= 0):
        raise StepError("medium_shift_mev needs positive, finite wavelengths in nm")
    shift = 1e3 * (HC_EV_NM / lam - HC_EV_NM / air_to_vacuum(lam, method=_check_method(method)))
    return float(shift) if shift.ndim == 0 else shift


def sample_peak_wavelength_nm(
    cube: xr.DataArray, *, max_spectra: int = 256, max_chunks: int = 4
) -> float:
    """Median wavelength (nm, axis values) of the maxima of a small sample of spectra.

    Takes a strided lattice of at most ``max_spectra`` spectra from at most
    ``max_chunks`` spatial chunks (first index of any stack dim), so at most
    those chunks are read. Falls back to the centre of the axis when no
    sampled spectrum has a finite maximum or the sample cannot be read.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on a wavelength axis (nm).
    max_spectra : int
        Most spectra to read.
    max_chunks : int
        Most spatial chunks to touch.

    Returns
    -------
    float
        Wavelength in nm.
    """
    import dask

    lam = np.asarray(cube["wavelength"].values, dtype=float)
    centre = float(0.5 * (lam[0] + lam[-1]))
    arr = cube.isel({d: 0 for d in cube.dims if d not in ("y", "x", "wavelength")})
    arr = arr.transpose("y", "x", "wavelength")
    data = arr.data
    blocks = spread_blocks(data, max(1, int(max_chunks)))
    per = max(1, int(max_spectra) // len(blocks))
    side = max(1, int(np.floor(np.sqrt(per))))
    parts = []
    for b in blocks:
        sy = max(1, -(-b.shape[0] // side))
        sx = max(1, -(-b.shape[1] // side))
        parts.append(b[::sy, ::sx, :].reshape(-1, b.shape[-1]))
    try:
        (sample,) = dask.compute(parts)
        spectra = np.concatenate([np.asarray(p, dtype=float) for p in sample])
    except (OSError, ValueError, MemoryError):
        return centre
    ok = np.isfinite(spectra).any(axis=1)
    if not ok.any():
        return centre
    peaks = lam[np.nanargmax(spectra[ok], axis=1)]
    return float(np.median(peaks))


def assumed_medium_notice(cube: xr.DataArray, *, peak_nm: float | None = None) -> str | None:
    """The one-line notice for a cube whose wavelength medium was assumed, else None.

    The notice is due when the cube is on a wavelength axis and its attr
    ``wavelength_medium_source`` is ``"assumed"``; it gives the energy shift
    (:func:`medium_shift_mev`) at ``peak_nm`` (default: the sampled median peak,
    :func:`sample_peak_wavelength_nm`).
    """
    if "wavelength" not in cube.dims or cube.attrs.get("wavelength_medium_source") != "assumed":
        return None
    medium = str(cube.attrs.get("wavelength_medium", "air"))
    where = "the map's median peak"
    if peak_nm is None:
        peak_nm = sample_peak_wavelength_nm(cube)
    return medium_message(medium, peak_nm, where)


def medium_message(medium: str, peak_nm: float, where: str = "the map's median peak") -> str:
    """Text of the assumed-medium notice for an axis taken as ``medium`` (air or vacuum)."""
    other = "vacuum" if medium == "air" else "air"
    shift = medium_shift_mev(peak_nm)
    direction = "higher" if other == "vacuum" else "lower"
    return (
        f"wavelength medium not stated, assuming {medium}; if the axis is in {other}, "
        f"energies are {shift:.3g} meV {direction} at {peak_nm:.0f} nm ({where}); "
        "state it with --medium air|vacuum"
    )


def _convert_medium(cube: xr.DataArray, target: str, method: str, name: str) -> xr.DataArray:
    cube, sdim = check_cube(cube)
    if sdim != "wavelength":
        raise StepError(f"{name} needs a wavelength axis, the cube has {sdim!r}")
    m = _check_method(method)
    medium = str(cube.attrs.get("wavelength_medium", "air")).lower()
    lam = np.asarray(cube["wavelength"].values, dtype=float)
    if medium == target:
        new = lam
    elif target == "vacuum":
        new = air_to_vacuum(lam, method=m)
    else:
        new = vacuum_to_air(lam, method=m)
    if new.size > 1 and not np.all(np.diff(new) > 0):
        raise StepError(f"{name}: converted wavelength axis is not strictly ascending")
    coord_attrs = dict(cube["wavelength"].attrs)
    coord_attrs["long_name"] = f"wavelength in {target}"
    out = cube.assign_coords(wavelength=("wavelength", new, coord_attrs))
    attrs = dict(cube.attrs)
    attrs["wavelength_medium"] = target
    return finish(out, cube, name, {"method": m}, attrs=attrs, converted_from=medium)


@register_step("to_vacuum")
def to_vacuum(cube: xr.DataArray, *, method: str = DEFAULT_AIR_METHOD) -> xr.DataArray:
    """Convert the wavelength axis to vacuum wavelengths (nm) and set ``wavelength_medium``.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on a wavelength axis (nm); ``wavelength_medium`` attr "air" (default) or "vacuum".
    method : {"ciddor", "iau"}
        Dispersion formula of air, see :func:`refractive_index_air`.

    Returns
    -------
    xarray.DataArray
        Same data, axis in vacuum nm (still ascending); a no-op on the axis if already vacuum.
    """
    return _convert_medium(cube, "vacuum", method, "to_vacuum")


@register_step("to_air")
def to_air(cube: xr.DataArray, *, method: str = DEFAULT_AIR_METHOD) -> xr.DataArray:
    """Convert the wavelength axis to standard-air wavelengths (nm) and set ``wavelength_medium``.

    See :func:`to_vacuum`; the axis stays ascending.
    """
    return _convert_medium(cube, "air", method, "to_air")
