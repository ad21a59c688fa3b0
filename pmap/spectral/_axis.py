"""Spectral axis conversions: wavelength → photon energy, wavenumber, Raman shift.

Intensities are converted as densities (Jacobian applied), so that the
integral over the new axis equals the integral over the old one.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import xarray as xr
from scipy import sparse

from ..conventions import HC_EV_NM, INTENSITY_UNITS
from ..errors import StepError
from ..noise import PEDESTAL_COORD, SCALE_COORD, noise_correlated, noise_scaled
from ..steps import register_step
from ._airvac import DEFAULT_AIR_METHOD, air_to_vacuum, vacuum_wavelength_nm
from ._common import check_cube, finish, float_dtype

__all__ = ["channel_edges", "to_energy", "to_wavenumber", "to_raman_shift"]

# intensity unit -> (is a density per nm, unit without the per-nm / per-channel part)
_PER_CHANNEL = {
    "counts": "counts",
    "counts/s": "counts/s",
    "counts/s/W": "counts/s/W",
    "W": "W",
    "arbitrary": "arbitrary",
    "1": "arbitrary",
}
_PER_NM = {"counts/nm": "counts", "W/nm": "W", "photons/s/m2/nm": "photons/s/m2"}


def channel_edges(centres: Any) -> np.ndarray:
    """Channel edges (n + 1) from ascending channel centres (n): midpoints inside,
    half the neighbouring spacing outside (common practice)."""
    c = np.asarray(centres, dtype=float)
    if c.size < 2:
        raise StepError("at least two channels are needed to define channel widths")
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[c[0] - (mid[0] - c[0])], mid, [c[-1] + (c[-1] - mid[-1])]])


def _target_unit(unit: str, per: str) -> tuple[bool, str]:
    """(input is per channel, output unit) for a conversion to a density per ``per``."""
    if unit in _PER_NM:
        per_channel, base = False, _PER_NM[unit]
    elif unit in _PER_CHANNEL:
        per_channel, base = True, _PER_CHANNEL[unit]
    else:
        raise StepError(
            f"cannot convert intensity unit {unit!r} to a density per {per}; "
            f"expected one of {sorted(_PER_CHANNEL) + sorted(_PER_NM)}"
        )
    out = base if base == "arbitrary" else f"{base}/{per}"
    if out not in INTENSITY_UNITS:
        raise StepError(f"resulting unit {out!r} is not a pmap intensity unit")
    return per_channel, out


def _rebin_matrix(edges: np.ndarray, new_edges: np.ndarray) -> sparse.csr_matrix:
    """Sparse (n, m) matrix R so that densities on ``new_edges`` are ``values @ R``.

    R[i, j] = |old bin i ∩ new bin j| / |new bin j| (uniform density inside each old bin):
    the same as interpolating the cumulative integral linearly at the new edges, so every
    new bin holds exactly the old area it overlaps.
    """
    lo = np.maximum(edges[:-1, None], new_edges[None, :-1])
    hi = np.minimum(edges[1:, None], new_edges[None, 1:])
    overlap = np.clip(hi - lo, 0.0, None) / np.diff(new_edges)[None, :]
    return sparse.csr_matrix(overlap)


#: target dim -> (axis unit, long_name, intensity density "per" unit)
_AXES = {
    "energy": ("eV", "photon energy", "eV"),
    "wavenumber": ("cm-1", "wavenumber", "cm-1"),
    "raman_shift": ("cm-1", "shift from excitation", "cm-1"),
}


def _convert_axis(
    cube: xr.DataArray,
    dim: str,
    x_of_vac: Callable[[np.ndarray], np.ndarray],
    *,
    jacobian: bool,
    resample: str | None,
    n_channels: int | None,
    method: str,
    extra_params: dict | None = None,
    attrs_extra: dict | None = None,
) -> xr.DataArray:
    unit, long_name, per = _AXES[dim]
    name = f"to_{dim}"
    params = {
        **(extra_params or {}),
        "resample": resample,
        "n_channels": n_channels,
        "jacobian": jacobian,
        "method": method,
    }
    cube, sdim = check_cube(cube)
    if sdim != "wavelength":
        raise StepError(f"{name} needs a wavelength axis (nm), the cube has {sdim!r}")
    if resample not in (None, "uniform"):
        raise StepError(f"resample must be None or 'uniform', got {resample!r}")
    medium = str(cube.attrs.get("wavelength_medium", "air")).lower()
    lam = np.asarray(cube["wavelength"].values, dtype=float)
    lam_vac = vacuum_wavelength_nm(cube, method=method)
    x = x_of_vac(lam_vac)
    edges_axis = channel_edges(lam)
    edges_vac = air_to_vacuum(edges_axis, method=method) if medium == "air" else edges_axis
    x_edges = x_of_vac(edges_vac)
    if not (np.all(np.diff(x) > 0) or np.all(np.diff(x) < 0)):
        raise StepError(f"{name}: the new axis is not monotonic over the cube's channels")
    unit_in = str(cube.attrs.get("units", "counts"))
    out_dtype = float_dtype(cube.dtype)
    if jacobian:
        per_channel, unit_out = _target_unit(unit_in, per)
        # |dλ_axis/dx| at the channel centres; dλ_axis/dλ_vac from a central difference.
        h = 1e-3
        dx = np.abs(x_of_vac(lam_vac + h) - x_of_vac(lam_vac - h)) / (2 * h)
        if medium == "air":
            dvac = air_to_vacuum(lam + h, method=method) - air_to_vacuum(lam - h, method=method)
            dvac /= 2 * h
        else:
            dvac = np.ones_like(lam)
        scale = 1.0 / (dx * dvac)
        if per_channel:
            scale = scale / np.diff(edges_axis)
    else:
        unit_out = unit_in
        scale = np.ones_like(lam)
    order = np.argsort(x)
    factor = xr.DataArray(scale.astype(out_dtype), dims=("wavelength",))
    n = order.size
    if np.array_equal(order, np.arange(n)):
        take: slice | np.ndarray = slice(None)
    elif np.array_equal(order, np.arange(n)[::-1]):  # E = hc/λ: a reversal, a view per chunk
        take = slice(None, None, -1)
    else:
        take = order
    # channels put in order first: the product is then written in order (C-contiguous);
    # a reversed view of it would be copied again by every block function after it
    src, factor = cube.astype(out_dtype).isel(wavelength=take), factor.isel(wavelength=take)
    dens = noise_scaled(src * factor, src, factor, f"to_{dim} Jacobian")
    keep = (SCALE_COORD, PEDESTAL_COORD)  # the noise model's coordinates follow the channels
    dens = dens.drop_vars(
        [c for c in dens.coords if "wavelength" in dens[c].dims and c not in keep]
    )
    dens = dens.rename({"wavelength": dim})
    xs = x[order]
    if resample == "uniform":
        e_sorted = np.sort(x_edges)
        n_new = int(n_channels) if n_channels is not None else lam.size
        if n_new < 2:
            raise StepError(f"n_channels must be at least 2, got {n_new}")
        new_edges = np.linspace(e_sorted[0], e_sorted[-1], n_new + 1)
        xs = 0.5 * (new_edges[1:] + new_edges[:-1])
        if not jacobian:
            raise StepError("resample='uniform' needs jacobian=True (it conserves densities)")
        rebin = _rebin_matrix(e_sorted, new_edges)
        dens = noise_correlated(dens, dens, f"to_{dim} uniform resampling mixes channels")
        dens = dens.drop_vars([c for c in keep if c in dens.coords and dim in dens[c].dims])

        def core(v: np.ndarray) -> np.ndarray:
            flat = v.reshape(-1, v.shape[-1]).astype(np.float64)
            return np.asarray(flat @ rebin).reshape(v.shape[:-1] + (n_new,)).astype(out_dtype)

        dens = xr.apply_ufunc(
            core,
            dens,
            input_core_dims=[[dim]],
            output_core_dims=[[dim + "_new"]],
            dask="parallelized",
            output_dtypes=[out_dtype],
            dask_gufunc_kwargs={"output_sizes": {dim + "_new": n_new}},
            keep_attrs=True,
        ).rename({dim + "_new": dim})
    elif n_channels is not None:
        raise StepError("n_channels is only used with resample='uniform'")
    dens = dens.assign_coords({dim: (dim, xs, {"units": unit, "long_name": long_name})})
    attrs = {k: v for k, v in cube.attrs.items() if k != "wavelength_medium"}
    attrs["units"] = unit_out
    attrs.update(attrs_extra or {})
    return finish(dens, cube, name, params, attrs=attrs)


def _per_channel_to_density(cube: xr.DataArray, jacobian: bool) -> xr.DataArray:
    """A cube already on an energy axis: counts per channel → per eV; densities unchanged."""
    cube, _ = check_cube(cube)
    unit = str(cube.attrs.get("units", "counts"))
    if not jacobian or unit not in _PER_CHANNEL or unit in ("arbitrary", "1"):
        return cube
    _, unit_out = _target_unit(unit, "eV")
    width = xr.DataArray(1.0 / np.diff(channel_edges(cube["energy"].values)), dims=("energy",))
    out_dtype = float_dtype(cube.dtype)
    out = noise_scaled(cube.astype(out_dtype) * width.astype(out_dtype), cube, width,
                       "to_energy: per channel to per eV")
    attrs = {**cube.attrs, "units": unit_out}
    return finish(out, cube, "to_energy", {"already_energy": True}, attrs=attrs)


@register_step("to_energy")
def to_energy(
    cube: xr.DataArray,
    *,
    resample: str | None = None,
    n_channels: int | None = None,
    jacobian: bool = True,
    method: str = DEFAULT_AIR_METHOD,
) -> xr.DataArray:
    """Convert a wavelength cube to photon energy in eV (ascending), Jacobian applied.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on a wavelength axis in nm (air or vacuum, attr ``wavelength_medium``).
    resample : {None, "uniform"}
        None keeps one channel per wavelength channel (non-uniform energy steps);
        "uniform" rebins onto an evenly spaced energy grid conserving the integral.
    n_channels : int, optional
        Number of channels of the uniform grid (default: as many as the input).
    jacobian : bool
        Convert the intensity to a density per eV (default True). False only relabels the axis.
    method : {"ciddor", "iau"}
        Air dispersion used to get vacuum wavelengths when the axis is in air.

    Returns
    -------
    xarray.DataArray
        Cube with dim ``energy`` (eV, ascending); a cube already on an energy axis keeps
        its axis and, if in counts per channel, is divided by the channel widths in eV
        (so one pipeline serves both kinds of cube). Units: counts per channel ("counts",
        "counts/s", "counts/s/W") are first divided by the channel width in nm (from the
        channel edges), so the result is e.g. "counts/eV" and ∫ I dE equals the total counts;
        densities per nm ("counts/nm", "W/nm") are multiplied by |dλ/dE| only.

    Notes
    -----
    I_E = I_λ · |dλ/dE| = I_λ · λ²/(hc) for a vacuum axis (λ in nm, hc in eV·nm);
    for an air axis the factor dλ_air/dλ_vac is included. Energies use vacuum wavelengths:
    E = hc/λ_vac. The uniform rebinning interpolates the cumulative integral at the new
    bin edges, never the values. Cost: one multiply per value (plus a cumulative sum with
    ``resample``).

    References
    ----------
    Mooney & Kambhampati, J. Phys. Chem. Lett. 4, 3316 (2013).
    """
    if isinstance(cube, xr.DataArray) and "energy" in cube.dims:
        return _per_channel_to_density(cube, jacobian)
    return _convert_axis(
        cube,
        "energy",
        lambda lv: HC_EV_NM / lv,
        jacobian=jacobian,
        resample=resample,
        n_channels=n_channels,
        method=method,
    )


@register_step("to_wavenumber")
def to_wavenumber(
    cube: xr.DataArray,
    *,
    resample: str | None = None,
    n_channels: int | None = None,
    jacobian: bool = True,
    method: str = DEFAULT_AIR_METHOD,
) -> xr.DataArray:
    """Convert a wavelength cube to absolute (vacuum) wavenumber in cm⁻¹, ascending.

    ν̃ = 10⁷/λ_vac (λ in nm). Options and units as :func:`to_energy`, per cm⁻¹
    (e.g. "counts/cm-1").
    """
    return _convert_axis(
        cube,
        "wavenumber",
        lambda lv: 1e7 / lv,
        jacobian=jacobian,
        resample=resample,
        n_channels=n_channels,
        method=method,
    )


@register_step("to_raman_shift")
def to_raman_shift(
    cube: xr.DataArray,
    *,
    excitation_wavelength_nm: float | None = None,
    resample: str | None = None,
    n_channels: int | None = None,
    jacobian: bool = True,
    method: str = DEFAULT_AIR_METHOD,
) -> xr.DataArray:
    """Convert a wavelength cube to shift from the excitation line in cm⁻¹ (Stokes positive).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on a wavelength axis in nm.
    excitation_wavelength_nm : float, optional
        Laser wavelength in nm, in the same medium as the cube's axis; default the
        cube's ``excitation_wavelength_nm`` attr (StepError if neither is known).
    resample, n_channels, jacobian, method
        As :func:`to_energy`; densities are per cm⁻¹.

    Returns
    -------
    xarray.DataArray
        Cube with dim ``raman_shift`` in cm⁻¹: Δν̃ = 10⁷/λ_exc − 10⁷/λ (vacuum nm).
    """
    exc = excitation_wavelength_nm
    if exc is None:
        exc = cube.attrs.get("excitation_wavelength_nm")
    if exc is None:
        raise StepError(
            "to_raman_shift needs the excitation wavelength: give excitation_wavelength_nm= "
            "or set the cube attr 'excitation_wavelength_nm'"
        )
    exc = float(exc)
    if not exc > 0:
        raise StepError(f"excitation wavelength must be positive, got {exc}")
    medium = str(cube.attrs.get("wavelength_medium", "air")).lower()
    exc_vac = float(air_to_vacuum(exc, method=method)) if medium == "air" else exc
    return _convert_axis(
        cube,
        "raman_shift",
        lambda lv: 1e7 / exc_vac - 1e7 / lv,
        jacobian=jacobian,
        resample=resample,
        n_channels=n_channels,
        method=method,
        extra_params={"excitation_wavelength_nm": exc},
        attrs_extra={"excitation_wavelength_nm": exc},
    )
