"""Is there emission in this pixel? A test with a stated false-alarm probability.

Statistic (per pixel): the largest standardised excess of a box filter over a
straight-line baseline, scanned over positions and widths (a multiscale matched
filter; box filters of widths spaced by √2 approximate a line's matched filter within ~10 %). The data
are first taken back to raw-count units with the cube's noise model
(value = s·(raw − p), :mod:`pmap.noise`) and variance-stabilised with the
generalized Anscombe transform for Poisson–Gaussian data, which makes the noise
close to N(0, 1) at every level (Murtagh, Starck & Bijaoui, Astron. Astrophys.
Suppl. Ser. 112, 179 (1995); Mäkitalo & Foi, IEEE Trans. Image Process. 22, 91
(2013)): z = (2/a)·sqrt(a·raw + 3a²/8 + b). For each box the baseline (constant
and slope, least squares over the whole spectrum) is projected out exactly, so
under "no emission" every box statistic is N(0, 1); the threshold for M boxes is
the one-sided normal quantile at α/M (Bonferroni), so the false-alarm
probability per pixel is at most α (the Bonferroni bound; boxes overlap, so the
true rate is lower).

Assumption behind that rate: without emission the spectrum lies in the span of
the baseline. With ``continuum="line"`` that is a straight line in channel index,
and structured light that is not (a curved stray-light continuum, a laser tail, a
thermal glow) is "emission" to the test: over a quadratic continuum 26 % of
noise-only pixels were flagged, over the laser tails of the scene bank all of them.
The default ``continuum="auto"`` adds the map's own convex continuum, taken from its
quietest spectra (:mod:`._continuum`), which restores the rate on those maps
(tests/test_detect_continuum.py). A continuum that is not convex (a broad glass
fluorescence band, say) cannot be told from emission and is still flagged.
Segmentation also requires each labelled pixel to carry its cluster's own spectrum
at 5 σ.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import xarray as xr
from scipy import special

from ..errors import PmapNotice, StepError
from ..noise import get_noise_model, noise_coords
from ..provenance import with_step
from ._common import check_cube
from ._continuum import estimate_continuum, scan_rows_basis

__all__ = ["detect_signal", "box_scan_plan"]


def box_scan_plan(n: int, min_width: int = 2) -> list[tuple[int, int]]:
    """(width, stride) pairs of the box scan over n channels: widths ×√2 from ``min_width``
    up to n/2, stride max(1, width // 4) (no line position falls between boxes by more
    than 1/8 of the width)."""
    plan: list[tuple[int, int]] = []
    w = float(max(int(min_width), 1))
    while w <= max(n // 2, 1):
        wi = int(round(w))
        if not plan or wi > plan[-1][0]:
            plan.append((wi, max(1, wi // 4)))
        w *= np.sqrt(2.0)
    return plan


def _n_tests(n: int, plan) -> int:
    return int(sum((n - w) // s + 1 for w, s in plan))


def box_scan_max(Z: np.ndarray, plan) -> np.ndarray:
    """Largest standardised box excess over a least-squares line, per row of Z (m, n).

    Z must have unit noise variance per channel; returns (m,) maxima of
    N/sqrt(q), N = Σ_box residual, q = Var(N) from the hat matrix of {1, x}
    (compiled, one pass of cumulative sums per spectrum).
    """
    from ._detect_scan import box_table, scan_rows_table

    Z = np.ascontiguousarray(Z, dtype=np.float64)
    widths = np.array([w for w, _ in plan], dtype=np.int64)
    strides = np.array([st for _, st in plan], dtype=np.int64)
    # the box terms that do not depend on the spectrum, once per call (bit-identical
    # statistics to the row kernel kept as the reference in tests/_detect_reference.py)
    return scan_rows_table(Z, *box_table(Z.shape[1], widths, strides))


def detect_signal(
    cube: xr.DataArray,
    *,
    false_alarm: float = 1e-3,
    min_width_channels: int | None = None,
    continuum: str = "auto",
) -> xr.Dataset:
    """Per-pixel emission test with a stated false-alarm probability (lazy).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube carrying a noise model (:func:`pmap.attach_noise_model`; raw counts
        get one here from their attrs or the data). Spikes should be removed first:
        a spike is an excess the test cannot tell from a narrow line.
    false_alarm : float
        Probability that a pixel with no emission is called signal (default 1e-3).
    min_width_channels : int, optional
        Narrowest box (channels). Default: the instrument FWHM in channels when the
        attrs give it (``instrument_fwhm_nm`` / ``instrument_fwhm_ev``), at least 2.
    continuum : {"auto", "line"}
        Baseline under each box. ``"line"``: a straight line in channel index.
        ``"auto"`` (default): the line plus the map's own smooth continuum (stray
        light, laser tail, thermal glow), found in the quietest spectra of up to
        4096 sampled pixels (from at most 16 chunks of a chunked cube: one extra
        read of those) and accepted only where it is convex
        (:mod:`pmap.spectral._continuum`); where none is found the result is the
        same as ``"line"``. The attrs say which was used.

    Returns
    -------
    xarray.Dataset
        ``signal`` (…, y, x) bool and ``signal_statistic`` (the largest box
        excess in σ); attrs ``false_alarm``, ``threshold_sigma``, ``n_tests``, method.

    Notes
    -----
    See the module docstring. Under no emission each box statistic is N(0, 1) up to
    the accuracy of the variance-stabilising transform (its residual skew matters
    only for boxes of a few channels at counts ≲ 1 per channel with little read
    noise); the threshold z = Φ⁻¹(1 − α/M) for M boxes bounds the per-pixel false
    alarm by α. A line of matched-filter SNR ρ gives a statistic near 0.85 ρ, so at
    α = 1e-3 (z ≈ 5.0 for 512 channels) lines with ρ ≥ 8 and a FWHM up to ~10 % of
    the axis are found in ≥ 95 % of pixels; broader lines lose part of their excess
    to the fitted baseline slope (they look like a sloped background). Cost: about 4 n operations per spectrum per width octave.
    """
    cube, sdim = check_cube(cube)
    if not 0 < float(false_alarm) < 1:
        raise StepError(f"false_alarm must be between 0 and 1, got {false_alarm}")
    model = get_noise_model(cube)
    if model is None and cube.attrs.get("units") == "counts":
        from ._noise import attach_noise_model

        cube = attach_noise_model(cube)
        model = get_noise_model(cube)
    if model is None or not model.valid or model.correlated:
        raise StepError(
            "detect_signal needs a usable, uncorrelated noise model (attach one to the raw "
            "counts with pmap.attach_noise_model, before smoothing or PCA)"
        )
    n = cube.sizes[sdim]
    if min_width_channels is None:
        min_width_channels = _instrument_channels(cube, sdim)
    plan = box_scan_plan(n, max(2, int(min_width_channels)))
    M = _n_tests(n, plan)
    thr = float(-special.ndtri(float(false_alarm) / M))
    a, b = model.var_per_count, model.var_offset_counts2
    s, p = noise_coords(cube)
    spatial = [d for d in cube.dims if d != sdim]
    s_full, p_full = xr.broadcast(s, p)

    def stabilised(v, sv, pv):
        """(raw counts (m, n), their generalized-Anscombe transform z, usable rows)."""
        Y = np.asarray(v, dtype=np.float64).reshape(-1, n)
        S = np.broadcast_to(np.asarray(sv, dtype=np.float64), v.shape).reshape(-1, n)
        P = np.broadcast_to(np.asarray(pv, dtype=np.float64), v.shape).reshape(-1, n)
        raw = Y / S + P
        fin = np.isfinite(raw)
        n_ok = fin.sum(axis=1)
        ok = n_ok >= max(8, n // 2)
        for r in np.flatnonzero(ok & (n_ok < n)):  # masked channels: bridged linearly
            g = fin[r]
            raw[r, ~g] = np.interp(np.flatnonzero(~g), np.flatnonzero(g), raw[r, g])
        raw = raw[ok]
        return raw, to_z(raw), ok

    def to_z(raw):
        """The generalized Anscombe transform of raw counts (unit noise variance)."""
        if a > 0:
            return (2.0 / a) * np.sqrt(np.maximum(a * raw + 0.375 * a * a + b, 0.0))
        return raw / np.sqrt(max(b, model.floor_counts2))

    def as_core(v):
        v = v if sdim in v.dims else v.expand_dims({sdim: 1})
        return v.transpose(*[d for d in v.dims if d != sdim], sdim)

    if continuum not in ("auto", "line"):
        raise StepError(f"continuum must be 'auto' or 'line', got {continuum!r}")
    basis, cinfo = None, {"rank": 0, "quiet": 0, "rejected": ""}
    if continuum == "auto":
        sample = _sample_pixels(cube, sdim)
        s_s, p_s = (_sample_pixels(xr.DataArray(v).broadcast_like(cube), sdim) for v in (s, p))
        raw_s, z_s, _ = stabilised(sample, s_s, p_s)
        widths = np.array([w for w, _ in plan], dtype=np.int64)
        strides = np.array([st for _, st in plan], dtype=np.int64)
        Qb, cinfo = estimate_continuum(z_s, raw_s, widths, strides, thr,
                                       lambda r: a * np.maximum(r, 0.0) + b)
        basis = Qb if cinfo["rank"] > 0 else None

    def core(v, sv, pv):
        shp = v.shape[:-1]
        _, z, ok = stabilised(v, sv, pv)
        out = np.full(ok.size, np.nan)
        if np.any(ok):
            out[ok] = box_scan_max(z, plan) if basis is None else box_scan_basis(z, basis, plan)
        return out.reshape(shp)

    stat = xr.apply_ufunc(
        core,
        cube,
        as_core(s_full),
        as_core(p_full),
        input_core_dims=[[sdim], [sdim], [sdim]],
        output_core_dims=[[]],
        dask="parallelized",
        output_dtypes=[np.float64],
        exclude_dims={sdim},
    )
    stat = stat.transpose(*spatial)
    attrs = {
        "false_alarm": float(false_alarm),
        "threshold_sigma": thr,
        "n_tests": M,
        "min_width_channels": int(plan[0][0]) if plan else 0,
        "continuum": continuum,
        "continuum_rank": int(cinfo["rank"]),
        "continuum_note": (
            f"baseline: a straight line plus {cinfo['rank']} continuum vector(s) from the "
            f"convex continuum of the {cinfo['seed']} quietest sampled spectra"
            if cinfo["rank"] else
            "baseline: a straight line" + (f" ({cinfo['rejected']})" if cinfo["rejected"]
                                           else "")),
        "method": (
            "largest box-filter excess over a least-squares baseline (a line, plus the map's "
            "convex continuum where found; widths x sqrt2, stride w/4) on "
            "generalized-Anscombe-stabilised raw counts; Bonferroni threshold "
            "Phi^-1(1 - alpha/M): false-alarm probability per pixel <= alpha"
        ),
    }
    ds = xr.Dataset(
        {
            "signal": (stat > thr).assign_attrs(
                long_name=f"emission detected (false-alarm probability <= {false_alarm:g})",
                units="1",
            ),
            "signal_statistic": stat.assign_attrs(
                long_name="largest box-filter excess over the baseline", units="1"
            ),
        },
        attrs=with_step({}, "detect_signal", {"false_alarm": float(false_alarm),
                                              "min_width_channels": min_width_channels,
                                              "continuum": continuum},
                        **{k: v for k, v in attrs.items() if k != "method"}),
    )
    ds.attrs.update(attrs)
    return ds


def box_scan_basis(Z: np.ndarray, Q: np.ndarray, plan) -> np.ndarray:
    """Largest standardised box excess per row of Z (m, n) over the least-squares fit of the
    orthonormal baseline columns Q (n, r) (:func:`._continuum.scan_rows_basis`)."""
    Z = np.ascontiguousarray(Z, dtype=np.float64)
    widths = np.array([w for w, _ in plan], dtype=np.int64)
    strides = np.array([st for _, st in plan], dtype=np.int64)
    return scan_rows_basis(Z, np.ascontiguousarray(Q), widths, strides)


#: pixels sampled for the continuum
_N_SAMPLE = 4096


def _sample_pixels(arr: xr.DataArray, sdim: str) -> np.ndarray:
    """Spectra (m, n) of up to ``_N_SAMPLE`` pixels on a regular lattice (every pixel of a
    small map), computed in one pass. On a chunked cube the lattice is laid over at most
    4 chunks per spatial dim (spread over the map), so at most 16 chunks are read."""
    spatial = [d for d in arr.dims if d != sdim]
    chunks = dict(zip(arr.dims, arr.chunks)) if arr.chunks is not None else {}
    cand = {}
    for d in spatial:
        bounds = np.cumsum((0,) + tuple(chunks.get(d, (arr.sizes[d],))))
        pick = np.unique(np.linspace(0, bounds.size - 2, min(4, bounds.size - 1)).round()
                         .astype(int))
        cand[d] = np.concatenate([np.arange(bounds[k], bounds[k + 1]) for k in pick])
    total = int(np.prod([c.size for c in cand.values()])) if cand else 1
    step = max(1, int(np.ceil((total / _N_SAMPLE) ** (1.0 / max(len(cand), 1)))))
    sub = arr.isel({d: c[::step] for d, c in cand.items()})
    sub = sub.transpose(*spatial, sdim)
    return np.asarray(sub.values, dtype=np.float64).reshape(-1, arr.sizes[sdim])


def _instrument_channels(cube: xr.DataArray, sdim: str) -> int:
    """The instrument FWHM in channels (median channel width), or 2 when not stated."""
    ax = np.asarray(cube[sdim].values, dtype=float)
    step = float(np.median(np.abs(np.diff(ax)))) if ax.size > 1 else 1.0
    fw: Any = None
    if sdim == "wavelength" and cube.attrs.get("instrument_fwhm_nm") is not None:
        fw = float(cube.attrs["instrument_fwhm_nm"]) / step
    elif sdim == "energy" and cube.attrs.get("instrument_fwhm_ev") is not None:
        fw = float(cube.attrs["instrument_fwhm_ev"]) / step
    elif sdim == "energy" and cube.attrs.get("instrument_fwhm_nm") is not None:
        e = float(np.median(ax))
        fw = float(cube.attrs["instrument_fwhm_nm"]) * e * e / 1239.8419843320026 / step
    if fw is None or not np.isfinite(fw):
        return 2
    if fw > ax.size / 8:
        warnings.warn(f"instrument FWHM of {fw:.0f} channels: detection boxes start there",
                      PmapNotice, stacklevel=3)
    return max(2, int(np.floor(fw)))
