"""PCA denoising: fit on a random sample of spectra, project every chunk lazily."""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import xarray as xr

from ..errors import StepError
from ..noise import noise_correlated
from ..steps import WholeMapPass, register_step, whole_map_values
from ._common import check_cube, finish, float_dtype
from ._robust import robust_sigma_of_diff

__all__ = ["pca_denoise", "choose_n_components", "PCA_RULES"]

#: Rules for choosing the number of components.
PCA_RULES = ("marchenko_pastur", "broken_stick")


def choose_n_components(
    eigenvalues: np.ndarray, *, rule: str, n_samples: int, noise_var: float
) -> int:
    """Number of principal components to keep, by a stated rule.

    Parameters
    ----------
    eigenvalues : array
        Covariance eigenvalues, descending.
    rule : {"marchenko_pastur", "broken_stick"}
        "marchenko_pastur": keep the eigenvalues above the upper edge of the
        Marchenko–Pastur law of pure noise, σ²(1 + √(n_channels/n_samples))², σ² the noise
        variance per value (estimated from the spectral first differences).
        "broken_stick": keep the leading components whose share of the variance exceeds
        the broken-stick expectation b_k = (1/p) Σ_{i=k}^{p} 1/i (stop at the first miss).
    n_samples : int
        Number of spectra the eigenvalues come from.
    noise_var : float
        Noise variance per value (for "marchenko_pastur").

    References
    ----------
    Marchenko & Pastur, Math. USSR-Sbornik 1, 457 (1967); broken stick: Jackson,
    Ecology 74, 2204 (1993) (from memory).
    """
    ev = np.asarray(eigenvalues, dtype=float)
    p = ev.size
    if rule == "marchenko_pastur":
        edge = noise_var * (1.0 + np.sqrt(p / n_samples)) ** 2
        return int(np.sum(ev > edge))
    if rule == "broken_stick":
        share = ev / max(ev.sum(), 1e-300)
        b = np.cumsum(1.0 / np.arange(p, 0, -1))[::-1] / p
        miss = np.flatnonzero(share <= b)
        return int(miss[0]) if miss.size else p
    raise StepError(f"unknown rule {rule!r}; use one of {PCA_RULES}")


def _fit(
    sample: np.ndarray, n_components: int | None, rule: str, width: int
) -> tuple[np.ndarray, np.ndarray]:
    """(mean (n,), basis (n, width)) from the sample spectra (m, n).

    The first k columns of the basis are the leading eigenvectors of the sample
    covariance, the others zero, so the shape is known before the fit runs.
    """
    x = np.asarray(sample, dtype=np.float64)
    x = x[np.all(np.isfinite(x), axis=-1)]
    m, n = x.shape
    if m < 2:
        raise StepError("PCA needs at least 2 finite sample spectra")
    mean = x.mean(axis=0)
    xc = x - mean
    ev, vec = np.linalg.eigh(xc.T @ xc / (m - 1))  # ascending
    ev, vec = np.clip(ev[::-1], 0.0, None), vec[:, ::-1]
    if n_components is None:
        noise_var = float(np.mean(robust_sigma_of_diff(x) ** 2))
        k = choose_n_components(ev, rule=rule, n_samples=m, noise_var=noise_var)
    else:
        k = int(n_components)
    k = max(1, min(k, width, m - 1))
    basis = np.zeros((n, width))
    basis[:, :k] = vec[:, :k]
    return mean, basis


def _project(x: np.ndarray, mean: np.ndarray, basis: np.ndarray, dtype) -> np.ndarray:
    xc = x.astype(np.float64) - mean
    y = (xc @ basis) @ basis.T + mean
    return y.astype(dtype)


@register_step("pca_denoise")
def pca_denoise(
    cube: xr.DataArray,
    *,
    n_components: int | None = None,
    rule: str = "marchenko_pastur",
    sample_size: int = 20000,
    seed: int | None = 0,
    max_components: int = 64,
    whole_map: WholeMapPass | None = None,
) -> xr.DataArray:
    """Denoise by keeping the leading principal components of the spectra.

    Parameters
    ----------
    cube : xarray.DataArray
        Cube (*stack, y, x, S).
    n_components : int, optional
        Components to keep; default chosen by ``rule``.
    rule : {"marchenko_pastur", "broken_stick"}
        How k is chosen when not given (see :func:`choose_n_components`).
    sample_size : int
        Spectra drawn at random (without replacement, seeded) to fit the components.
    seed : int or None
        Seed of the random sample.
    max_components : int
        Upper bound of k when chosen by ``rule`` (default 64; sets the projection cost).
    whole_map : pmap.steps.WholeMapPass, optional
        Given by the pipeline runner: the PCA basis (mean spectrum and projection) is
        computed through it once, now, and recorded in the provenance. Without it (the
        default) nothing is computed here.

    Returns
    -------
    xarray.DataArray
        Lazy cube mean + (x − mean)·VₖVₖᵀ, same units. The fit runs when the result is
        computed (one pass over the sampled spectra), then every chunk is projected.

    Notes
    -----
    Cost: the covariance (n × n) of the m sampled spectra and its eigendecomposition once,
    then 4·n·w operations per spectrum, w = ``n_components`` or ``max_components``.
    """
    cube, sdim = check_cube(cube)
    if rule not in PCA_RULES:
        raise StepError(f"unknown rule {rule!r}; use one of {PCA_RULES}")
    n = cube.sizes[sdim]
    if n_components is not None and not 1 <= int(n_components) <= n:
        raise StepError(f"n_components must be between 1 and {n}, got {n_components}")
    lead = [d for d in cube.dims if d != sdim]
    shape = tuple(cube.sizes[d] for d in lead)
    total = int(np.prod(shape))
    m = min(int(sample_size), total)
    if m < 2:
        raise StepError(f"sample_size must be at least 2 and the cube hold 2 spectra (got {m})")
    rng = np.random.default_rng(seed)
    flat_idx = np.sort(rng.choice(total, size=m, replace=False))
    idx = np.unravel_index(flat_idx, shape)
    sample = cube.data.vindex[idx]
    width = int(n_components) if n_components is not None else min(n, int(max_components))
    fit = dask.delayed(_fit, nout=2)(sample, n_components, rule, width)
    mean, proj = whole_map_values(
        whole_map, "pca_denoise",
        mean_spectrum=da.from_delayed(fit[0], shape=(n,), dtype=np.float64),
        projection=da.from_delayed(fit[1], shape=(n, width), dtype=np.float64),
    )
    dt = float_dtype(cube.dtype)
    out = xr.apply_ufunc(
        _project,
        cube,
        xr.DataArray(mean, dims=(sdim,)),
        xr.DataArray(proj, dims=("_pca_in", "_pca_out")),
        input_core_dims=[[sdim], [sdim], ["_pca_in", "_pca_out"]],
        output_core_dims=[[sdim]],
        dask="parallelized",
        output_dtypes=[dt],
        kwargs={"dtype": dt},
        keep_attrs=True,
    )
    out = noise_correlated(out, cube, "pca_denoise (projection mixes channels)")
    return finish(
        out,
        cube,
        "pca_denoise",
        {
            "n_components": n_components,
            "rule": rule,
            "sample_size": int(sample_size),
            "seed": seed,
            "max_components": int(max_components),
        },
    )
