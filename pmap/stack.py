"""Stack single maps into one cube along a new dim (temperature, excitation power, ...).

Maps are registered to the first by sub-pixel phase correlation of their
integrated-intensity images (Guizar-Sicairos, Thurman & Fienup, Opt. Lett. 33, 156
(2008): the cross-power spectrum's inverse DFT evaluated on an upsampled grid around
its coarse peak), shifted by bilinear interpolation written as a weighted sum of four
integer-offset slices (lazy, no rechunking), and cropped to their common area.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from .conventions import SPECTRAL_DIMS
from .cube import STACK_DIMS, validate_cube
from .errors import PmapNotice, StepError
from .noise import get_noise_model, noise_correlated
from .provenance import with_step

__all__ = ["phase_correlation_shift", "stack_cubes", "STACK_VALUE_UNITS"]

#: default units of a stack dim; each map's value is read from attrs ``{dim}_{units}``
STACK_VALUE_UNITS = {"temperature": "K", "excitation_power": "W", "power": "W", "time": "s",
                     "excitation_wavelength": "nm", "voltage": "V", "field": "T"}


def _detrend_window(img: np.ndarray) -> np.ndarray:
    """Best-fit plane removed, then a 2-D Hann window: the wrap-around edges of a real
    map (background, gradients) would otherwise dominate the correlation."""
    ny, nx = img.shape
    yy, xx = np.mgrid[0:ny, 0:nx]
    a = np.column_stack([np.ones(img.size), yy.ravel(), xx.ravel()])
    coef = np.linalg.lstsq(a, img.ravel(), rcond=None)[0]
    resid = img - (a @ coef).reshape(img.shape)
    return resid * np.outer(np.hanning(ny), np.hanning(nx))


def _correlation_peak(a: np.ndarray, b: np.ndarray, upsample: int) -> tuple[float, float]:
    """Peak of the cross-correlation of b with a, to 1/upsample px (upsampled DFT)."""
    cross = np.fft.fft2(b) * np.conj(np.fft.fft2(a))
    if not np.any(np.abs(cross) > 0):
        raise StepError("phase correlation: an integrated-intensity image is flat (no structure)")
    ny, nx = a.shape
    if ny % 2 == 0:  # the Nyquist row/column has no sign: drop it
        cross[ny // 2, :] = 0
    if nx % 2 == 0:
        cross[:, nx // 2] = 0
    corr = np.fft.ifft2(cross).real
    iy, ix = np.unravel_index(np.argmax(corr), corr.shape)
    y0 = iy - ny if iy > ny // 2 else iy
    x0 = ix - nx if ix > nx // 2 else ix
    # refine: evaluate sum_k R(k) exp(2πi k·r) on a grid of step 1/upsample within ±1.5 px
    off = np.arange(-1.5 * upsample, 1.5 * upsample + 1) / upsample
    ey = np.exp(2j * np.pi * np.outer(y0 + off, np.fft.fftfreq(ny)))
    ex = np.exp(2j * np.pi * np.outer(x0 + off, np.fft.fftfreq(nx)))
    fine = (ey @ cross @ ex.T).real
    jy, jx = np.unravel_index(np.argmax(fine), fine.shape)
    return float(y0 + off[jy]), float(x0 + off[jx])


#: An integrated-intensity image whose detrended variance is below this many times its
#: noise variance has no structure to register against (a uniform film: the
#: correlation peak would sit wherever the noise puts it).
MIN_STRUCTURE = 2.0


def structure_to_noise(img: np.ndarray) -> float:
    """Variance of an image after removing its best-fit plane over its noise variance
    (1 for noise alone). Noise from the 4-neighbour Laplacian, which annihilates planes
    (var = 20 σ² for white noise), by the median absolute deviation (robust to edges
    and grain boundaries; common practice)."""
    a = np.nan_to_num(np.asarray(img, float))
    ny, nx = a.shape
    if ny < 3 or nx < 3:
        return float("inf")
    yy, xx = np.mgrid[0:ny, 0:nx]
    m = np.column_stack([np.ones(a.size), yy.ravel(), xx.ravel()])
    resid = a - (m @ np.linalg.lstsq(m, a.ravel(), rcond=None)[0]).reshape(a.shape)
    lap = 4 * a[1:-1, 1:-1] - a[:-2, 1:-1] - a[2:, 1:-1] - a[1:-1, :-2] - a[1:-1, 2:]
    noise = (1.4826 * float(np.median(np.abs(lap - np.median(lap))))) ** 2 / 20.0
    var = float(resid.var())
    if noise <= 0:
        return float("inf") if var > 0 else 0.0
    return var / noise


def phase_correlation_shift(ref: np.ndarray, img: np.ndarray, *, upsample: int = 50,
                            max_iter: int = 8) -> tuple[float, float]:
    """Sub-pixel shift (dy, dx) in pixels such that ``img(r) ≈ ref(r − d)``.

    Cross-power spectrum of the detrended, Hann-windowed images, its inverse DFT
    evaluated on an upsampled grid around the coarse peak (Guizar-Sicairos, Thurman &
    Fienup 2008; not whitened: whitening lets the structureless high frequencies of
    smooth PL images set the peak). The fixed window pulls the estimate towards zero,
    so ``img`` is shifted back by the estimate (cubic spline) and the residual shift
    measured again until it is below 1/upsample px.

    Parameters
    ----------
    ref, img : ndarray (ny, nx)
        Images of the same shape (NaN read as 0).
    upsample : int
        Refinement factor: each estimate is found to 1/upsample pixel.
    max_iter : int
        Most re-estimates of the residual shift.

    Returns
    -------
    (dy, dx) : floats, pixels.
    """
    from scipy import ndimage

    a = np.nan_to_num(np.asarray(ref, float))
    b = np.nan_to_num(np.asarray(img, float))
    if a.shape != b.shape or a.ndim != 2:
        raise StepError(f"phase correlation needs two images of one shape, got {a.shape}, {b.shape}")
    if a.shape[0] < 4 or a.shape[1] < 4:
        raise StepError(f"images of {a.shape} px are too small to register")
    wa = _detrend_window(a)
    d = np.zeros(2)
    for _ in range(max_iter):
        moved = ndimage.shift(b, -d, order=3, mode="nearest") if d.any() else b
        r = np.array(_correlation_peak(wa, _detrend_window(moved), upsample))
        d = d + r
        if np.all(np.abs(r) <= 1.0 / upsample):
            break
    return float(round(d[0], 4)), float(round(d[1], 4))


def _stack_value(cube: xr.DataArray, along: str, units: str, i: int) -> float:
    key = f"{along}_{units}"
    if key not in cube.attrs:
        raise StepError(f"map {i} has no attribute {key!r}; give the values (--values)")
    try:
        return float(cube.attrs[key])
    except (TypeError, ValueError):
        raise StepError(f"map {i}: attribute {key!r} = {cube.attrs[key]!r} is not a number") \
            from None


def stack_cubes(cubes: Sequence[xr.DataArray], *, along: str, values: Sequence[float] | None = None,
                units: str | None = None, register: bool = True,
                max_shift_fraction: float = 0.25, upsample: int = 50,
                names: Sequence[str] | None = None) -> xr.DataArray:
    """Stack single maps into one cube with the stack dim ``along`` (lazy).

    Parameters
    ----------
    cubes : sequence of DataArray
        Canonical cubes (y, x, spectral), all on the same spectral axis.
    along : str
        Name of the new dim (``temperature``, ``excitation_power``, ...).
    values : sequence of float, optional
        Its value for each map (default: attrs ``{along}_{units}``, e.g. ``temperature_K``).
    units : str, optional
        Units of the values (default from :data:`STACK_VALUE_UNITS`; needed for other dims).
    register : bool
        Register every map to the first by sub-pixel phase correlation of the
        integrated-intensity images (this computes those images: one pass over each map).
        A pair of images without structure above their noise (:func:`structure_to_noise`
        below :data:`MIN_STRUCTURE`: a uniform film) is left unshifted, with a
        :class:`~pmap.errors.PmapNotice`.
    max_shift_fraction : float
        A shift beyond this fraction of the field is refused (StepError).
    upsample : int
        Phase-correlation precision, 1/upsample pixel.
    names : sequence of str, optional
        Names of the maps for messages and provenance (e.g. file names).

    Returns
    -------
    DataArray
        Cube (along, y, x, spectral), sorted by the stack values, cropped to the
        common area; ``attrs["stack_shifts_px"]`` holds each map's (dy, dx) in pixels.
    """
    import dask
    import dask.array as dsa

    cubes = [validate_cube(c) for c in cubes]
    n = len(cubes)
    names = list(names) if names is not None else [f"map {i}" for i in range(n)]
    if n < 2:
        raise StepError(f"stacking needs at least 2 maps, got {n}")
    if units is None:
        units = STACK_VALUE_UNITS.get(along)
        if units is None:
            raise StepError(f"no default units for stack dim {along!r}: give --units")
    for i, c in enumerate(cubes):
        extra = [d for d in c.dims if d not in ("y", "x") and d not in SPECTRAL_DIMS]
        if extra:
            raise StepError(f"{names[i]} already has stack dim(s) {extra}; stack single maps")
    spec = cubes[0].dims[-1]
    axis0 = np.asarray(cubes[0][spec].values)
    for i, c in enumerate(cubes[1:], 1):
        if c.dims[-1] != spec or c.sizes[spec] != axis0.size or not np.allclose(
                c[spec].values, axis0, rtol=1e-9, atol=0):
            raise StepError(f"{names[i]} has another spectral axis than {names[0]} "
                            f"({spec}, {axis0.size} channels); resample before stacking")
        if c.attrs.get("units") != cubes[0].attrs.get("units"):
            raise StepError(f"{names[i]} is in {c.attrs.get('units')!r}, {names[0]} in "
                            f"{cubes[0].attrs.get('units')!r}")
    if values is None:
        vals = np.array([_stack_value(c, along, units, i) for i, c in enumerate(cubes)])
    else:
        vals = np.asarray(values, dtype=float)
        if vals.shape != (n,):
            raise StepError(f"{len(vals)} values for {n} maps")
    if not np.all(np.isfinite(vals)):
        raise StepError(f"stack values missing (NaN) for {[names[i] for i in np.flatnonzero(~np.isfinite(vals))]}")
    uniq, counts = np.unique(vals, return_counts=True)
    if (counts > 1).any():
        raise StepError(f"duplicated {along} values {uniq[counts > 1].tolist()} {units}")

    shapes = [(c.sizes["y"], c.sizes["x"]) for c in cubes]
    shifts = [(0.0, 0.0)] * n
    flat: list[tuple[str, float]] = []  # maps left unshifted: no structure above noise
    if register:
        imgs = dask.compute(*[c.fillna(0).sum(spec).data for c in cubes])
        hy, hx = min(s[0] for s in shapes), min(s[1] for s in shapes)
        ref = np.asarray(imgs[0])[:hy, :hx]
        s_ref = structure_to_noise(ref)
        for i in range(1, n):
            img = np.asarray(imgs[i])[:hy, :hx]
            s_i = min(s_ref, structure_to_noise(img))
            if s_i < MIN_STRUCTURE:  # nothing to register against: left unshifted
                flat.append((names[i], s_i))
                continue
            dy, dx = phase_correlation_shift(ref, img, upsample=upsample)
            if abs(dy) > max_shift_fraction * hy or abs(dx) > max_shift_fraction * hx:
                raise StepError(f"{names[i]} is shifted by ({dy:.2f}, {dx:.2f}) px against "
                                f"{names[0]}, beyond {max_shift_fraction:.0%} of the field "
                                f"({hy} x {hx} px): not the same area? (--no-register to skip)")
            shifts[i] = (dy, dx)
    # registered map i: R_i(r) = img_i(r + d_i); common rows r in [lo, hi)
    lo_y = max([0] + [-int(np.floor(d[0])) for d in shifts])
    lo_x = max([0] + [-int(np.floor(d[1])) for d in shifts])
    hi_y = min(s[0] - int(np.floor(d[0])) - (1 if d[0] % 1 else 0) for s, d in zip(shapes, shifts))
    hi_x = min(s[1] - int(np.floor(d[1])) - (1 if d[1] % 1 else 0) for s, d in zip(shapes, shifts))
    hi_y, hi_x = min(hi_y, shapes[0][0]), min(hi_x, shapes[0][1])
    if hi_y - lo_y < 2 or hi_x - lo_x < 2:
        raise StepError("the maps have no common area after registration")
    ny, nx = hi_y - lo_y, hi_x - lo_x
    moved = any(d[0] % 1 or d[1] % 1 for d in shifts)
    if moved and cubes[0].attrs.get("units") == "counts" and get_noise_model(cubes[0]) is None:
        # interpolation mixes pixels: the noise model must be known before, and then it
        # is marked correlated so that fits fall back to residual-scaled errors
        from .spectral import attach_noise_model

        cubes = [attach_noise_model(c) for c in cubes]
    parts = []
    for c, (dy, dx) in zip(cubes, shifts):
        arr = c.data if isinstance(c.data, dsa.Array) else dsa.from_array(c.data)
        fy, fx = int(np.floor(dy)), int(np.floor(dx))
        py, px = dy - fy, dx - fx
        out = 0
        for oy, wy in ((0, 1 - py), (1, py)):
            for ox, wx in ((0, 1 - px), (1, px)):
                if wy * wx == 0:
                    continue
                ys, xs = lo_y + fy + oy, lo_x + fx + ox
                out = out + (wy * wx) * arr[ys:ys + ny, xs:xs + nx]
        parts.append(out)
    if flat:
        import warnings

        warnings.warn(
            f"{len(flat)} of {n - 1} maps not registered: they or {names[0]} show no "
            f"structure above noise to register against (structure/noise variance "
            f"{min(v for _, v in flat):.2g}-{max(v for _, v in flat):.2g}, below "
            f"{MIN_STRUCTURE:g}: {', '.join(nm for nm, _ in flat[:4])}"
            f"{', ...' if len(flat) > 4 else ''}); stacked unshifted (--no-register to "
            "skip registration)", PmapNotice, stacklevel=2)
    order = np.argsort(vals)
    data = dsa.stack([parts[i] for i in order], axis=0)
    c0 = cubes[0]
    coords = {along: (along, vals[order], {"units": units}),
              "y": c0["y"].isel(y=slice(lo_y, hi_y)), "x": c0["x"].isel(x=slice(lo_x, hi_x))}
    for name, co in c0.coords.items():
        if name not in coords and set(co.dims) <= {spec}:
            coords[name] = co
    attrs = {k: v for k, v in c0.attrs.items() if k != f"{along}_{units}"}
    shift_list = [[round(shifts[i][0], 4), round(shifts[i][1], 4)] for i in order]
    params = {"along": along, "units": units, "register": register,
              "max_shift_fraction": max_shift_fraction}
    attrs = with_step(attrs, "stack", params, maps=[names[i] for i in order],
                      unregistered_no_structure=[nm for nm, _ in flat],
                      values=[float(v) for v in vals[order]], shifts_px=shift_list,
                      crop_px={"y": [lo_y, hi_y], "x": [lo_x, hi_x]})
    attrs["stack_shifts_px"] = shift_list
    out = xr.DataArray(data, dims=(along, "y", "x", spec), coords=coords, name=c0.name,
                       attrs=attrs)
    if moved and get_noise_model(c0) is not None:
        out = noise_correlated(out, c0, "stack: sub-pixel registration (bilinear)")
    extra = () if along in STACK_DIMS else (along,)
    return validate_cube(out, stack_dims=extra)
