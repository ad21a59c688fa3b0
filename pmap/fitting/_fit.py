"""Per-pixel peak fitting of whole cubes: :func:`fit_peaks`, :func:`evaluate_fit`."""

from __future__ import annotations

import json
import threading
import warnings
from dataclasses import dataclass

import dask.array as da
import numpy as np
import xarray as xr

from ..conventions import HC_EV_NM, integrated_unit
from ..cube import spectral_dim, validate_cube
from ..errors import PmapNotice, StepError
from ..noise import get_noise_model, noise_coords
from ..provenance import with_step
from ..spectral._axis import channel_edges
from ..steps import WholeMapPass, register_step, whole_map_values
from . import _kernels as K
from ._common import fwhm_at_half, smooth3
from ._instrument import MODELS as _INSTRUMENT_MODELS
from ._instrument import deconvolve_peak, instrument_fwhm_ev, measure_instrument_fwhm
from ._lineshapes import (
    FWHM_TO_SIGMA,
    _voigt0,
    gaussian,
    lorentzian,
    pseudo_voigt,
    split_gaussian,
    voigt,
    voigt_widths,
)

__all__ = [
    "fit_peaks",
    "evaluate_fit",
    "model_spectrum",
    "FIT_STATUS_LEGEND",
    "PEAK_STATUS_LEGEND",
]

FIT_STATUS_LEGEND = (
    "0=converged;1=iteration limit reached (values kept);"
    "2=a parameter at a user-set bound (values kept);3=too little signal (NaN);"
    "4=masked or NaN input (NaN);5=solver failure, non-finite or singular (NaN);"
    "6=implausible: centre, width or area at its physical limit (edge of the energy axis, "
    "width at the channel spacing or the axis span, area <= 0) (NaN)"
)
#: CF ``flag_meanings`` tokens of the status codes 0–6 (both status variables)
STATUS_FLAG_MEANINGS = (
    "converged iteration_limit user_bound no_signal masked_or_nan solver_failure implausible"
)
PEAK_STATUS_LEGEND = (
    "0=converged;1=iteration limit reached (values kept);2=a parameter at a user-set bound "
    "(values kept);3=not detected: area below min_snr times its 1-sigma, or too little "
    "signal in the pixel (NaN);4=masked or NaN input (NaN);5=solver failure (NaN);"
    "6=implausible: centre at the edge of the energy axis, width at its limit or area <= 0 "
    "(NaN; the pixel's other peaks are kept)"
)
SHAPE_NAMES = {
    "voigt": ("lorentz_fraction", "Lorentzian FWHM / total FWHM (Olivero-Longbothum split)"),
    "pseudo_voigt": ("eta", "Lorentzian fraction of the pseudo-Voigt mixture"),
    "split_gaussian": ("asymmetry", "(HWHM_high - HWHM_low) / FWHM"),
}
_SHAPE_BOUNDS = {"voigt": (0.0, 0.99), "pseudo_voigt": (0.0, 1.0), "split_gaussian": (-0.9, 0.9)}
_SHAPE_START = {"voigt": 0.3, "pseudo_voigt": 0.5, "split_gaussian": 0.0}
_ALIASES = {
    "center": "center",
    "centre": "center",
    "energy": "center",
    "center_ev": "center",
    "fwhm": "fwhm",
    "width": "fwhm",
    "fwhm_ev": "fwhm",
    "area": "area",
    "shape": "shape",
    "offset": "offset",
    "background": "offset",
    "slope": "slope",
    "lorentz_fraction": "shape",
    "eta": "shape",
    "asymmetry": "shape",
}
_BACKGROUNDS = {"none": 0, "constant": 1, "linear": 2}
# energy, err, fwhm, err, area, err, height, err, shape, err, status, apparent fwhm, err
_PEAK_FIELDS = 13
_PS = 10  # index of the per-peak status within a peak's fields
# relative cost / step tolerances, as MINPACK's defaults used by scipy curve_fit
_FTOL = _XTOL = 1.49012e-8
# stop when the next Gauss–Newton step is below this many standard errors (it is then
# taken without another evaluation: the error left is second order in it)
_STOL = 0.1
_N_TAIL = 8  # offset, err, slope, err, bic, status, chi2_red, n_iter


@dataclass
class _Spec:
    model: str
    code: int
    K: int
    nbg: int
    npp: int
    kind: list
    peak: list
    free_idx: np.ndarray
    nfree: int
    lo: np.ndarray
    hi: np.ndarray
    bound_flag: np.ndarray  # 0 none, 2 user bound, 6 physical (default) bound
    fixed: np.ndarray  # NaN = free
    start: np.ndarray  # NaN = estimate
    x: np.ndarray
    xref: float
    init: str
    xe: np.ndarray  # channel edges (n + 1): the model is averaged over each channel
    instrument: dict | None = None  # Gaussian instrument FWHM: {"fwhm_ev": …} or {"fwhm_nm": …}

    @property
    def nfull(self) -> int:
        return len(self.kind)


def _spatial_chunks(cube) -> dict | None:
    """The cube's own spatial chunk sizes (dask-backed), so validation does not rechunk it.

    A rechunk would copy the whole cube once and change the parallel decomposition
    the caller chose; None (default chunking) for in-memory cubes.
    """
    if not isinstance(getattr(cube, "data", None), da.Array):
        return None
    sizes = cube.chunksizes
    return {d: max(sizes[d]) for d in ("y", "x") if d in sizes}


def _canon(key: str) -> str:
    k = _ALIASES.get(str(key).lower())
    if k is None:
        raise StepError(
            f"unknown fit parameter {key!r}; use center, fwhm, area, shape (or the model's shape "
            "name), offset, slope"
        )
    return k


def _per_peak(value, K: int, what: str) -> list:
    if (
        isinstance(value, (list, tuple))
        and len(value) == K
        and not (what == "bounds" and K == 2 and all(np.isscalar(v) for v in value))
    ):
        return list(value)
    return [value] * K


def _build_spec(x, *, model, peaks, background, bounds, fixed, shared, init) -> _Spec:
    if model not in K.MODEL_CODES:
        raise StepError(f"unknown model {model!r}; choose one of {', '.join(K.MODEL_CODES)}")
    if not isinstance(peaks, (int, np.integer)) or not 1 <= peaks <= 4:
        raise StepError(f"peaks must be an integer from 1 to 4, got {peaks!r}")
    if background not in _BACKGROUNDS:
        raise StepError(f"background must be one of {list(_BACKGROUNDS)}, got {background!r}")
    code = K.MODEL_CODES[model]
    npp = K.N_PEAK_PARAMS[code]
    nbg = _BACKGROUNDS[background]
    # a private writable copy: the kernels are compiled once for this array type (a
    # read-only coordinate would get its own compilation, whose vectorised loops may
    # round differently in the last bit)
    x = np.array(x, dtype=np.float64, order="C", copy=True)
    span = float(x[-1] - x[0])
    step = float(np.min(np.diff(x))) if x.size > 1 else span
    kind, peak = [], []
    for k in range(peaks):
        kind += ["center", "fwhm", "area", "shape"][:npp]
        peak += [k] * npp
    kind += ["offset", "slope"][:nbg]
    peak += [-1] * nbg
    n = len(kind)
    lo, hi = np.full(n, -np.inf), np.full(n, np.inf)
    flag = np.zeros(n, dtype=int)
    for j, kd in enumerate(kind):
        if kd == "center":
            lo[j], hi[j], flag[j] = x[0], x[-1], 6
        elif kd == "fwhm":
            lo[j], hi[j], flag[j] = 0.5 * step, 2.0 * span, 6
        elif kd == "area":
            lo[j], flag[j] = 0.0, 6
        elif kd == "shape":
            lo[j], hi[j] = _SHAPE_BOUNDS[model]
    fixed_v = np.full(n, np.nan)
    start = np.full(n, np.nan)

    def slots(key):
        c = _canon(key)
        if c == "shape" and npp == 3:
            raise StepError(f"model {model!r} has no shape parameter")
        idx = [j for j, kd in enumerate(kind) if kd == c]
        if not idx:
            raise StepError(f"parameter {key!r} does not exist with background={background!r}")
        return c, idx

    for key, val in (bounds or {}).items():
        c, idx = slots(key)
        vals = _per_peak(val, len(idx), "bounds") if c not in ("offset", "slope") else [val]
        for j, b in zip(idx, vals):
            if b is None:
                continue
            b_lo, b_hi = (float(v) if v is not None else np.nan for v in b)
            if not np.isnan(b_lo):
                lo[j] = b_lo
            if not np.isnan(b_hi):
                hi[j] = b_hi
            if not lo[j] < hi[j]:
                raise StepError(f"bounds for {key!r} must be (low, high) with low < high, got {b}")
            flag[j] = 2
    for key, val in (fixed or {}).items():
        c, idx = slots(key)
        vals = _per_peak(val, len(idx), "fixed") if c not in ("offset", "slope") else [val]
        for j, v in zip(idx, vals):
            if v is not None:
                fixed_v[j] = float(v)
    if isinstance(init, dict):
        for key, val in init.items():
            c, idx = slots(key)
            vals = _per_peak(val, len(idx), "init") if c not in ("offset", "slope") else [val]
            for j, v in zip(idx, vals):
                if v is not None:
                    start[j] = float(v)
        init_mode = "given"
    elif init in ("auto", "mean"):
        init_mode = init
    else:
        raise StepError(f"init must be 'auto', 'mean' or a dict of starting values, got {init!r}")
    free_idx = np.full(n, -1, dtype=np.int64)
    nfree = 0
    shared_kinds = {_canon(s) for s in (shared or [])}
    for s in shared_kinds:
        if s not in ("center", "fwhm", "area", "shape") or (s == "shape" and npp == 3):
            raise StepError(f"only peak parameters can be shared across peaks, got {s!r}")
    group: dict[str, int] = {}
    for j, kd in enumerate(kind):
        if np.isfinite(fixed_v[j]):
            continue
        if kd in shared_kinds:
            if kd not in group:
                group[kd] = nfree
                nfree += 1
            free_idx[j] = group[kd]
        else:
            free_idx[j] = nfree
            nfree += 1
    for s in shared_kinds:  # a shared parameter fixed in one peak is fixed in all
        idx = [j for j, kd in enumerate(kind) if kd == s]
        vals = fixed_v[idx]
        if np.any(np.isfinite(vals)) and not np.all(np.isfinite(vals)):
            raise StepError(f"shared parameter {s!r} is fixed in some peaks only")
    if nfree == 0:
        raise StepError("every parameter is fixed: nothing to fit")
    return _Spec(
        model,
        code,
        peaks,
        nbg,
        npp,
        kind,
        peak,
        free_idx,
        nfree,
        lo,
        hi,
        flag,
        fixed_v,
        start,
        x,
        float(0.5 * (x[0] + x[-1])),
        init_mode,
        channel_edges(x),
    )


def _filled(Y):
    """Y with masked (non-finite) channels filled by linear interpolation along each row,
    and the number of finite channels per row (descriptors and starting values only:
    the fit itself gives masked channels zero weight)."""
    n_ok = K.count_finite(Y) if Y.ndim == 2 and Y.shape[1] else np.isfinite(Y).sum(axis=1)
    bad_rows = np.flatnonzero((n_ok < Y.shape[1]) & (n_ok >= 2))
    if bad_rows.size == 0:
        return Y, n_ok
    ok = np.isfinite(Y)
    F = np.array(Y, dtype=np.float64, copy=True)
    idx = np.arange(Y.shape[1])
    for r in bad_rows:
        g = ok[r]
        F[r, ~g] = np.interp(idx[~g], idx[g], F[r, g])
    return F, n_ok


def _quick_desc(Y, x):
    """Per-row descriptors (one compiled pass, see ``describe_rows``).

    Returns (finite, base, height, noise, start): base = minimum of the 3-channel
    running mean, height = its maximum above base, noise = white-noise σ from
    second differences (the signal test); ``start`` = (offset, centre, height,
    fwhm) starting values: the log-parabola estimate where it succeeds, else the
    maximum's parabolic vertex and the half-maximum width (a quarter of the span
    where there is none) above the minimum.
    """
    finite, _, D = K.describe_rows(Y, x)
    b, height, e_max, fw, noise, b2, h2, c2, fw2 = D.T
    fw = np.where(np.isfinite(fw) & (fw > 0), fw, 0.25 * (x[-1] - x[0]))
    ok = np.isfinite(fw2)
    start = (
        np.where(ok, b2, b),
        np.where(ok, c2, e_max),
        np.where(ok, h2, height),
        np.where(ok, fw2, fw),
    )
    return finite, b, height, noise, start


def _area_from(height, fwhm):
    return np.maximum(height, 0.0) * fwhm * 1.0645  # Gaussian: area = height·FWHM·√(π/4ln2)


def _finish_start(P0, spec):
    """Apply fixed values, equalise shared groups, clip to bounds."""
    fixed = np.isfinite(spec.fixed)
    P0[:, fixed] = spec.fixed[fixed]
    for f in range(spec.nfree):
        cols = np.flatnonzero(spec.free_idx == f)
        if cols.size > 1:
            P0[:, cols] = P0[:, cols].mean(axis=1, keepdims=True)
    return np.clip(P0, spec.lo, spec.hi)


_UNIT_NOISE = (0, 1.0, 0.0, 1.0)  # (var_mode, a, b, floor): unit weights
_ONE = np.ones((1, 1))
_ZERO = np.zeros((1, 1))


def _run(Y, spec, P0, nz, max_iter, rows=None, stol=None, VS=_ONE, VP=_ZERO):
    """Fit rows ``rows`` of Y (all by default) from starting values P0 (len(rows), n_full).

    ``nz`` = (var_mode, a, b, floor) and VS, VP (rows × channels, either may be
    length 1): the noise law of :mod:`pmap.noise` (see ``K.lm_batch``).
    """
    if rows is None:
        rows = np.arange(Y.shape[0])
    var_mode, a, b, floor = nz
    return K.lm_batch(
        Y,
        np.asarray(rows, dtype=np.int64),
        spec.x,
        spec.xe,
        spec.xref,
        np.ascontiguousarray(P0, dtype=np.float64),
        spec.lo,
        spec.hi,
        spec.free_idx,
        spec.nfree,
        spec.code,
        spec.K,
        spec.nbg,
        var_mode,
        np.ascontiguousarray(VS, dtype=np.float64),
        np.ascontiguousarray(VP, dtype=np.float64),
        float(a),
        float(b),
        float(floor),
        max_iter,
        _FTOL,
        _XTOL,
        _STOL if stol is None else stol,
    )


def _d2_peaks(x, y, K, fw1):
    """Up to K (centre, fwhm, height) guesses from the minima of the smoothed second derivative.

    Overlapping lines that give one maximum still give separate minima of y''
    (derivative spectroscopy, common practice): the spectrum is smoothed with a
    Gaussian of σ = fw1/8 (fw1: the one-peak width), differentiated twice, and its
    K deepest local minima are the centres; the width of each negative lobe
    (between the zero crossings, ≈ 2σ of a Gaussian line) gives its FWHM.
    """
    n = x.size
    step = float(np.median(np.diff(x)))
    sig = max(fw1 / 8.0 / step, 0.7)
    half = int(np.ceil(4 * sig))
    k = np.exp(-0.5 * (np.arange(-half, half + 1) / sig) ** 2)
    ys = np.convolve(np.pad(y, half, mode="edge"), k / k.sum(), mode="valid")
    d2 = np.gradient(np.gradient(ys, x), x)
    i = np.flatnonzero((d2[1:-1] < d2[:-2]) & (d2[1:-1] <= d2[2:]) & (d2[1:-1] < 0)) + 1
    i = i[np.argsort(d2[i])][:K]
    out = []
    for j in np.sort(i):
        lo = j
        while lo > 0 and d2[lo] < 0:
            lo -= 1
        hi = j
        while hi < n - 1 and d2[hi] < 0:
            hi += 1
        fw = max((x[hi] - x[lo]) * 1.18, 3 * step)  # lobe ≈ 2σ = FWHM/1.18
        out.append((x[j], fw, max(ys[j], 0.0)))
    return out


_TEMPLATES: dict = {}
_TEMPLATES_LOCK = threading.Lock()


def _template_once(mean, spec):
    """:func:`_template`, computed once per (mean spectrum, model) and reused by every
    block of a map (the blocks of one fit share the whole-map mean)."""
    m = np.ascontiguousarray(mean, dtype=np.float64)
    key = (m.tobytes(), spec.x.tobytes(), spec.model, spec.K, spec.nbg, spec.init,
           spec.start.tobytes())
    with _TEMPLATES_LOCK:
        hit = _TEMPLATES.get(key)
    if hit is None:
        hit = _template(m, spec)
        with _TEMPLATES_LOCK:
            if len(_TEMPLATES) >= 16:
                _TEMPLATES.clear()
            _TEMPLATES[key] = hit
    return hit


def _template(mean, spec):
    """Fit the mean spectrum with K peaks: the best of several starts (lowest χ²).

    Starts: greedy (add each peak at the largest residual of the fit with one
    fewer), second-derivative minima (:func:`_d2_peaks`), and the one-peak fit
    split into K narrower peaks across its width. Unit weights: the template only
    seeds the per-pixel starting values. Returns (parameters, height, centre of
    the one-peak start) so that pixels can shift it to their own position.
    """
    x = spec.x
    Y = np.ascontiguousarray(_filled(np.asarray(mean, dtype=np.float64)[None, :])[0])
    mean = Y[0]
    _, _, _, _, (b, e_max, height, fw) = _quick_desc(Y, x)
    bg = [b[0], 0.0][: spec.nbg]
    npp = spec.npp
    shape0 = [_SHAPE_START[spec.model]] if npp == 4 else []

    def sub_spec(k):
        return _build_spec(x, model=spec.model, peaks=k, background=list(_BACKGROUNDS)[spec.nbg],
                           bounds=None, fixed=None, shared=None, init="auto")

    def fit(p, k):
        sub = sub_spec(k)
        P0 = np.clip(np.asarray(p, dtype=float)[None, :], sub.lo, sub.hi)
        P, _, chi2, st, _ = _run(Y, sub, P0, _UNIT_NOISE, 200)
        ok = np.all(np.isfinite(P[0])) and st[0] != K.STATUS_FAILED
        return (P[0] if ok else P0[0]), (float(chi2[0]) if ok else np.inf)

    # greedy
    prev, _ = fit([e_max[0], fw[0], _area_from(height, fw)[0], *shape0, *bg], 1)
    one = prev
    for k in range(2, spec.K + 1):
        f = np.empty(x.size)
        K.eval_model(spec.code, x, spec.xref, np.asarray(prev), k - 1, spec.nbg, f,
                     np.zeros((x.size, len(prev))), False)
        resid = smooth3((mean - f)[None, :])[0]
        i = int(np.argmax(resid))
        rw = fwhm_at_half(x, resid[None, :], np.array([i]), np.array([0.5 * resid[i]]))[0]
        w = rw if np.isfinite(rw) and rw > 0 else fw[0] / 2.0
        w = max(w, 3 * float(np.min(np.diff(x))))
        newp = [x[i], w, max(resid[i], 1e-12) * w * 1.0645, *shape0]
        prev, _ = fit(list(prev[: (k - 1) * npp]) + newp + bg, k)
    cands = [fit(list(prev), spec.K)] if spec.K == 1 else [(prev, None)]
    if spec.K > 1:
        cands[0] = fit(list(prev), spec.K)
        fw1 = float(one[1])
        guesses = _d2_peaks(x, mean - b[0], spec.K, fw1)
        if len(guesses) == spec.K:
            p = [v for c, w, h in guesses for v in (c, w, h * w * 1.0645, *shape0)]
            cands.append(fit(p + bg, spec.K))
        c1, a1 = float(one[0]), float(one[2])
        offs = np.linspace(-0.35, 0.35, spec.K) * fw1
        p = [v for o in offs for v in (c1 + o, fw1 / spec.K * 1.2, a1 / spec.K, *shape0)]
        cands.append(fit(p + bg, spec.K))
    best = min(cands, key=lambda c: c[1])[0]
    if spec.init == "given":
        given = spec.start[: spec.K * npp]
        if np.all(np.isfinite(given)):
            best = np.asarray(list(given) + list(best[spec.K * npp:]), dtype=float)
    return np.asarray(best, dtype=float), float(height[0]), float(e_max[0])


def _place_template(Yr, b, spec, tp):
    """Place the K-peak template ``tp`` on each row of Yr (m, n): (shift eV (m,), areas
    (m, K), background (m, nbg)).

    The shift maximises the cross-correlation of the row (less its base ``b``) with
    the template's peaks (searched over ± the template's span or widest FWHM, whichever
    is larger, in steps of a quarter of the narrowest template FWHM but at least one
    channel, refined by a parabola through the best three);
    a pixel's maximum alone is a poor anchor when the relative heights of the lines
    change across the map (it may sit on another line than the template's). With the
    line shapes fixed at that position the areas and the background are linear: least
    squares gives them; an area ≤ 0 starts at 2 % of the row's largest.
    """
    x = spec.x
    n, K_, npp = x.size, spec.K, spec.npp
    cen, fwhm = tp[0:K_ * npp:npp], tp[1:K_ * npp:npp]
    step = float(np.median(np.abs(np.diff(x))))
    # the correlation is as smooth as the narrowest line: a grid of a quarter of its
    # FWHM (at least one channel) samples it densely enough for the parabola below
    step *= max(1, int(float(np.min(fwhm)) / (4.0 * step)))
    ns = int(np.ceil(max(float(np.ptp(cen)), float(np.max(fwhm))) / step))
    shifts = np.arange(-ns, ns + 1) * step
    B = np.empty((shifts.size, K_, n))
    f, J = np.empty(n), np.zeros((n, npp))
    for k in range(K_):
        q = np.array(tp[k * npp:(k + 1) * npp], dtype=np.float64)
        c0, q[2] = q[0], 1.0
        for i, s in enumerate(shifts):
            q[0] = c0 + s
            K.eval_model(spec.code, x, spec.xref, q, 1, 0, f, J, False)
            B[i, k] = f
    a_t = np.asarray(tp[2:K_ * npp:npp], dtype=np.float64)
    cols = np.array([np.ones(n), x - spec.xref][: spec.nbg]).reshape(spec.nbg, n)
    # projections of every row on every peak at every shift: M[k] (m, shifts)
    M = [Yr @ B[:, k].T for k in range(K_)]
    C = sum(a_t[k] * (M[k] - b[:, None] * B[:, k].sum(axis=1)) for k in range(K_))
    best = np.argmax(C, axis=1)
    m = Yr.shape[0]
    r = np.arange(m)
    inner = (best > 0) & (best < shifts.size - 1)
    cm, c0_, cp = (C[r, np.clip(best + d, 0, shifts.size - 1)] for d in (-1, 0, 1))
    curv = cm - 2.0 * c0_ + cp
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(inner & (curv < 0), 0.5 * (cm - cp) / curv, 0.0)
    shift = shifts[best] + np.clip(np.nan_to_num(frac), -0.5, 0.5) * step
    # linear least squares for the areas and background at the best shift: normal
    # equations from the projections above and the Gram matrix of each shift's basis
    D = np.concatenate([B, np.broadcast_to(cols, (shifts.size, spec.nbg, n))], axis=1)
    G = np.einsum("spn,sqn->spq", D, D)[best]  # (m, K + nbg, K + nbg)
    rhs = np.concatenate([np.stack([M[k][r, best] for k in range(K_)], axis=1),
                          Yr @ cols.T], axis=1)
    G += np.eye(G.shape[1]) * (1e-12 * np.trace(G, axis1=1, axis2=2))[:, None, None]
    coef = np.linalg.solve(G, rhs[..., None])[..., 0]
    areas, bg = coef[:, :K_], coef[:, K_:]
    top = np.max(areas, axis=1, keepdims=True)
    areas = np.where(areas > 0.02 * top, areas, 0.02 * np.maximum(top, 0.0))
    return shift, areas, bg


def _starts(Y, rows, desc, spec, template):
    """Starting values (len(rows), n_full) for rows ``rows`` of Y, ``desc`` of those rows."""
    m = rows.size
    b, e_max, height, fw = desc
    P0 = np.zeros((m, spec.nfull))
    npp = spec.npp
    placed = None
    if template is not None and spec.K > 1:
        placed = _place_template(_filled(np.asarray(Y[rows], dtype=np.float64))[0], b, spec,
                                 template[0])
    if placed is not None:
        # several peaks: the template slid to the pixel by cross-correlation, its peak
        # areas (and the background) by linear least squares at that position
        shift, areas, bg0 = placed
        P0[:] = template[0]
        for k in range(spec.K):
            P0[:, k * npp] += shift
            P0[:, k * npp + 2] = areas[:, k]
    elif template is not None:
        tp, t_height, t_centre = template
        scale = np.where(t_height > 0, np.maximum(height, 0.0) / t_height, 1.0)
        # the template moved to the pixel: its centres shift with the pixel's maximum
        shift = np.where(np.isfinite(e_max), e_max - t_centre, 0.0)
        P0[:] = tp
        for k in range(spec.K):
            P0[:, k * npp + 2] = tp[k * npp + 2] * scale
            P0[:, k * npp] = tp[k * npp] + shift
    else:
        P0[:, 0], P0[:, 1], P0[:, 2] = e_max, fw, _area_from(height, fw)
        if npp == 4:
            P0[:, 3] = _SHAPE_START[spec.model]
    ob = spec.K * npp
    if spec.nbg >= 1:
        P0[:, ob] = b
    if spec.nbg == 2:
        P0[:, ob + 1] = 0.0
    if placed is not None and spec.nbg >= 1:
        P0[:, ob:ob + spec.nbg] = bg0
    given = np.isfinite(spec.start)
    if np.any(given):
        P0[:, given] = spec.start[given]
        for k in range(spec.K):  # given centre/width without area: area from local height
            j = k * npp
            if given[j] and not given[j + 2]:
                i = np.clip(np.searchsorted(spec.x, spec.start[j]), 0, spec.x.size - 1)
                P0[:, j + 2] = _area_from(Y[rows, i] - b, P0[:, j + 1])
    return _finish_start(P0, spec)


def _height(model, fw, area, shape):
    with np.errstate(divide="ignore", invalid="ignore"):
        if model in ("gaussian", "split_gaussian"):
            return area / (fw * np.sqrt(np.pi / (4.0 * np.log(2.0))))
        if model == "lorentzian":
            return 2.0 * area / (np.pi * fw)
        if model == "pseudo_voigt":
            return area * (shape * 2.0 / (np.pi * fw) + (1.0 - shape) / (fw * 1.0644670194312262))
        fg, fl = voigt_widths(fw, shape)
        return area * _voigt0(fg * FWHM_TO_SIGMA, 0.5 * fl)


def _fit_rows(Y, mean, spec, nz, max_iter, min_snr, VS=_ONE, VP=_ZERO):
    """Fit every row of Y (m, n), float32 or float64; returns (m, n_out) packed outputs.

    ``nz``, VS, VP: the noise law (see :func:`_run`). With several peaks, pixels
    whose fit did not converge cleanly (iteration limit, a peak implausible or
    not significant) are refitted from their own second-derivative start
    (:func:`_d2_peaks`); the lower χ² is kept.
    """
    m = Y.shape[0]
    out = np.full((m, _PEAK_FIELDS * spec.K + _N_TAIL), np.nan)
    Yf, n_ok = _filled(Y)
    finite, b, height, noise, start = _quick_desc(Yf, spec.x)
    # masked channels (bad-pixel masking) are left out of the fit; a spectrum with too
    # few channels left is "masked or NaN input"
    finite &= n_ok >= max(spec.nfree + 3, Y.shape[1] // 2)
    if nz[0] in (1, 3):  # the noise law's σ at the base level, mid-axis, as a floor
        var_mode, a, bb, floor = nz
        mid = Y.shape[1] // 2
        sc = VS[:, min(mid, VS.shape[1] - 1)]
        pc = VP[:, min(mid, VP.shape[1] - 1)]
        var = np.maximum(a * sc * np.maximum(b, 0.0) + sc * sc * (a * pc + bb), sc * sc * floor)
        noise = np.maximum(noise, np.sqrt(var))
    weak = ~(height > 0) | (height < min_snr * noise)
    status = np.where(finite, np.where(weak, 3, -1), 4)
    fit_rows = np.flatnonzero(status == -1)
    if fit_rows.size:
        template = None
        if spec.K > 1 or spec.init == "mean":
            template = _template_once(mean, spec)
        sel = tuple(v[fit_rows] for v in start)
        P0 = _starts(Y, fit_rows, sel, spec, template)
        P, COV, chi2, st, niter = _run(Y, spec, P0, nz, max_iter, fit_rows, VS=VS, VP=VP)
        res = _postprocess(P, COV, chi2, st, niter, spec, nz[0] == 1, min_snr)
        if spec.K > 1:
            res = _retry(Y, fit_rows, res, spec, nz, max_iter, min_snr, VS, VP, sel)
        out[fit_rows] = res
        status[fit_rows] = out[fit_rows, -3].astype(np.int64)
    out[:, -3] = status
    for k in range(spec.K):  # pixels not fitted: every peak shares the pixel's status
        col = k * _PEAK_FIELDS + _PS
        out[:, col] = np.where(np.isnan(out[:, col]), status, out[:, col])
    return out


def _peak_rank(o, K_):
    """(number of clean peaks, χ²) of packed output rows: the order of preference."""
    pst = o[:, [k * _PEAK_FIELDS + _PS for k in range(K_)]]
    return np.sum(pst == 0, axis=1), np.where(np.isfinite(o[:, -2]), o[:, -2], np.inf)


def _retry(Y, rows, res, spec, nz, max_iter, min_snr, VS, VP, desc):
    """Refit multi-peak rows that ended badly from two per-pixel starts; keep the best.

    Starts: (a) the second-derivative minima of the pixel's own spectrum
    (:func:`_d2_peaks`); (b) its one-peak start plus K − 1 peaks of zero area (a
    pixel with fewer lines than K then ends with the extra peaks dropped rather
    than one line split into insignificant halves). Kept: more clean peaks first,
    then the lower χ².
    """
    pst = res[:, [k * _PEAK_FIELDS + _PS for k in range(spec.K)]]
    again = np.flatnonzero((res[:, -3] != 0) | np.any(pst != 0, axis=1))
    if again.size == 0:
        return res
    b, c0, h0, fw = (v[again] for v in desc)
    npp, nb = spec.npp, spec.K * spec.npp
    shape0 = _SHAPE_START.get(spec.model, 0.0)
    starts = [np.full((again.size, spec.nfull), np.nan) for _ in range(2)]
    for r, i in enumerate(again):
        y = _filled(np.asarray(Y[rows[i]], dtype=np.float64)[None, :])[0][0]
        g = _d2_peaks(spec.x, y - b[r], spec.K, float(fw[r]))
        if len(g) == spec.K:
            starts[0][r, :nb] = [v for c, w, h in g for v in (c, w, h * w * 1.0645, shape0)[:npp]]
        one = [c0[r], fw[r], _area_from(h0[r], fw[r]), shape0][:npp]
        extra = [v for k in range(1, spec.K)
                 for v in (c0[r] + (-1) ** k * fw[r], fw[r], 0.0, shape0)[:npp]]
        starts[1][r, :nb] = one + extra
    for P0 in starts:
        if spec.nbg >= 1:
            P0[:, nb] = b
        if spec.nbg == 2:
            P0[:, nb + 1] = 0.0
        have = np.flatnonzero(np.all(np.isfinite(P0), axis=1))
        if have.size == 0:
            continue
        fit = _run(Y, spec, _finish_start(P0[have], spec), nz, max_iter, rows[again[have]],
                   VS=VS, VP=VP)
        new = _postprocess(*fit, spec, nz[0] == 1, min_snr)
        g_new, c_new = _peak_rank(new, spec.K)
        g_old, c_old = _peak_rank(res[again[have]], spec.K)
        better = (g_new > g_old) | ((g_new == g_old) & (c_new < c_old))
        res[again[have][better]] = new[better]
    return res


def _postprocess(P, COV, chi2, st, niter, spec, weighted=True, min_snr=5.0):
    """Pack the fitted parameters, errors and statuses into output rows.

    Each peak gets its own status (``PEAK_STATUS_LEGEND``): a peak at a physical
    limit (centre at the axis edge, width at its limit, area ≤ 0) is implausible
    (6) and a peak whose area is below ``min_snr`` × its 1σ is not detected (3);
    such a peak is NaN while the pixel's other peaks keep their values. The pixel
    status is 6 (or 3) only when no peak is left. ``bic`` = χ² + k ln n
    (weighted) or n ln(RSS/n) + k ln n (unit weights), k free parameters,
    n channels (Schwarz 1978).
    """
    m, K_, npp = P.shape[0], spec.K, spec.npp
    if np.array_equal(spec.free_idx, np.arange(spec.nfull)):
        C = COV  # every parameter free and its own
    else:
        M = np.zeros((spec.nfull, spec.nfree))
        for j, f in enumerate(spec.free_idx):
            if f >= 0:
                M[j, f] = 1.0
        C = np.einsum("jf,mfg,kg->mjk", M, COV, M)
    var = np.diagonal(C, axis1=1, axis2=2)
    with np.errstate(invalid="ignore"):
        err = np.where(np.isfinite(var), np.sqrt(np.maximum(var, 0.0)), np.nan)
    status = st.copy()
    x0, x1 = spec.x[0], spec.x[-1]
    tol = 1e-9 * np.maximum(1.0, np.abs(P))
    at_lo = np.abs(P - spec.lo) <= tol
    at_hi = np.abs(P - spec.hi) <= tol
    free = spec.free_idx >= 0
    hit = (at_lo | at_hi) & free
    user = np.any(hit & (spec.bound_flag == 2), axis=1)
    peak_of = np.asarray(spec.peak)
    peak_bad = np.zeros((m, K_), dtype=bool)
    peak_faint = np.zeros((m, K_), dtype=bool)
    for k in range(K_):
        cols = peak_of == k
        phys = np.any(hit[:, cols] & (spec.bound_flag[cols] == 6), axis=1)
        c, ar = P[:, k * npp], P[:, k * npp + 2]
        peak_bad[:, k] = phys | (c < x0) | (c > x1) | ~(ar > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            peak_faint[:, k] = ~peak_bad[:, k] & ~(ar >= min_snr * err[:, k * npp + 2])
    failed = ~np.all(np.isfinite(P), axis=1) | (status == 5)
    none_left = np.all(peak_bad | peak_faint, axis=1)
    ok = status >= 0
    status = np.where(ok & none_left & np.any(peak_bad, axis=1), 6, status)
    status = np.where(ok & none_left & ~np.any(peak_bad, axis=1), 3, status)
    status = np.where(ok & (status <= 1) & user, 2, status)
    status = np.where(failed, 5, status)
    out = np.full((m, _PEAK_FIELDS * K_ + _N_TAIL), np.nan)
    # derived: height and its uncertainty by finite differences in (fwhm, area, shape)
    for k in range(K_):
        o = k * npp
        shape = P[:, o + 3] if npp == 4 else np.zeros(m)
        h = _height(spec.model, P[:, o + 1], P[:, o + 2], shape)
        grads = []
        for d in range(1, npp):
            q = [P[:, o + 1].copy(), P[:, o + 2].copy(), shape.copy()]
            step = 1e-6 * np.maximum(np.abs(q[d - 1]), 1e-6)
            q[d - 1] = q[d - 1] + step
            grads.append((_height(spec.model, *q) - h) / step)
        G = np.stack(grads, axis=1)
        sub = np.nan_to_num(C[:, o + 1 : o + npp, o + 1 : o + npp])  # held-fixed ones: 0
        h_err = np.sqrt(np.maximum(np.einsum("mi,mij,mj->m", G, sub, G), 0.0))
        base = k * _PEAK_FIELDS
        out[:, base + 0], out[:, base + 1] = P[:, o], err[:, o]
        out[:, base + 2], out[:, base + 3] = P[:, o + 1], err[:, o + 1]
        out[:, base + 4], out[:, base + 5] = P[:, o + 2], err[:, o + 2]
        out[:, base + 6], out[:, base + 7] = h, h_err
        if npp == 4:
            out[:, base + 8], out[:, base + 9] = P[:, o + 3], err[:, o + 3]
        out[:, base + 11], out[:, base + 12] = P[:, o + 1], err[:, o + 1]
        if spec.instrument is not None:  # the intrinsic line under the instrument function
            fi = instrument_fwhm_ev(P[:, o], **spec.instrument)
            j = [o + 1, o + 3] if npp == 4 else [o + 1]
            fw_i, fw_e, sh_i, sh_e = deconvolve_peak(
                spec.model, P[:, o + 1], err[:, o + 1], P[:, o + 3] if npp == 4 else None,
                C[:, j][:, :, j], fi)
            out[:, base + 2], out[:, base + 3] = fw_i, fw_e
            if npp == 4:
                out[:, base + 8], out[:, base + 9] = sh_i, sh_e
        pst = np.where(peak_bad[:, k], 6, np.where(peak_faint[:, k], 3, status))
        pst = np.where(np.isin(status, (3, 4, 5, 6)) | (status < 0), status, pst)
        drop = np.isin(pst, (3, 4, 5, 6))
        out[drop, base : base + _PS] = np.nan
        out[:, base + _PS] = pst
    # sort peaks by ascending energy in every pixel (dropped peaks last)
    if K_ > 1:
        blocks = out[:, : K_ * _PEAK_FIELDS].reshape(m, K_, _PEAK_FIELDS)
        order = np.argsort(np.where(np.isfinite(blocks[:, :, 0]), blocks[:, :, 0], np.inf), axis=1)
        blocks = np.take_along_axis(blocks, order[:, :, None], axis=1)
        out[:, : K_ * _PEAK_FIELDS] = blocks.reshape(m, -1)
    ob = K_ * npp
    t = K_ * _PEAK_FIELDS
    if spec.nbg >= 1:
        out[:, t], out[:, t + 1] = P[:, ob], err[:, ob]
    if spec.nbg == 2:
        out[:, t + 2], out[:, t + 3] = P[:, ob + 1], err[:, ob + 1]
    n, k_free = spec.x.size, spec.nfree
    dof = max(n - k_free, 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        fit_term = chi2 * dof if weighted else n * np.log(chi2 * dof / n)
    out[:, -4] = fit_term + k_free * np.log(n)
    out[:, -3] = status
    out[:, -2] = chi2
    out[:, -1] = niter
    nan_rows = np.isin(status, (3, 4, 5, 6)) | (status < 0)
    out[nan_rows, : t + 4] = np.where(
        np.isin(np.arange(t + 4) % _PEAK_FIELDS, [_PS]) & (np.arange(t + 4) < t),
        out[nan_rows, : t + 4],
        np.nan,
    )
    out[nan_rows, -4] = np.nan
    out[nan_rows, -2] = np.nan
    return out


def _noise_setup(cube, noise, read_noise_counts, gain_e_per_count):
    """The fit's noise law from the cube's noise model (:mod:`pmap.noise`).

    Returns (cube, nz, description): ``nz`` = (var_mode, a, b, floor); var_mode 1 gives a
    true χ², 3 a residual relative to the law's variance, 0 a plain residual variance.
    A raw cube in counts without a model gets one here (stated figures, else
    estimated from the data); a cube whose model is correlated or unreliable is
    weighted by the law's shape with residual-scaled errors (var_mode 3); one with
    no model that is not raw counts gets unit weights and residual-scaled errors.
    """
    from ..spectral import attach_noise_model  # lower layer, imported on use

    if noise not in ("auto", "poisson", "residual"):
        raise StepError(f"noise must be 'auto', 'poisson' or 'residual', got {noise!r}")
    unit = cube.attrs.get("units", "1")
    model = get_noise_model(cube)
    if noise != "residual" and model is None and unit == "counts":
        cube = attach_noise_model(
            cube, gain_e_per_count=gain_e_per_count, read_noise_counts=read_noise_counts
        )
        model = get_noise_model(cube)
    why = None
    if noise == "residual":
        why = "unit weights requested (noise='residual')"
    elif model is None:
        why = (
            f"the cube (in {unit}) carries no noise model; attach one to the raw counts with "
            "pmap.attach_noise_model before any scaling step"
        )
    elif model.correlated:
        why = "the noise is correlated between channels (" + "; ".join(model.notes) + ")"
    elif not model.valid and gain_e_per_count is None:
        why = f"the noise model is {model.source}"
    if why is not None:
        if noise == "poisson":
            raise StepError(f"noise='poisson' is not possible: {why}")
        if noise == "auto" and str(unit).startswith("counts") and model is None:
            warnings.warn(
                f"fit_peaks: {why}; errors are scaled by each pixel's residual and the fit "
                "reports residual_variance, not chi2_red",
                PmapNotice,
                stacklevel=3,
            )
        if noise == "auto" and model is not None:
            # the law's shape across channels still holds (interpolation, smoothing and
            # PCA change its level, not which channels are brighter): weights from it,
            # errors scaled by the residual
            return (
                cube,
                (3, model.var_per_count, model.var_offset_counts2, model.floor_counts2),
                (
                    "weights from the noise model's per-channel variance, 1-sigma errors "
                    f"scaled by the weighted residual ({why}); weighted_residual_variance is "
                    "the residual variance relative to the model's (1 if the law held)"
                ),
            )
        return (
            cube,
            _UNIT_NOISE,
            (
                f"unit weights; 1-sigma errors from the covariance scaled by the residual "
                f"variance (no noise model: {why}); residual_variance is in ({unit})^2"
            ),
        )
    a, b, floor = model.var_per_count, model.var_offset_counts2, model.floor_counts2
    if gain_e_per_count is not None:
        a = 1.0 / float(gain_e_per_count)
    if read_noise_counts is not None:
        rn = float(read_noise_counts)
        b = rn * rn - a * float(model.dark_level_counts or 0.0)
        floor = a * a + rn * rn
    if not a >= 0 or not np.isfinite(b) or not floor > 0:
        raise StepError(f"invalid noise law: a = {a}, b = {b}, floor = {floor}")
    return (
        cube,
        (1, float(a), float(b), float(floor)),
        (
            "weighted least squares with the cube's noise model: variance = s*a*model + "
            f"s^2*(a*p + b) per channel ({model.describe()}; s, p: the scale and pedestal "
            "coordinates); weights from the fitted model, refreshed at every accepted "
            "Levenberg-Marquardt step (the Poisson maximum-likelihood score equations); "
            "absolute 1-sigma errors from the unscaled covariance; chi2_red is the true "
            "reduced chi-square"
        ),
    )


def _rows_of(arr, lead_shape):
    """A noise coordinate's block as rows (1 or prod(lead_shape), n_k) for ``K.lm_batch``."""
    arr = np.asarray(arr, dtype=np.float64)
    if all(d == 1 for d in arr.shape[:-1]):
        return arr.reshape(1, arr.shape[-1])
    return np.broadcast_to(arr, (*lead_shape, arr.shape[-1])).reshape(-1, arr.shape[-1])


def _apply_fit(cube, func, n_out, nz, mean=None):
    """Lazily apply ``func(Y, mean_vec, VS, VP)`` to every spectrum (rows of each chunk).

    The noise coordinates (scale, pedestal) go along as extra inputs with a core
    dim of length n_channels or 1, broadcast over the spatial dims by dask.
    """
    sdim = spectral_dim(cube)
    n_ch = cube.sizes[sdim]
    s, p = noise_coords(cube) if nz[0] else (xr.DataArray(1.0), xr.DataArray(0.0))

    def core(v, name):
        v = v.rename({sdim: name}) if sdim in v.dims else v.expand_dims({name: 1})
        return v.astype(np.float64)

    s_in, p_in = core(s, "_nz_s"), core(p, "_nz_p")
    has_mean = mean is not None

    def block(y, vs, vp, *ex):
        shp = y.shape[:-1]
        dt = np.float32 if y.dtype == np.float32 else np.float64
        rows = np.ascontiguousarray(y.reshape(-1, y.shape[-1]), dtype=dt)
        if rows.shape[0] == 0:
            return np.empty((*shp, n_out))
        mvec = np.asarray(ex[0], dtype=np.float64).reshape(-1, n_ch)[0] if has_mean else None
        return func(rows, mvec, _rows_of(vs, shp), _rows_of(vp, shp)).reshape(*shp, n_out)

    extra = [mean] if has_mean else []
    out = xr.apply_ufunc(
        block,
        cube,
        s_in,
        p_in,
        *extra,
        input_core_dims=[[sdim], ["_nz_s"], ["_nz_p"]] + [[sdim]] * len(extra),
        output_core_dims=[["fit_output"]],
        dask="parallelized",
        output_dtypes=[np.float64],
        dask_gufunc_kwargs={"output_sizes": {"fit_output": n_out}},
        keep_attrs=False,
    )
    out = out.transpose(*[d for d in cube.dims if d != sdim], "fit_output")
    return out.assign_coords({d: cube[d] for d in out.dims if d in cube.coords})


@register_step("fit_peaks")
def fit_peaks(
    cube,
    *,
    model: str = "gaussian",
    peaks: int = 1,
    background: str = "constant",
    bounds: dict | None = None,
    fixed: dict | None = None,
    shared: list | None = None,
    init="auto",
    max_iter: int = 100,
    read_noise_counts: float | None = None,
    gain_e_per_count: float | None = None,
    noise: str = "auto",
    energy_range_ev=None,
    min_snr: float = 5.0,
    instrument_fwhm_ev: float | None = None,
    instrument_fwhm_nm: float | None = None,
    instrument_lamp=None,
    whole_map: WholeMapPass | None = None,
) -> xr.Dataset:
    """Fit a sum of peaks plus background to every spectrum of an energy cube (lazy).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube with an ``energy`` axis (eV, ascending); use ``pmap.to_energy`` first.
    model : {"gaussian", "lorentzian", "voigt", "pseudo_voigt", "split_gaussian"}
        Line shape. Each peak has centre (eV), FWHM (eV), area (intensity·eV) and,
        for the last three, a shape parameter: ``lorentz_fraction`` (Voigt, f_L/f_V,
        0–0.99), ``eta`` (pseudo-Voigt Lorentzian fraction, 0–1), ``asymmetry``
        (split Gaussian, −0.9–0.9; see :func:`split_gaussian`).
    peaks : int
        Number of peaks, 1–4. In the result they are sorted by energy in every pixel.
    background : {"none", "constant", "linear"}
        Background: offset (intensity), plus slope (intensity/eV) about the axis centre.
    bounds : dict, optional
        ``{"center": (lo, hi)}`` for every peak or a list of per-peak (lo, hi);
        keys center, fwhm, area, shape, offset, slope. Defaults: centre within the
        axis, FWHM from half a channel to twice the span, area ≥ 0.
    fixed : dict, optional
        Values fixed across the map, e.g. ``{"center": [1.42, None]}`` (a known
        defect band at 1.42 eV as the first peak) or ``{"fwhm": 0.03}``.
    shared : list of str, optional
        Peak parameters shared by all peaks of a pixel, e.g. ``["fwhm"]``.
    init : "auto", "mean" or dict
        Starting values: "auto" uses per-pixel descriptors for one peak and a
        fit of the map's mean spectrum for several; "mean" always the mean
        spectrum; a dict gives values (same keys as ``fixed``).
    max_iter : int
        Levenberg–Marquardt iterations per spectrum.
    read_noise_counts, gain_e_per_count : float, optional
        Override the read noise (counts) and gain (e⁻/count) of the cube's noise
        model (see :func:`pmap.attach_noise_model`).
    noise : {"auto", "poisson", "residual"}
        "auto": weights from the noise model that travels with the cube
        (:mod:`pmap.noise`; a raw cube in counts without one gets it here, from its
        attrs or estimated from the data), absolute errors and a true χ²_red; unit
        weights with errors scaled by the residual variance when there is no model
        or the noise is correlated (smoothing, PCA, resampling). "poisson": require
        the noise model (StepError otherwise). "residual": unit weights.
    energy_range_ev : (float, float), optional
        Fit only this energy window (eV).
    min_snr : float
        Spectra whose maximum above the minimum (3-channel running mean) is below
        ``min_snr`` × noise are not fitted (status 3, NaN); with one peak, a fitted
        area below ``min_snr`` × its 1σ uncertainty also gives status 3 (the fit
        latched onto noise).
    instrument_fwhm_ev, instrument_fwhm_nm : float, optional
        FWHM of a Gaussian instrument function, in eV or in nm (then E²/hc × it at
        each peak's energy). The model is the line convolved with it (exact for
        "gaussian" and "voigt", the models it applies to): ``peak_fwhm`` (and the
        Voigt ``lorentz_fraction``) are the intrinsic line's, NaN where the line is
        not wider than the instrument; ``peak_fwhm_apparent`` is the fitted width.
    instrument_lamp : DataArray or path, optional
        Measure the instrument FWHM (nm) from the strongest line of this lamp
        spectrum instead (:func:`pmap.fitting.measure_instrument_fwhm`).
    whole_map : pmap.steps.WholeMapPass, optional
        Given by the pipeline runner: the mean spectrum that seeds multi-peak starts is
        computed through it once, now, and recorded in the provenance. Without it (the
        default) nothing is computed here.

    Returns
    -------
    xarray.Dataset
        Lazy; ``peak_energy``, ``peak_energy_err``, ``peak_fwhm``, ``peak_fwhm_err``
        (eV), ``peak_area``, ``peak_area_err``, ``peak_height``, ``peak_height_err``,
        ``peak_wavelength`` (nm, vacuum), ``peak_shape`` (+ err) with dims
        (peak, …, y, x); ``background_offset`` (+ ``background_slope``), ``fit_status``
        (legend in attrs), ``peak_status`` (peak, …, y, x: each peak's own status, so a
        spurious component does not discard the good one), ``bic`` (Schwarz's
        criterion, to see where K peaks are warranted), ``chi2_red`` (dimensionless, with a noise model) or
        ``residual_variance`` (intensity², without one), ``n_iter`` with dims (…, y, x).

    Notes
    -----
    The model is averaged over each channel (edges midway between channel centres):
    data in counts per channel, or a density derived from them, are channel
    integrals, and a point-sampled model would report narrow lines too wide.
    Batched Levenberg–Marquardt (numba, analytic Jacobians, SIMD over channels),
    float64 inside; chunks run in parallel on dask's threads (the compiled loop
    releases the GIL), so the cube's spatial chunking is kept as given. Starting
    values for one peak come from a weighted log-parabola fit of the channels above
    half maximum (Caruana et al., Anal. Chem. 58, 1162 (1986)), after which about
    two passes over the channels suffice: each pass forms the model, the weights
    and the normal equations together, and the fit stops when the next
    Gauss–Newton step is below 0.1 standard error (that step is taken) or the χ²
    change is below 1.5e-8 (MINPACK's default). One Gaussian with a constant
    background uses a dedicated one-pass kernel. Errors are 1σ from the covariance
    (see attr ``uncertainty_method``). Cost per spectrum ~ passes × channels × peaks.
    """
    params = {k: v for k, v in locals().items() if k != "cube"}  # the options, for provenance
    if instrument_lamp is not None:
        params["instrument_lamp"] = str(instrument_lamp) if not isinstance(
            instrument_lamp, xr.DataArray) else "DataArray"
    cube = validate_cube(cube, chunks=_spatial_chunks(cube))
    if spectral_dim(cube) != "energy":
        raise StepError(
            f"fit_peaks needs an energy axis (eV), got {spectral_dim(cube)!r}; convert first "
            "with pmap.to_energy"
        )
    if energy_range_ev is not None:
        lo_e, hi_e = (float(v) for v in energy_range_ev)
        cube = cube.sel(energy=slice(lo_e, hi_e))
    x = np.asarray(cube["energy"].values, dtype=float)
    if x.size < 5:
        raise StepError(f"only {x.size} channels to fit (need at least 5)")
    spec = _build_spec(
        x,
        model=model,
        peaks=peaks,
        background=background,
        bounds=bounds,
        fixed=fixed,
        shared=shared,
        init=init,
    )
    given = [v for v in (instrument_fwhm_ev, instrument_fwhm_nm, instrument_lamp) if v is not None]
    if len(given) > 1:
        raise StepError("give one of instrument_fwhm_ev, instrument_fwhm_nm, instrument_lamp")
    if given:
        if model not in _INSTRUMENT_MODELS:
            raise StepError(
                f"an instrument function is convolved exactly for the models "
                f"{', '.join(_INSTRUMENT_MODELS)}; a {model} line seen through a Gaussian "
                "instrument is a Voigt profile: use model='voigt'"
            )
        if instrument_lamp is not None:
            measured = measure_instrument_fwhm(instrument_lamp)
            instrument_fwhm_nm = measured["fwhm_nm"]
            params["instrument_measured"] = measured
        key, val = (("fwhm_ev", instrument_fwhm_ev) if instrument_fwhm_ev is not None
                    else ("fwhm_nm", instrument_fwhm_nm))
        if not (np.isfinite(float(val)) and float(val) > 0):
            raise StepError(f"instrument FWHM must be positive, got {val!r}")
        spec.instrument = {key: float(val)}
    n_par = spec.nfree
    if x.size <= n_par:
        raise StepError(f"{x.size} channels cannot fit {n_par} free parameters")
    cube, nz, unc = _noise_setup(cube, noise, read_noise_counts, gain_e_per_count)
    n_out = _PEAK_FIELDS * spec.K + _N_TAIL
    mean = None
    if spec.K > 1 or spec.init == "mean":
        # the mean spectrum (a lazy reduction) seeds multi-peak starting values
        spatial = [d for d in cube.dims if d != "energy"]
        mean = cube.mean(dim=spatial, skipna=True).reset_coords(drop=True)
        mean = mean.chunk({"energy": -1}) if isinstance(mean.data, da.Array) else mean
        mean = mean.copy(data=whole_map_values(whole_map, "fit_peaks",
                                               mean_spectrum=mean.data))

    def rows(Y, mean_vec, VS, VP):
        return _fit_rows(Y, mean_vec, spec, nz, int(max_iter), float(min_snr), VS=VS, VP=VP)

    arr = _apply_fit(cube, rows, n_out, nz, mean)
    params.update(peaks=int(peaks), max_iter=int(max_iter))
    return _assemble(arr, cube, spec, unc, params, nz[0])


def _take_col(block, col):
    """Column ``col`` of a packed output block (…, n_out) as a contiguous (…) array."""
    return np.ascontiguousarray(block[..., col])


def _take_peaks(block, cols):
    """Columns ``cols`` (one per peak) of a packed output block as (peak, …)."""
    return np.ascontiguousarray(np.moveaxis(block[..., cols], -1, 0))


def _assemble(arr, cube, spec, unc, params, var_mode):
    unit = cube.attrs.get("units", "1")
    area_unit = integrated_unit(unit, "eV")
    fields = [
        ("peak_energy", "eV", "peak centre energy"),
        ("peak_energy_err", "eV", "1-sigma uncertainty of the peak centre energy"),
        ("peak_fwhm", "eV", "peak full width at half maximum"),
        ("peak_fwhm_err", "eV", "1-sigma uncertainty of the peak FWHM"),
        ("peak_area", area_unit, "integrated peak intensity"),
        ("peak_area_err", area_unit, "1-sigma uncertainty of the peak area"),
        ("peak_height", unit, "peak height above background"),
        ("peak_height_err", unit, "1-sigma uncertainty of the peak height"),
        ("peak_shape", "1", ""),
        ("peak_shape_err", "1", ""),
    ]
    data = arr.data
    sp = arr.dims[:-1]
    xp = da if isinstance(data, da.Array) else np

    def var(col, units, long, **extra):
        """Output column(s) as a variable: an int → dims (…, y, x); a list → (peak, …, y, x).

        On a dask array one blockwise task per block (``map_blocks``), which dask fuses
        with later elementwise steps: slicing the packed output instead makes two or
        three tasks per variable and block, whose scheduling cost ~0.6 µs a spectrum.
        """
        if isinstance(col, list):
            dims = ("peak", *sp)
            if xp is da:
                v = data.map_blocks(_take_peaks, col, drop_axis=data.ndim - 1, new_axis=0,
                                    chunks=((len(col),), *data.chunks[:-1]), dtype=data.dtype)
            else:
                v = _take_peaks(data, col)
        else:
            dims = sp
            if xp is da:
                v = data.map_blocks(_take_col, col, drop_axis=data.ndim - 1, dtype=data.dtype)
            else:
                v = _take_col(data, col)
        return xr.Variable(dims, v, {"units": units, "long_name": long, **extra})

    dv = {}
    for i, (name, u, long) in enumerate(fields):
        if name.startswith("peak_shape"):
            if spec.npp == 3:
                continue
            sname, sdesc = SHAPE_NAMES[spec.model]
            long = f"peak {sname}: {sdesc}" + (" (1-sigma uncertainty)" if "err" in name else "")
        dv[name] = var([k * _PEAK_FIELDS + i for k in range(spec.K)], u, long)
    if spec.instrument is not None:
        (key, val), = spec.instrument.items()
        what = f"{val:g} {'eV' if key == 'fwhm_ev' else 'nm'}"
        for i, suffix, long in ((11, "", "apparent FWHM (line convolved with the instrument)"),
                                (12, "_err", "1-sigma uncertainty of the apparent FWHM")):
            dv[f"peak_fwhm_apparent{suffix}"] = var(
                [k * _PEAK_FIELDS + i for k in range(spec.K)], "eV", long)
        dv["peak_fwhm"].attrs["long_name"] = (
            f"intrinsic peak FWHM (Gaussian instrument function of FWHM {what} "
            "deconvolved; NaN where not wider than the instrument)")
    dv["peak_wavelength"] = xr.Variable(
        dv["peak_energy"].dims,
        HC_EV_NM / dv["peak_energy"].data,
        {"units": "nm", "long_name": "peak wavelength (vacuum, hc/E)"},
    )
    t = spec.K * _PEAK_FIELDS
    if spec.nbg >= 1:
        dv["background_offset"] = var(t, unit, "background offset")
        dv["background_offset_err"] = var(t + 1, unit, "1-sigma uncertainty")
    if spec.nbg == 2:
        su, ref = f"{unit}/eV", {"reference_energy_ev": spec.xref}
        dv["background_slope"] = var(t + 2, su, "background slope", **ref)
        dv["background_slope_err"] = var(t + 3, su, "1-sigma uncertainty", **ref)
    # CF flags: flag_values of the variable's own type, flag_meanings as blank-separated
    # tokens (CF-1.10 §3.5); the prose is in "legend"
    flags = {"flag_values": np.arange(7, dtype=np.int8), "flag_meanings": STATUS_FLAG_MEANINGS}
    st = var(-3, "1", "fit status", legend=FIT_STATUS_LEGEND, **flags)
    dv["fit_status"] = st.astype(np.int8)
    pst = var([k * _PEAK_FIELDS + _PS for k in range(spec.K)], "1", "fit status of each peak",
              legend=PEAK_STATUS_LEGEND, **flags)
    dv["peak_status"] = pst.astype(np.int8)
    dv["bic"] = var(
        -4,
        "1",
        "Bayesian information criterion of the fit (lower is better; compare runs with "
        "different numbers of peaks pixel by pixel)",
    )
    if var_mode == 3:
        dv["weighted_residual_variance"] = var(
            -2, "1", "weighted residual variance per degree of freedom, relative to the noise "
            "model's (the errors are scaled by it)"
        )
    elif var_mode == 1:
        dv["chi2_red"] = var(
            -2, "1", "reduced chi-square (residuals weighted by the noise model)"
        )
    else:
        dv["residual_variance"] = var(
            -2, f"({unit})^2", "residual variance per degree of freedom (no noise model)"
        )
    dv["n_iter"] = var(-1, "1", "Levenberg-Marquardt iterations")
    coords = {k: c for k, c in arr.coords.items() if "fit_output" not in c.dims}
    coords["peak"] = ("peak", np.arange(spec.K), {"long_name": "peak index, by energy"})
    keep = {k: v for k, v in cube.attrs.items() if k not in ("units", "long_name")}
    keep["fit_noise_weighted"] = int(var_mode in (1, 3))
    attrs = with_step(keep, "fit_peaks", params)
    attrs.update(
        {
            "fit_model": spec.model,
            "fit_n_peaks": spec.K,
            "fit_background": list(_BACKGROUNDS)[spec.nbg],
            "fit_background_reference_energy_ev": spec.xref,
            "fit_parameters": json.dumps(
                {
                    "names": [
                        f"{kd}[{p}]" if p >= 0 else kd for kd, p in zip(spec.kind, spec.peak)
                    ],
                    "lower": [None if not np.isfinite(v) else float(v) for v in spec.lo],
                    "upper": [None if not np.isfinite(v) else float(v) for v in spec.hi],
                    "fixed": [None if not np.isfinite(v) else float(v) for v in spec.fixed],
                    "free_index": [int(v) for v in spec.free_idx],
                }
            ),
            "fit_status_legend": FIT_STATUS_LEGEND,
            "uncertainty_method": unc,
            "fit_energy_range_ev": [float(spec.x[0]), float(spec.x[-1])],
            "fit_intensity_units": unit,
        }
    )
    if spec.npp == 4:
        attrs["fit_shape_parameter"] = SHAPE_NAMES[spec.model][0]
    if spec.instrument is not None:
        (key, val), = spec.instrument.items()
        attrs[f"fit_instrument_{key}"] = val
    return xr.Dataset(dv, coords=coords, attrs=attrs)


def model_spectrum(params, energy_ev, *, model=None, background=None, reference_energy_ev=None):
    """Model spectrum and its components at given energies.

    Parameters
    ----------
    params : xarray.Dataset or dict
        A :func:`fit_peaks` result reduced to one pixel (``result.isel(y=0, x=0)``),
        or a dict with ``center``, ``fwhm``, ``area`` (lists, eV / intensity·eV),
        optional ``shape``, ``offset``, ``slope``, and ``model``.
    energy_ev : array_like
        Energies (eV) to evaluate at.
    model, background, reference_energy_ev : optional
        Override the model name, background kind and slope reference energy
        (taken from the result attrs by default).

    Returns
    -------
    xarray.Dataset
        ``total`` (energy), ``peak`` components (peak, energy), ``background`` (energy).
    """
    e = np.asarray(energy_ev, dtype=float)
    if isinstance(params, xr.Dataset):
        extra = [d for d in params["peak_energy"].dims if d != "peak"]
        if extra:
            raise StepError(f"select one pixel first (dims left: {extra})")
        model = model or params.attrs.get("fit_model", "gaussian")
        ref = (
            reference_energy_ev
            if reference_energy_ev is not None
            else params.attrs.get("fit_background_reference_energy_ev", 0.0)
        )
        d = {
            "center": params["peak_energy"].values,
            "fwhm": params["peak_fwhm"].values,
            "area": params["peak_area"].values,
            "shape": params["peak_shape"].values if "peak_shape" in params else None,
            "offset": float(params["background_offset"]) if "background_offset" in params else 0.0,
            "slope": float(params["background_slope"]) if "background_slope" in params else 0.0,
        }
        unit = params.attrs.get("fit_intensity_units", "1")
    else:
        d = dict(params)
        model = model or d.get("model", "gaussian")
        ref = (
            reference_energy_ev
            if reference_energy_ev is not None
            else d.get("reference_energy_ev", 0.0)
        )
        unit = d.get("units", "1")
    if model not in K.MODEL_CODES:
        raise StepError(f"unknown model {model!r}")
    c = np.atleast_1d(np.asarray(d["center"], dtype=float))
    fw = np.atleast_1d(np.asarray(d["fwhm"], dtype=float))
    ar = np.atleast_1d(np.asarray(d["area"], dtype=float))
    sh = d.get("shape")
    sh = np.full(c.size, _SHAPE_START.get(model, 0.0)) if sh is None else np.atleast_1d(sh)
    comps = []
    for k in range(c.size):
        if model == "gaussian":
            comps.append(gaussian(e, c[k], fw[k], ar[k]))
        elif model == "lorentzian":
            comps.append(lorentzian(e, c[k], fw[k], ar[k]))
        elif model == "pseudo_voigt":
            comps.append(pseudo_voigt(e, c[k], fw[k], sh[k], ar[k]))
        elif model == "split_gaussian":
            comps.append(split_gaussian(e, c[k], fw[k], sh[k], ar[k]))
        else:
            fg, fl = voigt_widths(fw[k], sh[k])
            comps.append(voigt(e, c[k], fg, fl, ar[k]))
    comps = np.array(comps).reshape(c.size, e.size)
    bg = np.full(e.size, float(d.get("offset", 0.0) or 0.0))
    bg = bg + float(d.get("slope", 0.0) or 0.0) * (e - float(ref))
    total = np.nansum(comps, axis=0) + bg
    coords = {"energy": ("energy", e, {"units": "eV", "long_name": "photon energy"})}
    return xr.Dataset(
        {
            "total": ("energy", total, {"units": unit, "long_name": f"fitted {model} model"}),
            "peak_component": (
                ("peak", "energy"),
                comps,
                {"units": unit, "long_name": "peak components"},
            ),
            "background": ("energy", bg, {"units": unit, "long_name": "fitted background"}),
        },
        coords=coords,
        attrs={"model": model},
    )


def evaluate_fit(result: xr.Dataset, energy_ev=None, **pixel) -> xr.Dataset:
    """Fitted model and components at one pixel of a :func:`fit_peaks` result.

    Parameters
    ----------
    result : xarray.Dataset
        Output of :func:`fit_peaks`.
    energy_ev : array_like, optional
        Energies (eV); default 512 points over the fitted energy range.
    **pixel
        Coordinates of the pixel, e.g. ``y=3.0, x=5.0`` (µm, nearest pixel), and
        any stack dims.
    """
    if energy_ev is None:
        lo, hi = result.attrs.get("fit_energy_range_ev", (0.5, 4.0))
        energy_ev = np.linspace(lo, hi, 512)
    sel = result.sel(pixel, method="nearest") if pixel else result
    return model_spectrum(sel.compute(), energy_ev)
