"""Absolute PL: the generalized Planck law fitted per pixel on the high-energy side.

Würfel, J. Phys. C 15, 3967 (1982): Φ(E) = a·2πE²/(h³c²) / (exp((E − Δμ)/kT) − 1),
Φ in photons s⁻¹ m⁻² eV⁻¹ (E in eV), a the absorptivity: a constant (1 by default: on
the high-energy side of an absorber a ≈ 1; a constant a and Δμ are degenerate on the
Boltzmann tail, so it is not fitted), a given spectrum, or an Urbach step (1 above the
gap, exp((E − E_g)/E_U) below) whose Urbach energy E_U is fitted. The fit gives the quasi-Fermi-level splitting Δμ
(``qfls``, eV), the carrier temperature T (K) and the implied open-circuit voltage
Δμ/q (``implied_voc``, V).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from .errors import StepError
from .noise import get_noise_model, noise_coords, noise_scaled
from .provenance import with_step
from .series._fit import STATUS_FLAG_MEANINGS, STATUS_FLAG_VALUES, STATUS_LEGEND, lm_fit
from .series._laws import K_B_EV, Law

__all__ = ["planck_flux", "fit_planck", "PLANCK_PREFACTOR", "PHOTON_FLUX_UNITS",
           "PHOTON_FLUX_PER_NM_UNITS", "COUNT_DENSITY_UNITS"]

_H_EV_S = 6.62607015e-34 / 1.602176634e-19  # Planck constant, eV s (exact, 2019 SI)
_C_M_S = 299792458.0
#: 2π/(h³c²) in photons s⁻¹ m⁻² eV⁻³ (E in eV)
PLANCK_PREFACTOR = 2 * np.pi / (_H_EV_S**3 * _C_M_S**2)
#: accepted spellings of the absolute photon-flux unit of a calibrated cube
PHOTON_FLUX_UNITS = ("photons s-1 m-2 eV-1", "photons/s/m2/eV", "photons/(s m2 eV)",
                     "photons s^-1 m^-2 eV^-1")
#: the same flux per nm of wavelength (a cube on a ``wavelength`` axis): converted to per eV
#: with the Jacobian |dλ/dE| by :func:`pmap.spectral.to_energy`
PHOTON_FLUX_PER_NM_UNITS = ("photons s-1 m-2 nm-1", "photons/s/m2/nm", "photons/(s m2 nm)",
                            "photons s^-1 m^-2 nm^-1")
#: detector densities per eV that ``photon_flux_per_count`` turns into photon flux
COUNT_DENSITY_UNITS = ("counts/eV", "counts/s/eV")


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


def _planck_law(absorptivity, urbach_gap_ev: float | None = None) -> Law:
    """The Planck law on a window: ``absorptivity`` a number or one value per window
    channel; with ``urbach_gap_ev`` a third parameter, the Urbach energy E_U (eV) of the
    step a(E) = 1 above the gap, exp((E − E_g)/E_U) below it, is fitted."""
    pre0 = np.asarray(absorptivity, float) * PLANCK_PREFACTOR
    fit_urbach = urbach_gap_ev is not None

    def a_of(e, p):
        if not fit_urbach:
            return 1.0
        below = np.minimum(e - urbach_gap_ev, 0.0)
        return np.exp(below / p[:, 2:3])

    def model(e, p):
        z = (e - p[:, 0:1]) / (K_B_EV * p[:, 1:2])
        return pre0 * a_of(e, p) * e * e / np.expm1(z)

    def jac(e, p):
        t = p[:, 1:2]
        z = (e - p[:, 0:1]) / (K_B_EV * t)
        g = 1.0 / np.expm1(z)
        dg = -np.exp(z) * g * g
        a = a_of(e, p)
        base = pre0 * a * e * e * dg
        cols = [base * (-1.0 / (K_B_EV * t)), base * (-z / t)]
        if fit_urbach:  # ∂a/∂E_U = a·(E_g − E)/E_U² below the gap, 0 above
            below = np.minimum(e - urbach_gap_ev, 0.0)
            cols.append(pre0 * e * e * g * a * (-below) / p[:, 2:3] ** 2)
        return np.stack(cols, axis=-1)

    def start(e, y, w):
        # Boltzmann tail: ln(Φ/(pre E²)) = (Δμ − E)/kT, weighted linear fit per pixel, on
        # the channels above the gap when an Urbach step is fitted
        ok = (y > 0) & (w > 0)
        if fit_urbach:
            ok &= (e >= urbach_gap_ev)[None, :]
        pre_e = pre0 * np.ones_like(e)
        ly = np.where(ok, np.log(np.where(ok, y, 1.0) / (pre_e * e * e)), 0.0)
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
        cols = [mu, temp] + ([np.full_like(mu, 0.015)] if fit_urbach else [])
        return np.stack(cols, axis=1)

    names = ("qfls", "carrier_temperature") + (("urbach_energy",) if fit_urbach else ())
    units = ("eV", "K") + (("eV",) if fit_urbach else ())
    descr = ("quasi-Fermi-level splitting", "carrier temperature") + (
        ("Urbach energy of the absorptivity step",) if fit_urbach else ())
    return Law("planck", "energy", "eV", (), names, units, descr, model, jac, start,
               lambda p: (p[:, 1] <= 0) | ((p[:, 2] <= 0) if fit_urbach else False),
               "Würfel, J. Phys. C 15, 3967 (1982)")


def _absorptivity(absorptivity, energy_ev: np.ndarray):
    """(a on the axis or a number, Urbach gap to fit at or None, description) from the
    ``absorptivity`` option: a number, one value per channel (array or DataArray on
    ``energy``), a two-column text file (energy eV, a), or a mapping
    ``{"urbach_gap_ev": Eg}`` (Urbach energy fitted) / ``{"urbach_gap_ev": Eg,
    "urbach_energy_ev": Eu}`` (the step given)."""
    if isinstance(absorptivity, dict):
        unknown = set(absorptivity) - {"urbach_gap_ev", "urbach_energy_ev"}
        if unknown or "urbach_gap_ev" not in absorptivity:
            raise StepError("an absorptivity step is {urbach_gap_ev = Eg, urbach_energy_ev = "
                            f"Eu (optional: fitted when absent)}}, got {absorptivity!r}")
        gap = float(absorptivity["urbach_gap_ev"])
        eu = absorptivity.get("urbach_energy_ev")
        if eu is None:
            return 1.0, gap, f"Urbach step at {gap:g} eV, Urbach energy fitted"
        eu = float(eu)
        if not eu > 0:
            raise StepError(f"urbach_energy_ev must be > 0, got {eu}")
        a = np.exp(np.minimum(energy_ev - gap, 0.0) / eu)
        return a, None, f"Urbach step at {gap:g} eV with Urbach energy {eu:g} eV (given)"
    if isinstance(absorptivity, (str, bytes)) or hasattr(absorptivity, "__fspath__"):
        try:
            table = np.loadtxt(absorptivity, delimiter=None, comments="#", ndmin=2)
        except (OSError, ValueError) as exc:
            raise StepError(f"cannot read the absorptivity spectrum {absorptivity}: {exc}") \
                from None
        if table.shape[1] < 2:
            raise StepError("an absorptivity file has two columns: energy (eV), absorptivity")
        order = np.argsort(table[:, 0])
        e_tab, a_tab = table[order, 0], table[order, 1]
        if energy_ev.min() < e_tab[0] or energy_ev.max() > e_tab[-1]:
            raise StepError(f"the absorptivity spectrum covers {e_tab[0]:g}–{e_tab[-1]:g} eV, "
                            f"not the cube's {energy_ev.min():g}–{energy_ev.max():g} eV")
        a = np.interp(energy_ev, e_tab, a_tab)
        desc = f"absorptivity spectrum from {absorptivity}"
    elif np.ndim(absorptivity) == 0 and not isinstance(absorptivity, xr.DataArray):
        a = float(absorptivity)
        if not a > 0:
            raise StepError(f"absorptivity must be > 0, got {absorptivity}")
        return a, None, f"a = {a:g} (assumed, not fitted)"
    else:
        a = np.asarray(absorptivity.values if isinstance(absorptivity, xr.DataArray)
                       else absorptivity, float).ravel()
        if a.size != energy_ev.size:
            raise StepError(f"an absorptivity spectrum needs one value per channel "
                            f"({energy_ev.size}), got {a.size}")
        desc = "absorptivity spectrum given per channel"
    if not (np.all(np.isfinite(a)) and np.all(a > 0) and np.all(a <= 1.0 + 1e-9)):
        raise StepError("absorptivity values must lie in (0, 1]")
    return a, None, desc


def window_nm_to_ev(window_nm: tuple[float, float], *, medium: str = "air",
                    method: str = "ciddor") -> tuple[float, float]:
    """A wavelength window (nm) as the photon-energy window (eV, ascending) it covers.

    Air wavelengths (``medium="air"``, pmap's default for an axis) are first made vacuum
    wavelengths with :func:`pmap.airvac.air_to_vacuum` (as :func:`pmap.spectral.to_energy`
    does), then E = hc/λ_vac.
    """
    from .airvac import air_to_vacuum
    from .conventions import nm_to_ev

    lo, hi = (float(v) for v in window_nm)
    if not (0 < lo < hi):
        raise StepError(f"wavelength window must be 0 < low < high nm, got {lo}:{hi}")
    lam = np.array([lo, hi])
    if str(medium).lower() == "air":
        lam = np.asarray(air_to_vacuum(lam, method=method), float)
    e = np.sort(np.asarray(nm_to_ev(lam), float))
    return float(e[0]), float(e[1])


def _absolute(cube: xr.DataArray, photon_flux_per_count) -> tuple[xr.DataArray, str]:
    """The cube in photons s⁻¹ m⁻² eV⁻¹ on an energy axis, and how it got there."""
    units = str(cube.attrs.get("units", ""))
    if units in PHOTON_FLUX_PER_NM_UNITS:
        if "wavelength" not in cube.dims:
            raise StepError(f"a cube in {units!r} must be on a wavelength axis (nm)")
        from .spectral import to_energy

        # to_energy's density-per-nm path multiplies by |dλ/dE| whatever is counted: run it
        # under a per-nm unit it knows and put the photon-flux unit back
        out = to_energy(cube.assign_attrs(units="W/nm"))
        return (out.assign_attrs(units="photons/s/m2/eV"),
                "per nm converted to per eV with the Jacobian |dλ/dE| = λ²/hc (vacuum λ)")
    if "energy" not in cube.dims:
        raise StepError("fit_planck needs a cube on an energy axis (eV), or a photon flux per "
                        "nm on a wavelength axis: convert it first (pmap.to_energy)")
    if units in PHOTON_FLUX_UNITS:
        return cube, "absolute photon flux as given"
    cal = photon_flux_per_count if photon_flux_per_count is not None \
        else cube.attrs.get("photon_flux_per_count")
    if units in COUNT_DENSITY_UNITS and cal is not None:
        if isinstance(cal, xr.DataArray):
            if set(cal.dims) - set(cube.dims):
                raise StepError(f"photon_flux_per_count spectrum has dims {cal.dims}; "
                                "it must be on the cube's energy axis")
            f = cal
        else:
            arr = np.asarray(cal, dtype=float)
            if arr.ndim == 0:
                f = xr.DataArray(float(arr))
            elif arr.shape == (cube.sizes["energy"],):
                f = xr.DataArray(arr, dims=("energy",))
            else:
                raise StepError(f"photon_flux_per_count must be a number or one value per "
                                f"energy channel ({cube.sizes['energy']}), got shape {arr.shape}")
        fv = np.asarray(f.values, float)
        if not (np.all(np.isfinite(fv)) and np.all(fv > 0)):
            raise StepError("photon_flux_per_count must be finite and > 0")
        out = noise_scaled(cube * f, cube, f, "planck: photon_flux_per_count calibration")
        out.attrs = {**cube.attrs, "units": "photons/s/m2/eV"}
        return out, f"{units} times photon_flux_per_count (photons s-1 m-2 per count)"
    if units in ("counts", "counts/s"):
        raise StepError(f"fit_planck: the cube is in {units!r} per channel: convert it to a "
                        "density per eV (pmap.to_energy) and give photon_flux_per_count "
                        "(photons s-1 m-2 per count) to make it an absolute photon flux")
    what = (" and photon_flux_per_count (attr or option) is missing"
            if units in COUNT_DENSITY_UNITS else "")
    raise StepError(f"fit_planck needs an absolutely calibrated cube in photons s-1 m-2 eV-1 "
                    f"(or per nm), or counts/eV with photon_flux_per_count; this one is in "
                    f"{units!r}{what}")


def _plqy(cube: xr.DataArray, exc: float, sigma, model) -> xr.Dataset:
    """PLQY = Σ Φ·ΔE / excitation flux (channel widths ΔE from the channel edges), ±1σ."""
    from .spectral import channel_edges

    if not (np.isfinite(exc) and exc > 0):
        raise StepError(f"excitation_photon_flux must be > 0 photons s-1 m-2, got {exc}")
    width = xr.DataArray(np.diff(channel_edges(cube["energy"].values)), dims=("energy",))
    total = (cube * width).sum("energy", skipna=False)
    if sigma is not None:
        var = (sigma * sigma * width * width).sum("energy")
    elif model is not None:
        sc, pd = noise_coords(cube)
        v = (sc * model.var_per_count * cube.clip(min=0)
             + sc * sc * (model.var_per_count * pd + model.var_offset_counts2))
        v = np.maximum(v, sc * sc * model.floor_counts2)
        var = (v * width * width).sum("energy")
    else:
        var = xr.full_like(total, np.nan)
    plqy = (total / exc).reset_coords(drop=True)
    err = (np.sqrt(var) / exc).reset_coords(drop=True)
    return xr.Dataset({
        "plqy": plqy.assign_attrs(units="1", long_name="photoluminescence quantum yield "
                                  "(emitted over incident excitation photons)"),
        "plqy_err": err.assign_attrs(units="1", long_name="1-sigma of plqy")})


#: Without σ or a noise model, the variance of a channel is taken ∝ max(flux, this ×
#: the spectrum's largest flux) (see :func:`fit_planck`).
UNWEIGHTED_FLOOR = 0.01


def fit_planck(cube: xr.DataArray, *, energy_range_ev: tuple[float, float] | None = None,
               wavelength_range_nm: tuple[float, float] | None = None,
               sigma: xr.DataArray | None = None, absorptivity: float = 1.0,
               photon_flux_per_count=None, excitation_photon_flux: float | None = None,
               max_iter: int = 200, whole_map=None) -> xr.Dataset:
    """Fit the generalized Planck law per pixel on the high-energy side of the PL.

    Parameters
    ----------
    cube : DataArray
        An absolute photon flux: on an ``energy`` axis (eV) in photons s⁻¹ m⁻² eV⁻¹
        (:data:`PHOTON_FLUX_UNITS`), or on a ``wavelength`` axis (nm) in photons s⁻¹ m⁻²
        nm⁻¹ (:data:`PHOTON_FLUX_PER_NM_UNITS`; converted to per eV with the Jacobian by
        :func:`pmap.spectral.to_energy`), or a detector density per eV (``counts/eV``,
        ``counts/s/eV``) with ``photon_flux_per_count``.
    energy_range_ev : (float, float), optional
        Fit window, eV (default: from the maximum of the mean spectrum + 3kT at 300 K,
        77.6 meV, to the end of the axis).
    wavelength_range_nm : (float, float), optional
        The window in nm instead, for a cube on a wavelength axis (in its medium,
        ``wavelength_medium``, air unless stated; :func:`window_nm_to_ev`). Only one of
        the two windows may be given.
    sigma : DataArray, optional
        1σ uncertainties of the cube values (same units). Default: from the cube's noise
        model (:mod:`pmap.noise`) when it has one, var = s·a·m + s²·(a·p + b) with m the
        fitted model (a first fit weighted with the data as m, a second with the model:
        the Poisson score equations at the solution); errors absolute, ``planck_chi2_red``
        a true reduced χ² (a correlated model: weights from the law, errors scaled by
        √χ²_red). Without either, shot-noise-like relative weights (variance ∝ the
        fitted flux, floored at 1 % of its maximum in the window) and errors scaled by
        √χ²_red.
    absorptivity : float, array, DataArray, path or dict
        Absorptivity a(E) (1): a number (default 1: assumed, not fitted); a spectrum, one
        value per channel of the energy axis or a DataArray on ``energy`` (interpolated);
        a two-column text file (energy eV, a); or an Urbach step a = 1 above the gap and
        exp((E − E_g)/E_U) below it, ``{"urbach_gap_ev": Eg}`` with E_U fitted per pixel
        (``urbach_energy``, eV, with ``_err``; the window must reach below the gap) or
        ``{"urbach_gap_ev": Eg, "urbach_energy_ev": Eu}`` given.
    photon_flux_per_count : float, array or DataArray on ``energy``, optional
        Absolute calibration of a ``counts/eV`` (or ``counts/s/eV``) cube: photons s⁻¹ m⁻²
        per count (per count/s), a number or a calibration spectrum; default the cube's
        attr ``photon_flux_per_count``.
    excitation_photon_flux : float, optional
        Incident excitation photon flux, photons s⁻¹ m⁻² (default the attr
        ``excitation_photon_flux``): adds ``plqy`` = ∫Φ dE over the whole axis / this flux
        (external quantum yield relative to the incident flux; divide by the absorptance
        for the internal one), with ``plqy_err`` from the same noise as the fit.
    max_iter : int
        Levenberg–Marquardt iteration limit.
    whole_map : pmap.steps.WholeMapPass, optional
        Given by the pipeline runner: the mean spectrum that places the automatic window
        is computed through it once, now, and recorded in the provenance. Without it
        (the default) nothing is computed here.

    Returns
    -------
    Dataset
        ``qfls`` (eV), ``carrier_temperature`` (K), ``implied_voc`` (V) with ``_err``,
        ``planck_chi2_red`` and ``planck_status`` (CF flags) on the cube's non-spectral
        dims, ``plqy`` (1) with ``plqy_err`` when the excitation flux is known; the
        assumptions in the attrs (``planck_assumptions``).
    """
    if not isinstance(cube, xr.DataArray):
        raise StepError(f"fit_planck needs an xarray DataArray, got {type(cube).__name__}")
    if energy_range_ev is not None and wavelength_range_nm is not None:
        raise StepError("give the Planck window once: energy_range_ev or wavelength_range_nm")
    if wavelength_range_nm is not None:
        if "wavelength" not in cube.dims and "wavelength_medium" not in cube.attrs:
            raise StepError("wavelength_range_nm needs the cube's wavelength medium, lost once "
                            "the axis is in energy: give energy_range_ev (plcube process "
                            "--planck-window converts nm with the input cube's medium)")
        medium = str(cube.attrs.get("wavelength_medium", "air"))
        energy_range_ev = window_nm_to_ev(wavelength_range_nm, medium=medium)
    cube, how = _absolute(cube, photon_flux_per_count)
    e_all = np.asarray(cube["energy"].values, float)
    if isinstance(absorptivity, xr.DataArray) and "energy" in absorptivity.coords:
        absorptivity = np.interp(e_all, *(np.asarray(v, float) for v in (
            absorptivity["energy"].values, absorptivity.values)))  # on the cube's axis
    a_all, urbach_gap, a_text = _absorptivity(absorptivity, e_all)
    if energy_range_ev is None:
        from .steps import whole_map_values  # phase one of a pipeline run

        mean = np.asarray(whole_map_values(
            whole_map, "planck", mean_spectrum=cube.mean([d for d in cube.dims if d != "energy"]).data))
        lo, hi = float(e_all[int(np.nanargmax(mean))]) + 3 * K_B_EV * 300.0, float(e_all[-1])
    else:
        lo, hi = (float(v) for v in energy_range_ev)
    sel = (e_all >= lo) & (e_all <= hi)
    if sel.sum() < 4:
        raise StepError(f"the Planck window {lo:.4f}–{hi:.4f} eV holds {int(sel.sum())} channels; "
                        "need at least 4")
    sub = cube.isel(energy=np.flatnonzero(sel))
    e = e_all[sel]
    if urbach_gap is not None and not (e < urbach_gap).sum() >= 2:
        raise StepError(f"the Urbach energy can be fitted only with channels below the gap "
                        f"({urbach_gap:g} eV) in the window {lo:.4f}–{hi:.4f} eV")
    law = _planck_law(a_all[sel] if np.ndim(a_all) else a_all, urbach_gap)
    k = law.n_params
    p_fallback = [[float(e[0]), 300.0] + ([0.015] if urbach_gap is not None else [])]
    weighted = sigma is not None
    model = get_noise_model(cube) if not weighted else None
    use_noise = model is not None and model.valid
    poisson = use_noise and not model.correlated
    a_n = model.var_per_count if use_noise else 0.0
    b_n = model.var_offset_counts2 if use_noise else 0.0
    fl_n = model.floor_counts2 if use_noise else 0.0
    sig = sigma.isel(energy=np.flatnonzero(sel)) if weighted else None

    def kernel(v, s, sc, pd):
        shape = v.shape[:-1]
        n = v.shape[-1]
        v2 = v.reshape(-1, n)
        if use_noise:
            sc2 = np.broadcast_to(sc, v.shape).reshape(-1, n)
            pd2 = np.broadcast_to(pd, v.shape).reshape(-1, n)

            def sd_of(m, floor):  # pmap.noise: var = s·a·m + s²·(a·p + b), floored
                var = sc2 * a_n * np.maximum(m, 0.0) + sc2 * sc2 * (a_n * pd2 + b_n)
                return np.sqrt(np.maximum(var, sc2 * sc2 * floor))

            # first pass weighted by the data (floored: a channel of 0 counts is not
            # exact), then by the fitted model with 1 % of that floor: a Boltzmann tail
            # falls to far below one count per channel, where var = a·m holds and the
            # full floor (a² + read noise²) drowned the tail's information (an invented
            # sparse-tail cube: χ²_red 0.14, errors 2.4x larger); with no floor at all,
            # 6 % of its pixels locked onto single counts where m ≪ 1 (χ²_red ~10⁴)
            p, pe, cr, st = lm_fit(law, e, v2, sd_of(v2, fl_n), max_iter=max_iter,
                                   weighted=True)
            good = np.all(np.isfinite(p), axis=1)
            with np.errstate(all="ignore"):
                m = law.model(e, np.where(good[:, None], p, p_fallback))
            m = np.where(good[:, None] & np.isfinite(m), m, v2)
            p, pe, cr, st = lm_fit(law, e, v2, sd_of(m, 0.01 * fl_n), max_iter=max_iter,
                                   weighted=True)
            if not poisson:
                pe = pe * np.sqrt(cr)[:, None]
        elif weighted:
            p, pe, cr, st = lm_fit(law, e, v2, s.reshape(-1, n), max_iter=max_iter,
                                   weighted=True)
        else:
            # no σ and no noise model: shot-noise-like weights, var ∝ flux floored at 1 %
            # of the spectrum's largest value (a calibrated count spectrum: var = K·Φ/g +
            # K²·r²), from the data, then from the fitted model; errors scaled by √χ²_red.
            # (Errors proportional to the data themselves gave the channels of a decayed
            # tail, at or near zero, infinite weight: qfls off by volts.)
            def rel_sd(m):
                top = np.nanmax(np.abs(m), axis=1, keepdims=True)
                return np.sqrt(np.maximum(np.abs(m), UNWEIGHTED_FLOOR * top) * top)

            p, pe, cr, st = lm_fit(law, e, v2, rel_sd(v2), max_iter=max_iter, weighted=True)
            good = np.all(np.isfinite(p), axis=1)
            with np.errstate(all="ignore"):
                m = law.model(e, np.where(good[:, None], p, p_fallback))
            m = np.where(good[:, None] & np.isfinite(m), m, v2)
            p, pe, cr, st = lm_fit(law, e, v2, rel_sd(m), max_iter=max_iter, weighted=True)
            pe = pe * np.sqrt(cr)[:, None]
        return np.concatenate([p, pe, cr[:, None], st[:, None].astype(float)],
                              axis=1).reshape(*shape, 2 * k + 2)

    if hasattr(sub.data, "dask"):
        sub = sub.chunk({"energy": -1})
        if weighted:
            sig = sig.chunk(dict(zip(sub.dims, sub.chunks)))
    s_in = sig if weighted else xr.DataArray(np.zeros(sub.sizes["energy"]), dims=("energy",))
    if use_noise:
        sc, pd = noise_coords(sub)
        sc = sc if "energy" in sc.dims else sc.expand_dims(energy=sub.sizes["energy"])
        pd = pd if "energy" in pd.dims else pd.expand_dims(energy=sub.sizes["energy"])
        if hasattr(pd.data, "dask"):
            pd = pd.chunk({"energy": -1})
    else:
        sc = pd = xr.DataArray(np.zeros(sub.sizes["energy"]), dims=("energy",))
    out = xr.apply_ufunc(kernel, sub, s_in, sc, pd,
                         input_core_dims=[["energy"]] * 4,
                         output_core_dims=[["_planck"]], dask="parallelized",
                         output_dtypes=[float],
                         dask_gufunc_kwargs={"output_sizes": {"_planck": 2 * k + 2}})
    out = out.transpose(*[d for d in sub.dims if d != "energy"], "_planck")
    ds = xr.Dataset()
    ds["qfls"] = out.isel(_planck=0).assign_attrs(units="eV",
                                                 long_name="quasi-Fermi-level splitting")
    ds["qfls_err"] = out.isel(_planck=k).assign_attrs(units="eV", long_name="1-sigma of qfls")
    ds["carrier_temperature"] = out.isel(_planck=1).assign_attrs(units="K",
                                                                long_name="carrier temperature")
    if urbach_gap is not None:
        ds["urbach_energy"] = out.isel(_planck=2).assign_attrs(
            units="eV", long_name="Urbach energy of the absorptivity step")
        ds["urbach_energy_err"] = out.isel(_planck=k + 2).assign_attrs(
            units="eV", long_name="1-sigma of urbach_energy")
    ds["carrier_temperature_err"] = out.isel(_planck=k + 1).assign_attrs(
        units="K", long_name="1-sigma of carrier_temperature")
    # implied Voc = Δμ/q: the same number in V as Δμ in eV
    ds["implied_voc"] = ds["qfls"].copy().assign_attrs(units="V",
                                                      long_name="implied open-circuit voltage")
    ds["implied_voc_err"] = ds["qfls_err"].copy().assign_attrs(units="V",
                                                              long_name="1-sigma of implied_voc")
    ds["planck_chi2_red"] = out.isel(_planck=2 * k).assign_attrs(
        units="1", long_name="reduced chi-square of the Planck fit")
    ds["planck_status"] = out.isel(_planck=2 * k + 1).fillna(4).astype(np.int8).assign_attrs(
        units="1", long_name="Planck fit status", legend=str(STATUS_LEGEND).replace("'", '"'),
        flag_values=np.array(STATUS_FLAG_VALUES, np.int8), flag_meanings=STATUS_FLAG_MEANINGS)
    exc = excitation_photon_flux if excitation_photon_flux is not None \
        else cube.attrs.get("excitation_photon_flux")
    if exc is not None:
        ds = ds.merge(_plqy(cube, float(exc), sigma, model if poisson else None))
    ds = ds.drop_vars([c for c in ds.coords if c.startswith("noise_")], errors="ignore")
    cal = photon_flux_per_count
    a_param = (absorptivity if isinstance(absorptivity, (int, float, dict, str))
               else "spectrum")
    params = {"energy_range_ev": [lo, hi], "absorptivity": a_param, "max_iter": max_iter}
    if wavelength_range_nm is not None:
        params["wavelength_range_nm"] = [float(v) for v in wavelength_range_nm]
    if exc is not None:
        params["excitation_photon_flux"] = float(exc)
    if cal is not None:
        params["photon_flux_per_count"] = (float(cal) if np.ndim(cal) == 0 and
                                           not isinstance(cal, xr.DataArray) else "spectrum")
    attrs = with_step({k: v for k, v in cube.attrs.items() if k != "units"}, "planck", params,
                      reference="Würfel, J. Phys. C 15, 3967 (1982)", weighted=weighted)
    if weighted:
        attrs["planck_uncertainty_method"] = "weighted by the given 1-sigma errors"
    elif poisson:
        attrs["planck_uncertainty_method"] = (
            "weighted by the noise model (var = s*a*m + s^2*(a*p + b), m the fitted model); "
            "absolute 1-sigma errors; planck_chi2_red a true reduced chi-square")
    elif use_noise:
        attrs["planck_uncertainty_method"] = ("weights from the noise model's per-channel variance "
                                       "(correlated noise); errors scaled by sqrt(chi2_red)")
    else:
        attrs["planck_uncertainty_method"] = (
            "no noise model: shot-noise-like relative weights (variance proportional to the "
            "fitted flux, floored at 1 % of its maximum); errors scaled by sqrt(chi2_red)")
    for v in ("qfls_err", "carrier_temperature_err", "implied_voc_err"):
        ds[v].attrs["uncertainty_method"] = attrs["planck_uncertainty_method"]
    attrs["planck_window_ev"] = [lo, hi]
    attrs["planck_flux"] = how
    attrs["planck_assumptions"] = (
        f"generalized Planck law (Würfel 1982) with absorptivity {a_text} on the window; "
        "parabolic bands, quasi-Fermi levels flat over the probed depth, one carrier "
        "temperature; Boltzmann tail window above the maximum")
    ds.attrs = attrs
    return ds
