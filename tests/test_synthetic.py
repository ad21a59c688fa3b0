"""Tests of pmap.synthetic: the demo cube agrees with its own truth and with physics."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import constants, stats

from pmap.airvac import air_to_vacuum
from pmap.cube import validate_cube
from pmap.errors import InputFileError, StepError
from pmap.synthetic import (
    DEMO_SIZES,
    PEAK_NAMES,
    DemoScenario,
    make_demo_cube,
    write_demo_cube,
)

# hc in eV·nm from the exact 2019 SI constants (scipy.constants, CODATA 2018;
# Tiesinga et al., Rev. Mod. Phys. 93, 025010 (2021)).
HC = constants.h * constants.c / constants.e * 1e9
FWHM_PER_SIGMA = 2 * np.sqrt(2 * np.log(2))


def iau_air_to_vacuum(air_nm):
    """Independent reference: IAU standard (Morton, ApJS 130, 403 (2000)), iterated."""
    air = np.asarray(air_nm, dtype=float)
    vac = air.copy()
    for _ in range(10):
        s2 = (1e3 / vac) ** 2
        vac = air * (1 + 8.34254e-5 + 2.406147e-2 / (130 - s2) + 1.5998e-4 / (38.9 - s2))
    return vac


def outer_edges_nm(wavelength):
    step = wavelength[1] - wavelength[0]
    return wavelength[0] - step / 2, wavelength[-1] + step / 2


@pytest.fixture(scope="module")
def demo():
    """64 × 64 map with the noise-free expected cube, with and without spikes."""
    cube, truth = make_demo_cube(shape=(64, 64), seed=3, expected=True)
    clean, _ = make_demo_cube(shape=(64, 64), seed=3, spikes=False)
    return cube.values.astype(float), clean.values.astype(float), truth, cube.attrs


def test_validate_cube_accepts_and_metadata(demo):
    cube, truth = make_demo_cube(shape=(16, 24), seed=0)
    again = validate_cube(cube)
    assert again.dims == ("y", "x", "wavelength")
    assert cube.attrs["units"] == "counts"
    assert cube["wavelength"].attrs["units"] == "nm" and cube["y"].attrs["units"] == "um"
    for key in (
        "excitation_wavelength_nm",
        "exposure_s",
        "excitation_power_W",
        "temperature_K",
        "saturation_counts",
        "read_noise_counts",
        "gain_e_per_count",
        "dark_offset_counts",
        "wavelength_medium",
        "instrument_notes",
    ):
        assert key in cube.attrs, key
    assert "synthetic" in cube.attrs["instrument_notes"].lower()
    for name, var in truth.variables.items():
        if name not in ("peak", "peak_name"):
            assert "units" in var.attrs, name
    assert list(truth["peak_name"].values) == list(PEAK_NAMES)
    assert set(np.unique(truth["region"].values)) == {-1, 0, 1, 2}


def test_air_to_vacuum_worked_examples():
    # the generator converts its air axis with the IAU formula
    # Kr line, air 605.6125 nm -> vacuum 605.78019 nm (worked example from Ciddor,
    # Appl. Opt. 35, 1566 (1996); IAU/Morton 2000 differs by < 1e-6 nm here).
    assert air_to_vacuum(605.6125, method="iau") == pytest.approx(605.78019, abs=1e-5)
    # He-Ne: vacuum 632.9914 nm <-> air 632.8164 nm (4 decimals given, hence 1e-4 nm).
    assert air_to_vacuum(632.8164, method="iau") == pytest.approx(632.9914, abs=1e-4)


def test_expected_sum_equals_truth_areas_plus_background(demo):
    """Channel counts of each Gaussian-in-energy line integrate exactly to its area."""
    _, _, truth, attrs = demo
    wl = truth["wavelength"].values
    lo, hi = outer_edges_nm(wl)
    assert attrs["wavelength_medium"] == "air"
    e_hi, e_lo = HC / iau_air_to_vacuum(np.array([lo, hi]))  # window in photon energy
    e0 = truth["peak_energy"].values
    sig = truth["peak_fwhm"].values / FWHM_PER_SIGMA
    # fraction of each line inside the window: scipy.stats.norm as the reference CDF
    frac = stats.norm.cdf(e_hi, e0, sig) - stats.norm.cdf(e_lo, e0, sig)
    lines = np.nansum(truth["peak_area"].values * frac, axis=0)
    bg = truth["background_amplitude"].values * truth["background_shape"].values.sum()
    total = truth["expected"].values.sum(axis=-1)
    np.testing.assert_allclose(total, lines + bg, rtol=1e-6, atol=1e-9)
    # the defect band at 1.38 eV is partly outside the window: the check is not trivial
    assert np.nanmin(frac[2]) < 0.999


def _line_maximum_nm(spectrum, wl):
    """Maximum of a sampled line by a parabola through the top three channels."""
    i = int(np.argmax(spectrum))
    a, b, c = spectrum[i - 1 : i + 2]
    return wl[i] + 0.5 * (a - c) / (a - 2 * b + c) * (wl[1] - wl[0])


@pytest.mark.parametrize("medium", ["vacuum", "air"])
def test_jacobian_shifts_maximum_in_wavelength(medium):
    """A Gaussian in energy peaks in wavelength where g(E)·E² is largest, not at hc/E0.

    I_λ = I_E·|dE/dλ| = I_E·E²/(hc) (Mooney & Kambhampati, J. Phys. Chem. Lett. 4,
    3316 (2013)); d/dE[g(E) E²] = 0 gives E* = (E0 + sqrt(E0² + 8σ²))/2.
    """
    scen = DemoScenario(band_edge_fwhm_ev=0.30, band_edge_fwhm_variation_ev=0.0)
    cube, truth = make_demo_cube(
        shape=(16, 16),
        n_channels=4096,
        seed=1,
        expected=True,
        wavelength_medium=medium,
        scenario=scen,
    )
    iy, ix = np.argwhere(truth["region"].values == 0)[-1]
    line = (
        truth["expected"].values[iy, ix]
        - truth["background_amplitude"].values[iy, ix] * truth["background_shape"].values
    )
    wl = truth["wavelength"].values
    to_vac = iau_air_to_vacuum if medium == "air" else np.asarray
    e0 = truth["peak_energy"].values[0, iy, ix]
    sig = truth["peak_fwhm"].values[0, iy, ix] / FWHM_PER_SIGMA
    found_vac = to_vac(np.array([_line_maximum_nm(line, wl)]))[0]
    e_star = (e0 + np.sqrt(e0**2 + 8 * sig**2)) / 2
    assert found_vac == pytest.approx(HC / e_star, abs=0.02)
    # dense numerical reference: counts per nm = pdf(E)·hc/λ² on a fine vacuum grid
    lam = np.linspace(650, 950, 2_000_001)
    dense = stats.norm.pdf(HC / lam, e0, sig) * HC / lam**2
    assert found_vac == pytest.approx(lam[np.argmax(dense)], abs=0.02)
    # the shift from hc/E0 is real (several nm for a 0.3 eV wide line)
    assert HC / e0 - found_vac > 5.0


def test_clean_pixel_maximum_channel_matches_truth_energy(demo):
    _, _, truth, _ = demo
    wl = truth["wavelength"].values
    e_chan = HC / iau_air_to_vacuum(wl)  # channel centres as photon energies, E = hc/λ_vac
    region = truth["region"].values
    exp = truth["expected"].values
    for code, peak in ((0, 0), (1, 1)):
        iy, ix = np.argwhere(region == code)[0]
        e0 = truth["peak_energy"].values[peak, iy, ix]
        sig = truth["peak_fwhm"].values[peak, iy, ix] / FWHM_PER_SIGMA
        e_star = (e0 + np.sqrt(e0**2 + 8 * sig**2)) / 2
        i = int(np.argmax(exp[iy, ix]))
        assert abs(e_chan[i] - e_star) <= abs(e_chan[i] - e_chan[i + 1])


def _noise_sd(expected, attrs):
    # shot noise (Poisson variance = mean, in electrons) + read noise + ADC rounding (1/12)
    g = attrs["gain_e_per_count"]
    return np.sqrt(expected / g + attrs["read_noise_counts"] ** 2 + 1 / 12)


def test_poisson_and_read_noise_statistics(demo):
    """Var = mean/gain + read² + 1/12 (Poisson statistics; photon transfer, common practice)."""
    _, clean, truth, attrs = demo
    exp = truth["expected"].values
    ok = ~(truth["dead_pixel"].values | truth["saturated_pixel"].values)
    resid = (clean - attrs["dark_offset_counts"] - exp)[ok]
    z = resid / _noise_sd(exp[ok], attrs)
    assert abs(z.mean()) < 0.01
    assert z.var() == pytest.approx(1.0, rel=0.02)
    # a band of bright channels: variance tracks the mean (Poisson), not the read noise
    sel = (exp[ok] > 300) & (exp[ok] < 500)
    assert sel.sum() > 20_000
    expect_var = exp[ok][sel].mean() + attrs["read_noise_counts"] ** 2 + 1 / 12
    assert resid[sel].var() == pytest.approx(expect_var, rel=0.03)
    # off-sample: no photons, so offset and read noise only
    off = clean[truth["region"].values == -1]
    assert off.mean() == pytest.approx(attrs["dark_offset_counts"], abs=0.1)
    assert off.std() == pytest.approx(np.sqrt(attrs["read_noise_counts"] ** 2 + 1 / 12), rel=0.03)


def test_spikes_are_where_the_mask_says(demo):
    cube, clean, truth, attrs = demo
    mask = truth["spike_mask"].values
    diff = cube - clean
    sat = truth["saturated_pixel"].values
    # spikes change exactly the masked values (the other noise is unchanged)
    assert np.array_equal(diff[~sat] != 0, mask[~sat])
    assert np.all(diff[mask & ~sat[..., None]] >= 0.3 * 500 - 1)
    # and no unmasked value stands out from the noise
    z = (cube - attrs["dark_offset_counts"] - truth["expected"].values) / _noise_sd(
        truth["expected"].values, attrs
    )
    usable = ~(truth["dead_pixel"].values | sat)[..., None] & ~mask
    assert np.abs(z[usable]).max() < 7
    # rate: 2e-4 events per value, half of them two channels wide
    n_values = mask.size
    n_events = (
        np.diff(
            np.concatenate([np.zeros(mask.shape[:2] + (1,), bool), mask], -1).astype(np.int8),
            axis=-1,
        )
        == 1
    ).sum()
    expected_events = 2e-4 * n_values
    assert abs(n_events - expected_events) < 5 * np.sqrt(expected_events)


def test_dead_and_saturated_pixels(demo):
    cube, _, truth, attrs = demo
    dy, dx = truth.attrs["dead_pixel_yx"]
    sy, sx = truth.attrs["saturated_pixel_yx"]
    assert truth["dead_pixel"].values[dy, dx] and truth["saturated_pixel"].values[sy, sx]
    dead = cube[dy, dx][~truth["spike_mask"].values[dy, dx]]
    assert dead.mean() == pytest.approx(attrs["dark_offset_counts"], abs=1.5)
    assert dead.std() < 2 * attrs["read_noise_counts"]
    assert cube[sy, sx].max() == attrs["saturation_counts"]
    assert (cube == attrs["saturation_counts"]).sum() == (
        cube[sy, sx] == attrs["saturation_counts"]
    ).sum()
    assert truth["region"].values[dy, dx] == 0 and truth["region"].values[sy, sx] == 0


def test_determinism_and_seed_dependence():
    a, ta = make_demo_cube(shape=(16, 24), seed=5)
    b, tb = make_demo_cube(shape=(16, 24), seed=5)
    c, tc = make_demo_cube(shape=(16, 24), seed=6)
    assert np.array_equal(a.values, b.values)
    xr.testing.assert_identical(ta, tb)
    assert not np.array_equal(a.values, c.values)
    assert not np.array_equal(ta["peak_energy"].values, tc["peak_energy"].values, equal_nan=True)


def test_chunked_writing_is_independent_of_tiling(tmp_path):
    shape = (40, 56)
    mem, mem_truth = make_demo_cube(shape=shape, seed=2)
    p1 = write_demo_cube(tmp_path / "a", shape=shape, seed=2, chunks=(16, 24))
    p2 = write_demo_cube(tmp_path / "b", shape=shape, seed=2, chunks=(64, 64), workers=2)
    c1 = xr.open_zarr(p1.cube)["intensity"]
    c2 = xr.open_zarr(p2.cube)["intensity"]
    assert c1.chunks != c2.chunks
    np.testing.assert_array_equal(c1.values, mem.values)
    np.testing.assert_array_equal(c2.values, mem.values)
    t1 = xr.open_zarr(p1.truth).load()
    np.testing.assert_array_equal(t1["spike_mask"].values, mem_truth["spike_mask"].values)
    np.testing.assert_array_equal(t1["peak_energy"].values, mem_truth["peak_energy"].values)
    assert list(t1["peak_name"].values) == list(PEAK_NAMES)
    cube = validate_cube(xr.open_zarr(p1.cube))
    assert cube.attrs["saturation_counts"] == 65535.0
    with pytest.raises(InputFileError, match="already exists"):
        write_demo_cube(tmp_path / "a", shape=shape, seed=2)


def test_written_expected_cube(tmp_path):
    p = write_demo_cube(tmp_path, size="tiny", seed=4, expected=True)
    _, truth = make_demo_cube(shape=DEMO_SIZES["tiny"], seed=4, expected=True)
    t = xr.open_zarr(p.truth)
    np.testing.assert_allclose(t["expected"].values, truth["expected"].values, rtol=1e-6)


def test_bad_arguments():
    with pytest.raises(StepError, match="at least 8"):
        make_demo_cube(shape=(4, 4))
    with pytest.raises(StepError, match="write_demo_cube"):
        make_demo_cube(shape=(4096, 4096))
    with pytest.raises(StepError, match="unknown demo size"):
        write_demo_cube("/nonexistent-never-written", size="huge")
    with pytest.raises(StepError, match="medium"):
        make_demo_cube(shape=(16, 16), wavelength_medium="water")


def test_demo_paths_and_compare_with_truth(tmp_path):
    from pmap.synthetic import compare_with_truth

    paths = write_demo_cube(tmp_path, size="tiny", seed=0)
    assert paths["cube"] == paths.cube == paths[0] and paths["truth"] == paths.truth
    truth = xr.open_zarr(paths.truth).load()
    # a "result" that recovers the band edge exactly and the segregated line 20 meV low
    e = truth["peak_energy"].values
    fit = np.stack([e[1] - 0.020, e[0]])  # ascending in energy, as in pmap results
    result = xr.Dataset({"peak_energy": (("peak", "y", "x"), fit), "region": truth["region"]})
    text = compare_with_truth(result, paths.truth)
    assert "band_edge: |dE| median 0.0 meV" in text
    assert np.isfinite(e[1]).any()  # seed 0 has a segregated domain in the tiny map
    assert "segregated: |dE| median 20.0 meV" in text and "bias -20.0 meV" in text
    assert "regions: 100% of pixels agree" in text
    with pytest.raises(StepError, match="cannot be compared"):
        compare_with_truth(result.isel(x=slice(0, 5)), truth)
