"""Attach a detector noise model to a raw cube: from its attrs, else estimated from the data.

The model (see :mod:`pmap.noise`) is the photon-transfer relation of the raw
counts, var = a·μ + b (Janesick, *Photon Transfer*, SPIE Press 2007). Stated
figures (``gain_e_per_count``, ``read_noise_counts``, ``dark_level_counts``) are
used when present; what is missing is estimated from the data by a
difference-based mean–variance method in the spirit of Foi, Trimeche, Katkovnik
& Egiazarian, IEEE Trans. Image Process. 17, 1737 (2008): a high-pass (the 4th
difference along the spectral axis, which annihilates cubic signal) gives local
variance samples, a level from channels outside the difference (independent of
its noise) sorts them into bins, and a weighted straight line through the bin
means gives a and b. (The 6th difference, annihilating quintic signal, is used;
bins where it disagrees with the 4th difference hold signal curvature and are
dropped.)
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..cube import spread_blocks
from ..errors import PmapNotice, StepError
from ..noise import NoiseModel, get_noise_model, set_noise_model
from ..provenance import with_step
from ..steps import register_step
from ._common import check_cube

__all__ = ["attach_noise_model", "estimate_noise_parameters"]

# high-pass filters: 4th and 6th differences (annihilate cubic / quintic signal)
_C4 = np.array([1.0, -4.0, 6.0, -4.0, 1.0])
_C6 = np.array([1.0, -6.0, 15.0, -20.0, 15.0, -6.0, 1.0])
_N_BINS = 24
_MAX_SAMPLE_CHUNKS = 6
_MAX_SAMPLE_SPECTRA = 4096  # ~2·10⁶ difference samples: the gain to well under 1 %
# an estimated gain is used only when its relative 1σ error is below this (σ of the
# error bars it gives: half of it)
_MAX_REL_ERR = 0.05


def _difference_samples(Y: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, ...]:
    """(level, d²/Σc², proxy, row) for every interior channel of every finite spectrum row.

    ``d`` = Σ c_k y_{i+k}; ``level`` = Σ c_k² y_{i+k} / Σc² is the exact level whose
    linear variance law the difference obeys (E[d²]/Σc² = a·E[level] + b); ``proxy``
    = mean of the two channels either side just outside the filter sorts samples
    into bins without selecting on the filter's own noise; ``row`` = the sample's row
    in ``Y`` (rows with NaN or no variation give no samples).
    """
    Y = np.asarray(Y, dtype=np.float64)
    rows = np.flatnonzero(np.all(np.isfinite(Y), axis=1) & (np.ptp(Y, axis=1) > 0))
    Y = Y[rows]  # no NaN, no dead pixel
    n, h = Y.shape[1], c.size // 2
    if Y.shape[0] == 0 or n < 4 * h + 4:
        return np.empty(0), np.empty(0), np.empty(0), np.empty(0, dtype=np.int64)
    i = np.arange(h + 2, n - h - 2)
    c2 = float(np.sum(c * c))
    d = sum(ck * Y[:, i + k - h] for k, ck in enumerate(c))
    lev = sum(ck * ck * Y[:, i + k - h] for k, ck in enumerate(c)) / c2
    proxy = 0.25 * (Y[:, i - h - 2] + Y[:, i - h - 1] + Y[:, i + h + 1] + Y[:, i + h + 2])
    return (lev.ravel(), (d * d / c2).ravel(), proxy.ravel(),
            np.repeat(rows, i.size).astype(np.int64))


def _plateau_rows(Y: np.ndarray) -> np.ndarray:
    """Rows holding a saturated plateau: a run of ≥ 3 consecutive channels at exactly the
    sample's largest value (a detector or converter limit; noise never repeats a value
    three times running at the top of the range)."""
    Y = np.asarray(Y)
    fin = np.isfinite(Y)
    if not fin.any():
        return np.zeros(Y.shape[0], dtype=bool)
    top = Y == np.max(Y[fin])
    if top.sum() < 3:
        return np.zeros(Y.shape[0], dtype=bool)
    return np.any(top[:, :-2] & top[:, 1:-1] & top[:, 2:], axis=1)


def _near(flag: np.ndarray, row: np.ndarray, width: int) -> np.ndarray:
    """``flag`` widened to every sample of the same row within ``width`` − 1 positions
    (samples of a row are consecutive channels, rows one after another)."""
    out = flag.copy()
    for k in range(1, width):
        same_l = row[k:] == row[:-k]
        out[k:] |= flag[:-k] & same_l
        out[:-k] |= flag[k:] & same_l
    return out


def _row_noise_factor(c: np.ndarray) -> float:
    """Var of the mean of n overlapping d²/σ² samples is ``factor``·2/n (Gaussian noise;
    Cov(d_i², d_{i+k}²) = 2ρ_k²σ⁴ with ρ_k the filter's autocorrelation)."""
    c2 = float(np.sum(c * c))
    rho = [float(np.sum(c[:-k] * c[k:])) / c2 for k in range(1, c.size)]
    return 1.0 + 2.0 * float(np.sum(np.square(rho)))


#: A sampled spectrum whose differences disagree with the map's law by more than this
#: many standard errors (its mean d²/var) is left out of the fit (see
#: :func:`estimate_noise_parameters`).
_ROW_Z = 6.0


def estimate_noise_parameters(
    Y: Any, *, gain_e_per_count: float | None = None, saturation_counts: float | None = None
) -> dict[str, float]:
    """Estimate the raw-count variance law var = a·μ + b from spectra Y (n_spectra, n_channels).

    Parameters
    ----------
    Y : array_like
        Raw spectra in counts (rows), each a whole spectrum.
    gain_e_per_count : float, optional
        When given, a = 1/gain is fixed and only b is estimated.
    saturation_counts : float, optional
        Spectra reaching this level are left out (a saturated plateau has no noise).

    Returns
    -------
    dict
        ``a`` (counts per count), ``b`` (counts²), ``a_err``, ``b_err`` (1σ),
        ``floor`` (smallest binned variance, counts²), ``level_min``, ``level_max``
        (counts), ``n_samples``, ``method``.

    Notes
    -----
    Difference-based mean–variance estimate (see the module docstring): samples
    whose difference exceeds 6σ of the first-pass law (cosmic spikes, sharp lines)
    are dropped, and so are whole spectra whose mean d²/var differs from 1 by more
    than 6 standard errors (a pixel with an offset but no shot noise, a line sharp
    enough to reach the high-pass: one such spectrum far above the map's levels
    would tilt the line) and spectra with a saturated plateau (a run of ≥ 3 channels
    at exactly the largest value); the fit is repeated until the kept samples no
    longer change (at most 4 fits). Raises StepError when there are too few samples.
    """
    Y = np.asarray(Y)
    if saturation_counts is not None:
        Y = Y[~np.any(Y >= 0.98 * float(saturation_counts), axis=1)]
    Y = Y[~_plateau_rows(Y)]  # a saturated plateau has no noise
    lev, d2, proxy, row = _difference_samples(Y, _C6)
    d2_4 = _difference_samples(Y, np.pad(_C4, 1))[1]  # same samples, 4th difference
    if lev.size < 200:
        fin = np.all(np.isfinite(Y), axis=1) if Y.ndim == 2 else np.zeros(0, bool)
        why = (f"spectra of {Y.shape[-1]} channels are too short for it (at least "
               f"{4 * (_C6.size // 2) + 4} needed)" if Y.ndim == 2 and Y.shape[-1] < 4 * (_C6.size // 2) + 4
               else "every sampled spectrum is constant (no noise: dead or blank pixels?) or "
               "holds NaN" if Y.ndim == 2 and not np.any(fin & (np.ptp(
                   np.where(np.isfinite(Y), Y, 0), axis=1) > 0))
               else f"too few samples ({lev.size})")
        raise StepError(
            f"cannot estimate the noise model: {why}; state the detector's "
            "gain_e_per_count and read_noise_counts in the cube's attrs"
        )
    keep = np.ones(lev.size, dtype=bool)
    fixed_a = None if gain_e_per_count is None else 1.0 / float(gain_e_per_count)
    factor = _row_noise_factor(_C6)
    res = None
    for _ in range(4):
        res = _binned_fit(lev[keep], d2[keep], proxy[keep], fixed_a, d2_4[keep], factor)
        var = np.maximum(res["a"] * lev + res["b"], res["floor"])
        ratio = d2 / var
        # |d| ≤ 6σ of the fitted law, and no sample whose window shares a channel with
        # one beyond it: a cosmic spike raises every difference that sees it
        new_keep = ~_near(ratio > 36.0, row, _C6.size)
        # whole spectra that do not follow the map's law (an offset without shot noise,
        # a line sharp enough to reach the high-pass): their mean d²/var differs from 1
        # by more than _ROW_Z standard errors
        n_row = np.bincount(row, weights=new_keep, minlength=Y.shape[0])
        with np.errstate(invalid="ignore", divide="ignore"):
            r_row = np.bincount(row, weights=ratio * new_keep, minlength=Y.shape[0]) / n_row
            z_row = (r_row - 1.0) / np.sqrt(2.0 * factor / n_row)
        bad_row = (n_row >= 20) & (np.abs(z_row) > _ROW_Z)
        if bad_row.mean() < 0.5:  # a rule for outliers, not for the bulk of the map
            new_keep &= ~bad_row[row]
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    res["n_samples"] = int(keep.sum())
    res["method"] = (
        "difference-based mean-variance fit (6th spectral difference, level-binned, "
        "Foi et al. 2008; photon transfer, Janesick 2007)"
    )
    return res


def _binned_fit(lev, d2, proxy, fixed_a, d2_4, factor=1.0):
    """Weighted line through level-binned means; bins where the 4th- and 6th-difference
    variances disagree (signal curvature leaking into the high-pass) are dropped.
    ``factor``: the variance of a bin mean of overlapping difference samples over that
    of independent ones (:func:`_row_noise_factor`), for the errors of a and b."""
    edges = np.unique(np.quantile(proxy, np.linspace(0.0, 1.0, _N_BINS + 1)))
    idx = np.clip(np.searchsorted(edges, proxy, side="right") - 1, 0, max(edges.size - 2, 0))
    nb = max(edges.size - 1, 1)
    cnt = np.bincount(idx, minlength=nb).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        my_all = np.bincount(idx, weights=d2, minlength=nb) / cnt
        my4 = np.bincount(idx, weights=d2_4, minlength=nb) / cnt
        agree = np.abs(my4 - my_all) <= 4.0 * np.sqrt(2.0 / cnt) * my_all
    ok = (cnt >= 20) & agree
    if not np.any(ok):
        ok = cnt >= 20
    mx = np.bincount(idx, weights=lev, minlength=nb)[ok] / cnt[ok]
    my = my_all[ok]
    # s.e. of a bin mean of d²/Σc² ≈ sqrt(2·factor/n)·E[d²/Σc²] (near-Gaussian
    # differences; overlapping windows of one spectrum are correlated: factor ≈ 3.2 for
    # the 6th difference, so independent-sample errors would be 1.8x too small);
    # weights from the observed bin means first, then from the fitted line (weights
    # from the data themselves favour bins that came out low: a bias of ~0.4 s.e.)
    expect = my
    for _ in range(2):
        se = np.sqrt(2.0 * factor / cnt[ok]) * np.maximum(expect, 1e-12)
        w = 1.0 / se**2
        if fixed_a is not None:
            a = fixed_a
            b = float(np.sum(w * (my - a * mx)) / np.sum(w))
            a_err, b_err = 0.0, float(1.0 / np.sqrt(np.sum(w)))
        elif mx.size >= 2 and np.ptp(mx) > 0:
            A = np.stack([mx, np.ones_like(mx)], axis=1)
            cov = np.linalg.inv(A.T @ (A * w[:, None]))
            a, b = cov @ (A.T @ (w * my))
            a_err, b_err = float(np.sqrt(cov[0, 0])), float(np.sqrt(cov[1, 1]))
        else:
            break
        line = a * mx + b
        if not np.all(line > 0):  # keep the observed weights where the line is not usable
            break
        expect = line
    if not (fixed_a is not None or (mx.size >= 2 and np.ptp(mx) > 0)):
        a, b, a_err, b_err = 0.0, float(np.mean(my)), np.inf, 0.0
    floor = float(np.min(my)) if my.size else 1.0
    return {
        "a": float(a),
        "b": float(b),
        "a_err": float(a_err),
        "b_err": float(b_err),
        "floor": max(floor, 1e-12),
        "level_min": float(np.min(mx)) if mx.size else float("nan"),
        "level_max": float(np.max(mx)) if mx.size else float("nan"),
    }


def _sample_rows(cube: xr.DataArray, sdim: str, max_chunks: int = _MAX_SAMPLE_CHUNKS) -> np.ndarray:
    """Whole spatial chunks spread over the map (≤ max_chunks), as rows (n, n_ch), computed;
    thinned to about ``_MAX_SAMPLE_SPECTRA`` rows by a regular stride."""
    import dask

    data = cube.transpose(..., sdim).data
    arrs = dask.compute(*spread_blocks(data, max_chunks))
    rows = np.concatenate([np.asarray(a).reshape(-1, a.shape[-1]) for a in arrs])
    return rows[:: max(1, rows.shape[0] // _MAX_SAMPLE_SPECTRA)]


def _stated(cube: xr.DataArray, key: str, alias: str | None = None) -> float | None:
    v = cube.attrs.get(key, cube.attrs.get(alias) if alias else None)
    if v is None:
        return None
    try:
        v = float(v)
    except (TypeError, ValueError):
        raise StepError(f"attr {key} must be a number, got {v!r}") from None
    if not np.isfinite(v):
        raise StepError(f"attr {key} must be finite, got {v!r}")
    return v


@register_step("attach_noise_model")
def attach_noise_model(
    cube: xr.DataArray,
    *,
    gain_e_per_count: float | None = None,
    read_noise_counts: float | None = None,
    dark_level_counts: float | None = None,
    estimate: str = "auto",
) -> xr.DataArray:
    """Attach the detector noise model to a raw cube in counts (stated figures, else estimated).

    Parameters
    ----------
    cube : xarray.DataArray
        Raw cube in ``counts`` (before any scaling step).
    gain_e_per_count, read_noise_counts, dark_level_counts : float, optional
        Detector gain (e⁻/count), read noise (1σ, counts) and dark level / bias
        (counts). Default: the cube's attrs of the same names (``dark_offset_counts``
        is accepted for the dark level).
    estimate : {"auto", "always", "never"}
        "auto": estimate from the data what is not stated (reads up to 6 whole
        chunks spread over the map); "always": ignore stated figures except those
        given here; "never": require gain and read noise to be stated.

    Returns
    -------
    xarray.DataArray
        The cube with ``attrs["noise_model"]`` (a :class:`pmap.noise.NoiseModel`
        as JSON); values unchanged. A cube that already has a model is returned as is.

    Notes
    -----
    With gain g, read noise r and dark level D stated: a = 1/g, b = r² − D/g.
    Otherwise the difference-based estimator of :func:`estimate_noise_parameters`
    supplies what is missing (a and b, or b with a fixed). When the data span too
    narrow a range of levels to pin a down (relative error > 5 %), the model is
    marked not valid (``valid=False``, the reason in ``source``) and fits use unit
    weights with residual-scaled errors instead of claiming Poisson statistics.
    """
    cube, sdim = check_cube(cube)
    if get_noise_model(cube) is not None:
        return cube
    unit = str(cube.attrs.get("units", ""))
    if unit != "counts":
        raise StepError(
            f"a noise model needs the raw cube in counts (this one is in {unit!r}); "
            "attach it before scaling steps"
        )
    if estimate not in ("auto", "always", "never"):
        raise StepError(f"estimate must be 'auto', 'always' or 'never', got {estimate!r}")
    use_attrs = estimate != "always"
    g = gain_e_per_count if gain_e_per_count is not None else (
        _stated(cube, "gain_e_per_count") if use_attrs else None
    )
    rn = read_noise_counts if read_noise_counts is not None else (
        _stated(cube, "read_noise_counts") if use_attrs else None
    )
    dark = dark_level_counts if dark_level_counts is not None else (
        _stated(cube, "dark_level_counts", "dark_offset_counts") if use_attrs else None
    )
    if g is not None and not g > 0:
        raise StepError(f"gain_e_per_count must be > 0, got {g}")
    if rn is not None and not rn >= 0:
        raise StepError(f"read_noise_counts must be >= 0, got {rn}")
    params = {"gain_e_per_count": g, "read_noise_counts": rn, "dark_level_counts": dark,
              "estimate": estimate}
    if g is not None and rn is not None and (dark is not None or estimate == "never"):
        a = 1.0 / g
        d = float(dark or 0.0)
        model = NoiseModel(
            var_per_count=a,
            var_offset_counts2=rn * rn - a * d,
            floor_counts2=a * a + rn * rn,
            source="attrs: gain, read noise" + (", dark level" if dark is not None else
                                                " (dark level 0 assumed)"),
            gain_e_per_count=g,
            read_noise_counts=rn,
            dark_level_counts=d,
        )
        found: dict = {}
    elif estimate == "never":
        raise StepError(
            "gain_e_per_count and read_noise_counts are not stated and estimate='never'"
        )
    else:
        rows = _sample_rows(cube, sdim)
        est = estimate_noise_parameters(
            rows, gain_e_per_count=g, saturation_counts=_stated(cube, "saturation_counts")
        )
        a, b = est["a"], est["b"]
        what = "b" if g is not None else "a and b"
        source = f"estimated {what} from {est['n_samples']} samples: {est['method']}"
        valid = True
        if g is None and not (a > 0 and est["a_err"] < _MAX_REL_ERR * a):
            valid = False
            source = (
                f"not estimable: gain {1.0 / a if a > 0 else float('inf'):.3g} ± "
                f"{est['a_err'] / max(a, 1e-300) * 100:.0f} % from {est['n_samples']} "
                "samples (too few spectra or too narrow a range of levels); state "
                "gain_e_per_count and read_noise_counts"
            )
        model = NoiseModel(
            var_per_count=float(a),
            var_offset_counts2=float(b),
            floor_counts2=max(0.5 * est["floor"], (a * a) if a > 0 else 1e-12),
            source=source,
            gain_e_per_count=(1.0 / a) if a > 0 else None,
            read_noise_counts=rn,
            dark_level_counts=dark,
            valid=valid,
        )
        found = {k: est[k] for k in ("a", "b", "a_err", "b_err", "n_samples")}
        if g is None:
            warnings.warn(
                f"detector gain not stated: noise model estimated from the data "
                f"(gain {1.0 / a:.3g} ± {est['a_err'] / a * 100:.1f} % e-/count)" if valid else
                f"detector gain not stated and the noise model is {source}; fits will use "
                "unit weights with errors scaled by the residual",
                PmapNotice,
                stacklevel=2,
            )
    out = set_noise_model(cube, model)
    out.attrs = with_step(out.attrs, "attach_noise_model", params, noise_model=model.describe(),
                          **({"estimate": found} if found else {}))
    return out
