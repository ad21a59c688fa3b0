"""Segmentation of a map into regions by clustering per-pixel features.

The default (``feature_space="emission"``, ``method="merge"``) labels pixels by
emission type: features from :mod:`._emission`, the number of regions from
:mod:`._merge`, no-signal pixels from :func:`pmap.spectral.detect_signal`.
scikit-learn is imported inside the functions only.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

import dask.array as da
import numpy as np
import xarray as xr
from scipy import ndimage

from ..errors import StepError
from ..noise import get_noise_model
from ..provenance import PROVENANCE_ATTR, with_step
from ..steps import register_step
from ._common import (
    apply_mask,
    block_sample_positions,
    centroid_of,
    check_pixels,
    check_spectral,
    finite_rows,
    gather,
    jsonable_params,
    map_pixels,
    neighbour_pairs,
    pixel_dims,
    sample_positions,
)
from ._emission import EmissionSpace, fill_nan_channels, has_emission_peak, region_descriptions
from ._merge import (
    CONTINUITY,
    MIN_DIFFERENCE,
    SEPARATION,
    VALLEY_RATIO,
    MergeData,
    _unit_area,
    merge_history,
    mixed_groups,
    pair_score,
    step_z,
)
from ._stats import _share_text

FEATURE_SPACES = ("emission", "shape", "shape+intensity", "abundance", "parameters")
CLUSTER_METHODS = ("merge", "kmeans", "gmm")
#: Over-clusters cut before merging (method "merge").
N_OVER_CLUSTERS = 16
#: A pixel is ambiguous between its label and another when the other label's nearest
#: centroid is within this factor of the distance to its own (island clean-up).
AMBIGUOUS = 1.5
#: Fit sets larger than this use MiniBatchKMeans instead of KMeans.
MINIBATCH_ABOVE = 100_000
#: Pixels used for each silhouette score.
SILHOUETTE_PIXELS = 5000


# ---------------------------------------------------------------- feature transforms
# Each takes (n, n_core) float64 rows and returns (features (n, m), signal (n,), property (n,)).


def _noise_of_sum(x: np.ndarray) -> np.ndarray:
    """1-sigma noise of the channel sum of each row, from its mean absolute first difference.

    For white noise of s.d. σ, E|x[i+1] − x[i]| = 2σ/√π, so σ = (√π/2)·mean|Δx|
    (common practice); the sum of n channels then has noise σ·√n. Steep spectral
    structure inflates the estimate (conservative). Unlike a median, it is not 0 for
    sparse integer counts.
    """
    d = np.diff(x, axis=1)
    sigma = 0.5 * np.sqrt(np.pi) * np.abs(d, out=d).mean(axis=1)
    return sigma * np.sqrt(x.shape[1])


def _signal_rows(x: np.ndarray, min_snr: float | None) -> tuple[np.ndarray, np.ndarray]:
    """(rows with finite, non-zero spectra whose sum exceeds min_snr × its noise, NaN-free rows).

    Masked channels (NaN) are filled from their neighbours first; a row with no finite
    value has no signal.
    """
    x = fill_nan_channels(x)
    ok = finite_rows(x)
    xs = x if ok.all() else np.where(ok[:, None], x, 0.0)
    signal = ok & np.any(xs != 0, axis=1)
    if min_snr is not None:
        total = xs.sum(axis=1)
        signal &= (total > 0) & (total > min_snr * _noise_of_sum(xs))
    return signal, xs


def _cube_features(
    x: np.ndarray, *, axis: np.ndarray, with_intensity: bool, min_snr: float | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    signal, xs = _signal_rows(x, min_snr)
    total = xs.sum(axis=1)
    norm = np.linalg.norm(xs, axis=1)
    feats = xs / np.where(norm > 0, norm, 1.0)[:, None]
    if with_intensity:
        logi = np.log10(np.where(total > 0, total, 1.0))
        feats = np.concatenate([feats, logi[:, None]], axis=1)
    return feats, signal, centroid_of(xs, axis)


def _emission_features(
    x: np.ndarray,
    *,
    space: EmissionSpace | None,
    axis: np.ndarray,
    min_snr: float | None,
    with_property: bool = True,
    signal_rows: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """(features, signal, centroid); ``signal_rows``: what :func:`_signal_rows` gave
    for these rows and ``min_snr``, when the caller has it already."""
    signal, xs = _signal_rows(x, min_snr) if signal_rows is None else signal_rows
    m = (space.n_components + (space.weight > 0)) if space is not None else 1
    feats = np.zeros((len(xs), m))
    if space is not None and signal.any():
        feats[signal] = space.features(xs[signal])
    return feats, signal, (centroid_of(xs, axis) if with_property else None)


def _signal_core(x: np.ndarray, *, min_snr: float | None) -> np.ndarray:
    return _signal_rows(x, min_snr)[0]


def _fill_core(x: np.ndarray) -> np.ndarray:
    return fill_nan_channels(x)


def _usable_noise_model(cube: xr.DataArray) -> bool:
    model = get_noise_model(cube)
    return model is not None and model.valid and not model.correlated


def _detected(arr: xr.DataArray, core: str, false_alarm: float):
    """(signal map or None, rule text): :func:`pmap.spectral.detect_signal` on the cube with
    masked channels filled, when the cube carries a usable noise model."""
    if not _usable_noise_model(arr):
        return None, None
    from ..spectral import detect_signal

    filled = xr.apply_ufunc(
        lambda b: fill_nan_channels(b.reshape(-1, b.shape[-1])).reshape(b.shape),
        arr,
        input_core_dims=[[core]],
        output_core_dims=[[core]],
        dask="parallelized",
        output_dtypes=[np.float64],
        keep_attrs=True,
    )
    for name in ("noise_scale", "noise_pedestal_counts"):
        if name in arr.coords and name not in filled.coords:
            filled = filled.assign_coords({name: arr.coords[name]})
    # a straight baseline, as when the K criterion and the merge rules were validated on
    # the bank. With the map's continuum as baseline (detect_signal's default) the
    # stray-light background drops out before clustering and auto K on the InGaN scene
    # fell below the target on 4 of seeds 0-5 (ARI 0.87-0.90): its dim wafer-edge
    # pixels (3 % of the brightness under a laser tail 5x stronger) become a region
    det = detect_signal(filled, false_alarm=false_alarm, continuum="line")
    sig = det["signal"]
    rule = (
        f"emission detected (pmap.spectral.detect_signal, false-alarm probability "
        f"<= {false_alarm:g} per pixel where the background is straight in channel, "
        f"threshold {det.attrs['threshold_sigma']:.2f} sigma)"
    )
    return sig.transpose(*[d for d in arr.dims if d != core]), rule


def _sample_detected(arr: xr.DataArray, core: str, positions, false_alarm: float):
    """(raw rows, signal per row) of the sampled pixels: the rows and their noise
    coordinates gathered in one compute, then :func:`pmap.spectral.detect_signal` on
    those rows only (the same test as on the whole map, without scanning every chunk)."""
    import dask

    from ..noise import noise_coords
    from ..spectral import detect_signal

    dims = pixel_dims(arr, core)
    shape = tuple(arr.sizes[d] for d in dims)
    if positions is None:
        positions = tuple(i.ravel() for i in np.indices(shape))
    idx = {d: xr.DataArray(np.asarray(p), dims="pixel") for d, p in zip(dims, positions)}
    scale, ped = noise_coords(arr)
    ped = ped.isel({d: v for d, v in idx.items() if d in ped.dims})
    scale = scale.isel({d: v for d, v in idx.items() if d in scale.dims})
    data = arr.data
    rows = data.vindex[tuple(np.asarray(p) for p in positions)] if isinstance(data, da.Array) \
        else np.asarray(data)[tuple(np.asarray(p) for p in positions)]
    rows, ped_v, scale_v = dask.compute(rows, ped.data, scale.data)
    rows = np.asarray(rows, dtype=np.float64).reshape(-1, arr.sizes[core])
    n = len(rows)
    filled = fill_nan_channels(rows)

    def as_small(v, dims_v):
        v = np.asarray(v, dtype=np.float64)
        if "pixel" in dims_v:
            v = np.moveaxis(v, dims_v.index("pixel"), 0)
            rest = [d for d in dims_v if d != "pixel"]
            return v[None], ("y", "x", *rest)
        return v, tuple(dims_v)

    pv, pdims = as_small(ped_v, list(ped.dims))
    sv, sdims = as_small(scale_v, list(scale.dims))
    small = xr.DataArray(
        filled[None], dims=("y", "x", core),
        coords={core: arr[core], "noise_pedestal_counts": (pdims, pv),
                "noise_scale": (sdims, sv)},
        attrs=dict(arr.attrs),
    )
    sig = np.asarray(detect_signal(small, false_alarm=false_alarm, continuum="line")["signal"]
                     .values).reshape(n)
    return rows, sig


def signal_mask(
    cube: xr.DataArray, *, false_alarm: float = 1e-3, min_snr: float | None = 5.0
) -> xr.DataArray:
    """Boolean map (*stack, y, x), True where a pixel has signal (lazy for dask cubes).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S). Masked channels (NaN) are filled from their neighbours.
    false_alarm : float
        With a usable noise model on the cube (``pmap.attach_noise_model``; every cube
        in :func:`pmap.process` has one): the emission test
        :func:`pmap.spectral.detect_signal` at this false-alarm probability per pixel.
    min_snr : float or None
        Without a noise model: a pixel has signal when its spectrum is finite, not all
        zero and (unless None) its channel sum exceeds ``min_snr`` times the noise of
        that sum, σ·√n_channels with σ = (√π/2)·mean|Δx| from the first differences
        (ideally on dark- or baseline-subtracted data: a constant offset counts as signal).

    Returns
    -------
    xarray.DataArray of bool; attr ``rule`` says which test was used. Pass
    ``mask=~signal_mask(cube)`` to :func:`segment` to apply the same rule to abundance
    or parameter features.
    """
    arr, core = check_spectral(cube)
    det, rule = _detected(arr, core, false_alarm)
    if det is not None:
        out = det.copy()
    else:
        out = map_pixels(
            _signal_core, arr, core, out_core=None, dtype=bool, kwargs={"min_snr": min_snr}
        )
        rule = f"channel sum > {min_snr} x noise of the sum" if min_snr else "finite, not 0"
    out.attrs = {"long_name": "pixel has signal", "units": "1", "rule": rule}
    return out.rename("signal")


def _map_features(
    x: np.ndarray, *, weights: np.ndarray | None, order_index: int, positive: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ok = finite_rows(x)
    xs = np.where(ok[:, None], x, 0.0)
    signal = ok
    if positive:
        signal = ok & (np.clip(xs, 0.0, None).sum(axis=1) > 0)
    if weights is not None:
        w = np.clip(xs, 0.0, None)
        tot = w.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            prop = np.where(tot > 0, (w @ weights) / tot, np.nan)
    else:
        prop = xs[:, order_index]
    return xs, signal, prop


#: A pixel keeps its region's label only when that region's mean spectrum is present
#: in it at this many noise s.d. (matched filter, :func:`template_snr`).
MIN_TEMPLATE_SNR = 5.0


def template_snr(x: np.ndarray, which: np.ndarray, templates: np.ndarray) -> np.ndarray:
    """Matched-filter signal-to-noise ratio of each row's template (units 1).

    Rows ``x`` (n, C) and ``templates`` (m, C) lose their best quadratic baseline in
    the channel index (a slowly curved continuum: stray light, laser tail, glow); the
    row's projection on its unit-norm template ``templates[which]`` (``which`` (n,),
    negative: none, NaN out) is divided by the row's white-noise s.d., 1.4826·MAD of
    the second differences / √6 (common practice). The matched filter is the most
    sensitive test for a known shape (North, Proc. IEEE 51, 1016 (1963)): a pixel
    whose emission was detected carries the spectrum of the cluster it is nearest to,
    while a curved background that a generic detector took for a broad peak does not.
    """
    n, c = x.shape
    out = np.full(n, np.nan)
    if c < 8 or not np.any(which >= 0):
        return out
    q, tp = _template_basis(templates)
    for j in np.unique(which[which >= 0]):
        rows = np.flatnonzero(which == j)
        xs = x[rows]
        xr = xs - (xs @ q) @ q.T
        d2 = xs[:, :-2] - 2.0 * xs[:, 1:-1] + xs[:, 2:]
        sig = 1.4826 * np.median(np.abs(d2 - np.median(d2, axis=1, keepdims=True)), axis=1)
        sig = sig / np.sqrt(6.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[rows] = np.where(sig > 0, (xr @ tp[j]) / sig, np.inf)
    return out


def _predict(
    x: np.ndarray,
    *,
    transform,
    tkw: dict,
    mu: np.ndarray,
    sd: np.ndarray,
    model,
    relabel: np.ndarray,
    second: bool = False,
    fused: _FusedLabels | None = None,
) -> np.ndarray:
    """Labels (n,) int32 of the rows x (n, C), or (n, 2) with the runner-up label when
    ``second``; with ``fused`` the compiled row pass (:mod:`._label_kernel`) labels the
    rows and only rows with some non-finite channels take the numpy path below."""
    if fused is not None:
        return fused(x, second=second)
    return _predict_numpy(x, transform=transform, tkw=tkw, mu=mu, sd=sd, model=model,
                          relabel=relabel, second=second)


#: Label with the compiled row pass where it applies (False: the numpy path only, for
#: comparisons).
FUSED_LABELS = True


class _FusedLabels:
    """The compiled labelling pass for the emission space and the merge model: the
    constants of :func:`_predict` prepared once (picklable, plain arrays)."""

    def __init__(self, *, space: EmissionSpace, min_snr: float | None, model: _Nearest,
                 relabel: np.ndarray, predict_kw: dict):
        self.predict_kw = predict_kw
        self.min_snr = -1.0 if min_snr is None else float(min_snr)
        self.projT = np.ascontiguousarray((space.comps * space.inv_noise) / space.scale)
        self.offset = np.ascontiguousarray((space.mean @ space.comps.T) / space.scale)
        self.floor = float(space.floor)
        self.li_mu, self.li_sd, self.weight = float(space.li_mu), float(space.li_sd), \
            float(space.weight)
        self.centroids = np.ascontiguousarray(model.centroids)
        self.c2 = np.ascontiguousarray(model.c2)
        self.region_of = np.ascontiguousarray(model.region_of, dtype=np.int64)
        self.relabel = np.ascontiguousarray(relabel, dtype=np.int32)
        c = self.projT.shape[1]
        self.use_templates = model.templates is not None
        if self.use_templates:
            q, tp = _template_basis(model.templates)
        else:
            q, tp = np.zeros((c, 3)), np.zeros((len(self.c2), c))
        self.qT, self.tp = np.ascontiguousarray(q.T), np.ascontiguousarray(tp)
        self.qtp = np.ascontiguousarray(self.tp @ q)

    @staticmethod
    def usable(transform, space, model, n_channels: int) -> bool:
        """Whether the compiled pass applies (emission space, nearest-centroid model,
        at least 8 channels: :func:`template_snr` gives NaN below)."""
        return (FUSED_LABELS and transform is _emission_features and space is not None
                and isinstance(model, _Nearest) and n_channels >= 8)

    def __call__(self, x: np.ndarray, *, second: bool) -> np.ndarray:
        from ._label_kernel import FALLBACK, label_rows

        if x.dtype not in (np.float32, np.float64):
            x = x.astype(np.float64)
        x = np.ascontiguousarray(x)
        lab, alt, status = label_rows(
            x, self.min_snr, self.projT, self.offset, self.floor, self.li_mu, self.li_sd,
            self.weight, self.centroids, self.c2, self.region_of, self.relabel,
            AMBIGUOUS**2, self.qT, self.tp, self.qtp, self.use_templates, MIN_TEMPLATE_SNR,
        )
        rows = np.flatnonzero(status == FALLBACK)
        if rows.size:
            got = _predict_numpy(np.asarray(x[rows], dtype=np.float64), second=True,
                                 **self.predict_kw)
            lab[rows], alt[rows] = got[:, 0], got[:, 1]
        return np.stack([lab, alt], axis=1) if second else lab


def _template_basis(templates: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(q (C, 3) orthonormal basis of {1, u, u²} on u ∈ [−1, 1], templates (m, C) with
    that baseline projected out, scaled to unit norm) as in :func:`template_snr`."""
    c = templates.shape[1]
    u = np.linspace(-1.0, 1.0, c)
    q, _ = np.linalg.qr(np.stack([np.ones(c), u, u * u], axis=1))
    tp = templates - (templates @ q) @ q.T
    norm = np.linalg.norm(tp, axis=1)
    return q, tp / np.where(norm > 0, norm, 1.0)[:, None]


def _predict_numpy(
    x: np.ndarray,
    *,
    transform,
    tkw: dict,
    mu: np.ndarray,
    sd: np.ndarray,
    model,
    relabel: np.ndarray,
    second: bool = False,
) -> np.ndarray:
    if transform is _emission_features:
        feats, signal, _ = transform(x, **tkw, with_property=False)
    else:
        feats, signal, _ = transform(x, **tkw)
    out = np.full(len(x), -1, dtype=np.int32)
    alt = np.full(len(x), -2, dtype=np.int32)
    if signal.any():
        if second:
            p, q = model.predict2((feats[signal] - mu) / sd)
            alt[signal] = np.where(q >= 0, relabel[np.clip(q, 0, None)], q)
        else:
            p = model.predict((feats[signal] - mu) / sd)
        out[signal] = np.where(p >= 0, relabel[np.clip(p, 0, None)], -1)
    templates = getattr(model, "templates", None)
    if templates is not None and np.any(out >= 0):
        which = np.full(len(x), -1, dtype=np.int64)
        rows = np.flatnonzero(signal)
        which[rows] = model.nearest((feats[signal] - mu) / sd)
        which[out < 0] = -1
        snr = template_snr(fill_nan_channels(x), which, templates)
        out = np.where((out >= 0) & ~(snr >= MIN_TEMPLATE_SNR), -1, out).astype(np.int32)
    if not second:
        return out
    return np.stack([out, alt], axis=1)


# ---------------------------------------------------------------- building the feature space


def _parameter_array(ds: xr.Dataset, variables: Sequence[str] | None) -> tuple[xr.DataArray, list]:
    if not isinstance(ds, xr.Dataset):
        raise StepError("feature_space='parameters' needs an xarray Dataset of maps")
    names = (
        list(variables) if variables else [v for v in ds.data_vars if {"y", "x"} <= set(ds[v].dims)]
    )
    if not names:
        raise StepError("no parameter maps with y and x dims to segment on")
    parts, labels = [], []
    for name in names:
        if name not in ds.data_vars:
            raise StepError(f"variable {name!r} not in the dataset (has {list(ds.data_vars)})")
        v = ds[name]
        if not {"y", "x"} <= set(v.dims):
            raise StepError(f"variable {name!r} has no y and x dims (dims {list(v.dims)})")
        v = v.transpose(..., "y", "x")
        lead = v.dims[:-2]
        n_lead = int(np.prod([v.sizes[d] for d in lead])) if lead else 1
        data = v.data.reshape(n_lead, v.sizes["y"], v.sizes["x"])
        parts.append(data.astype(np.float64))
        if lead:
            idx = np.indices([v.sizes[d] for d in lead]).reshape(len(lead), -1).T
            labels += [f"{name}[{','.join(map(str, i))}]" for i in idx]
        else:
            labels.append(name)
    lib = da if any(isinstance(p, da.Array) for p in parts) else np
    data = lib.concatenate(parts, axis=0)
    arr = xr.DataArray(
        data, dims=("feature", "y", "x"), coords={"feature": labels, "y": ds["y"], "x": ds["x"]}
    )
    return arr.transpose("y", "x", "feature"), names


def _abundance_array(features: Any) -> tuple[xr.DataArray, np.ndarray | None, bool]:
    spectra = None
    method = None
    if isinstance(features, xr.Dataset):
        if "component_abundance" not in features:
            raise StepError(
                "feature_space='abundance' needs a Dataset with component_abundance "
                "(from pmap.decompose) or a DataArray with a component dim"
            )
        method = features.attrs.get("method")
        if "component_spectrum" in features:
            spectra = features["component_spectrum"]
        features = features["component_abundance"]
    if not isinstance(features, xr.DataArray) or "component" not in features.dims:
        raise StepError("abundance features must have a 'component' dim")
    weights = None
    if spectra is not None and method == "nmf":
        sdim = [d for d in spectra.dims if d != "component"][0]
        weights = centroid_of(
            np.asarray(spectra.values, dtype=float), np.asarray(spectra[sdim].values, dtype=float)
        )
    return features, weights, method in (None, "nmf")


def _feature_space(features, space, *, variables, min_snr, order_by):
    """Return (array, core dim, transform, kwargs, property description)."""
    if space in ("emission", "shape", "shape+intensity"):
        arr, core = check_spectral(features, "features")
        if order_by not in (None, "centroid"):
            raise StepError(f"order_by for spectra must be 'centroid', got {order_by!r}")
        units = arr[core].attrs.get("units", "")
        if space == "emission":
            kw = {"space": None, "axis": np.asarray(arr[core].values, dtype=float),
                  "min_snr": min_snr}
            return arr, core, _emission_features, kw, (f"spectral centroid ({core})", units)
        kw = {
            "axis": np.asarray(arr[core].values, dtype=float),
            "with_intensity": space == "shape+intensity",
            "min_snr": min_snr,
        }
        return arr, core, _cube_features, kw, (f"spectral centroid ({core})", units)
    if space == "abundance":
        arr, weights, positive = _abundance_array(features)
        arr, core = check_pixels(arr, "component", "abundance")
        if order_by not in (None, "centroid") or weights is None:
            if order_by in (None, "centroid"):
                idx = 0
            elif str(order_by).isdigit() and int(order_by) < arr.sizes["component"]:
                idx = int(order_by)
            else:
                raise StepError(
                    f"order_by for abundances must be 'centroid' or a component "
                    f"index, got {order_by!r}"
                )
            kw = {"weights": None, "order_index": idx, "positive": positive}
            return arr, core, _map_features, kw, (f"abundance of component {idx}", "")
        kw = {"weights": weights, "order_index": 0, "positive": positive}
        return arr, core, _map_features, kw, ("abundance-weighted spectral centroid", "")
    if space == "parameters":
        arr, names = _parameter_array(features, variables)
        arr, core = check_pixels(arr, "feature", "parameter maps")
        key = order_by if order_by is not None else names[0]
        labels = list(arr["feature"].values)
        matches = [i for i, lab in enumerate(labels) if lab == key or lab.startswith(f"{key}[")]
        if not matches:
            raise StepError(f"order_by {key!r} is not among the features {labels}")
        units = features[key.split("[")[0]].attrs.get("units", "") if key in features else ""
        kw = {"weights": None, "order_index": matches[0], "positive": False}
        return arr, core, _map_features, kw, (f"mean {labels[matches[0]]}", units)
    raise StepError(f"unknown feature_space {space!r}; use one of {FEATURE_SPACES}")


def _standardise(feats: np.ndarray, space: str, intensity_weight: float):
    """Per-feature (mean, scale): z-scores, except unit-norm spectra which stay as they are."""
    m = feats.shape[1]
    if space == "emission":  # scaled when the space was fitted
        return np.zeros(m), np.ones(m)
    if space in ("shape", "shape+intensity"):
        mu, sd = np.zeros(m), np.ones(m)
        if space == "shape+intensity":
            shape_var = feats[:, :-1].var(axis=0).sum()
            s = feats[:, -1].std()
            mu[-1] = feats[:, -1].mean()
            sd[-1] = (s if s > 0 else 1.0) / (intensity_weight * (np.sqrt(shape_var) or 1.0))
        return mu, sd
    sd = feats.std(axis=0)
    return feats.mean(axis=0), np.where(sd > 0, sd, 1.0)


# ---------------------------------------------------------------- clustering


def _cluster_model(
    method: str, k: int, n: int, n_features: int, seed: int, covariance_type: str | None
):
    if method == "kmeans":
        from sklearn.cluster import KMeans, MiniBatchKMeans

        if n > MINIBATCH_ABOVE:
            return MiniBatchKMeans(n_clusters=k, random_state=seed, batch_size=4096, n_init=3)
        return KMeans(n_clusters=k, random_state=seed, n_init=4)
    from sklearn.mixture import GaussianMixture

    cov = covariance_type or ("full" if n_features <= 32 else "diag")
    return GaussianMixture(n_components=k, covariance_type=cov, random_state=seed, reg_covar=1e-6)


def _one_openmp_thread():
    """Context: scikit-learn's OpenMP loops (k-means) on one thread. A sample of ~10⁴
    rows costs a few Mflop per Lloyd iteration, which threads do not speed up, while
    on a busy machine each iteration's barrier waits for a descheduled thread (16
    clusters of 18000 × 11 rows, 2 cores at load 4: 0.18-0.47 s on one thread, 0.49-1.73 s
    on two); and with one thread the cluster sums are added in one fixed order (with
    several, in the order the threads finish)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1, user_api="openmp")


def _choose_k(z: np.ndarray, method: str, ks: list[int], seed: int, cov: str | None):
    """Fit every k; return (models, scores, rule text, best k)."""
    from sklearn.metrics import silhouette_score

    models, scores = {}, []
    for k in ks:
        with _one_openmp_thread():
            model = _cluster_model(method, k, len(z), z.shape[1], seed, cov).fit(z)
        models[k] = model
        if method == "kmeans":
            lab = model.predict(z)
            if len(np.unique(lab)) < 2:
                scores.append(float("nan"))
                continue
            n = min(len(z), SILHOUETTE_PIXELS)
            scores.append(float(silhouette_score(z, lab, sample_size=n, random_state=seed)))
        else:
            scores.append(float(model.bic(z)))
    arr = np.asarray(scores)
    if np.all(np.isnan(arr)):
        raise StepError("no candidate number of regions could be scored")
    if method == "kmeans":
        best = ks[int(np.nanargmax(arr))]
        rule = (
            f"largest mean silhouette (Rousseeuw, J. Comput. Appl. Math. 20, 53 (1987)) "
            f"on up to {SILHOUETTE_PIXELS} sampled pixels"
        )
    else:
        best = ks[int(np.nanargmin(arr))]
        rule = "smallest Bayesian information criterion (Schwarz, Ann. Stat. 6, 461 (1978))"
    return models, scores, rule, best


class _Nearest:
    """Nearest-centroid labels: each kept over-cluster centroid carries its region
    (−1: a continuum without an emission peak, i.e. no emission)."""

    def __init__(self, centroids: np.ndarray, region_of: np.ndarray, templates=None):
        self.centroids = np.asarray(centroids, dtype=np.float64)
        self.region_of = np.asarray(region_of, dtype=np.int64)
        self.c2 = np.einsum("ij,ij->i", self.centroids, self.centroids)
        #: Mean measured spectrum (C,) of each centroid's cluster, or None: a pixel
        #: keeps its label only if it carries its nearest cluster's spectrum
        #: (:func:`template_snr` ≥ MIN_TEMPLATE_SNR).
        self.templates = None if templates is None else np.asarray(templates, dtype=np.float64)

    def nearest(self, z: np.ndarray) -> np.ndarray:
        """Index of the nearest centroid of each row."""
        return np.argmin(self.c2[None, :] - 2.0 * (z @ self.centroids.T), axis=1)

    def predict(self, z: np.ndarray) -> np.ndarray:
        return self.region_of[self.nearest(z)]

    def predict2(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(label, runner-up label or −2): the runner-up is the label of the nearest
        centroid of another label when it is within AMBIGUOUS × the distance to the
        nearest centroid (the pixel could be either), else −2 (clearly its own)."""
        d2 = np.maximum(self.c2[None, :] - 2.0 * (z @ self.centroids.T)
                        + np.einsum("ij,ij->i", z, z)[:, None], 0.0)
        best = np.argmin(d2, axis=1)
        lab = self.region_of[best]
        other = np.where(self.region_of[None, :] == lab[:, None], np.inf, d2)
        alt = np.argmin(other, axis=1)
        rows = np.arange(len(z))
        near = other[rows, alt] <= (AMBIGUOUS**2) * d2[rows, best]
        return lab, np.where(near, self.region_of[alt], -2)


def _fit_merge(
    data: MergeData,
    spectra: np.ndarray | None,
    *,
    n_regions: int | str,
    ks: list[int],
    seed: int,
    min_pixels: int,
):
    """Over-cluster, set continua aside, merge (see :mod:`._merge`), let small groups
    join their least separated neighbour, drop mixed-pixel groups; choose K.

    Returns (predictor, k, merge scores, notes, natural K).
    """
    from sklearn.cluster import KMeans, MiniBatchKMeans

    z = data.feats
    separation = data.separation
    kmax = max(ks)
    n0 = int(min(max(N_OVER_CLUSTERS, 2 * kmax), max(2, len(z) // 20), len(z)))
    with _one_openmp_thread():
        if len(z) > MINIBATCH_ABOVE:
            km = MiniBatchKMeans(n_clusters=n0, random_state=seed, batch_size=4096,
                                 n_init=3).fit(z)
            lab = km.predict(z)
        else:
            km = KMeans(n_clusters=n0, random_state=seed, n_init=2).fit(z)
            lab = km.labels_
    piece_sizes = np.bincount(lab, minlength=n0)
    base = spectra if spectra is not None else z
    from scipy import sparse

    onehot = sparse.csr_matrix((np.ones(len(lab)), (lab, np.arange(len(lab)))),
                               shape=(n0, len(lab)))
    piece_means = np.asarray(onehot @ base) / np.maximum(piece_sizes, 1)[:, None]
    # Over-clusters whose mean spectrum has no peak inside the window are no emission.
    continuum = np.zeros(n0, dtype=bool)
    if spectra is not None:
        continuum = np.array([piece_sizes[j] > 0 and not has_emission_peak(piece_means[j])
                              for j in range(n0)])
        if continuum[piece_sizes > 0].all():
            continuum[:] = False
    emit = np.flatnonzero(~continuum & (piece_sizes > 0))
    data.step_z = step_z(n0)
    if spectra is not None:
        data.spectra = spectra
        data.host_ok = ~continuum[lab]
        data.piece = lab
        if continuum.any():
            data.continuum = np.array([_unit_area(m) for m in piece_means[continuum]])
    states = merge_history(data, lab, emit)
    bg = -1
    cont_members = [int(j) for j in np.flatnonzero(continuum)]

    def finalize(st):
        groups = {g: list(members) for g, members in st.groups.items()}
        notes = {}
        rows = {g: np.isin(lab, members) for g, members in groups.items()}
        while len(groups) > 1:
            sizes = {g: int(rows[g].sum()) for g in groups}
            small = [g for g in groups if sizes[g] < min_pixels]
            if not small:
                break
            g = min(small, key=lambda k: (sizes[k], k))
            ra = np.flatnonzero(rows[g])
            scores = {h: pair_score(data, ra, np.flatnonzero(rows[h]))[0]
                      for h in groups if h != g}
            h = min(scores, key=scores.get)
            notes[f"group {g}"] = f"{sizes[g]} fitted pixels (< {min_pixels}): joined group {h}"
            groups[h] = groups[h] + groups.pop(g)
            rows[h] = rows[h] | rows.pop(g)
        with_bg = dict(groups)
        if cont_members:
            with_bg[bg] = cont_members
        mixed = mixed_groups(piece_means, piece_sizes, with_bg, keep={bg})
        for g, why in mixed.items():
            notes[f"group {g}"] = why
        kept = [g for g in sorted(groups) if g not in mixed] or [max(groups, key=lambda k: rows[k].sum())]
        return groups, kept, notes

    natural = 0
    while natural + 1 < len(states) and states[natural + 1].score < separation:
        natural += 1
    done = {natural: finalize(states[natural])}
    k_natural = len(done[natural][1])
    want = None if n_regions == "auto" else int(n_regions)
    lo, hi = (min(ks), max(ks)) if want is None else (want, want)
    pick, step = natural, (1 if k_natural > hi else -1 if k_natural < lo else 0)
    while step and 0 <= pick + step < len(states):
        pick += step
        done[pick] = finalize(states[pick])
        n = len(done[pick][1])
        if (step > 0 and n <= hi) or (step < 0 and n >= lo):
            break
    groups, kept, notes = done[pick]
    centroids, region_of, templates = [], [], []
    for r, g in enumerate(kept):
        # A cluster too small to be a region on its own is checked against the
        # spectrum of the nearest large cluster of its region (its own mean would be
        # whatever its few pixels hold, a curved background included).
        large = [m for m in groups[g] if piece_sizes[m] >= min_pixels]
        for member in groups[g]:
            centroids.append(km.cluster_centers_[member])
            region_of.append(r)
            ref = member
            if piece_sizes[member] < min_pixels and large:
                dist = [np.sum((km.cluster_centers_[m] - km.cluster_centers_[member]) ** 2)
                        for m in large]
                ref = large[int(np.argmin(dist))]
            templates.append(piece_means[ref])
    for member in cont_members:
        centroids.append(km.cluster_centers_[member])
        region_of.append(-1)
        templates.append(piece_means[member])
    if cont_members:
        share = float(np.isin(lab, cont_members).mean()) * 100
        notes["continuum"] = (
            f"{len(cont_members)} of {n0} clusters ({share:.1f} % of the fitted pixels) have no "
            "emission peak inside the window: no emission"
        )
    scores = [float(s.score) for s in states[1:]]
    model = _Nearest(np.array(centroids), np.array(region_of),
                     np.array(templates) if spectra is not None else None)
    return model, len(kept), scores, notes, k_natural


def _sample_pos(arr: xr.DataArray, core: str, positions) -> np.ndarray:
    """(n, 2) y and x of the sampled pixels, each scaled to [0, 1]."""
    dims = pixel_dims(arr, core)
    if positions is None:
        positions = tuple(i.ravel() for i in np.indices([arr.sizes[d] for d in dims]))
    out = []
    for name in ("y", "x"):
        idx = np.asarray(positions[dims.index(name)], dtype=float)
        out.append(idx / max(arr.sizes[name] - 1, 1))
    return np.column_stack(out)


# ---------------------------------------------------------------- spatial clean-up


def relabel_islands(
    labels: np.ndarray, min_px: int, second: np.ndarray | None = None
) -> np.ndarray:
    """Relabel 4-connected islands smaller than ``min_px`` pixels to their neighbours' majority.

    Parameters
    ----------
    labels : ndarray of int, shape (y, x)
        Region labels; negative values (no signal) are left alone and never spread.
    min_px : int
        Islands with fewer pixels than this take the label most frequent along their
        border (ties: the smaller label). Islands bordered only by no-signal pixels stay.
    second : ndarray of int, shape (y, x), optional
        Each pixel's runner-up label (−2: none close). When given, an island changes
        only if that border label is the runner-up of at least half of its pixels: an
        island that is clearly of its own kind stays.

    Returns
    -------
    ndarray of int, same shape. One pass: neighbours are read before any change.
    """
    lab = np.asarray(labels)
    if min_px <= 1 or lab.size == 0:
        return lab.copy()
    ids = np.zeros(lab.shape, dtype=np.int64)
    offset = 0
    for r in np.unique(lab[lab >= 0]):
        comp, n = ndimage.label(lab == r)
        ids[comp > 0] = comp[comp > 0] + offset
        offset += n
    sizes = np.bincount(ids.ravel(), minlength=offset + 1)
    small = (ids > 0) & (sizes[ids] < min_px)
    if not small.any():
        return lab.copy()
    isl, nb = [], []
    for axis in (0, 1):
        for shift in (1, -1):
            a = [slice(None)] * 2
            b = [slice(None)] * 2
            a[axis] = slice(None, -1) if shift == 1 else slice(1, None)
            b[axis] = slice(1, None) if shift == 1 else slice(None, -1)
            p, q = tuple(a), tuple(b)
            sel = small[p] & (lab[q] >= 0) & (lab[q] != lab[p])
            isl.append(ids[p][sel])
            nb.append(lab[q][sel])
    isl_all = np.concatenate(isl)
    nb_all = np.concatenate(nb)
    out = lab.copy()
    if isl_all.size == 0:
        return out
    n_lab = int(lab.max()) + 1
    pairs, counts = np.unique(isl_all * n_lab + nb_all, return_counts=True)
    pi, pl = pairs // n_lab, pairs % n_lab
    order = np.lexsort((pl, -counts, pi))
    first = np.ones(len(order), dtype=bool)
    first[1:] = pi[order][1:] != pi[order][:-1]
    winner = np.full(offset + 1, -2, dtype=np.int64)
    winner[pi[order][first]] = pl[order][first]
    change = small & (winner[ids] >= 0)
    if second is not None:
        agree = np.bincount(ids[change], weights=(np.asarray(second) == winner[ids])[change],
                            minlength=offset + 1)
        size = np.bincount(ids[change], minlength=offset + 1)
        ok = np.zeros(offset + 1, dtype=bool)
        ok[size > 0] = agree[size > 0] >= 0.5 * size[size > 0]
        change &= ok[ids]
    out[change] = winner[ids][change]
    return out


def _clean(region: xr.DataArray, min_px: int, second: xr.DataArray | None = None) -> xr.DataArray:
    if isinstance(region.data, da.Array):
        region = region.chunk({"y": -1, "x": -1})
        if second is not None:
            second = second.chunk({"y": -1, "x": -1})

    def one(a, b=None):
        flat = a.reshape(-1, *a.shape[-2:])
        flat_b = None if b is None else b.reshape(-1, *b.shape[-2:])
        return np.stack([
            relabel_islands(m, min_px, None if flat_b is None else flat_b[i])
            for i, m in enumerate(flat)
        ]).reshape(a.shape)

    args = [region] if second is None else [region, second]
    return xr.apply_ufunc(
        one,
        *args,
        input_core_dims=[["y", "x"]] * len(args),
        output_core_dims=[["y", "x"]],
        dask="parallelized",
        output_dtypes=[region.dtype],
    ).transpose(*region.dims)


# ---------------------------------------------------------------- public


@register_step("segment")
def segment(
    features: xr.DataArray | xr.Dataset,
    *,
    n_regions: int | str = "auto",
    method: str = "merge",
    feature_space: str = "emission",
    min_region_px: int = 3,
    seed: int = 0,
    sample_pixels: int | None = 20000,
    k_range: Sequence[int] = range(1, 9),
    variables: Sequence[str] | None = None,
    false_alarm: float = 1e-3,
    min_snr: float | None = 5.0,
    order_by: str | None = None,
    intensity_weight: float | None = None,
    covariance_type: str | None = None,
    separation: float = SEPARATION,
    valley_ratio: float = VALLEY_RATIO,
    continuity: float = CONTINUITY,
    min_difference: float = MIN_DIFFERENCE,
    min_region_fraction: float = 0.005,
    mask: xr.DataArray | None = None,
) -> xr.DataArray:
    """Label every pixel with a region (emission type) by clustering per-pixel features.

    Parameters
    ----------
    features : xarray.DataArray or xarray.Dataset
        A cube (*stack, y, x, S) for ``"emission"``, ``"shape"``, ``"shape+intensity"``;
        the Dataset from :func:`pmap.decompose` (or its abundance DataArray with a
        ``component`` dim) for ``"abundance"``; a Dataset of maps (y, x) or
        (peak, y, x) for ``"parameters"``.
    n_regions : int or "auto"
        Number of regions K, or "auto" (see ``method``).
    method : {"merge", "kmeans", "gmm"}
        ``"merge"`` (default): k-means cut into 16 (or 2 × max(k_range)) clusters,
        then clusters merged while they are one population — continuous across their
        shared border, no density valley between them on their discriminant axis, a
        separation explained by a smooth (quartic) spatial trend (the membership step
        known to be small: its upper bound, z standard errors above it, Bonferroni over
        the cluster pairs, under ``separation``), spectra on the two sides of their
        border within ``min_difference``, or, for clusters without a shared border,
        their spectra within ``min_difference`` once their surroundings are aligned —
        see
        :mod:`pmap.decomposition._merge`; clusters of fewer than ``min_region_fraction``
        of the fitted pixels join the cluster they are least separated from; clusters
        of mixed pixels (mean spectrum a mix of two others) and clusters whose mean
        spectrum has no peak inside the window (stray light, laser tail: no emission,
        −1) are not regions. "auto" stops where every pair left is separated (clipped
        to ``k_range``); a given K merges on, or stops earlier, until K regions remain.
        The fit sample is drawn as 2 × 2 squares so that it holds neighbours. A pixel
        keeps its region only when the mean spectrum of its nearest cluster (for a
        cluster too small to be a region, of the nearest large cluster of the same
        region) is present in it at ``MIN_TEMPLATE_SNR`` (5) noise s.d. after a
        quadratic baseline (matched filter, :func:`template_snr`); else −1.
        ``"kmeans"``: k-means with K clusters ("auto": largest silhouette); ``"gmm"``:
        a Gaussian mixture ("auto": smallest BIC).
    feature_space : {"emission", "shape", "shape+intensity", "abundance", "parameters"}
        ``"emission"`` (default): unit-area spectra, noise-whitened, on their leading
        principal components, plus log intensity weighted by ``intensity_weight``
        (:mod:`pmap.decomposition._emission`). ``"shape"``: spectra divided by their
        Euclidean norm; ``"shape+intensity"``: the same plus log10 intensity;
        NMF abundances; parameter maps (z-scores on the fitted sample).
    min_region_px : int
        Clean-up: 4-connected islands smaller than this (default 3: single pixels and
        pairs) take the label most frequent on their border (:func:`relabel_islands`);
        with ``method="merge"`` only when that label is the runner-up of at least half
        of the island's pixels (its nearest centroid within 1.5 × the distance to their
        own): an island clearly of its own kind (a point defect) stays. 0 keeps the
        clustering as it is.
    seed : int
        Seed of the pixel sample and of the clustering.
    sample_pixels : int or None
        Pixels drawn at random (seeded) to fit the clustering; None uses every pixel.
    k_range : sequence of int
        Candidates for ``n_regions="auto"`` (k-means and GMM use those ≥ 2).
    variables : sequence of str, optional
        Maps to use with ``"parameters"`` (default: every variable with y and x dims).
    false_alarm : float
        Spectral features on a cube with a usable noise model: a pixel has signal when
        :func:`pmap.spectral.detect_signal` finds emission at this false-alarm
        probability per pixel; others are −1.
    min_snr : float or None
        Without a noise model: a pixel has signal when its integrated intensity exceeds
        ``min_snr`` times its noise (see :func:`signal_mask`); None: only NaN, all-zero
        and masked pixels are "no signal". Other feature spaces: NaN and masked pixels
        (and all-zero NMF abundances); pass ``mask=~signal_mask(cube)`` for the same rule.
    order_by : str, optional
        Property whose per-region mean sets the region numbers (ascending):
        spectra and NMF abundances use the spectral centroid ("centroid"),
        parameters a variable name (default: the first of ``variables``).
    intensity_weight : float, optional
        Weight of the log-intensity feature: ``"emission"`` (default 0.5) its
        standardised value times this, beside shape scores of summed variance 1;
        ``"shape+intensity"`` (default 1) its variance equals this² times the summed
        variance of the shape features.
    covariance_type : str, optional
        GMM covariance ("full" up to 32 features, else "diag").
    separation, valley_ratio, continuity, min_difference : float
        Merge thresholds of ``method="merge"``: membership step beyond the spatial
        trend over the residual s.d. (6), density-valley ratio (0.8), border jump over
        the step between neighbours inside the clusters (3), relative difference of the
        unit-area spectra on the two sides of the border (0.1).
    min_region_fraction : float
        ``method="merge"``: a region needs at least this fraction of the fitted pixels
        (and at least 10 of them).
    mask : xarray.DataArray of bool, optional
        True marks pixels to leave out.

    Returns
    -------
    xarray.DataArray
        ``region`` (*stack, y, x) int32: 0..K−1 ordered by ``order_by``, −1 for
        NaN, masked and no-signal pixels; lazy when the input is dask-backed.
        Attrs: method, k, rule, k_candidates, scores, legend (JSON), flag_values,
        flag_meanings, feature_space, order_by, seed, n_fit_pixels, signal_rule,
        ``region_names`` (JSON {label: "1.63 eV band, 62 %"}: what the region emits,
        from its mean spectrum, and its share of the sampled pixels) and
        ``region_descriptions`` (JSON list, the names without the share).

    Notes
    -----
    k-means: Lloyd, IEEE Trans. Inf. Theory 28, 129 (1982), k-means++ seeding
    (Arthur & Vassilvitskii, SODA 2007). The fit uses the signal pixels among
    ``sample_pixels`` random ones; every pixel is then assigned lazily, one task
    per spatial chunk. The island clean-up needs each whole (y, x) label map in
    one chunk (int32, small).
    """
    if method not in CLUSTER_METHODS:
        raise StepError(f"unknown clustering method {method!r}; use one of {CLUSTER_METHODS}")
    if n_regions != "auto" and not (isinstance(n_regions, (int, np.integer)) and n_regions >= 1):
        raise StepError(f"n_regions must be a positive integer or 'auto', got {n_regions!r}")
    if min_region_px < 0:
        raise StepError(f"min_region_px must be >= 0, got {min_region_px}")
    if intensity_weight is None:
        intensity_weight = 0.5 if feature_space == "emission" else 1.0
    if not intensity_weight >= 0:
        raise StepError(f"intensity_weight must be >= 0, got {intensity_weight}")
    if not 0 < float(false_alarm) < 1:
        raise StepError(f"false_alarm must be between 0 and 1, got {false_alarm}")
    params = {
        "n_regions": n_regions,
        "method": method,
        "feature_space": feature_space,
        "min_region_px": min_region_px,
        "seed": seed,
        "sample_pixels": sample_pixels,
        "k_range": list(k_range),
        "variables": list(variables) if variables else None,
        "false_alarm": false_alarm,
        "min_snr": min_snr,
        "order_by": order_by,
        "intensity_weight": intensity_weight,
        "covariance_type": covariance_type,
        "separation": separation,
        "valley_ratio": valley_ratio,
        "continuity": continuity,
        "min_difference": min_difference,
        "min_region_fraction": min_region_fraction,
    }
    arr, core, transform, tkw, (prop_name, prop_units) = _feature_space(
        features, feature_space, variables=variables, min_snr=min_snr, order_by=order_by
    )
    spectral = feature_space in ("emission", "shape", "shape+intensity")
    signal_rule = None
    sample_arr = None
    if spectral:
        det, signal_rule = _detected(arr, core, float(false_alarm))
        if det is not None:
            sample_arr = apply_mask(arr, mask)
            arr = arr.where(det)
            tkw["min_snr"] = None
        else:
            signal_rule = (
                f"channel sum > {min_snr} x noise of the sum (no noise model on the cube)"
                if min_snr else "finite, not all zero (no noise model on the cube)"
            )
    arr = apply_mask(arr, mask)

    if method == "merge":  # squares of 2 x 2 pixels: the sample holds neighbours
        positions = block_sample_positions(arr, core, sample_pixels, seed, block=2)
    else:
        positions = sample_positions(arr, core, sample_pixels, seed)
    if sample_arr is not None:  # detection on the sampled rows only (one pass less)
        raw, sig_rows = _sample_detected(sample_arr, core, positions, float(false_alarm))
        raw[~sig_rows] = np.nan
    else:
        raw = gather(arr, core, positions)
    pos_all = _sample_pos(arr, core, positions)
    space = None
    if feature_space == "emission":
        sig0, filled = _signal_rows(raw, tkw["min_snr"])
        if sig0.sum() >= 2:
            space = EmissionSpace.fit(filled[sig0], intensity_weight=float(intensity_weight))
        tkw["space"] = space
        feats, signal, prop = transform(raw, **tkw, signal_rows=(sig0, filled))
        # the signal rows with masked channels filled (as fill_nan_channels(raw[signal]))
        sig_spectra = filled[signal]
    else:
        feats, signal, prop = transform(raw, **tkw)
        sig_spectra = fill_nan_channels(raw[signal]) if spectral else raw[signal]
    n_sampled = len(raw)
    feats, prop, pos = feats[signal], prop[signal], pos_all[signal]
    if method == "merge":
        ks = sorted({int(k) for k in k_range if int(k) >= 1})
    else:
        ks = sorted({int(k) for k in k_range if 2 <= int(k) < len(feats)})
    if n_regions != "auto":
        ks = [int(n_regions)]
    if not ks or len(feats) < max(max(ks), 2):
        raise StepError(
            f"only {len(feats)} sampled pixels with signal: too few to find "
            f"{ks[-1] if ks else 'any'} regions (raise sample_pixels or lower min_snr)"
        )
    mu, sd = _standardise(feats, feature_space, intensity_weight)
    z = (feats - mu) / sd
    merge_info: dict[str, Any] = {}
    if method == "merge":
        min_pixels = max(10, int(np.ceil(min_region_fraction * len(z))))
        spectra = sig_spectra if spectral else None
        data = MergeData(z, pos, neighbour_pairs(arr, core, positions, signal),
                         separation=float(separation), valley_ratio=float(valley_ratio),
                         continuity=float(continuity),
                         to_spectra=None if space is None else space.unit_area_of,
                         n_shape=0 if space is None else space.n_components,
                         min_difference=float(min_difference),
                         axis=np.asarray(arr[core].values, dtype=float) if spectral else None)
        model, k, scores, dropped, natural = _fit_merge(
            data, spectra, n_regions=n_regions, ks=ks, seed=seed, min_pixels=min_pixels,
        )
        rule = (
            f"k-means over-clustering merged while one population (after Hennig, Adv. "
            f"Data Anal. Classif. 4, 3 (2010)): border jump < {continuity} x the step "
            f"inside, density valley ratio > {valley_ratio}, membership step < "
            f"{separation} residual s.d. beyond a quartic spatial trend (its upper bound at "
            f"{data.step_z:.2f} standard errors, Bonferroni), or border spectra "
            f"within {min_difference:.0%}; groups under {min_pixels} fitted pixels joined "
            f"their nearest; mixed-pixel groups and peakless continua (no emission) dropped; "
            f"a pixel without its nearest cluster's spectrum at {MIN_TEMPLATE_SNR:g} sigma "
            f"(matched filter) is no emission"
            + ("" if n_regions == "auto" else f"; merged on to the K = {k} given")
        )
        merge_info = {"k_natural": int(natural), "dropped_clusters": json.dumps(dropped)}
    elif n_regions == "auto":
        models, scores, rule, k = _choose_k(z, method, ks, seed, covariance_type)
        model = models[k]
    else:
        k, scores, rule = ks[0], [], "given by the user"
        with _one_openmp_thread():
            model = _cluster_model(method, k, len(z), z.shape[1], seed, covariance_type).fit(z)
    lab = model.predict(z)
    n_continuum = int(np.sum(lab < 0))
    counts = np.bincount(lab[lab >= 0], minlength=k)
    with np.errstate(invalid="ignore"):
        means = np.array([np.nanmean(prop[lab == j]) if counts[j] else np.nan for j in range(k)])
    order = np.argsort(np.where(np.isnan(means), np.inf, means), kind="stable")
    relabel = np.empty(k, dtype=np.int32)
    relabel[order] = np.arange(k, dtype=np.int32)

    kwargs = {"transform": transform, "tkw": tkw, "mu": mu, "sd": sd, "model": model,
              "relabel": relabel}
    in_dtype: Any = np.float64
    if _FusedLabels.usable(transform, space, model, arr.sizes[core]):
        # one compiled row pass per chunk, on the chunk as stored (no float64 copy)
        kwargs["fused"] = _FusedLabels(space=space, min_snr=tkw["min_snr"], model=model,
                                       relabel=relabel, predict_kw=dict(kwargs))
        in_dtype = None
    if method == "merge" and min_region_px > 1:
        both = map_pixels(_predict, arr, core, out_core="choice", out_size=2, dtype=np.int32,
                          kwargs={**kwargs, "second": True}, in_dtype=in_dtype)
        region = both.isel(choice=0, drop=True)
        region = _clean(region, int(min_region_px), both.isel(choice=1, drop=True))
    else:
        region = map_pixels(_predict, arr, core, out_core=None, dtype=np.int32, kwargs=kwargs,
                            in_dtype=in_dtype)
        if min_region_px > 1:
            region = _clean(region, int(min_region_px))
    legend = {"-1": "no signal, NaN or masked"}
    for j in range(k):
        src = order[j]
        legend[str(j)] = (
            f"mean {prop_name} {means[src]:.6g} {prop_units}".rstrip()
            + f"; {counts[src]} of {len(z)} fitted pixels"
        )
    descriptions = _descriptions(
        features, feature_space, arr, core, sig_spectra, lab, order, k, prop_name, means
    )
    share = 100.0 / max(n_sampled, 1)
    n_none = n_sampled - len(z) + n_continuum
    names = {"-1": f"no emission detected, {_share_text(n_none * share)}"
             if spectral else f"no data, {_share_text(n_none * share)}"}
    for j in range(k):
        names[str(j)] = f"{descriptions[j]}, {_share_text(counts[order[j]] * share)}"
    base = (
        {PROVENANCE_ATTR: features.attrs[PROVENANCE_ATTR]}
        if PROVENANCE_ATTR in features.attrs
        else {}
    )
    attrs = with_step(base, "segment", jsonable_params(params), k=k, rule=rule)
    attrs.update(
        {
            "long_name": "region label",
            "units": "1",
            "flag_values": list(range(-1, k)),
            "flag_meanings": " ".join(["no_signal"] + [f"region_{j}" for j in range(k)]),
            "method": method,
            "k": k,
            "rule": rule,
            "k_candidates": ks if scores else [k],
            "scores": scores,
            "legend": json.dumps(legend),
            "region_names": json.dumps(names),
            "region_descriptions": json.dumps(descriptions),
            "feature_space": feature_space,
            "order_by": prop_name,
            "seed": seed,
            "n_fit_pixels": len(z),
            "n_sampled_pixels": int(n_sampled),
            "signal_rule": signal_rule or "finite (and not all-zero abundances)",
            "min_snr": "none" if min_snr is None else float(min_snr),
            "min_region_px": int(min_region_px),
            "island_rule": (
                f"4-connected islands under {int(min_region_px)} pixels take the label most "
                "frequent on their border"
                + (f", when that label is the runner-up (nearest centroid within "
                   f"{AMBIGUOUS} x the distance to their own) of at least half their pixels"
                   if method == "merge" else "")
                if min_region_px > 1 else "none"
            ),
            **merge_info,
        }
    )
    if space is not None:
        attrs["n_shape_components"] = int(space.n_components)
    region.attrs = attrs
    region.name = "region"
    return region


def _descriptions(features, space, arr, core, rows, lab, order, k, prop_name, means):
    """What each region (in final order) emits: from its mean spectrum when the
    features are spectra, else the ordering property."""
    if space in ("emission", "shape", "shape+intensity") and len(rows):
        x = fill_nan_channels(rows)
        axis = np.asarray(arr[core].values, dtype=float)
        units = arr[core].attrs.get("units", "")
        spectra, inten = [], []
        for j in range(k):
            sel = lab == order[j]
            spectra.append(x[sel].mean(axis=0) if sel.any() else np.zeros(x.shape[1]))
            inten.append(float(np.median(x[sel].sum(axis=1))) if sel.any() else 0.0)
        return region_descriptions(spectra, inten, axis, core, units)
    return [f"{prop_name} {means[order[j]]:.4g}" for j in range(k)]
