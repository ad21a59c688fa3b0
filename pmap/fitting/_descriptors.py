"""Fast per-pixel spectral descriptors (no fitting)."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..conventions import integrated_unit
from ..cube import spectral_dim, validate_cube
from ..errors import StepError
from ..provenance import with_step
from ..steps import register_step
from ._common import apply_per_spectrum

__all__ = ["spectral_descriptors"]


def _window_index(x: np.ndarray, window) -> slice:
    lo, hi = (float(v) for v in window)
    if not hi > lo:
        raise StepError(f"energy window {window!r} must be (low, high) with low < high, in eV")
    i0, i1 = np.searchsorted(x, lo, "left"), np.searchsorted(x, hi, "right")
    if i1 - i0 < 2:
        raise StepError(
            f"energy window {lo:g}–{hi:g} eV holds fewer than 2 channels of the axis "
            f"{x[0]:g}–{x[-1]:g} eV"
        )
    return slice(int(i0), int(i1))


def _trapezoid_weights(x: np.ndarray) -> np.ndarray:
    """Weights w with Y @ w == np.trapezoid(Y, x, axis=-1) (one matrix-vector product)."""
    w = np.zeros(x.size)
    if x.size > 1:
        dx = np.diff(x)
        w[:-1] += 0.5 * dx
        w[1:] += 0.5 * dx
    return w


def _descriptor_rows(Y, x, win, rwin):
    """Descriptors of rows Y (m, n) on axis x (eV): (m, 5), through the compiled kernel."""
    from ._kernels import descriptor_rows

    i0, i1, _ = win.indices(x.size)
    if rwin is None:
        ratio = np.array([-1, -1, -1, -1])
        w1 = w2 = np.zeros(0)
    else:
        (a0, a1, _), (b0, b1, _) = (s.indices(x.size) for s in rwin)
        ratio = np.array([a0, a1, b0, b1])
        w1, w2 = _trapezoid_weights(x[a0:a1]), _trapezoid_weights(x[b0:b1])
    return descriptor_rows(Y, x, np.array([i0, i1]), _trapezoid_weights(x[i0:i1]), ratio, w1, w2)


@register_step("spectral_descriptors")
def spectral_descriptors(cube, *, window_ev=None, ratio_windows=None) -> xr.Dataset:
    """Per-pixel descriptors of a spectrum on the energy axis, without fitting.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube with an ``energy`` axis (eV, ascending).
    window_ev : (float, float), optional
        Energy window (eV) for the integrated intensity and the centroid; default the whole axis.
    ratio_windows : ((float, float), (float, float)), optional
        Two energy windows (eV); ``window_ratio`` = integral of the first / integral of the second.

    Returns
    -------
    xarray.Dataset
        Lazy maps (…, y, x): ``max_energy`` (eV; maximum channel refined by a
        three-point parabola), ``centroid_energy`` (eV; ∫E·I dE / ∫I dE),
        ``integrated_intensity`` (intensity·eV, trapezoid), ``fwhm_interp`` (eV;
        full width at half the maximum, linear interpolation between channels,
        NaN when the band is not closed within the axis), and with ``ratio_windows``
        ``window_ratio`` (1).

    Notes
    -----
    Works on the data as given: subtract a background first if there is one.
    Cost: a few passes over each spectrum, far cheaper than a fit.
    """
    cube = validate_cube(cube)
    if spectral_dim(cube) != "energy":
        raise StepError(
            f"spectral_descriptors needs an energy axis (eV), got {spectral_dim(cube)!r}; "
            "convert first with pmap.to_energy"
        )
    x = np.asarray(cube["energy"].values, dtype=float)
    win = slice(None) if window_ev is None else _window_index(x, window_ev)
    rwin = None
    if ratio_windows is not None:
        if len(ratio_windows) != 2:
            raise StepError("ratio_windows must be two (low, high) energy windows in eV")
        rwin = (_window_index(x, ratio_windows[0]), _window_index(x, ratio_windows[1]))
    arr = apply_per_spectrum(
        cube,
        lambda Y: _descriptor_rows(Y, x, win, rwin),
        5,
        out_dim="descriptor",
        keep_float32=True,
    )
    unit = cube.attrs.get("units", "1")
    spec = [
        ("max_energy", "eV", "energy of the spectral maximum (parabolic interpolation)"),
        ("centroid_energy", "eV", "intensity-weighted mean energy"),
        (
            "integrated_intensity",
            integrated_unit(unit, "eV"),
            "integrated intensity",
        ),
        ("fwhm_interp", "eV", "full width at half maximum (interpolated)"),
        ("window_ratio", "1", "ratio of integrated intensities in two energy windows"),
    ]
    data_vars = {}
    for i, (name, u, long) in enumerate(spec):
        if name == "window_ratio" and rwin is None:  # no windows stated: no map of NaN
            continue
        v = arr.isel(descriptor=i, drop=True)
        v.attrs = {"units": u, "long_name": long}
        data_vars[name] = v
    params = {"window_ev": window_ev, "ratio_windows": ratio_windows}
    keep = {k: v for k, v in cube.attrs.items() if k not in ("units", "long_name")}
    attrs = with_step(keep, "spectral_descriptors", params)
    ds = xr.Dataset(data_vars, attrs=attrs)
    if window_ev is not None:
        ds["integrated_intensity"].attrs["window_ev"] = [float(v) for v in window_ev]
    if ratio_windows is not None:
        ds["window_ratio"].attrs["windows_ev"] = [[float(a) for a in w] for w in ratio_windows]
    return ds
