"""Air ↔ vacuum wavelength formulas (IAU standard and Ciddor 1996), plain numpy.

Bottom layer, so that the demo generator and the spectral steps share one
implementation; the cube steps ``to_vacuum``/``to_air`` live in
:mod:`pmap.spectral`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .errors import StepError

__all__ = [
    "AIR_METHODS",
    "DEFAULT_AIR_METHOD",
    "refractive_index_air",
    "air_to_vacuum",
    "vacuum_to_air",
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
