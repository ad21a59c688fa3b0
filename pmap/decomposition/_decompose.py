"""PCA and NMF of a cube: component spectra, abundance maps, a component-count curve.

scikit-learn is imported inside the functions only.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Iterable
from typing import Any

import numpy as np
import xarray as xr

from ..conventions import SPECTRAL_DIMS
from ..cube import METADATA_ATTRS
from ..errors import PmapNotice, PmapWarning, StepError
from ..provenance import PROVENANCE_ATTR, with_step
from ..steps import register_step
from ._common import (
    apply_mask,
    check_spectral,
    finite_rows,
    gather,
    iter_batches,
    jsonable_params,
    map_pixels,
    peak_positions,
    sample_positions,
)
from ._components import align_rows, peak_offsets, sharp_edges, shifting_pairs
from ._nnls import nnls_clipped_rows, nnls_rows

METHODS = ("nmf", "pca")
NEGATIVE_POLICY = "values below 0 clipped to 0 before NMF fitting and unmixing"


def _result_attrs(cube: xr.DataArray, step: str, params: dict, **results: Any) -> dict:
    base = {k: v for k, v in cube.attrs.items() if k in METADATA_ATTRS or k == PROVENANCE_ATTR}
    return with_step(base, step, jsonable_params(params), **results)


def _check_method(method: str, n_components: int, n_channels: int) -> None:
    if method not in METHODS:
        raise StepError(f"unknown decomposition method {method!r}; use one of {METHODS}")
    if not isinstance(n_components, (int, np.integer)) or n_components < 1:
        raise StepError(f"n_components must be a positive integer, got {n_components!r}")
    if n_components > n_channels:
        raise StepError(f"n_components={n_components} exceeds the {n_channels} spectral channels")


def _valid_sample(arr: xr.DataArray, sdim: str, sample_pixels: int | None, seed: int) -> np.ndarray:
    x = gather(arr, sdim, sample_positions(arr, sdim, sample_pixels, seed))
    return x[finite_rows(x)]


def _catch_convergence(fit, *args, warn: bool = True) -> bool:
    """Call ``fit(*args)``; turn scikit-learn's ConvergenceWarning into a PmapWarning
    (or, with ``warn=False``, keep quiet); return whether it converged."""
    from sklearn.exceptions import ConvergenceWarning

    converged = True
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        fit(*args)
    for w in caught:
        if issubclass(w.category, ConvergenceWarning):
            converged = False
            if warn:
                warnings.warn(
                    f"decomposition did not converge: {w.message}", PmapWarning, stacklevel=3
                )
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return converged


def _nmf_model(
    n_components: int, *, seed: int, init: str | None, solver: str | None, max_iter: int | None
):
    from sklearn.decomposition import NMF

    return NMF(
        n_components=n_components,
        init=init or "nndsvda",
        solver=solver or "cd",
        max_iter=max_iter or 500,
        random_state=seed,
    )


def _fit_sample(
    x: np.ndarray,
    method: str,
    k: int,
    *,
    seed: int,
    init: str | None,
    solver: str | None,
    max_iter: int | None,
) -> tuple[np.ndarray, np.ndarray | None, dict]:
    """Fit on an in-memory (n, C) array; return (components (k, C), mean or None, info)."""
    if len(x) < k:
        raise StepError(f"only {len(x)} valid pixels to fit {k} components")
    if method == "pca":
        from sklearn.decomposition import PCA

        if init is not None:
            raise StepError("init applies to NMF only")
        model = PCA(n_components=k, svd_solver=solver or "full", random_state=seed)
        model.fit(x)
        info = {"solver": model.svd_solver, "explained_variance": model.explained_variance_ratio_}
        return model.components_, model.mean_, info
    from sklearn.decomposition import non_negative_factorization

    model = _nmf_model(k, seed=seed, init=init, solver=solver, max_iter=max_iter)
    got = {}

    def fit(xc):
        # NMF.fit's own factorisation (the estimator's parameters, the same solver
        # calls), without the reconstruction error it then computes over the whole
        # sample, which nothing here reads: the same components, bit for bit
        p = model.get_params()
        got["w"], got["h"], got["n_iter"] = non_negative_factorization(
            xc, **{key: p[key] for key in (
                "n_components", "init", "solver", "beta_loss", "tol", "max_iter",
                "random_state", "alpha_W", "alpha_H", "l1_ratio", "verbose", "shuffle")})

    _catch_convergence(fit, np.clip(x, 0.0, None))
    info = {
        "solver": model.solver,
        "init": model.init,
        "max_iter": model.max_iter,
        "n_iter": int(got["n_iter"]),
    }
    return got["h"], None, info


def _fit_incremental(
    arr: xr.DataArray,
    sdim: str,
    method: str,
    k: int,
    *,
    seed: int,
    init: str | None,
    solver: str | None,
    max_iter: int | None,
    batch_pixels: int,
) -> tuple[np.ndarray, np.ndarray | None, dict]:
    """Fit chunk by chunk with partial_fit (IncrementalPCA, MiniBatchNMF)."""
    if method == "pca":
        from sklearn.decomposition import IncrementalPCA

        if init is not None or solver is not None:
            raise StepError("init and solver do not apply to incremental PCA")
        model = IncrementalPCA(n_components=k, batch_size=batch_pixels)
        for batch in iter_batches(arr, sdim, batch_pixels, max(k, 2), seed):
            model.partial_fit(batch)
        info = {
            "solver": "incremental SVD (IncrementalPCA.partial_fit)",
            "passes": 1,
            "n_fit_pixels": int(model.n_samples_seen_),
            "explained_variance": model.explained_variance_ratio_,
        }
        return model.components_, model.mean_, info
    from sklearn.decomposition import MiniBatchNMF

    if solver not in (None, "mu"):
        raise StepError("incremental NMF uses multiplicative updates only (solver='mu')")
    passes = max_iter or 1
    model = MiniBatchNMF(
        n_components=k, init=init or "nndsvda", batch_size=batch_pixels, random_state=seed
    )
    n_seen = 0
    for p in range(passes):
        for batch in iter_batches(arr, sdim, batch_pixels, k, seed + p):
            _catch_convergence(model.partial_fit, np.clip(batch, 0.0, None))
            n_seen += len(batch) if p == 0 else 0
    info = {
        "n_fit_pixels": n_seen,
        "solver": "mu (MiniBatchNMF.partial_fit, Frobenius loss)",
        "init": model.init,
        "passes": passes,
        "n_steps": int(model.n_steps_),
    }
    return model.components_, None, info


def _pca_scores(x: np.ndarray, *, mean: np.ndarray, spectra: np.ndarray) -> np.ndarray:
    out = np.full((len(x), len(spectra)), np.nan)
    ok = finite_rows(x)
    out[ok] = (x[ok] - mean) @ spectra.T
    return out


def _nmf_abundance(x: np.ndarray, *, spectra: np.ndarray, reference: float | None = None):
    if reference is None:
        return nnls_clipped_rows(x, spectra)
    out = np.full((len(x), len(spectra)), np.nan)
    ok = finite_rows(x)
    rows = x[ok]
    if reference is not None and len(rows):
        rows = align_rows(rows, reference=reference)[0]
    out[ok] = nnls_rows(np.clip(rows, 0.0, None), spectra)
    return out


def _aligned_pca_scores(x: np.ndarray, *, mean, spectra, reference: float) -> np.ndarray:
    out = np.full((len(x), len(spectra)), np.nan)
    ok = finite_rows(x)
    if ok.any():
        out[ok] = (align_rows(x[ok], reference=reference)[0] - mean) @ spectra.T
    return out


def _shift_core(x: np.ndarray, *, axis: np.ndarray, reference: float) -> np.ndarray:
    out = np.full(len(x), np.nan)
    ok = finite_rows(x)
    if ok.any():
        ch = np.arange(len(axis), dtype=float)
        out[ok] = np.interp(peak_offsets(x[ok]), ch, axis) - np.interp(reference, ch, axis)
    return out


def _diagnose(spectra, w, sample, axis, attrs, sdim, aligned=False):
    """Sharp-edge flags, shifting-line pairs and the notice text (None when all is well)."""
    flag, slope, data_slope, inst = sharp_edges(spectra, sample, axis, attrs, sdim)
    pairs = shifting_pairs(spectra, w, sample, axis)
    unit = SPECTRAL_DIMS.get(sdim, "axis units")
    parts = []
    if flag.any():
        ks = ", ".join(str(int(k)) for k in np.flatnonzero(flag))
        ref = "the instrument resolution or " if any(v is not None for v in inst) else ""
        parts.append(
            f"component(s) {ks} have edges sharper than {ref}any line in the data (steepest "
            f"relative slope {np.nanmax(slope[flag]):.3g} vs {data_slope:.3g} per {unit} in "
            f"the brightest spectra): a line cut into pieces, not an emission spectrum"
        )
    for p in pairs:
        a, b = p["components"]
        parts.append(
            f"components {a} and {b} look like one line shifting continuously across the map "
            f"({p['intermediate_share']:.0%} of their pixels are intermediate mixes, the "
            f"centroid follows the mix with r = {p['centroid_correlation']:.2f}, over "
            f"{p['span']:.3g} {unit}): their abundance maps show a gradient, not two phases"
        )
    notice = None
    if parts:
        notice = "NMF: " + "; ".join(parts) + (
            ". See the peak-energy map (peak_energy, centroid_energy or max_energy) for the "
            "shift" + ("." if aligned else ", or decompose with align='peak' (components of "
                       "the aligned spectra, the shift as its own map).")
        )
    return flag, slope, data_slope, inst, pairs, notice


def _normalise_components(
    method: str, comps: np.ndarray, axis: np.ndarray, info: dict
) -> tuple[np.ndarray, np.ndarray, str]:
    """Scale, sign and order the components; return (spectra, order, rule)."""
    comps = np.array(comps, dtype=np.float64)
    if method == "pca":
        big = np.argmax(np.abs(comps), axis=1)
        sign = np.sign(comps[np.arange(len(comps)), big])
        comps *= np.where(sign == 0, 1.0, sign)[:, None]
        return comps, np.arange(len(comps)), "explained variance, descending (PCA order)"
    peak = comps.max(axis=1)
    comps = comps / np.where(peak > 0, peak, 1.0)[:, None]
    order = np.lexsort((np.arange(len(comps)), peak_positions(comps, axis)))
    return comps[order], order, "spectral position of each component's maximum, ascending"


@register_step("decompose")
def decompose(
    cube: xr.DataArray,
    *,
    method: str = "nmf",
    n_components: int = 3,
    sample_pixels: int | None = 20000,
    seed: int = 0,
    init: str | None = None,
    solver: str | None = None,
    max_iter: int | None = None,
    incremental: bool = False,
    batch_pixels: int = 4096,
    mask: xr.DataArray | None = None,
    align: str | None = None,
) -> xr.Dataset:
    """PCA or NMF of a cube: component spectra and per-pixel abundance maps.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube with dims (*stack, y, x, S); any spectral dim S (energy in eV,
        wavelength in nm...). Numpy- or dask-backed.
    method : {"nmf", "pca"}
        Non-negative matrix factorisation (components are emission spectra) or
        principal component analysis.
    n_components : int
        Number of components.
    sample_pixels : int or None
        Fit on this many pixels drawn at random (seeded, without replacement;
        pixels with any NaN are then dropped); None fits on every pixel (in memory).
    seed : int
        Seed of the pixel sample and of the estimator.
    init : str, optional
        NMF initialisation (scikit-learn names), default "nndsvda".
    solver : str, optional
        NMF solver "cd" (default) or "mu"; PCA ``svd_solver`` (default "full").
    max_iter : int, optional
        NMF iterations (default 500); with ``incremental`` the number of passes over the cube (default 1).
    incremental : bool
        Fit chunk by chunk instead (IncrementalPCA / MiniBatchNMF ``partial_fit``),
        each spatial chunk computed on its own: for cubes larger than memory.
    batch_pixels : int
        Rows per ``partial_fit`` call when ``incremental``.
    mask : xarray.DataArray of bool, optional
        True marks pixels to leave out (treated like NaN pixels).
    align : {None, "peak"}
        ``"peak"``: shift-aware decomposition. Every spectrum is first moved so that its
        own main peak (centroid of the part above half its maximum) sits at the median
        position of the sample's peaks (linear interpolation in channel index), so a line that shifts
        across the map is one component; the shift is returned as ``component_shift``
        (*stack, y, x) in S units. With several bands per pixel the strongest is
        aligned. Not with ``incremental``.

    Returns
    -------
    xarray.Dataset
        ``component_spectrum`` (component, S); ``component_abundance``
        (component, *stack, y, x), lazy when the cube is dask-backed, NaN for
        NaN / masked pixels; ``explained_variance`` (component); ``component_peak``
        (component) in S units; PCA adds ``mean_spectrum`` (S). Attrs record the
        method, parameters, seed, fit set and ordering rule. NMF: attrs of
        ``component_spectrum`` ``sharp_edge`` (1 per component whose edges are steeper
        than the instrument or any line in the data allows), ``max_relative_slope``,
        ``data_max_relative_slope``; Dataset attrs ``shifting_line_pairs`` (JSON: pairs of
        components that are one line shifting across the map) and ``component_notice``;
        the notice is also issued as a :class:`pmap.errors.PmapNotice`
        (:mod:`pmap.decomposition._components`).

    Notes
    -----
    NMF (Lee & Seung, Nature 401, 788 (1999)) clips negative values (e.g. after
    baseline subtraction) at 0 and records that policy and the clipped fraction.
    Its spectra are scaled to a maximum of 1, so an abundance is the height of
    that component's spectrum at the pixel, in the cube's intensity units;
    abundances of every pixel are the exact non-negative least-squares solution
    for the fitted spectra (per pixel, chunk-independent). NMF components are
    ordered by the spectral position of their maximum (ascending); its
    ``explained_variance`` is the share of the sample's summed intensity carried by
    each component. PCA loadings have unit norm, the sign that makes the largest
    entry positive, explained-variance order; ``explained_variance`` is the ratio.
    Cost: the fit reads ``sample_pixels`` spectra (or, incremental, every chunk
    once per pass); the abundance maps are one lazy pass, one task per chunk.
    """
    arr, sdim = check_spectral(cube)
    _check_method(method, n_components, arr.sizes[sdim])
    params = {
        "method": method,
        "n_components": int(n_components),
        "sample_pixels": sample_pixels,
        "seed": seed,
        "init": init,
        "solver": solver,
        "max_iter": max_iter,
        "incremental": incremental,
        "batch_pixels": batch_pixels,
        "mask": None if mask is None else "given",
        "align": align,
    }
    if align not in (None, "peak"):
        raise StepError(f"align must be None or 'peak', got {align!r}")
    if align and incremental:
        raise StepError("align='peak' works on a pixel sample, not with incremental=True")
    arr = apply_mask(arr, mask)
    axis = np.asarray(arr[sdim].values, dtype=float)
    opts = {"seed": seed, "init": init, "solver": solver, "max_iter": max_iter}
    skip_sample = incremental and method == "pca"  # the sample only serves NMF's shares
    sample = (
        np.empty((0, arr.sizes[sdim]))
        if skip_sample
        else _valid_sample(arr, sdim, sample_pixels, seed)
    )
    reference = None
    if align:
        if not len(sample):
            raise StepError("no valid pixels to align")
        reference = float(np.median(peak_offsets(sample)))
        sample = align_rows(sample, reference=reference)[0]
    if incremental:
        comps, mean, info = _fit_incremental(
            arr, sdim, method, n_components, batch_pixels=batch_pixels, **opts
        )
        fit_desc = "incremental (partial_fit over spatial chunks)"
    else:
        comps, mean, info = _fit_sample(sample, method, n_components, **opts)
        fit_desc = f"random sample of {len(sample)} valid pixels (seed {seed})"
    spectra, order, rule = _normalise_components(method, comps, axis, info)

    attrs: dict[str, Any] = {
        "method": method,
        "fit": fit_desc,
        "n_fit_pixels": len(sample),
        "component_order": rule,
    }
    attrs.update({k: v for k, v in info.items() if k != "explained_variance"})
    if method == "pca":
        ev = np.asarray(info["explained_variance"])[order]
        ev_def = "fraction of the fitted pixels' variance explained (PCA explained_variance_ratio)"
        fn, kw = _pca_scores, {"mean": mean, "spectra": spectra}
        if reference is not None:
            fn, kw = _aligned_pca_scores, {**kw, "reference": reference}
    else:
        clipped = np.clip(sample, 0.0, None)
        w = nnls_rows(clipped, spectra)
        total = clipped.sum()
        ev = w.sum(axis=0) * spectra.sum(axis=1) / total if total > 0 else np.full(len(w), np.nan)
        resid = np.linalg.norm(clipped - w @ spectra) / max(np.linalg.norm(clipped), 1e-300)
        ev_def = (
            "share of the summed intensity of the sampled pixels carried by each component "
            "(sum of abundance x spectrum over the sample / summed intensity)"
        )
        attrs.update(
            {
                "negative_policy": NEGATIVE_POLICY,
                "negative_fraction": float(np.mean(sample < 0)) if sample.size else 0.0,
                "reconstruction_error_rel": float(resid),
            }
        )
        fn, kw = _nmf_abundance, {"spectra": spectra, "reference": reference}
        flag, slope, data_slope, _, pairs, notice = _diagnose(
            spectra, w, clipped, axis, cube.attrs, sdim, aligned=reference is not None
        )
        attrs["shifting_line_pairs"] = json.dumps(pairs)
        attrs["component_notice"] = notice or "none"
        if notice:
            warnings.warn(notice, PmapNotice, stacklevel=2)
    attrs["explained_variance_definition"] = ev_def
    attrs = _result_attrs(cube, "decompose", params, n_fit_pixels=attrs["n_fit_pixels"]) | attrs
    attrs["seed"] = seed

    abundance = map_pixels(fn, arr, sdim, out_core="component", out_size=len(spectra), kwargs=kw,
                           in_dtype=None if fn is _nmf_abundance and reference is None
                           else np.float64)
    abundance = abundance.transpose("component", *[d for d in arr.dims if d != sdim])
    units = cube.attrs.get("units", "1")
    comp = np.arange(len(spectra))
    s_units = arr[sdim].attrs.get("units", "")
    ds = xr.Dataset(
        {
            "component_spectrum": (
                ("component", sdim),
                spectra,
                {
                    "units": "1",
                    "long_name": (
                        "component emission spectrum (maximum 1)"
                        if method == "nmf"
                        else "principal component loading (unit norm)"
                    ),
                },
            ),
            "component_abundance": (
                abundance.dims,
                abundance.data,
                {
                    "units": units,
                    "long_name": (
                        "component amplitude (height of its spectrum)"
                        if method == "nmf"
                        else "principal component score"
                    ),
                },
            ),
            "explained_variance": (
                ("component",),
                np.asarray(ev, dtype=float),
                {"units": "1", "long_name": ev_def},
            ),
            "component_peak": (
                ("component",),
                peak_positions(spectra, axis),
                {"units": s_units, "long_name": f"{sdim} of the component spectrum's maximum"},
            ),
        },
        coords={
            "component": ("component", comp, {"long_name": "component index"}),
            sdim: arr[sdim],
            **{d: arr[d] for d in abundance.dims if d in arr.coords},
        },
        attrs=attrs,
    )
    if method == "nmf":
        ds["component_spectrum"].attrs.update(
            {
                "sharp_edge": [int(v) for v in flag],
                "max_relative_slope": [float(v) for v in slope],
                "data_max_relative_slope": float(data_slope),
                "max_relative_slope_units": f"1/{s_units}" if s_units else "1",
            }
        )
    if reference is not None:
        shift = map_pixels(
            _shift_core, arr, sdim, out_core=None,
            kwargs={"axis": axis, "reference": reference},
        )
        ds["component_shift"] = (
            shift.dims,
            shift.data,
            {
                "units": s_units,
                "long_name": (
                    f"{sdim} of the pixel's main peak minus the reference "
                    f"{float(np.interp(reference, np.arange(len(axis)), axis)):.6g} {s_units}"
                ),
            },
        )
        ds.attrs["align"] = "peak"
        ds.attrs["align_reference"] = float(np.interp(reference, np.arange(len(axis)), axis))
    if mean is not None:
        ds["mean_spectrum"] = (
            (sdim,),
            np.asarray(mean, dtype=float),
            {"units": units, "long_name": "mean spectrum of the fitted pixels"},
        )
    return ds


def component_count_curve(
    cube: xr.DataArray,
    method: str = "nmf",
    *,
    counts: Iterable[int] = range(1, 9),
    sample_pixels: int | None = 20000,
    seed: int = 0,
    init: str | None = None,
    solver: str | None = None,
    max_iter: int | None = None,
    mask: xr.DataArray | None = None,
) -> xr.Dataset:
    """Relative reconstruction error against the number of components, to help choose it.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube with one spectral dim (see :func:`decompose`).
    method : {"nmf", "pca"}
        Decomposition to evaluate.
    counts : iterable of int
        Component counts to try.
    sample_pixels, seed, init, solver, max_iter, mask
        As in :func:`decompose`; every count is fitted on the same seeded sample.

    Returns
    -------
    xarray.Dataset
        ``reconstruction_error`` (n_components), dimensionless: NMF
        ‖X − WH‖_F / ‖X‖_F of the sample (X clipped at 0); PCA
        ‖X_c − X̂_c‖_F / ‖X_c‖_F of the mean-centred sample, i.e.
        sqrt(1 − cumulative explained-variance ratio). PCA adds
        ``explained_variance_cumulative``.
    """
    arr, sdim = check_spectral(cube)
    ks = sorted({int(k) for k in counts})
    if not ks:
        raise StepError("counts is empty")
    _check_method(method, ks[-1], arr.sizes[sdim])
    _check_method(method, ks[0], arr.sizes[sdim])
    x = _valid_sample(apply_mask(arr, mask), sdim, sample_pixels, seed)
    opts = {"seed": seed, "init": init, "solver": solver, "max_iter": max_iter}
    data: dict[str, Any] = {}
    if method == "pca":
        _, _, info = _fit_sample(x, method, ks[-1], **opts)
        cum = np.cumsum(info["explained_variance"])[np.asarray(ks) - 1]
        err = np.sqrt(np.clip(1.0 - cum, 0.0, None))
        data["explained_variance_cumulative"] = (
            ("n_components",),
            cum,
            {"units": "1", "long_name": "cumulative explained-variance ratio"},
        )
        definition = "||Xc - Xc_hat||_F / ||Xc||_F of the mean-centred sample"
    else:
        xc = np.clip(x, 0.0, None)
        norm = max(float(np.linalg.norm(xc)), 1e-300)
        err, not_converged = [], []
        for k in ks:
            model = _nmf_model(k, seed=seed, init=init, solver=solver, max_iter=max_iter)
            if not _catch_convergence(model.fit, xc, warn=False):
                not_converged.append(k)
            err.append(model.reconstruction_err_ / norm)
        err = np.asarray(err)
        definition = "||X - WH||_F / ||X||_F of the sample (X clipped at 0)"
    data["reconstruction_error"] = (
        ("n_components",),
        np.asarray(err, dtype=float),
        {"units": "1", "long_name": definition},
    )
    attrs = {"method": method, "n_fit_pixels": len(x), "seed": seed}
    if method == "nmf":
        attrs["not_converged"] = not_converged  # counts that hit max_iter (recorded, not warned)
    return xr.Dataset(data, coords={"n_components": ("n_components", ks)}, attrs=attrs)
