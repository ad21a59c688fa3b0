"""fit_peaks, spectral_descriptors and physics helpers against scipy and known truth."""

import colour
import dask
import numpy as np
import pytest
import xarray as xr
from scipy.optimize import curve_fit

import pmap
from pmap.conventions import HC_EV_NM
from pmap.errors import PmapNotice, StepError
from pmap.fitting import (
    bandgap_from_peak,
    evaluate_fit,
    fit_peaks,
    gaussian,
    peak_shift,
    spectral_descriptors,
    voigt,
    voigt_widths,
)
from pmap.steps import get_step

E = np.linspace(1.30, 1.70, 161)


def _cube(data, units="counts", e=E):
    return pmap.make_cube(
        np.asarray(data, dtype=np.float32),
        energy_ev=e,
        units=units,
        attrs={"gain_e_per_count": 1.0, "read_noise_counts": 0.0, "dark_level_counts": 0.0},
    )


def _two_peaks(c1, c2, w1=0.04, w2=0.05, a1=20.0, a2=12.0):
    return gaussian(E, c1, w1, a1) + gaussian(E, c2, w2, a2)


@pytest.mark.parametrize(
    "model,peaks", [("gaussian", 1), ("gaussian", 2), ("voigt", 1), ("voigt", 2)]
)
def test_agrees_with_curve_fit(model, peaks):
    # reference: scipy.optimize.curve_fit on the same spectra with the same weights
    rng = np.random.default_rng(1)
    if model == "gaussian":

        def f(x, *p):
            return sum(gaussian(x, *p[3 * k : 3 * k + 3]) for k in range(peaks)) + p[-1]

        truth = [1.45, 0.05, 25.0, 1.56, 0.04, 15.0][: 3 * peaks] + [20.0]
    else:

        def f(x, *p):
            return (
                sum(
                    voigt(x, p[4 * k], *voigt_widths(p[4 * k + 1], p[4 * k + 3]), p[4 * k + 2])
                    for k in range(peaks)
                )
                + p[-1]
            )

        truth = [1.45, 0.05, 25.0, 0.4, 1.56, 0.04, 15.0, 0.3][: 4 * peaks] + [20.0]
    clean = f(E, *truth)
    data = rng.poisson(np.broadcast_to(clean, (2, 3, E.size))).astype(float)
    res = fit_peaks(_cube(data), model=model, peaks=peaks).compute()
    assert np.all(res.fit_status.values == 0)
    for iy, ix in ((0, 0), (1, 2)):
        y = data[iy, ix]
        sig = np.sqrt(np.maximum(f(E, *truth), 1.0))
        lo = [E[0], 0.005, 0, 0][: 4 if model == "voigt" else 3] * peaks + [-np.inf]
        hi = [E[-1], 1.0, np.inf, 0.99][: 4 if model == "voigt" else 3] * peaks + [np.inf]
        # iterate the model-variance weights like pmap (IRLS), starting from truth
        p = np.array(truth)
        for _ in range(5):
            p, cov = curve_fit(f, E, y, p0=p, sigma=sig, absolute_sigma=True, bounds=(lo, hi))
            sig = np.sqrt(np.maximum(f(E, *p), 1.0 / 1.0))
        npp = 4 if model == "voigt" else 3
        for k in range(peaks):
            pc = res.isel(y=iy, x=ix, peak=k)
            assert float(pc.peak_energy) == pytest.approx(p[npp * k], abs=2e-5)
            assert float(pc.peak_fwhm) == pytest.approx(p[npp * k + 1], rel=2e-3)
            assert float(pc.peak_area) == pytest.approx(p[npp * k + 2], rel=2e-3)
            assert float(pc.peak_energy_err) == pytest.approx(
                np.sqrt(cov[npp * k, npp * k]), rel=0.05
            )


def test_uncertainties_are_honest_and_truth_recovered():
    # pull distribution (fit − truth)/σ must have unit s.d. (common practice for checking
    # error bars); 2000 Poisson-noise spectra
    rng = np.random.default_rng(7)
    n = 2000
    c = rng.uniform(1.45, 1.55, n)
    w = rng.uniform(0.03, 0.06, n)
    a = rng.uniform(5.0, 15.0, n)
    data = rng.poisson(gaussian(E, c[:, None], w[:, None], a[:, None]) + 10.0)
    res = fit_peaks(_cube(data.reshape(40, 50, -1))).compute().isel(peak=0)
    assert np.all(res.fit_status.values == 0)
    for name, t in (("peak_energy", c), ("peak_fwhm", w), ("peak_area", a)):
        got = res[name].values.ravel()
        err = res[name + "_err"].values.ravel()
        pull = (got - t) / err
        assert np.std(pull) == pytest.approx(1.0, abs=0.15), name
        # bias well below the scatter (state: |mean pull| < 0.15)
        assert abs(np.mean(pull)) < 0.15, name
    assert np.median(res.chi2_red.values) == pytest.approx(1.0, abs=0.05)


def test_residual_noise_mode_scales_errors():
    # non-count units: σ from the residual, covariance scaled by χ²_red (common practice)
    rng = np.random.default_rng(3)
    n = 2000
    data = gaussian(E, 1.5, 0.05, 1.0) + 0.3 * rng.standard_normal((n, E.size))
    res = fit_peaks(_cube(data.reshape(40, 50, -1), units="arbitrary")).compute().isel(peak=0)
    pull = (res.peak_energy.values - 1.5) / res.peak_energy_err.values
    assert np.std(pull) == pytest.approx(1.0, abs=0.15)
    assert "residual variance" in res.attrs["uncertainty_method"]
    # no noise model: the χ² column is named for what it is, a residual variance
    assert "chi2_red" not in res and res.residual_variance.attrs["units"] == "(arbitrary)^2"


def test_no_signal_and_nan_pixels():
    rng = np.random.default_rng(4)
    data = rng.poisson(gaussian(E, 1.5, 0.05, 20.0) + 10.0, size=(2, 3, E.size)).astype(float)
    data[0, 0] = rng.poisson(10.0, E.size)  # noise only
    data[0, 1] = 0.0  # empty
    data[0, 2, :120] = np.nan  # most channels masked: nothing left to fit
    data[1, 0, [5, 80, 81]] = np.nan  # a few masked channels: left out, the pixel is fitted
    res = fit_peaks(_cube(data)).compute()
    st = res.fit_status.values
    assert st[0, 0] == 3 and st[0, 1] == 3 and st[0, 2] == 4
    assert np.all(st[1] == 0)
    assert abs(float(res.peak_energy.values[0, 1, 0]) - 1.5) < 0.005
    assert np.all(np.isnan(res.peak_energy.values[0, 0]))
    assert "0=converged" in res.fit_status.attrs["legend"]


def test_peaks_sorted_fixed_and_shared():
    rng = np.random.default_rng(5)
    # peaks swap relative strength across the map; output must stay sorted by energy
    a1 = np.linspace(5, 30, 6)
    clean = np.stack([_two_peaks(1.45, 1.56, a1=v, a2=35 - v) for v in a1]).reshape(2, 3, -1)
    data = rng.poisson(clean + 10.0).astype(float)
    res = fit_peaks(_cube(data), peaks=2).compute()
    pe = res.peak_energy.values
    assert np.all(pe[0] < pe[1])
    np.testing.assert_allclose(pe[0], 1.45, atol=0.004)
    np.testing.assert_allclose(pe[1], 1.56, atol=0.004)
    # a known defect band fixed across the map, and a common width
    res2 = fit_peaks(
        _cube(data), peaks=2, fixed={"center": [1.45, None]}, shared=["fwhm"]
    ).compute()
    assert np.all(res2.peak_energy.values[0] == pytest.approx(1.45, abs=1e-12))
    assert res2.peak_energy_err.values[0].max() == 0.0
    np.testing.assert_allclose(res2.peak_fwhm.values[0], res2.peak_fwhm.values[1], rtol=1e-12)


def test_user_bound_flags_status_2():
    data = np.broadcast_to(gaussian(E, 1.5, 0.05, 20.0) * 50 + 10.0, (1, 2, E.size))
    res = fit_peaks(_cube(data), bounds={"fwhm": (0.01, 0.03)}).compute()
    assert np.all(res.fit_status.values == 2)
    assert np.allclose(res.peak_fwhm.values, 0.03)


def test_led_spectrum_from_colour_science():
    # CIE 015:2018 LED-B1 (colour-science SDS_ILLUMINANTS): maxima near 450 and 605 nm.
    # Blue LED line + broad asymmetric phosphor band: three Gaussians describe it.
    sd = colour.SDS_ILLUMINANTS["LED-B1"]
    wl, val = np.asarray(sd.wavelengths, float), np.asarray(sd.values, float)
    e = HC_EV_NM / wl[::-1]
    ie = (val * wl**2 / HC_EV_NM)[::-1]  # Jacobian, Mooney & Kambhampati JPCL 4, 3316 (2013)
    cube = _cube(np.broadcast_to(ie, (1, 1, e.size)), units="arbitrary", e=e)
    res = fit_peaks(cube, peaks=3, background="none", max_iter=500).compute()
    assert res.fit_status.values.item() == 0
    # maxima of the fitted model back on the wavelength scale: I_λ ∝ I_E·E²
    fine = np.linspace(e[0], e[-1], 20001)
    lam_spec = evaluate_fit(res, fine, y=0.0, x=0.0).total.values * fine**2
    i = np.flatnonzero((lam_spec[1:-1] > lam_spec[:-2]) & (lam_spec[1:-1] > lam_spec[2:])) + 1
    lam_max = np.sort(HC_EV_NM / fine[i])
    assert lam_max.size == 2
    assert lam_max[0] == pytest.approx(450.0, abs=2.5)
    assert lam_max[1] == pytest.approx(605.0, abs=2.5)
    assert np.all(np.diff(res.peak_energy.values.ravel()) > 0)


def test_building_graph_computes_nothing_and_contract():
    def forbid(*a, **k):
        raise AssertionError("computed while building the graph")

    data = np.random.default_rng(0).poisson(gaussian(E, 1.5, 0.05, 20) + 5, (4, 4, E.size))
    cube = _cube(data)
    with dask.config.set(scheduler=forbid):
        ds = fit_peaks(cube, peaks=2, background="linear")
        dd = spectral_descriptors(cube)
    assert ds.peak_energy.dims == ("peak", "y", "x")
    assert ds.fit_status.dims == ("y", "x")
    for v in list(ds.data_vars) + list(dd.data_vars):
        obj = ds[v] if v in ds else dd[v]
        assert "units" in obj.attrs and "long_name" in obj.attrs, v
    assert ds.y.attrs["units"] == "pixel"
    assert "fit_peaks" in ds.attrs["pmap_provenance"]
    assert get_step("fit_peaks").func is fit_peaks
    assert get_step("spectral_descriptors").func is spectral_descriptors


def test_descriptors_against_known_gaussian():
    # Gaussian: maximum at centre, FWHM = width, integral = area (definitions, common practice)
    e = np.linspace(1.3, 1.7, 401)
    c = np.array([[1.4823, 1.5117]])
    y = gaussian(e, c[..., None], 0.05, 2.0)
    ds = spectral_descriptors(_cube(y, e=e), ratio_windows=((1.3, 1.5), (1.5, 1.7))).compute()
    np.testing.assert_allclose(ds.max_energy.values, c, atol=2e-5)
    np.testing.assert_allclose(ds.centroid_energy.values, c, atol=1e-6)
    np.testing.assert_allclose(ds.fwhm_interp.values, 0.05, rtol=2e-3)
    np.testing.assert_allclose(ds.integrated_intensity.values, 2.0, rtol=1e-6)
    assert ds.window_ratio.values[0, 0] > 1 > ds.window_ratio.values[0, 1]


def test_bandgap_and_shift():
    pe = xr.DataArray([[1.50, 1.52]], dims=("y", "x"), attrs={"units": "eV"})
    # GaN A-exciton binding 28 meV (Monemar, Phys. Rev. B 10, 676 (1974))
    gap = bandgap_from_peak(pe, exciton_binding_ev=0.028)
    np.testing.assert_allclose(gap.values, [[1.528, 1.548]])
    assert gap.attrs["units"] == "eV" and "caveat" in gap.attrs
    with pytest.warns(PmapNotice):
        bandgap_from_peak(pe, material_gap="indirect")
    with pytest.warns(PmapNotice):
        bandgap_from_peak(pe, stokes_shift_ev=0.01)
    np.testing.assert_allclose(peak_shift(pe, 1.51).values, [[-0.01, 0.01]], atol=1e-12)
    with pytest.raises(StepError):
        fit_peaks(pmap.make_cube(np.ones((1, 1, 10)), wavelength_nm=np.arange(500, 510)))
