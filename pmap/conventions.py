"""Physical constants, unit vocabulary and photon energy ↔ wavelength conversion.

The bottom layer of pmap: imports nothing else from the package except
:mod:`pmap.errors`.
"""

from __future__ import annotations

import numpy as np

from .errors import CubeValidationError

__all__ = [
    "udunits",
    "HC_EV_NM",
    "K_B_EV_PER_K",
    "SPECTRAL_DIMS",
    "SPATIAL_DIMS",
    "SPECTRAL_UNITS",
    "INTENSITY_UNITS",
    "CUBE_NAME",
    "nm_to_ev",
    "ev_to_nm",
    "nm_to_wavenumber",
    "integrated_unit",
    "normalise_length_unit",
    "normalise_intensity_unit",
]

# Defining constants of the 2019 SI (exact; BIPM, The International System of Units,
# 9th edition, 2019), the same values as scipy.constants without importing scipy here.
_H_J_S = 6.62607015e-34
_C_M_PER_S = 299792458.0
_E_C = 1.602176634e-19
_K_J_PER_K = 1.380649e-23
#: h·c in eV·nm, exact in the 2019 SI (CODATA 2018): 1239.841984... eV nm.
HC_EV_NM: float = _H_J_S * _C_M_PER_S / _E_C * 1e9
#: Boltzmann constant in eV/K.
K_B_EV_PER_K: float = _K_J_PER_K / _E_C

CUBE_NAME = "intensity"
SPATIAL_DIMS = ("y", "x")
#: Spectral dimension names and the unit each one carries.
SPECTRAL_DIMS = {"wavelength": "nm", "energy": "eV", "wavenumber": "cm-1", "raman_shift": "cm-1"}
SPECTRAL_UNITS = SPECTRAL_DIMS

# Accepted spellings → canonical CF-style unit strings.
_LENGTH_UNITS = {
    "um": "um", "µm": "um", "μm": "um", "micron": "um", "microns": "um", "micrometer": "um",
    "micrometre": "um", "nm": "nm", "nanometer": "nm", "nanometre": "nm", "mm": "mm",
    "pixel": "pixel", "pixels": "pixel", "px": "pixel", "1": "pixel",
}
_LENGTH_TO_UM = {"um": 1.0, "nm": 1e-3, "mm": 1e3}

#: Canonical intensity units pmap understands.
INTENSITY_UNITS = (
    "counts", "counts/s", "counts/s/W", "1", "arbitrary", "counts/eV", "counts/s/eV",
    "counts/s/W/eV", "counts/nm", "W/nm", "W/eV", "photons/s",
    # densities per wavenumber (pmap.spectral.to_wavenumber / to_raman_shift)
    "counts/cm-1", "counts/s/cm-1", "counts/s/W/cm-1", "W/cm-1",
    # absolute photon flux per unit energy or wavelength (absolute PL, pmap.planck)
    "photons/s/m2/eV", "photons/s/m2/nm",
)
_INTENSITY_ALIASES = {
    "count": "counts", "counts": "counts", "cts": "counts", "adu": "counts", "dn": "counts",
    "counts/s": "counts/s", "counts s-1": "counts/s", "cps": "counts/s", "counts/sec": "counts/s",
    "counts/s/w": "counts/s/W", "counts s-1 w-1": "counts/s/W",
    "1": "1", "": "1", "a.u.": "arbitrary", "au": "arbitrary", "arb. units": "arbitrary",
    "arbitrary": "arbitrary", "normalized": "1", "normalised": "1",
    "counts/ev": "counts/eV", "counts/s/ev": "counts/s/eV", "counts/s/w/ev": "counts/s/W/eV",
    "counts/nm": "counts/nm", "w/nm": "W/nm", "w/ev": "W/eV", "photons/s": "photons/s",
    "counts/cm-1": "counts/cm-1", "counts/s/cm-1": "counts/s/cm-1",
    "counts/s/w/cm-1": "counts/s/W/cm-1", "w/cm-1": "W/cm-1",
    "photons/s/m2/ev": "photons/s/m2/eV", "photons s-1 m-2 ev-1": "photons/s/m2/eV",
    "photons/(s m2 ev)": "photons/s/m2/eV", "photons s^-1 m^-2 ev^-1": "photons/s/m2/eV",
    "photons/s/m2/nm": "photons/s/m2/nm", "photons s-1 m-2 nm-1": "photons/s/m2/nm",
    "photons/(s m2 nm)": "photons/s/m2/nm", "photons s^-1 m^-2 nm^-1": "photons/s/m2/nm",
}


#: pmap's unit words that UDUNITS-2 does not parse, and the UDUNITS string written for them
#: in files meant for other tools (NetCDF export). A photon count and a pixel index are
#: pure numbers to UDUNITS; the variable's long_name keeps what is counted.
_UDUNITS = {
    "pixel": "1", "arbitrary": "1", "photons/s": "s-1", "photons/s/m2/eV": "s-1 m-2 eV-1",
    "photons/s/m2/nm": "s-1 m-2 nm-1",
    "e-/count": "1",
}


def udunits(units: str) -> str:
    """A UDUNITS-2 string for one of pmap's unit strings (unchanged when it already is one).

    ``"pixel"`` → ``"1"``, ``"photons/s/m2/eV"`` → ``"s-1 m-2 eV-1"``; see ``_UDUNITS``.
    """
    import re

    text = str(units).strip()
    if text in _UDUNITS:
        return _UDUNITS[text]
    # composite units ("pixel2" for a region's area, "counts/pixel"): a pixel is a number
    return re.sub(r"\bpixels?(\^?-?\d+)?\b", "1", text)


def nm_to_ev(wavelength_nm):
    """Photon energy in eV for a vacuum wavelength in nm: E = hc/λ.

    Works on scalars and arrays. Wavelengths must be positive.
    """
    lam = np.asarray(wavelength_nm, dtype=float)
    return HC_EV_NM / lam


def ev_to_nm(energy_ev):
    """Vacuum wavelength in nm for a photon energy in eV: λ = hc/E."""
    e = np.asarray(energy_ev, dtype=float)
    return HC_EV_NM / e


def nm_to_wavenumber(wavelength_nm):
    """Wavenumber in cm⁻¹ for a vacuum wavelength in nm (1e7/λ)."""
    return 1e7 / np.asarray(wavelength_nm, dtype=float)


def integrated_unit(unit: str, axis_unit: str = "eV") -> str:
    """Unit of an intensity in ``unit`` integrated over an axis in ``axis_unit``.

    A density per axis unit loses the denominator ("counts/eV" over eV → "counts");
    anything else gains the factor ("counts" over eV → "counts eV").
    """
    if unit in ("1", "arbitrary"):
        return unit
    suffix = "/" + axis_unit
    if unit.endswith(suffix):
        return unit[: -len(suffix)]
    return f"{unit} {axis_unit}"


def normalise_length_unit(unit: str | None) -> str:
    """Canonical spelling of a spatial length unit ("um", "nm", "mm" or "pixel").

    Raises CubeValidationError for a unit pmap does not understand.
    """
    if unit is None:
        return "pixel"
    key = str(unit).strip().lower() if str(unit).strip() not in ("µm", "μm") else str(unit).strip()
    if key in _LENGTH_UNITS:
        return _LENGTH_UNITS[key]
    raise CubeValidationError(f"spatial unit {unit!r} is not understood (use um, nm, mm or pixel)")


def length_to_um_factor(unit: str) -> float:
    """Multiplier that converts a canonical length unit to µm (1 for pixel-less units)."""
    return _LENGTH_TO_UM.get(unit, 1.0)


def normalise_intensity_unit(unit: str | None) -> str:
    """Canonical spelling of an intensity unit; raise CubeValidationError if unknown."""
    if unit is None:
        return "counts"
    key = str(unit).strip().lower()
    if key in _INTENSITY_ALIASES:
        return _INTENSITY_ALIASES[key]
    if str(unit) in INTENSITY_UNITS:
        return str(unit)
    raise CubeValidationError(
        f"intensity unit {unit!r} is not understood (known: {', '.join(INTENSITY_UNITS)})"
    )
