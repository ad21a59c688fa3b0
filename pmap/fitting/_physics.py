"""From fitted peak energies to physical quantities: bandgap estimates and shifts."""

from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from ..conventions import K_B_EV_PER_K
from ..errors import PmapNotice, StepError

__all__ = ["bandgap_from_peak", "band_to_band_offset_ev", "peak_shift"]


def band_to_band_offset_ev(peak_energy, temperature_K: float):
    """Energy by which a band-to-band PL maximum lies above the gap (eV).

    For band-to-band emission between parabolic bands in the Boltzmann limit the
    generalized Planck law gives I(E) ∝ E²·sqrt(E − E_g)·exp(−E/kT). Setting
    d ln I/dE = 2/E + 1/(2(E − E_g)) − 1/kT = 0 at the maximum E_p gives, exactly,

        E_p − E_g = kT·E_p / (2·(E_p − 2kT)),

    which is kT/2 when the E² prefactor is neglected (E_p ≫ kT; the prefactor
    adds kT²/(E_p − 2kT), 0.46 meV at 300 K and 1.5 eV).

    Parameters
    ----------
    peak_energy : float, array_like or xarray.DataArray
        PL maximum E_p (eV).
    temperature_K : float
        Carrier (lattice) temperature T in K; k = 8.617333262e-5 eV/K (CODATA 2018).

    Returns
    -------
    same type as ``peak_energy``
        E_p − E_g in eV; NaN where E_p ≤ 2kT (no maximum of that form).

    References
    ----------
    van Roosbroeck & Shockley, Phys. Rev. 94, 1558 (1954);
    Würfel, J. Phys. C 15, 3967 (1982).
    """
    kt = _kt(temperature_K)
    denom = peak_energy - 2.0 * kt
    out = kt * peak_energy / (2.0 * denom)
    return out.where(denom > 0) if isinstance(out, xr.DataArray) else np.where(
        np.asarray(denom) > 0, out, np.nan)


def _kt(temperature_K: float) -> float:
    t = float(temperature_K)
    if not np.isfinite(t) or t <= 0:
        raise StepError(f"band_to_band_temperature_K must be a positive temperature in K, "
                        f"got {temperature_K!r}")
    return K_B_EV_PER_K * t


def _energy(name: str, v) -> float:
    try:
        v = float(v)
    except (TypeError, ValueError):
        raise StepError(f"{name} must be an energy in eV, got {v!r}") from None
    if not np.isfinite(v) or v < 0:
        raise StepError(f"{name} must be a finite non-negative energy in eV, got {v!r}")
    return v


def bandgap_from_peak(
    peak_energy,
    *,
    exciton_binding_ev: float = 0.0,
    material_gap: str = "direct",
    stokes_shift_ev: float = 0.0,
    band_to_band_temperature_K: float | None = None,
    peak_energy_err=None,
    exciton_binding_err_ev: float = 0.0,
    stokes_shift_err_ev: float = 0.0,
):
    """Bandgap estimate (eV) from a PL peak energy map, with its uncertainty if asked.

    E_g ≈ E_peak + E_b + Stokes shift − band-to-band offset.

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
    band_to_band_temperature_K : float, optional
        Temperature (K) of band-to-band emission from parabolic bands: the offset
        of the maximum above the gap, ≈ kT/2 (exactly kT·E_p/(2(E_p − 2kT)) with the
        E² prefactor, see :func:`band_to_band_offset_ev`), is subtracted. Not with
        ``exciton_binding_ev`` (excitonic emission) nor an indirect gap.
    peak_energy_err : xarray.DataArray or array_like, optional
        1σ uncertainty of ``peak_energy`` (eV), e.g. ``result["peak_energy_err"]``.
        When given, the function returns ``(gap, gap_err)``.
    exciton_binding_err_ev, stokes_shift_err_ev : float
        1σ uncertainties (eV) of the corrections; need ``peak_energy_err``.

    Returns
    -------
    gap : xarray.DataArray or ndarray
        Bandgap estimate (eV); for a DataArray, named ``bandgap_estimate`` with the
        caveat in ``attrs["caveat"]``.
    gap_err : xarray.DataArray or ndarray
        Only with ``peak_energy_err``: 1σ uncertainty (eV), named
        ``bandgap_estimate_err``; the errors are taken as independent and added in
        quadrature, σ² = (∂E_g/∂E_p·σ_p)² + σ_b² + σ_s² (∂E_g/∂E_p = 1, or
        1 + (kT/(E_p − 2kT))² with the band-to-band offset). The temperature is
        taken as exact.

    Notes
    -----
    The PL maximum is not the bandgap in general: band filling, tail states,
    temperature, excitonic binding and Stokes shifts all move it. A PmapNotice
    is issued for indirect gaps and Stokes-shifted emission.

    References
    ----------
    Band-to-band offset: van Roosbroeck & Shockley, Phys. Rev. 94, 1558 (1954);
    Würfel, J. Phys. C 15, 3967 (1982).
    """
    if material_gap not in ("direct", "indirect"):
        raise StepError(f"material_gap must be 'direct' or 'indirect', got {material_gap!r}")
    exciton_binding_ev = _energy("exciton_binding_ev", exciton_binding_ev)
    stokes_shift_ev = _energy("stokes_shift_ev", stokes_shift_ev)
    sb = _energy("exciton_binding_err_ev", exciton_binding_err_ev)
    ss = _energy("stokes_shift_err_ev", stokes_shift_err_ev)
    if peak_energy_err is None and (sb > 0 or ss > 0):
        raise StepError("exciton_binding_err_ev / stokes_shift_err_ev need peak_energy_err "
                        "(the fit's peak_energy_err map) to give the estimate's uncertainty")
    caveat = (
        "estimate: PL peak energy + exciton binding energy + Stokes shift; the PL maximum "
        "is shifted from the gap by band filling, tail states and temperature"
    )
    b2b = band_to_band_temperature_K is not None
    if b2b:
        kt = _kt(band_to_band_temperature_K)
        if exciton_binding_ev > 0:
            raise StepError("band_to_band_temperature_K is for band-to-band emission, "
                            "exciton_binding_ev for excitonic emission: give one of them")
        if material_gap == "indirect":
            raise StepError("band_to_band_temperature_K assumes a direct gap (parabolic bands, "
                            "E²·sqrt(E − Eg)·exp(−E/kT)); not for an indirect gap")
        caveat += (
            f"; band-to-band emission at {float(band_to_band_temperature_K):g} K: the maximum of "
            f"E²·sqrt(E − Eg)·exp(−E/kT) lies kT·Ep/(2(Ep − 2kT)) ≈ kT/2 = {kt / 2 * 1e3:.3g} meV "
            "above the gap (Boltzmann limit, parabolic bands), subtracted"
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
    if not isinstance(peak_energy, xr.DataArray):
        peak_energy = np.asarray(peak_energy, dtype=float)
    gap = peak_energy + exciton_binding_ev + stokes_shift_ev
    if b2b:
        gap = gap - band_to_band_offset_ev(peak_energy, band_to_band_temperature_K)
    attrs = {
        "exciton_binding_ev": exciton_binding_ev,
        "stokes_shift_ev": stokes_shift_ev,
        "material_gap": material_gap,
    }
    if b2b:
        attrs["band_to_band_temperature_K"] = float(band_to_band_temperature_K)
    if isinstance(gap, xr.DataArray):
        gap = gap.rename("bandgap_estimate")
        gap.attrs = {
            "units": "eV",
            "long_name": "bandgap estimate from PL peak",
            "caveat": caveat,
            **attrs,
        }
    if peak_energy_err is None:
        return gap
    if not isinstance(peak_energy_err, xr.DataArray):
        peak_energy_err = np.asarray(peak_energy_err, dtype=float)
    slope = 1.0
    if b2b:  # ∂E_g/∂E_p = 1 − ∂offset/∂E_p = 1 + (kT/(E_p − 2kT))²
        slope = 1.0 + (kt / (peak_energy - 2.0 * kt)) ** 2
    err = ((slope * peak_energy_err) ** 2 + sb**2 + ss**2) ** 0.5
    if isinstance(err, xr.DataArray):
        err = err.rename("bandgap_estimate_err")
        err.attrs = {
            "units": "eV",
            "long_name": "1-sigma uncertainty of the bandgap estimate",
            "method": "independent errors in quadrature: peak_energy_err, "
            "exciton_binding_err_ev, stokes_shift_err_ev (temperature taken as exact); "
            "the caveat's systematic shifts are not included",
            "exciton_binding_err_ev": sb,
            "stokes_shift_err_ev": ss,
        }
    return gap, err


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
