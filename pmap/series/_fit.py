"""Fit a published law per pixel along a stack dimension (vectorised Levenberg–Marquardt)."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..errors import StepError
from ..provenance import with_step
from ._laws import LAWS, Law

#: printed names of the laws (titles of maps, figures and viewer layers)
LAW_TITLES = {"varshni": "Varshni", "bose_einstein": "Bose–Einstein", "linewidth": "Linewidth",
              "arrhenius": "Arrhenius", "power_law": "Power law"}

#: fit status legend (the codes follow the result store's ``fit_status``)
STATUS_LEGEND = {0: "converged", 1: "iteration limit", 4: "too few valid points (masked/NaN)",
                 5: "solver failure", 6: "implausible (parameter outside its physical domain)"}
#: CF ``flag_values``/``flag_meanings`` of the status codes (code 4, too few points, is
#: the "masked or NaN" state of the result store's ``fit_status``: no value, drawn grey)
STATUS_FLAG_VALUES = (0, 1, 4, 5, 6)
STATUS_FLAG_MEANINGS = "converged iteration_limit masked_or_nan solver_failure implausible"

#: power-law classes (Schmidt, Lischka & Zulehner 1992); rules of thumb only
POWER_CLASS_LEGEND = {-1: "no fit", 0: "k < 1 (free-to-bound, donor-acceptor pair)",
                      1: "1 <= k <= 2 (excitonic)", 2: "k > 2 (superlinear: check saturation "
                      "of competing channels or stimulated emission)"}
#: CF flags of ``power_law_class`` (−1, no converged fit, is left out: drawn as no value)
POWER_CLASS_FLAG_VALUES = (0, 1, 2)
POWER_CLASS_FLAG_MEANINGS = "k_below_1 k_1_to_2 k_above_2"
POWER_CLASS_CAVEAT = ("rules of thumb (Schmidt, Lischka & Zulehner, Phys. Rev. B 45, 8989 (1992)): "
                      "the exponent depends on the excitation range and on competing channels; "
                      "it does not identify a transition by itself")


def lm_fit(law: Law, x, y, sigma, *, max_iter: int = 200, weighted: bool = True):
    """Levenberg–Marquardt for many series at once.

    Parameters
    ----------
    law : Law
        The model (see :data:`pmap.series._laws.LAWS`).
    x : ndarray (n,)
        Stack coordinate (K or reference-scaled power).
    y, sigma : ndarray (N, n)
        Values and their 1σ uncertainties (NaN = missing point).
    weighted : bool
        If False, σ is ignored (unit weights) and the errors are scaled by √χ²_red.

    Returns
    -------
    params, errors : ndarray (N, k)
    chi2_red : ndarray (N,)
    status : ndarray (N,) int8 (legend :data:`STATUS_LEGEND`)
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    n_pix, n = y.shape
    k = law.n_params
    if weighted:
        s = np.asarray(sigma, float)
        good = np.isfinite(y) & np.isfinite(s) & (s > 0)
        w = np.where(good, 1.0 / np.where(good, s, 1.0), 0.0)
    else:
        good = np.isfinite(y)
        w = good.astype(float)
    y = np.where(good, y, 0.0)
    n_valid = good.sum(axis=1)
    params = np.full((n_pix, k), np.nan)
    errors = np.full((n_pix, k), np.nan)
    chi2_red = np.full(n_pix, np.nan)
    status = np.full(n_pix, 4, np.int8)
    idx = np.flatnonzero(n_valid >= k + 2)
    if idx.size == 0:
        return params, errors, chi2_red, status
    yy, ww = y[idx], w[idx]
    with np.errstate(all="ignore"):
        p = law.start(x, yy, ww)
        logs = list(law.log_params)

        def resid(p):
            return (yy_a - law.model(x, p)) * ww_a

        m = len(idx)
        lam = np.full(m, 1e-3)
        done = np.zeros(m, bool)
        st = np.full(m, 1, np.int8)
        yy_a, ww_a = yy, ww
        r = resid(p)
        chi2 = np.sum(r * r, axis=1)
        st[~np.isfinite(chi2)] = 5
        done |= ~np.isfinite(chi2)
        for _ in range(max_iter):
            act = np.flatnonzero(~done)
            if act.size == 0:
                break
            yy_a, ww_a = yy[act], ww[act]
            pa = p[act]
            j = law.jac(x, pa) * ww_a[..., None]
            ra = resid(pa)
            a = np.einsum("pni,pnj->pij", j, j)
            g = np.einsum("pni,pn->pi", j, ra)
            d = np.einsum("pii->pi", a)
            d = np.where(d > 0, d, 1.0)
            lhs = a + (lam[act, None] * d)[:, :, None] * np.eye(k)
            ok = np.all(np.isfinite(lhs), axis=(1, 2)) & np.all(np.isfinite(g), axis=1)
            step = np.zeros_like(pa)
            if ok.any():
                lo = lhs[ok]
                sing = np.linalg.cond(lo) > 1e15
                st_ok = np.zeros((ok.sum(), k))
                if (~sing).any():
                    st_ok[~sing] = np.linalg.solve(lo[~sing], g[ok][~sing][..., None])[..., 0]
                step[ok] = st_ok
                ok[np.flatnonzero(ok)[sing]] = False
            pn = pa + step
            rn = resid(pn)
            chi2n = np.sum(rn * rn, axis=1)
            better = ok & np.isfinite(chi2n) & (chi2n <= chi2[act])
            small_step = np.all(np.abs(step) <= 1e-9 * (np.abs(pa) + 1e-12), axis=1)
            small_gain = (chi2[act] - chi2n) <= 1e-10 * chi2[act] + 1e-14
            conv = better & (small_step | small_gain)
            p[act[better]] = pn[better]
            chi2[act[better]] = chi2n[better]
            lam[act] = np.where(better, np.maximum(lam[act] / 10, 1e-12), lam[act] * 10)
            stuck = ~better & (lam[act] > 1e12)  # no step improves: at the minimum
            conv |= stuck & ok
            failed = ~ok & (lam[act] > 1e12)
            st[act[conv]] = 0
            st[act[failed & ~conv]] = 5
            done[act[conv | failed]] = True
        # covariance at the solution
        yy_a, ww_a = yy, ww
        j = law.jac(x, p) * ww[..., None]
        a = np.einsum("pni,pnj->pij", j, j)
        cov = np.full_like(a, np.nan)
        inv_ok = np.all(np.isfinite(a), axis=(1, 2))
        inv_ok[inv_ok] = np.linalg.cond(a[inv_ok]) < 1e15
        cov[inv_ok] = np.linalg.inv(a[inv_ok])
        st[(st == 0) & ~inv_ok] = 5
        dof = n_valid[idx] - k
        cr = chi2 / dof
        var = np.einsum("pii->pi", cov)
        if not weighted:
            var = var * cr[:, None]
        err = np.sqrt(np.where(var >= 0, var, np.nan))
        for i in logs:  # reported as the value, error propagated
            p[:, i] = np.exp(p[:, i])
            err[:, i] = p[:, i] * err[:, i]
        st[(st == 0) & law.implausible(p)] = 6
    params[idx], errors[idx], chi2_red[idx], status[idx] = p, err, cr, st
    return params, errors, chi2_red, status


def _resolve(data, law: Law, quantity, err, dim):
    """The quantity, its uncertainty (or None), the stack dim; refuses bad input."""
    if isinstance(data, xr.Dataset):
        if quantity is None:
            quantity = next((q for q in law.default_quantities if q in data.data_vars), None)
            if quantity is None:
                raise StepError(f"law {law.name!r} needs one of {list(law.default_quantities)} "
                                f"in the result; pass quantity= (have {sorted(data.data_vars)})")
        if quantity not in data.data_vars:
            raise StepError(f"no variable {quantity!r} in the result "
                            f"(have {sorted(data.data_vars)})")
        values = data[quantity]
        if err is None and f"{quantity}_err" in data.data_vars:
            err = data[f"{quantity}_err"]
        if quantity.startswith("peak_") and "peak_status" in data.data_vars \
                and set(data["peak_status"].dims) <= set(values.dims):
            values = values.where(data["peak_status"] == 0)  # dropped components are missing
    elif isinstance(data, xr.DataArray):
        values = data
        quantity = quantity or data.name or "value"
    else:
        raise StepError(f"fit_law needs an xarray Dataset or DataArray, got {type(data).__name__}")
    if isinstance(err, xr.DataArray) and err.dims != values.dims:
        err = err.broadcast_like(values).transpose(*values.dims)
    if dim is None:
        from ..cube import STACK_DIMS

        cands = [d for d in values.dims if d in STACK_DIMS]
        if law.dim in values.dims:
            dim = law.dim
        elif len(cands) == 1:
            dim = cands[0]
        else:
            raise StepError(f"{quantity!r} has dims {values.dims}: no stack dim "
                            f"{law.dim!r}; name it with dim= (--dim)")
    if dim not in values.dims:
        raise StepError(f"{quantity!r} has no dim {dim!r} (dims {values.dims})")
    if dim not in values.coords:
        raise StepError(f"stack dim {dim!r} has no values: give it a coordinate "
                        f"({law.dim_units})")
    units = values[dim].attrs.get("units")
    if units is not None and dim == law.dim and str(units) != law.dim_units:
        raise StepError(f"stack coordinate {dim!r} is in {units!r}; law {law.name!r} needs "
                        f"{law.dim_units}")
    return values, err, dim, quantity


def _check_stack(x: np.ndarray, dim: str, law: Law) -> None:
    bad = [i for i, v in enumerate(x) if not np.isfinite(v)]
    if bad:
        raise StepError(f"stack dim {dim!r}: values missing (NaN) at positions {bad}")
    uniq, counts = np.unique(x, return_counts=True)
    if (counts > 1).any():
        raise StepError(f"stack dim {dim!r}: duplicated values {uniq[counts > 1].tolist()}")
    dx = np.diff(x)
    if not (np.all(dx > 0) or np.all(dx < 0)):
        raise StepError(f"stack dim {dim!r} is not monotonic: {x.tolist()}")
    if len(x) < law.n_params + 2:
        raise StepError(f"law {law.name!r} has {law.n_params} parameters and needs at least "
                        f"{law.n_params + 2} points along {dim!r}; got {len(x)}")
    if law.dim_units in ("K", "W") and np.any(x <= 0):
        raise StepError(f"stack dim {dim!r}: law {law.name!r} needs values > 0 "
                        f"{law.dim_units}; got {x[x <= 0].tolist()}")


def fit_law(data, *, law: str, quantity: str | None = None, dim: str | None = None,
            err: xr.DataArray | None = None, max_iter: int = 200,
            keep_data: bool = True) -> xr.Dataset:
    """Fit a published law per pixel along a stack dimension.

    Parameters
    ----------
    data : xarray.Dataset or xarray.DataArray
        A result (maps with a stack dim, e.g. ``peak_energy`` on
        (temperature, peak, y, x)) or the quantity itself.
    law : str
        ``varshni``, ``bose_einstein``, ``linewidth``, ``arrhenius`` (temperature in K)
        or ``power_law`` (excitation power in W).
    quantity : str, optional
        Variable to fit (default: ``peak_energy`` for varshni/bose_einstein,
        ``peak_fwhm`` for linewidth, ``peak_area`` else ``integrated_intensity``
        for arrhenius/power_law).
    dim : str, optional
        Stack dim (default: the law's, else the only stack dim present).
    err : xarray.DataArray, optional
        1σ uncertainties of the quantity (default ``{quantity}_err`` of the result).
        Without any, the fit is unweighted and errors are scaled by √χ²_red.
    max_iter : int
        Levenberg–Marquardt iteration limit.
    keep_data : bool
        Also return the fitted points: the quantity (and ``{quantity}_err``) with its
        stack dim, and the result's ``region`` map when it has one (for figures and
        the viewer).

    Returns
    -------
    xarray.Dataset
        ``{law}_{param}`` and ``{law}_{param}_err`` (units in attrs), ``{law}_chi2_red``
        (units "1"), ``{law}_status`` (CF flags and legend in attrs), on the dims other than the stack
        dim; ``power_law_class`` for the power law. Lazy (dask) when the input is.
    """
    if law not in LAWS:
        raise StepError(f"unknown law {law!r}; choose one of {sorted(LAWS)}")
    lw = LAWS[law]
    values, err, dim, quantity = _resolve(data, lw, quantity, err, dim)
    x = np.asarray(values[dim].values, dtype=float)
    _check_stack(x, dim, lw)
    weighted = err is not None
    ref = None
    xs = x
    if lw.name == "power_law":
        ref = float(np.exp(np.mean(np.log(x))))  # geometric mean: A is well conditioned
        xs = x / ref
    k = lw.n_params
    n_out = 2 * k + 2

    def kernel(v, e):
        shape = v.shape[:-1]
        v2 = v.reshape(-1, v.shape[-1])
        e2 = e.reshape(-1, e.shape[-1]) if weighted else None
        p, pe, cr, st = lm_fit(lw, xs, v2, e2, max_iter=max_iter, weighted=weighted)
        out = np.concatenate([p, pe, cr[:, None], st[:, None].astype(float)], axis=1)
        return out.reshape(*shape, n_out)

    if isinstance(values.data, np.ndarray):
        pass
    else:
        values = values.chunk({dim: -1})
    e_in = err if weighted else xr.zeros_like(values)
    if hasattr(values.data, "dask"):
        e_in = e_in.chunk(dict(zip(values.dims, values.chunks)))
    out = xr.apply_ufunc(
        kernel, values, e_in,
        input_core_dims=[[dim], [dim]], output_core_dims=[["_law_out"]],
        dask="parallelized", output_dtypes=[float],
        dask_gufunc_kwargs={"output_sizes": {"_law_out": n_out}},
    )
    q_units = values.attrs.get("units", "")
    ds = xr.Dataset()
    for i, (name, unit, desc) in enumerate(zip(lw.params, lw.units, lw.descriptions)):
        unit = q_units if unit == "y" else unit
        ds[f"{law}_{name}"] = out.isel(_law_out=i).assign_attrs(
            units=unit, long_name=f"{LAW_TITLES[law]} {name}: {desc}", description=desc)
        ds[f"{law}_{name}_err"] = out.isel(_law_out=k + i).assign_attrs(
            units=unit, long_name=f"1-sigma uncertainty of {law}_{name}")
    ds[f"{law}_chi2_red"] = out.isel(_law_out=2 * k).assign_attrs(
        units="1", long_name=f"{LAW_TITLES[law]} fit: reduced χ²"
        + ("" if weighted else " (unweighted: residual variance, no uncertainties given)"))
    st = out.isel(_law_out=2 * k + 1).fillna(4).astype(np.int8)
    ds[f"{law}_status"] = st.assign_attrs(
        units="1", long_name=f"{law} fit status", legend=str(STATUS_LEGEND).replace("'", '"'),
        flag_values=np.array(STATUS_FLAG_VALUES, np.int8), flag_meanings=STATUS_FLAG_MEANINGS)
    if law == "power_law":
        kk = ds["power_law_k"]
        cls = xr.where(kk < 1, 0, xr.where(kk <= 2, 1, 2))
        cls = xr.where((st == 0) & np.isfinite(kk), cls, -1).astype(np.int8)
        ds["power_law_class"] = cls.assign_attrs(
            units="1", long_name="power-law exponent class (rules of thumb)",
            legend=str(POWER_CLASS_LEGEND).replace("'", '"'), caveat=POWER_CLASS_CAVEAT,
            flag_values=np.array(POWER_CLASS_FLAG_VALUES, np.int8),
            flag_meanings=POWER_CLASS_FLAG_MEANINGS)
    ds = ds.drop_vars([c for c in ds.coords if dim in ds[c].dims or c == dim], errors="ignore")
    if keep_data:  # the fitted points travel with the law: figures and viewer need no source
        ds[quantity] = values.assign_attrs(values.attrs)
        if weighted:
            ds[f"{quantity}_err"] = err.assign_attrs(err.attrs)
        if isinstance(data, xr.Dataset) and "region" in data.data_vars \
                and dim not in data["region"].dims \
                and set(data["region"].dims) <= set(values.dims):
            ds["region"] = data["region"]
    attrs = dict(data.attrs) if isinstance(data, xr.Dataset) else {}
    attrs = {a: v for a, v in attrs.items() if a not in ("pmap_complete",)}
    params = {"law": law, "quantity": quantity, "dim": dim, "max_iter": max_iter}
    attrs = with_step(attrs, "series", params, reference=lw.reference,
                      weighted=weighted, n_points=int(len(x)),
                      stack_values=[float(v) for v in x])
    attrs.update({"series_law": law, "series_reference": lw.reference, "series_quantity": quantity,
                  "series_dim": dim, f"{dim}_values": [float(v) for v in x],
                  "uncertainty_method": "weighted by the quantity's 1-sigma errors (absolute)"
                  if weighted else "unweighted; errors scaled by sqrt(chi2_red)"})
    if ref is not None:
        attrs["reference_power_W"] = ref
    ds.attrs = attrs
    return ds


def evaluate_law(law: str, x, params, *, reference_power_w: float | None = None) -> np.ndarray:
    """The law at stack values ``x`` for reported parameters (as stored by :func:`fit_law`).

    Parameters
    ----------
    law : str
        A name of :data:`LAWS`.
    x : array_like (n,)
        Stack values in the law's units (K, or W for the power law).
    params : array_like (k,) or (N, k)
        Parameters in the order of ``LAWS[law].params`` and their stored units.
    reference_power_w : float, optional
        The power law's reference power (store attr ``reference_power_W``), W.

    Returns
    -------
    ndarray (n,) or (N, n)
        The quantity, in the units of the fitted quantity.
    """
    if law not in LAWS:
        raise StepError(f"unknown law {law!r}; choose one of {sorted(LAWS)}")
    lw = LAWS[law]
    p = np.array(params, dtype=float, ndmin=1)
    one = p.ndim == 1
    p = np.atleast_2d(p).copy()
    if p.shape[1] != lw.n_params:
        raise StepError(f"law {law!r} takes {lw.n_params} parameters, got {p.shape[1]}")
    with np.errstate(all="ignore"):
        for i in lw.log_params:
            p[:, i] = np.log(p[:, i])
        xs = np.asarray(x, dtype=float)
        if lw.name == "power_law":
            if reference_power_w is None:
                raise StepError("the power law needs its reference power (reference_power_W)")
            xs = xs / float(reference_power_w)
        out = lw.model(xs, p)
    return out[0] if one else out
