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
]


def vacuum_wavelength_nm(cube: xr.DataArray, *, method: str = DEFAULT_AIR_METHOD) -> np.ndarray:
    """The cube's wavelength axis in vacuum nm (converted if ``wavelength_medium`` is air)."""
    lam = np.asarray(cube["wavelength"].values, dtype=float)
    medium = str(cube.attrs.get("wavelength_medium", "air")).lower()
    return air_to_vacuum(lam, method=method) if medium == "air" else lam


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
