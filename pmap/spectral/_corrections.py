"""Detector and instrument corrections: dark, spectral response, exposure normalisation."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from ..errors import StepError
from ..noise import noise_scaled, noise_subtracted
from ..steps import WholeMapPass, register_step, whole_map_values
from ._common import (
    check_cube,
    finish,
    float_dtype,
    load_spectrum,
    region_slice,
    spectrum_on_axis,
)

__all__ = ["subtract_dark", "correct_response", "response_from_lamp", "normalise_exposure"]


def _describe(obj: Any) -> Any:
    """How a parameter is written in provenance (paths and numbers as given)."""
    if isinstance(obj, xr.DataArray):
        return f"<DataArray {dict(obj.sizes)}>"
    return str(obj) if not isinstance(obj, (int, float, dict, list, tuple)) else obj


@register_step("subtract_dark")
def subtract_dark(
    cube: xr.DataArray, *, dark: Any = None, region: Mapping[str, Any] | None = None,
    whole_map: WholeMapPass | None = None,
) -> xr.DataArray:
    """Subtract a dark (background) signal.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (counts or any intensity unit).
    dark : DataArray, float or path, optional
        A dark cube (same y, x and channels), one dark spectrum (same channels, matched by
        channel index), a constant (same units as the cube), or a file: a 1- or 2-column
        text spectrum, or any cube file :func:`pmap.open_cube` reads.
    region : dict, optional
        Instead of ``dark``: an off-sample region ``{"x": (x0, x1), "y": (y0, y1)}`` in the
        cube's spatial units (µm); its mean spectrum is subtracted from every pixel.
    whole_map : pmap.steps.WholeMapPass, optional
        Given by the pipeline runner: the region's mean spectrum is computed through it
        once, now, and recorded in the provenance. Without it (the default) nothing is
        computed here.

    Returns
    -------
    xarray.DataArray
        Lazy cube, same units, floating dtype.
    """
    cube, sdim = check_cube(cube)
    if (dark is None) == (region is None):
        raise StepError("give exactly one of dark= (cube, spectrum, constant or file) or region=")
    dt = float_dtype(cube.dtype)
    x = cube.astype(dt)
    if region is not None:
        if not isinstance(region, Mapping):
            raise StepError(f"region must be a mapping like {{'x': (0, 5)}}, got {region!r}")
        sub = region_slice(x, region)
        ref = sub.mean(("y", "x"))
        if ref.chunks is not None:
            ref = ref.copy(data=whole_map_values(whole_map, "subtract_dark",
                                                 region_mean_spectrum=ref.data))
        out = x - ref
        sub_val = ref
        params = {"region": {k: list(v) for k, v in region.items()}}
    else:
        d = load_spectrum(dark, what="dark")
        params = {"dark": _describe(dark)}
        if isinstance(d, float):
            out = x - dt.type(d)
            sub_val = d
        elif "y" in d.dims and "x" in d.dims and (d.sizes["y"] > 1 or d.sizes["x"] > 1):
            if d.sizes["y"] != cube.sizes["y"] or d.sizes["x"] != cube.sizes["x"]:
                raise StepError(
                    f"dark cube is {d.sizes['y']}×{d.sizes['x']} pixels, "
                    f"the cube {cube.sizes['y']}×{cube.sizes['x']}"
                )
            dsd = next((s for s in d.dims if s not in ("y", "x")), None)
            if dsd is None or d.sizes[dsd] != cube.sizes[sdim]:
                raise StepError("dark cube must have the same number of channels as the cube")
            if d.ndim != 3:
                raise StepError(f"dark cube must have dims (y, x, channels), got {d.dims}")
            dd = xr.DataArray(d.transpose("y", "x", dsd).data, dims=("y", "x", sdim))
            out = x - dd.astype(dt)
            sub_val = dd
        else:
            vals = spectrum_on_axis(d, cube, sdim, what="dark spectrum", interpolate=False)
            sub_val = xr.DataArray(vals, dims=(sdim,))
            out = x - sub_val.astype(dt)
    out = out.transpose(*cube.dims)
    out = noise_subtracted(out, cube, sub_val, "subtract_dark")
    return finish(out, cube, "subtract_dark", params)


@register_step("correct_response")
def correct_response(
    cube: xr.DataArray, *, response: Any, units: str | None = None
) -> xr.DataArray:
    """Divide by an instrument spectral response curve interpolated onto the cube's axis.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on a spectral axis.
    response : DataArray or path
        Response on the same kind of axis (a DataArray with the cube's spectral dim, or a
        2-column text file: axis value, response). Linearly interpolated; it must cover
        the cube's whole axis and be positive there.
    units : str, optional
        Intensity units of the result (default: unchanged, for a relative response).

    Returns
    -------
    xarray.DataArray
        Lazy cube ``cube / response``.
    """
    cube, sdim = check_cube(cube)
    r = load_spectrum(response, what="response", sdim=sdim)
    if isinstance(r, float):
        raise StepError("response must be a spectrum (DataArray or 2-column file), not a number")
    if sdim not in r.dims:
        raise StepError(
            f"response must be given on the cube's {sdim!r} axis, has dims {list(r.dims)}"
        )
    vals = spectrum_on_axis(r, cube, sdim, what="response", interpolate=True)
    bad = ~(np.isfinite(vals) & (vals > 0))
    if np.any(bad):
        first = float(cube[sdim].values[np.flatnonzero(bad)[0]])
        raise StepError(
            f"response is not positive and finite over the cube's axis "
            f"({int(bad.sum())} channels, first at {sdim}={first:g})"
        )
    dt = float_dtype(cube.dtype)
    out = cube.astype(dt) / xr.DataArray(vals.astype(dt), dims=(sdim,))
    out = noise_scaled(out, cube, xr.DataArray(1.0 / vals, dims=(sdim,)), "correct_response")
    attrs = dict(cube.attrs)
    if units is not None:
        from ..conventions import normalise_intensity_unit

        attrs["units"] = normalise_intensity_unit(units)
    return finish(
        out.transpose(*cube.dims),
        cube,
        "correct_response",
        {"response": _describe(response), "units": units},
        attrs=attrs,
    )


def response_from_lamp(measured: Any, certified: Any, *, normalise: bool = True) -> xr.DataArray:
    """Instrument response from a reference lamp: measured / certified spectrum.

    Parameters
    ----------
    measured : DataArray or path
        The lamp as measured by the instrument (a spectrum on ``wavelength`` or a cube,
        averaged over all other dims), counts per channel.
    certified : DataArray or path
        The lamp's certified spectral radiance or irradiance on wavelength (nm), any unit;
        interpolated onto the measured axis and must cover it.
    normalise : bool
        Scale the response to a maximum of 1 (default True), so that
        :func:`correct_response` keeps the cube's scale.

    Returns
    -------
    xarray.DataArray
        Response on the measured axis (dim ``wavelength``), for :func:`correct_response`.
    """
    m = load_spectrum(measured, what="measured lamp spectrum")
    c = load_spectrum(certified, what="certified lamp spectrum")
    if isinstance(m, float) or isinstance(c, float) or "wavelength" not in m.dims:
        raise StepError("measured and certified lamp spectra must be spectra on wavelength")
    other = [d for d in m.dims if d != "wavelength"]
    m1 = m.mean(other) if other else m
    cert = spectrum_on_axis(c, m1, "wavelength", what="certified spectrum", interpolate=True)
    if np.any(cert <= 0) or not np.all(np.isfinite(cert)):
        raise StepError("certified spectrum must be positive over the measured axis")
    resp = m1.astype(float) / xr.DataArray(cert, dims=("wavelength",))
    if normalise:
        resp = resp / resp.max()
    resp = resp.assign_coords(wavelength=m1["wavelength"])
    resp.name = "response"
    resp.attrs = {
        "units": "1" if normalise else "arbitrary",
        "long_name": "instrument spectral response",
        "wavelength_medium": m.attrs.get("wavelength_medium", "air"),
    }
    return resp


_POWER_UNITS = {"W": 1.0, "mW": 1e-3, "uW": 1e-6, "µW": 1e-6, "nW": 1e-9}


def _positive(value: Any, what: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise StepError(f"{what} must be a number, got {value!r}") from None
    if not (np.isfinite(v) and v > 0):
        raise StepError(f"{what} must be positive, got {value!r}")
    return v


@register_step("normalise_exposure")
def normalise_exposure(
    cube: xr.DataArray,
    *,
    exposure_s: float | None = None,
    per_power: bool = False,
    excitation_power_W: float | None = None,
) -> xr.DataArray:
    """Divide by exposure time (→ counts/s) and optionally by excitation power (→ counts/s/W).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube in "counts" (or "counts/s" when only the power is divided out).
    exposure_s : float, optional
        Exposure per spectrum in s; default the cube attr ``exposure_s``.
    per_power : bool
        Also divide by the excitation power (implied when ``excitation_power_W`` is given).
    excitation_power_W : float, optional
        Power at the sample in W; default the attr ``excitation_power_W``, else a stack
        coordinate ``excitation_power``/``power`` in W (mW, µW) giving one power per map.

    Returns
    -------
    xarray.DataArray
        Lazy cube in "counts/s" or "counts/s/W".

    Raises
    ------
    StepError
        If a needed exposure or power is neither in the attrs nor given, or the units
        are not counts / counts/s.
    """
    cube, sdim = check_cube(cube)
    unit = str(cube.attrs.get("units", "counts"))
    per_power = per_power or excitation_power_W is not None
    dt = float_dtype(cube.dtype)
    out = cube.astype(dt)
    fac: Any = 1.0  # out = cube · fac, for the noise model
    attrs = dict(cube.attrs)
    params: dict[str, Any] = {
        "exposure_s": exposure_s,
        "per_power": per_power,
        "excitation_power_W": excitation_power_W,
    }
    if unit == "counts":
        exp = exposure_s if exposure_s is not None else cube.attrs.get("exposure_s")
        if exp is None:
            raise StepError(
                "exposure time unknown: the cube has no 'exposure_s' attr; give exposure_s="
            )
        exp = _positive(exp, "exposure_s")
        out = out / dt.type(exp)
        fac = 1.0 / exp
        attrs["exposure_s"] = exp
        unit = "counts/s"
    elif unit != "counts/s" or not per_power:
        raise StepError(
            f"normalise_exposure needs a cube in counts (or counts/s to divide by "
            f"power only), this one is in {unit!r}"
        )
    if per_power:
        pw = (
            excitation_power_W
            if excitation_power_W is not None
            else cube.attrs.get("excitation_power_W")
        )
        if pw is not None:
            pw = _positive(pw, "excitation_power_W")
            out = out / dt.type(pw)
            fac = fac / pw
            attrs["excitation_power_W"] = pw
        else:
            dim = next((d for d in ("excitation_power", "power") if d in cube.dims), None)
            if dim is None or dim not in cube.coords:
                raise StepError(
                    "excitation power unknown: no 'excitation_power_W' attr, no "
                    "excitation_power coordinate; give excitation_power_W="
                )
            u = str(cube[dim].attrs.get("units", "W"))
            if u not in _POWER_UNITS:
                raise StepError(
                    f"{dim} coordinate unit {u!r} is not a power unit ({', '.join(_POWER_UNITS)})"
                )
            pv = np.asarray(cube[dim].values, dtype=float) * _POWER_UNITS[u]
            if np.any(~np.isfinite(pv) | (pv <= 0)):
                raise StepError(f"{dim} coordinate has non-positive powers")
            out = out / xr.DataArray(pv.astype(dt), dims=(dim,))
            fac = fac / xr.DataArray(pv, dims=(dim,))
        unit = "counts/s/W"
    attrs["units"] = unit
    out = noise_scaled(out, cube, fac, "normalise_exposure")
    return finish(out.transpose(*cube.dims), cube, "normalise_exposure", params, attrs=attrs)
