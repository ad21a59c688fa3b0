"""Absolute PL: the generalized Planck law fitted per pixel on the high-energy side.

Würfel, J. Phys. C 15, 3967 (1982): Φ(E) = a·2πE²/(h³c²) / (exp((E − Δμ)/kT) − 1),
Φ in photons s⁻¹ m⁻² eV⁻¹ (E in eV), a the absorptivity (taken as a constant, 1 by
default: on the high-energy side of an absorber a ≈ 1; a and Δμ are degenerate on the
Boltzmann tail, so a is not fitted). The fit gives the quasi-Fermi-level splitting Δμ
(``qfls``, eV), the carrier temperature T (K) and the implied open-circuit voltage
Δμ/q (``implied_voc``, V).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from .errors import StepError
from .provenance import with_step
from .series._fit import STATUS_LEGEND, lm_fit
from .series._laws import K_B_EV, Law

__all__ = ["planck_flux", "fit_planck", "PLANCK_PREFACTOR", "PHOTON_FLUX_UNITS"]

_H_EV_S = 6.62607015e-34 / 1.602176634e-19  # Planck constant, eV s (exact, 2019 SI)
_C_M_S = 299792458.0
#: 2π/(h³c²) in photons s⁻¹ m⁻² eV⁻³ (E in eV)
PLANCK_PREFACTOR = 2 * np.pi / (_H_EV_S**3 * _C_M_S**2)
#: accepted spellings of the absolute photon-flux unit of a calibrated cube
PHOTON_FLUX_UNITS = ("photons s-1 m-2 eV-1", "photons/s/m2/eV", "photons/(s m2 eV)",
                     "photons s^-1 m^-2 eV^-1")


def planck_flux(energy_ev, qfls_ev, temperature_k, absorptivity=1.0):
    """Generalized Planck photon flux, photons s⁻¹ m⁻² eV⁻¹ (Würfel 1982).

    Parameters
    ----------
    energy_ev : array_like
        Photon energy, eV.
    qfls_ev : float or array_like
        Quasi-Fermi-level splitting Δμ, eV.
    temperature_k : float or array_like
        Carrier temperature, K.
    absorptivity : float or array_like
        Absorptivity a (1).
    """
    e = np.asarray(energy_ev, float)
    z = (e - qfls_ev) / (K_B_EV * temperature_k)
    return absorptivity * PLANCK_PREFACTOR * e * e / np.expm1(z)


def _planck_law(absorptivity: float) -> Law:
    pre = absorptivity * PLANCK_PREFACTOR

    def model(e, p):
        z = (e - p[:, 0:1]) / (K_B_EV * p[:, 1:2])
        return pre * e * e / np.expm1(z)

    def jac(e, p):
        t = p[:, 1:2]
        z = (e - p[:, 0:1]) / (K_B_EV * t)
        g = 1.0 / np.expm1(z)
        dg = -np.exp(z) * g * g
        base = pre * e * e * dg
        return np.stack([base * (-1.0 / (K_B_EV * t)), base * (-z / t)], axis=-1)

    def start(e, y, w):
        # Boltzmann tail: ln(Φ/(pre E²)) = (Δμ − E)/kT, weighted linear fit per pixel
        ok = (y > 0) & (w > 0)
        ly = np.where(ok, np.log(np.where(ok, y, 1.0) / (pre * e * e)), 0.0)
        wl = np.where(ok, (w * y) ** 2, 0.0)  # σ(ln Φ) = σ/Φ
        s0, s1, s2 = wl.sum(1), (wl * e).sum(1), (wl * e * e).sum(1)
        t0, t1 = (wl * ly).sum(1), (wl * ly * e).sum(1)
        det = s0 * s2 - s1 * s1
        with np.errstate(all="ignore"):
            b1 = (s0 * t1 - s1 * t0) / det
            b0 = (t0 - b1 * s1) / s0
            temp = -1.0 / (K_B_EV * b1)
            mu = -b0 / b1
        bad = ~(np.isfinite(temp) & (temp > 0) & np.isfinite(mu))
        temp[bad], mu[bad] = 300.0, float(np.min(e)) - 0.3
        return np.stack([mu, temp], axis=1)

    return Law("planck", "energy", "eV", (), ("qfls", "carrier_temperature"), ("eV", "K"),
               ("quasi-Fermi-level splitting", "carrier temperature"), model, jac, start,
               lambda p: (p[:, 1] <= 0), "Würfel, J. Phys. C 15, 3967 (1982)")


def fit_planck(cube: xr.DataArray, *, energy_range_ev: tuple[float, float] | None = None,
               sigma: xr.DataArray | None = None, absorptivity: float = 1.0,
               max_iter: int = 200) -> xr.Dataset:
    """Fit the generalized Planck law per pixel on the high-energy side of the PL.

    Parameters
    ----------
    cube : DataArray
        Absolutely calibrated cube on an ``energy`` axis (eV), ``units`` in photons
        s⁻¹ m⁻² eV⁻¹ (see :data:`PHOTON_FLUX_UNITS`).
    energy_range_ev : (float, float), optional
        Fit window, eV (default: from the maximum of the mean spectrum + 3kT at 300 K,
        77.6 meV, to the end of the axis).
    sigma : DataArray, optional
        1σ uncertainties of the cube values (same units). Without them every point gets
        the same relative error and the errors are scaled by √χ²_red.
    absorptivity : float
        Absorptivity a on the window (1), assumed, not fitted.
    max_iter : int
        Levenberg–Marquardt iteration limit.

    Returns
    -------
    Dataset
        ``qfls`` (eV), ``carrier_temperature`` (K), ``implied_voc`` (V) with ``_err``,
        ``planck_chi2_red`` and ``planck_status`` on the cube's non-spectral dims.
    """
    if not isinstance(cube, xr.DataArray) or "energy" not in cube.dims:
        raise StepError("fit_planck needs a cube on an energy axis (eV): convert it first "
                        "(pmap.to_energy)")
    units = str(cube.attrs.get("units", ""))
    if units not in PHOTON_FLUX_UNITS:
        raise StepError(f"fit_planck needs an absolutely calibrated cube in photons s-1 m-2 "
                        f"eV-1; this one is in {units!r}")
    if not absorptivity > 0:
        raise StepError(f"absorptivity must be > 0, got {absorptivity}")
    e_all = np.asarray(cube["energy"].values, float)
    if energy_range_ev is None:
        from .steps import materialize  # one pass, shared with the pipeline's checks

        mean = np.asarray(materialize(cube.mean([d for d in cube.dims if d != "energy"]).data))
        lo, hi = float(e_all[int(np.nanargmax(mean))]) + 3 * K_B_EV * 300.0, float(e_all[-1])
    else:
        lo, hi = (float(v) for v in energy_range_ev)
    sel = (e_all >= lo) & (e_all <= hi)
    if sel.sum() < 4:
        raise StepError(f"the Planck window {lo:.4f}–{hi:.4f} eV holds {int(sel.sum())} channels; "
                        "need at least 4")
    sub = cube.isel(energy=np.flatnonzero(sel))
    e = e_all[sel]
    law = _planck_law(absorptivity)
    weighted = sigma is not None
    sig = sigma.isel(energy=np.flatnonzero(sel)) if weighted else None

    def kernel(v, s):
        shape = v.shape[:-1]
        v2 = v.reshape(-1, v.shape[-1])
        s2 = s.reshape(-1, s.shape[-1]) if weighted else np.abs(v2)
        p, pe, cr, st = lm_fit(law, e, v2, s2, max_iter=max_iter, weighted=True)
        if not weighted:
            pe = pe * np.sqrt(cr)[:, None]
        return np.concatenate([p, pe, cr[:, None], st[:, None].astype(float)],
                              axis=1).reshape(*shape, 6)

    if hasattr(sub.data, "dask"):
        sub = sub.chunk({"energy": -1})
        if weighted:
            sig = sig.chunk(dict(zip(sub.dims, sub.chunks)))
    s_in = sig if weighted else xr.zeros_like(sub)
    out = xr.apply_ufunc(kernel, sub, s_in, input_core_dims=[["energy"], ["energy"]],
                         output_core_dims=[["_planck"]], dask="parallelized",
                         output_dtypes=[float],
                         dask_gufunc_kwargs={"output_sizes": {"_planck": 6}})
    ds = xr.Dataset()
    ds["qfls"] = out.isel(_planck=0).assign_attrs(units="eV",
                                                 long_name="quasi-Fermi-level splitting")
    ds["qfls_err"] = out.isel(_planck=2).assign_attrs(units="eV", long_name="1-sigma of qfls")
    ds["carrier_temperature"] = out.isel(_planck=1).assign_attrs(units="K",
                                                                long_name="carrier temperature")
    ds["carrier_temperature_err"] = out.isel(_planck=3).assign_attrs(
        units="K", long_name="1-sigma of carrier_temperature")
    # implied Voc = Δμ/q: the same number in V as Δμ in eV
    ds["implied_voc"] = ds["qfls"].copy().assign_attrs(units="V",
                                                      long_name="implied open-circuit voltage")
    ds["implied_voc_err"] = ds["qfls_err"].copy().assign_attrs(units="V",
                                                              long_name="1-sigma of implied_voc")
    ds["planck_chi2_red"] = out.isel(_planck=4).assign_attrs(units="1")
    ds["planck_status"] = out.isel(_planck=5).fillna(4).astype(np.int8).assign_attrs(
        units="1", legend=str(STATUS_LEGEND).replace("'", '"'))
    params = {"energy_range_ev": [lo, hi], "absorptivity": absorptivity, "max_iter": max_iter}
    attrs = with_step({k: v for k, v in cube.attrs.items() if k != "units"}, "planck", params,
                      reference="Würfel, J. Phys. C 15, 3967 (1982)", weighted=weighted)
    attrs["uncertainty_method"] = ("weighted by the given 1-sigma errors" if weighted else
                                   "equal relative errors; scaled by sqrt(chi2_red)")
    ds.attrs = attrs
    return ds
