"""From fitted peak energies to physical quantities: bandgap estimates and shifts."""

from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from ..errors import PmapNotice, StepError

__all__ = ["bandgap_from_peak", "peak_shift"]


def bandgap_from_peak(
    peak_energy,
    *,
    exciton_binding_ev: float = 0.0,
    material_gap: str = "direct",
    stokes_shift_ev: float = 0.0,
):
    """Bandgap estimate (eV) from a PL peak energy map: E_g ≈ E_peak + E_b + Stokes shift.

    Parameters
    ----------
    peak_energy : xarray.DataArray or array_like
        PL peak energy (eV), e.g. ``result["peak_energy"].sel(peak=0)``.
    exciton_binding_ev : float
        Exciton binding energy (eV) to add when the peak is excitonic emission.
    material_gap : {"direct", "indirect"}
        For indirect-gap materials the PL peak is phonon-assisted and is not the gap.
    stokes_shift_ev : float
        Known Stokes shift between absorption edge and emission (eV), added back.

    Returns
    -------
    xarray.DataArray or ndarray
        Bandgap estimate (eV); for a DataArray the caveat is in ``attrs["caveat"]``.

    Notes
    -----
    The PL maximum is not the bandgap in general: band filling, tail states,
    temperature (kT/2 shift of the band-to-band maximum), excitonic binding and
    Stokes shifts all move it. A PmapNotice is issued for indirect gaps and
    Stokes-shifted emission.
    """
    if material_gap not in ("direct", "indirect"):
        raise StepError(f"material_gap must be 'direct' or 'indirect', got {material_gap!r}")
    for name, v in (
        ("exciton_binding_ev", exciton_binding_ev),
        ("stokes_shift_ev", stokes_shift_ev),
    ):
        if not np.isfinite(v) or v < 0:
            raise StepError(f"{name} must be a finite non-negative energy in eV, got {v!r}")
    caveat = (
        "estimate: PL peak energy + exciton binding energy + Stokes shift; the PL maximum "
        "is shifted from the gap by band filling, tail states and temperature"
    )
    if material_gap == "indirect":
        caveat += "; indirect gap: emission is phonon-assisted, the PL peak is not the gap"
        warnings.warn(
            "indirect-gap material: the PL peak lies below the gap by phonon energies "
            "and is not the bandgap",
            PmapNotice,
            stacklevel=2,
        )
    if stokes_shift_ev > 0:
        caveat += f"; Stokes shift {stokes_shift_ev:g} eV added back"
        warnings.warn(
            "Stokes-shifted emission: the PL peak is not the absorption gap; the given "
            "shift was added back",
            PmapNotice,
            stacklevel=2,
        )
    gap = peak_energy + exciton_binding_ev + stokes_shift_ev
    if isinstance(gap, xr.DataArray):
        gap = gap.rename("bandgap_estimate")
        gap.attrs = {
            "units": "eV",
            "long_name": "bandgap estimate from PL peak",
            "caveat": caveat,
            "exciton_binding_ev": exciton_binding_ev,
            "stokes_shift_ev": stokes_shift_ev,
            "material_gap": material_gap,
        }
    return gap


def peak_shift(peak_energy, reference_ev: float):
    """Shift of the peak energy from a reference, E_peak − E_ref (eV; positive = blue shift)."""
    if not np.isfinite(reference_ev) or reference_ev <= 0:
        raise StepError(f"reference_ev must be a positive energy in eV, got {reference_ev!r}")
    out = peak_energy - reference_ev
    if isinstance(out, xr.DataArray):
        out = out.rename("peak_shift")
        out.attrs = {
            "units": "eV",
            "long_name": f"peak shift from {reference_ev:g} eV",
            "reference_ev": reference_ev,
        }
    return out
