"""Cubes with known truth made WITHOUT pmap, and their Cramér–Rao bounds.

An independent yardstick for pmap's fits and error bars (issue 11): everything here uses
numpy/scipy only — never ``pmap.synthetic``, pmap's line shapes or its kernels — so a
test that compares pmap's output with these numbers checks pmap against something
outside itself.

Detector model (common practice for CCD/CMOS spectrometers; e.g. Janesick, *Photon
Transfer*, SPIE Press, 2007): photoelectrons per channel are Poisson with mean λ_i,
the read-out is ``counts = Poisson(λ_i)/gain + Normal(0, read_noise) + dark_level``
(gain in e⁻/count, read noise and dark level in counts), stored as float32.

Line: a Gaussian in photon energy with centre E0 and FWHM (eV) holding N photoelectrons,
integrated exactly over each channel: λ_i = N·[Φ(E_hi) − Φ(E_lo)] + b with Φ the normal
CDF (``scipy.special.erf``) and b a flat photon background (e⁻ per channel). Channel
edges are the midpoints of the channel centres (half a spacing beyond the outer ones,
common practice); on a wavelength axis they are converted with E = hc/λ,
hc = 1239.8419843320026 eV·nm (CODATA 2018, exact since the 2019 SI).

Truth in the units of a pmap result: ``peak_energy``/``peak_fwhm`` in eV; ``peak_area``
is ∫ I dE of a cube converted to counts/eV, i.e. the line's total counts = N/gain.

Cramér–Rao bound (:func:`crb`): Fisher information of θ = (E0, FWHM, area, background)
for independent Gaussian-approximated channels with mean μ_i(θ) (raw counts) and
variance var_i = (μ_i − dark)/gain + read_noise², keeping the mean term only,
I_jk = Σ_i ∂μ_i/∂θ_j ∂μ_i/∂θ_k / var_i (Kay, *Fundamentals of Statistical Signal
Processing: Estimation Theory*, Prentice Hall, 1993, eq. 3.31 and §15; for a counting
detector with gain 1 and no read noise this is exactly the Poisson Fisher information,
Mortensen, Churchman, Spudich & Flyvbjerg, Nat. Methods 7, 377 (2010)). Derivatives are
central finite differences of the channel-integrated model above; CRB = sqrt(diag(I⁻¹)).
"""

from __future__ import annotations

import numpy as np
import xarray as xr
from scipy.special import erf

#: h·c in eV·nm (CODATA 2018; h and c exact, e exact since the 2019 SI).
HC_EV_NM = 1239.8419843320026
#: FWHM = 2·sqrt(2 ln 2)·σ for a Gaussian (common practice).
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))
#: Parameter order of the truth arrays and of the CRB.
PARAMS = ("peak_energy", "peak_fwhm", "peak_area", "background")


def edges_from_centres(c: np.ndarray) -> np.ndarray:
    """n + 1 channel edges from n ascending centres: midpoints inside, half a spacing
    beyond the outer centres (common practice)."""
    c = np.asarray(c, dtype=float)
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[2 * c[0] - mid[0]], mid, [2 * c[-1] - mid[-1]]])


def _phi(z):
    """Standard normal CDF."""
    return 0.5 * (1.0 + erf(z / np.sqrt(2.0)))


def line_fraction(e_lo: np.ndarray, e_hi: np.ndarray, e0, fwhm) -> np.ndarray:
    """Fraction of a normalised Gaussian (centre e0, FWHM fwhm, eV) in [e_lo, e_hi].

    ``e0``/``fwhm`` broadcast against the channel axis (last): shape (..., 1) for a map.
    """
    s = np.asarray(fwhm, dtype=float) / FWHM_PER_SIGMA
    e0 = np.asarray(e0, dtype=float)
    return _phi((e_hi - e0) / s) - _phi((e_lo - e0) / s)


def expected_counts(e_lo, e_hi, e0, fwhm, area_counts, bg_counts, dark):
    """Mean raw counts per channel: dark + area·fraction + background (all in counts)."""
    return (np.asarray(dark, dtype=float)
            + np.asarray(area_counts, dtype=float) * line_fraction(e_lo, e_hi, e0, fwhm)
            + np.asarray(bg_counts, dtype=float))


def _truth_maps(shape, e0_ev, fwhm_ev, area_pe, rng, vary):
    """Per-pixel E0, FWHM, N: mild smooth variation plus a little pixel jitter."""
    ny, nx = shape
    yy, xx = np.meshgrid(np.linspace(0, 1, ny), np.linspace(0, 1, nx), indexing="ij")
    if not vary:
        return (np.full(shape, float(e0_ev)), np.full(shape, float(fwhm_ev)),
                np.full(shape, float(area_pe)))
    e0 = e0_ev + 0.15 * fwhm_ev * np.sin(2 * np.pi * xx) * np.cos(np.pi * yy)
    e0 = e0 + 0.02 * fwhm_ev * rng.uniform(-1, 1, shape)
    fw = fwhm_ev * (1.0 + 0.05 * np.cos(2 * np.pi * yy) + 0.01 * rng.uniform(-1, 1, shape))
    n = area_pe * (1.0 + 0.15 * np.cos(np.pi * xx) * np.sin(np.pi * yy)
                   + 0.03 * rng.uniform(-1, 1, shape))
    return e0, fw, n


def _grid(n_pix):
    """(ny, nx) with ny·nx = n_pix, as square as possible (40 × 50 for 2000)."""
    ny = int(np.floor(np.sqrt(n_pix)))
    while n_pix % ny:
        ny -= 1
    return ny, n_pix // ny


def _noisy_cube(lam_pe, *, gain, read_noise_counts, dark_level_counts, rng):
    counts = rng.poisson(lam_pe).astype(np.float64) / gain
    if read_noise_counts > 0:
        counts += rng.normal(0.0, read_noise_counts, size=counts.shape)
    counts += dark_level_counts
    return counts.astype(np.float32)


def _attrs(stated, gain, read_noise_counts, dark_level_counts, extra):
    attrs = {"units": "counts", "long_name": "PL intensity"}
    attrs.update(extra)
    if stated:
        attrs.update(gain_e_per_count=float(gain), read_noise_counts=float(read_noise_counts),
                     dark_level_counts=float(dark_level_counts))
    return attrs


def _make(axis_name, axis_vals, axis_attrs, e_lo, e_hi, *, n_pix, e0_ev, fwhm_ev,
          area_photoelectrons, background_photoelectrons, gain, read_noise_counts,
          dark_level_counts, stated_attrs, seed, vary, extra_attrs):
    rng = np.random.default_rng(seed)
    ny, nx = _grid(n_pix)
    e0, fw, n_pe = _truth_maps((ny, nx), e0_ev, fwhm_ev, area_photoelectrons, rng, vary)
    frac = line_fraction(e_lo, e_hi, e0[..., None], fw[..., None])
    lam_pe = n_pe[..., None] * frac + float(background_photoelectrons)
    data = _noisy_cube(lam_pe, gain=gain, read_noise_counts=read_noise_counts,
                       dark_level_counts=dark_level_counts, rng=rng)
    coords = {
        "y": ("y", 0.5 * np.arange(ny), {"units": "um"}),
        "x": ("x", 0.5 * np.arange(nx), {"units": "um"}),
        axis_name: (axis_name, axis_vals, axis_attrs),
    }
    cube = xr.DataArray(data, dims=("y", "x", axis_name), coords=coords, name="intensity",
                        attrs=_attrs(stated_attrs, gain, read_noise_counts, dark_level_counts,
                                     extra_attrs))
    truth = {
        "peak_energy": e0,
        "peak_fwhm": fw,
        "peak_area": n_pe / gain,  # counts: ∫ I dE of the counts/eV cube
        "background": np.full((ny, nx), background_photoelectrons / gain),  # counts/channel
        "photoelectrons": n_pe,
        "peak_counts_max": float(np.max(n_pe[..., None] * frac) / gain),
        "e_lo": e_lo,
        "e_hi": e_hi,
        "gain": float(gain),
        "read_noise_counts": float(read_noise_counts),
        "dark_level_counts": float(dark_level_counts),
        "n_pix": ny * nx,
        "shape": (ny, nx),
    }
    return cube, truth


def make_wavelength_cube(
    n_pix: int = 2000,
    n_ch: int = 512,
    *,
    lam0_nm: float = 740.0,
    lam1_nm: float = 870.0,
    e0_ev: float = 1.55,
    fwhm_ev: float = 0.03,
    area_photoelectrons: float = 1.3e5,
    background_photoelectrons: float = 20.0,
    gain: float = 1.0,
    read_noise_counts: float = 0.0,
    dark_level_counts: float = 0.0,
    medium: str = "vacuum",
    stated_attrs: bool = True,
    seed: int = 0,
    vary: bool = True,
) -> tuple[xr.DataArray, dict]:
    """A (y, x, wavelength) cube in counts, linear in vacuum wavelength (nm), with truth.

    Returns (cube, truth): ``cube`` is an in-memory DataArray (float32, attrs
    ``units="counts"``, ``wavelength_medium``, and ``gain_e_per_count``,
    ``read_noise_counts``, ``dark_level_counts`` when ``stated_attrs``);
    ``truth`` holds per-pixel maps (y, x) of ``peak_energy``, ``peak_fwhm`` (eV),
    ``peak_area`` (counts), ``background`` (counts per channel), and the channel
    edges in energy (``e_lo``, ``e_hi``; ascending in wavelength order).
    """
    if medium != "vacuum":
        raise ValueError("only vacuum axes: the generator converts with E = hc/λ_vac")
    lam = np.linspace(lam0_nm, lam1_nm, n_ch)
    edges = edges_from_centres(lam)
    # E decreases with λ: channel i spans [hc/λ_hi, hc/λ_lo]
    e_lo, e_hi = HC_EV_NM / edges[1:], HC_EV_NM / edges[:-1]
    return _make("wavelength", lam, {"units": "nm"}, e_lo, e_hi, n_pix=n_pix, e0_ev=e0_ev,
                 fwhm_ev=fwhm_ev, area_photoelectrons=area_photoelectrons,
                 background_photoelectrons=background_photoelectrons, gain=gain,
                 read_noise_counts=read_noise_counts, dark_level_counts=dark_level_counts,
                 stated_attrs=stated_attrs, seed=seed, vary=vary,
                 extra_attrs={"wavelength_medium": medium})


def make_energy_cube(
    n_pix: int = 2000,
    n_ch: int = 512,
    *,
    e_start_ev: float = 1.45,
    e_stop_ev: float = 1.65,
    e0_ev: float = 1.55,
    fwhm_ev: float = 0.008,
    area_photoelectrons: float = 4.4e4,
    background_photoelectrons: float = 20.0,
    gain: float = 1.0,
    read_noise_counts: float = 0.0,
    dark_level_counts: float = 0.0,
    stated_attrs: bool = True,
    seed: int = 0,
    vary: bool = True,
) -> tuple[xr.DataArray, dict]:
    """A (y, x, energy) cube in counts per channel, linear in photon energy (eV), with truth.

    As :func:`make_wavelength_cube`; the truth ``peak_area`` is N/gain (counts), which is
    ∫ I dE once the cube is divided by the channel width (counts/eV).
    """
    e = np.linspace(e_start_ev, e_stop_ev, n_ch)
    edges = edges_from_centres(e)
    return _make("energy", e, {"units": "eV"}, edges[:-1], edges[1:], n_pix=n_pix,
                 e0_ev=e0_ev, fwhm_ev=fwhm_ev, area_photoelectrons=area_photoelectrons,
                 background_photoelectrons=background_photoelectrons, gain=gain,
                 read_noise_counts=read_noise_counts, dark_level_counts=dark_level_counts,
                 stated_attrs=stated_attrs, seed=seed, vary=vary, extra_attrs={})


def crb(truth: dict) -> dict:
    """Cramér–Rao bound per pixel for θ = (E0, FWHM, area, background) of a cube's truth.

    Fisher information I_jk = Σ_i ∂μ_i/∂θ_j ∂μ_i/∂θ_k / var_i with μ_i the mean raw counts
    of channel i and var_i = (μ_i − dark)/gain + read_noise² (see the module docstring for
    the sources). Returns a dict of (y, x) maps of sqrt(diag(I⁻¹)) keyed like :data:`PARAMS`.
    """
    e_lo, e_hi = truth["e_lo"], truth["e_hi"]
    gain, rn, dark = truth["gain"], truth["read_noise_counts"], truth["dark_level_counts"]
    theta = np.stack([truth[p] for p in PARAMS], axis=-1).reshape(-1, len(PARAMS))

    def mu(t):
        return expected_counts(e_lo, e_hi, t[:, 0:1], t[:, 1:2], t[:, 2:3], t[:, 3:4], dark)

    steps = np.stack([1e-4 * theta[:, 1], 1e-4 * theta[:, 1], 1e-4 * theta[:, 2],
                      np.maximum(1e-3 * np.abs(theta[:, 3]), 1e-3)], axis=1)
    jac = np.empty(theta.shape + (e_lo.size,))
    for j in range(theta.shape[1]):
        tp, tm = theta.copy(), theta.copy()
        tp[:, j] += steps[:, j]
        tm[:, j] -= steps[:, j]
        jac[:, j] = (mu(tp) - mu(tm)) / (2 * steps[:, j : j + 1])
    var = (mu(theta) - dark) / gain + rn * rn
    fisher = np.einsum("mji,mki->mjk", jac / var[:, None, :], jac)
    cov = np.linalg.inv(fisher)
    sd = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    shape = truth["shape"]
    return {p: sd[:, j].reshape(shape) for j, p in enumerate(PARAMS)}


def write_zarr(cube: xr.DataArray, path) -> None:
    """Write a cube as a Zarr store (variable ``intensity``) with plain xarray."""
    cube.to_dataset(name="intensity").to_zarr(path, mode="w", consolidated=False)


# --------------------------------------------------------------------------------------
# The honesty cases of issue 11 (shared by tests/test_noise_honesty.py and
# scripts/bench_honesty.py) and the statistics measured on a pmap result.

#: Detector used throughout: dark 100 counts, read noise 3 counts (common CCD values).
_DET = {"dark_level_counts": 100.0, "read_noise_counts": 3.0}

#: case name -> (axis kind, how pmap is run, level, generator keywords)
HONESTY_CASES = {
    # (a) wavelength axis, gain 1, peak ~2000–2500 counts, attrs stated; through the CLI
    "a_wl_high_gain1_stated": ("wavelength", "cli", "high", dict(
        area_photoelectrons=1.3e5, background_photoelectrons=20.0, gain=1.0,
        stated_attrs=True, seed=11, **_DET)),
    # (b) the same at low counts (peak <= 50 counts)
    "b_wl_low_gain1_stated": ("wavelength", "api", "low", dict(
        area_photoelectrons=2400.0, background_photoelectrons=5.0, gain=1.0,
        stated_attrs=True, seed=12, **_DET)),
    # (c) gain 2.5 e-/count with read noise, high counts
    "c_wl_high_gain2.5_stated": ("wavelength", "api", "high", dict(
        area_photoelectrons=3.2e5, background_photoelectrons=50.0, gain=2.5,
        stated_attrs=True, seed=13, **_DET)),
    # (d) the detector of (c) with NO noise attrs: pmap must estimate the noise model
    "d_wl_low_gain2.5_unstated": ("wavelength", "api", "low", dict(
        area_photoelectrons=6000.0, background_photoelectrons=12.0, gain=2.5,
        stated_attrs=False, seed=14, **_DET)),
    "d_wl_high_gain2.5_unstated": ("wavelength", "api", "high", dict(
        area_photoelectrons=3.2e5, background_photoelectrons=50.0, gain=2.5,
        stated_attrs=False, seed=15, **_DET)),
    # (e) axis linear in photon energy, counts per channel, attrs stated
    "e_energy_high_gain1_stated": ("energy", "api", "high", dict(
        area_photoelectrons=4.4e4, background_photoelectrons=20.0, gain=1.0,
        stated_attrs=True, seed=16, **_DET)),
}

#: Fitted parameters whose pulls and errors are checked.
FIT_PARAMS = ("peak_energy", "peak_fwhm", "peak_area")


def make_case(name: str, n_pix: int = 2000):
    """(cube, truth, crb maps, via, level) of a case of :data:`HONESTY_CASES`."""
    kind, via, level, kw = HONESTY_CASES[name]
    maker = make_wavelength_cube if kind == "wavelength" else make_energy_cube
    cube, truth = maker(n_pix=n_pix, **kw)
    return cube, truth, crb(truth), via, level


def honesty_stats(result: xr.Dataset, truth: dict, bound: dict) -> dict:
    """Pull s.d., RMS error / RMS CRB, median χ²_red and convergence of a pmap result.

    ``result`` is an opened result store (peak dim first on the peak maps); statistics use
    the pixels with ``fit_status == 0``. Also returns the sampling standard errors used by
    the tests: s.e. of a sample s.d. ≈ sd/sqrt(2(n−1)) and of a sample RMS ≈ rms/sqrt(2n)
    (normal theory, common practice); s.e. of a median ≈ 1.2533·s/sqrt(n) (asymptotic
    relative efficiency of the median, common practice) with s = sqrt(2/ν) the s.d. of
    χ²_ν/ν, ν = channels − 4 fitted parameters.
    """
    status = np.asarray(result["fit_status"].values)
    ok = status == 0
    n_all, n = int(status.size), int(ok.sum())
    out = {"n_pixels": n_all, "n": n, "converged": n / max(n_all, 1),
           "se_sd": 1.0 / np.sqrt(2.0 * max(n - 1, 1)), "se_rms": 1.0 / np.sqrt(2.0 * max(n, 1))}
    for p in FIT_PARAMS:
        fit = np.asarray(result[p].isel(peak=0).values, dtype=float)[ok]
        err = np.asarray(result[p + "_err"].isel(peak=0).values, dtype=float)[ok]
        t = truth[p][ok]
        pull = (fit - t) / err
        out[p] = {
            "pull_sd": float(np.std(pull, ddof=1)) if n > 1 else np.nan,
            "pull_mean": float(np.mean(pull)) if n else np.nan,
            "rms_over_crb": float(np.sqrt(np.mean((fit - t) ** 2) / np.mean(bound[p][ok] ** 2)))
            if n else np.nan,
            "err_over_crb": float(np.sqrt(np.mean(err ** 2) / np.mean(bound[p][ok] ** 2)))
            if n else np.nan,
            "units": result[p].attrs.get("units"),
        }
    nu = truth["e_lo"].size - 4
    if "chi2_red" in result:  # part of the result-store contract (DEVELOPERS.md)
        chi2 = np.asarray(result["chi2_red"].values, dtype=float)[ok]
        out["chi2_median"] = float(np.median(chi2)) if n else np.nan
        out["chi2_units"] = result["chi2_red"].attrs.get("units")
    else:
        out["chi2_median"], out["chi2_units"] = np.nan, "<no chi2_red in the result>"
    out["se_chi2_median"] = 1.2533 * np.sqrt(2.0 / nu) / np.sqrt(max(n, 1))
    return out
