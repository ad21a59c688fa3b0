"""Air ↔ vacuum wavelengths (IAU standard and Ciddor 1996) and the to_vacuum/to_air steps."""

from __future__ import annotations

from typing import Any

import numpy as np
import xarray as xr

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

#: Dispersion formulas of standard air that pmap knows; the first is the default.
AIR_METHODS = ("ciddor", "iau")
DEFAULT_AIR_METHOD = "ciddor"


def _check_method(method: str) -> str:
    m = str(method).lower()
    if m not in AIR_METHODS:
        raise StepError(f"unknown air dispersion method {method!r}; use one of {AIR_METHODS}")
    return m


def refractive_index_air(wavelength_vac_nm: Any, *, method: str = DEFAULT_AIR_METHOD) -> np.ndarray:
    """Refractive index of standard dry air at a vacuum wavelength in nm.

    Parameters
    ----------
    wavelength_vac_nm : float or array
        Vacuum wavelength(s) in nm (valid roughly 200 nm – 2.5 µm).
    method : {"ciddor", "iau"}
        ``"ciddor"``: Ciddor (1996) standard dry air (15 °C, 101 325 Pa, 450 ppm CO₂),
        n − 1 = 0.05792105/(238.0185 − σ²) + 0.00167917/(57.362 − σ²).
        ``"iau"``: IAU standard (Morton 2000, from Birch & Downs 1994),
        n = 1 + 8.34254e-5 + 2.406147e-2/(130 − σ²) + 1.5998e-4/(38.9 − σ²).
        σ = 1/λ_vac in µm⁻¹ in both.

    Returns
    -------
    numpy.ndarray
        n (dimensionless).

    References
    ----------
    Ciddor, Appl. Opt. 35, 1566 (1996). Morton, ApJS 130, 403 (2000).
    Birch & Downs, Metrologia 31, 315 (1994).
    """
    m = _check_method(method)
    lam = np.asarray(wavelength_vac_nm, dtype=float)
    if np.any(lam <= 0):
        raise StepError("wavelengths must be positive for the air refractive index")
    s2 = (1e3 / lam) ** 2
    if m == "ciddor":
        return 1.0 + 0.05792105 / (238.0185 - s2) + 0.00167917 / (57.362 - s2)
    return 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - s2) + 1.5998e-4 / (38.9 - s2)


def vacuum_to_air(wavelength_vac_nm: Any, *, method: str = DEFAULT_AIR_METHOD) -> np.ndarray:
    """Air wavelength in nm for a vacuum wavelength in nm: λ_air = λ_vac / n(λ_vac).

    See :func:`refractive_index_air` for ``method``. Explicit, no iteration.
    """
    lam = np.asarray(wavelength_vac_nm, dtype=float)
    return lam / refractive_index_air(lam, method=method)


def air_to_vacuum(
    wavelength_air_nm: Any, *, method: str = DEFAULT_AIR_METHOD, tol_nm: float = 1e-12
) -> np.ndarray:
    """Vacuum wavelength in nm for an air wavelength in nm, by fixed-point iteration.

    Solves λ_vac = λ_air · n(λ_vac); each pass gains about four digits (n − 1 ≈ 3e-4),
    so it stops after a few passes when the change is below ``tol_nm`` (default 1e-12 nm).

    Parameters
    ----------
    wavelength_air_nm : float or array
        Air wavelength(s) in nm.
    method : {"ciddor", "iau"}
        Dispersion formula, see :func:`refractive_index_air`.
    tol_nm : float
        Convergence tolerance in nm.

    Returns
    -------
    numpy.ndarray
        Vacuum wavelength(s) in nm; the round trip through :func:`vacuum_to_air`
        reproduces the input to better than 1e-9 nm.
    """
    lam_air = np.asarray(wavelength_air_nm, dtype=float)
    lam = lam_air.copy()
    for _ in range(20):
        new = lam_air * refractive_index_air(lam, method=method)
        done = np.all(np.abs(new - lam) < tol_nm)
        lam = new
        if done:
            break
    return lam


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
