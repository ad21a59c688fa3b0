"""Bandgap estimate from the PL peak: band-to-band offset, uncertainty, pipeline keys."""

import numpy as np
import pytest
import xarray as xr
from scipy.optimize import minimize_scalar

from pmap.errors import PmapNotice, StepError
from pmap.fitting import bandgap_from_peak
from pmap.fitting._physics import band_to_band_offset_ev
from pmap.pipeline import load_pipeline

K_B = 8.617333262e-5  # Boltzmann constant in eV/K (CODATA 2018)


def planck_peak(eg, temperature_K):
    """Maximum of the generalized Planck form E²·sqrt(E − Eg)·exp(−E/kT), found numerically.

    Band-to-band emission of parabolic bands in the Boltzmann limit (van Roosbroeck &
    Shockley, Phys. Rev. 94, 1558 (1954); Würfel, J. Phys. C 15, 3967 (1982)).
    """
    kt = K_B * temperature_K

    def minus_log_i(e):
        return -(2 * np.log(e) + 0.5 * np.log(e - eg) - e / kt)

    res = minimize_scalar(minus_log_i, bounds=(eg + 1e-9, eg + 20 * kt), method="bounded",
                          options={"xatol": 1e-13})
    return res.x


@pytest.mark.parametrize("temperature_K", [10.0, 77.0, 300.0, 500.0])
@pytest.mark.parametrize("eg", [0.7, 1.5, 3.4])
def test_band_to_band_offset_against_numerical_maximum(eg, temperature_K):
    ep = planck_peak(eg, temperature_K)
    kt = K_B * temperature_K
    # the maximum sits kT/2 above the gap, plus a small correction from the E² prefactor
    assert ep - eg == pytest.approx(kt / 2, abs=kt**2 / eg * 1.1 + 1e-9)
    gap = bandgap_from_peak(ep, band_to_band_temperature_K=temperature_K)
    # 0.1 µeV: the numerical maximum of a flat-topped function is no more precise than that
    assert float(gap) == pytest.approx(eg, abs=1e-7)
    assert float(band_to_band_offset_ev(ep, temperature_K)) == pytest.approx(ep - eg, abs=1e-7)


def test_band_to_band_on_maps_with_caveat():
    pe = xr.DataArray([[1.50, np.nan], [1.52, 1.55]], dims=("y", "x"), attrs={"units": "eV"})
    gap = bandgap_from_peak(pe, band_to_band_temperature_K=300.0)
    # kT/2 = 12.9 meV at 300 K, plus about kT²/E_p = 0.45 meV from the E² prefactor
    assert 0.0129 < 1.5 - float(gap[0, 0]) < 0.0135
    assert np.isnan(gap.values[0, 1])
    assert gap.name == "bandgap_estimate" and gap.attrs["units"] == "eV"
    assert "kT/2" in gap.attrs["caveat"] and gap.attrs["band_to_band_temperature_K"] == 300.0


def test_band_to_band_offset_nan_without_a_maximum():
    # E_p ≤ 2kT: E²·sqrt(E − Eg)·exp(−E/kT) has no maximum there for any Eg > 0
    assert np.isnan(band_to_band_offset_ev(0.05, 300.0))


# ------------------------------------------------------------------ uncertainty
def test_error_in_quadrature_against_monte_carlo(rng):
    # exciton binding of GaN 28 ± 5 meV (Monemar, Phys. Rev. B 10, 676 (1974), value from
    # memory; the spread is made up); a Stokes shift of 10 ± 3 meV (made-up numbers)
    pe, s_pe = np.array([3.470, 3.480]), np.array([0.004, 0.001])
    with pytest.warns(PmapNotice, match="Stokes"):
        gap, err = bandgap_from_peak(pe, peak_energy_err=s_pe, exciton_binding_ev=0.028,
                                     exciton_binding_err_ev=0.005, stokes_shift_ev=0.010,
                                     stokes_shift_err_ev=0.003)
    n = 200_000
    draws = (pe + s_pe * rng.standard_normal((n, 2)) + 0.028 + 0.005 * rng.standard_normal((n, 1))
             + 0.010 + 0.003 * rng.standard_normal((n, 1)))
    np.testing.assert_allclose(gap, draws.mean(axis=0), atol=1e-4)
    np.testing.assert_allclose(err, draws.std(axis=0), rtol=0.01)


def test_error_with_band_to_band_against_monte_carlo(rng):
    # Monte Carlo through the test's own numerical inversion Ep -> Eg (interpolated table)
    t, s_pe = 300.0, 0.006
    egs = np.linspace(1.40, 1.60, 81)
    eps = np.array([planck_peak(e, t) for e in egs])
    pe = 1.5
    gap, err = bandgap_from_peak(np.array([pe]), band_to_band_temperature_K=t,
                                 peak_energy_err=np.array([s_pe]))
    draws = np.interp(pe + s_pe * rng.standard_normal(200_000), eps, egs)
    assert float(gap[0]) == pytest.approx(np.interp(pe, eps, egs), abs=2e-6)
    assert float(err[0]) == pytest.approx(draws.std(), rel=0.01)


def test_error_maps_keep_nan_and_attrs():
    pe = xr.DataArray([[1.50, 1.52]], dims=("y", "x"))
    pe_err = xr.DataArray([[0.002, np.nan]], dims=("y", "x"))
    gap, err = bandgap_from_peak(pe, peak_energy_err=pe_err, exciton_binding_ev=0.02,
                                 exciton_binding_err_ev=0.0015)
    assert err.name == "bandgap_estimate_err" and err.attrs["units"] == "eV"
    assert float(err[0, 0]) == pytest.approx(0.0025, rel=1e-9)  # 3-4-5 triangle
    assert np.isnan(err.values[0, 1])
    assert "caveat" in gap.attrs


@pytest.mark.parametrize(
    "kw",
    [
        {"exciton_binding_err_ev": 0.01},  # an error without the peak's error
        {"peak_energy_err": 0.001, "stokes_shift_err_ev": -0.001},
        {"peak_energy_err": 0.001, "exciton_binding_err_ev": float("nan")},
        {"band_to_band_temperature_K": 0.0},
        {"band_to_band_temperature_K": -10.0},
        {"band_to_band_temperature_K": 300.0, "exciton_binding_ev": 0.02},
        {"band_to_band_temperature_K": 300.0, "material_gap": "indirect"},
        {"exciton_binding_ev": "a lot"},
    ],
)
def test_bad_inputs_refused(kw):
    with pytest.raises(StepError):
        bandgap_from_peak(1.5, **kw)


def test_without_errors_returns_the_estimate_only():
    # unchanged call: one value, E_g = E_peak + E_b
    assert float(bandgap_from_peak(1.5, exciton_binding_ev=0.02)) == pytest.approx(1.52)


# ------------------------------------------------------------------ pipeline TOML
def test_toml_accepts_the_new_keys_and_refuses_unknown():
    pipe = load_pipeline("[fit]\n[properties]\nexciton_binding_ev = 0.03\n"
                         "exciton_binding_err_ev = 0.005\nstokes_shift_err_ev = 0.0\n")
    assert pipe.properties["exciton_binding_err_ev"] == 0.005
    pipe = load_pipeline("[fit]\n[properties]\nband_to_band_temperature_K = 300\n")
    assert pipe.properties["band_to_band_temperature_K"] == 300
    with pytest.raises(StepError, match="unknown \\[properties\\] key"):
        load_pipeline("[fit]\n[properties]\nband_to_band_temperature = 300\n")
    with pytest.raises(StepError, match="unknown \\[properties\\] key"):
        load_pipeline("[fit]\n[properties]\npeak_energy_err = 0.001\n")


def test_process_writes_bandgap_estimate_err(tmp_path):
    import pmap
    from pmap.synthetic import make_demo_cube

    cube, _ = make_demo_cube(shape=(8, 12), n_channels=128, seed=2)
    pipe = load_pipeline('[[steps]]\nstep = "to_energy"\n[fit]\n[properties]\n'
                         "band_to_band_temperature_K = 300.0\nstokes_shift_err_ev = 0.002\n")
    ds = pmap.process(cube, tmp_path / "r.zarr", pipeline=pipe, progress=False)
    ok = np.isfinite(ds.peak_energy.values) & np.isfinite(ds.peak_energy_err.values)
    assert ok.sum() > 10
    kt = K_B * 300.0
    offset = (ds.peak_energy - ds.bandgap_estimate).values[ok]
    # ≈ kT/2 (13 meV at 300 K), a little more from the E² prefactor (see above)
    assert np.all((offset > kt / 2) & (offset < kt / 2 + 1e-3))
    err = ds.bandgap_estimate_err.values[ok]
    np.testing.assert_allclose(err**2 - 0.002**2, ds.peak_energy_err.values[ok] ** 2, rtol=1e-3)
    assert ds.bandgap_estimate_err.attrs["units"] == "eV"
    assert "caveat" in ds.bandgap_estimate.attrs
