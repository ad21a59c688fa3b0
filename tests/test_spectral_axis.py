"""Wavelength → energy / wavenumber / Raman shift with the Jacobian."""

import numpy as np
import pytest

import pmap
from pmap.conventions import HC_EV_NM
from pmap.errors import StepError
from pmap.spectral import (
    air_to_vacuum,
    channel_edges,
    to_energy,
    to_raman_shift,
    to_vacuum,
    to_wavenumber,
)


def _gauss_cube(centre, fwhm, lo, hi, n, units="counts/nm"):
    wl = np.linspace(lo, hi, n)
    sig = fwhm / (2 * np.sqrt(2 * np.log(2)))
    y = np.exp(-0.5 * ((wl - centre) / sig) ** 2)
    return pmap.make_cube(
        y[None, :], wavelength_nm=wl, units=units, attrs={"wavelength_medium": "vacuum"}
    )


@pytest.mark.parametrize(
    ("centre", "fwhm", "shift_meV"),
    # Mooney & Kambhampati, J. Phys. Chem. Lett. 4, 3316 (2013), values as in REFERENCES.md
    [(800.0, 50.0, -2.18), (800.0, 100.0, -8.64), (500.0, 30.0, -3.21)],
)
def test_jacobian_moves_peak(centre, fwhm, shift_meV):
    cube = _gauss_cube(centre, fwhm, centre - 4 * fwhm, centre + 4 * fwhm, 40001)
    e = to_energy(cube)
    y = e.values[0, 0]
    x = e.energy.values
    i = int(np.argmax(y))
    # vertex of the parabola through the three top points (sub-channel peak)
    a, b, c = y[i - 1 : i + 2]
    h = x[i + 1] - x[i]
    peak = x[i] + 0.5 * h * (a - c) / (a - 2 * b + c)
    shift = (peak - HC_EV_NM / centre) * 1e3
    assert shift == pytest.approx(shift_meV, abs=0.01)
    if (centre, fwhm) == (800.0, 50.0):
        assert peak == pytest.approx(1.547625, abs=2e-5)  # same source


@pytest.mark.parametrize("medium", ["vacuum", "air"])
def test_area_conserved_density(medium):
    # ∫ I dλ = ∫ I dE (Mooney & Kambhampati 2013), dense grid, 1e-6 relative
    cube = _gauss_cube(700.0, 40.0, 500.0, 900.0, 20001)
    cube.attrs["wavelength_medium"] = medium
    e = to_energy(cube)
    lam = cube.wavelength.values
    if medium == "air":
        lam = air_to_vacuum(lam)  # the energy axis uses vacuum wavelengths
    area_l = np.trapezoid(cube.values[0, 0], cube.wavelength.values)
    area_e = np.trapezoid(e.values[0, 0], e.energy.values)
    assert area_e == pytest.approx(area_l, rel=1e-6)
    assert e.attrs["units"] == "counts/eV"
    np.testing.assert_allclose(e.energy.values, np.sort(HC_EV_NM / lam), rtol=1e-13)


def test_counts_per_channel_total_conserved(rng):
    # counts per channel on a non-uniform axis: Σ I_E ΔE equals the total counts
    wl = np.sort(rng.uniform(600, 900, 3000))
    counts = rng.poisson(1000, size=(2, 3, wl.size)).astype(float)
    cube = pmap.make_cube(counts, wavelength_nm=wl, attrs={"wavelength_medium": "vacuum"})
    e = to_energy(cube)
    edges = np.sort(HC_EV_NM / channel_edges(wl))
    total = (e.values * np.diff(edges)).sum(axis=-1)
    np.testing.assert_allclose(total, counts.sum(axis=-1), rtol=1e-6)
    assert e.attrs["units"] == "counts/eV"


def test_uniform_resampling_conserves_exactly(rng):
    wl = np.linspace(600, 900, 500)
    counts = rng.uniform(0, 100, size=(3, 4, wl.size))
    cube = pmap.make_cube(counts, wavelength_nm=wl, attrs={"exposure_s": 1.0}, units="counts/s")
    e = to_energy(cube, resample="uniform", n_channels=300)
    de = np.diff(e.energy.values)
    np.testing.assert_allclose(de, de[0], rtol=1e-9)
    assert e.sizes["energy"] == 300
    ref = to_energy(cube)
    lam_vac = air_to_vacuum(channel_edges(wl))
    ref_total = (ref.values * np.diff(np.sort(HC_EV_NM / lam_vac))).sum(-1)
    np.testing.assert_allclose((e.values * de[0]).sum(-1), ref_total, rtol=1e-10)
    assert e.attrs["units"] == "counts/s/eV"


def test_wavenumber_and_raman_shift():
    wl = np.linspace(540.0, 640.0, 101)
    cube = pmap.make_cube(
        np.ones((1, 2, 101)), wavelength_nm=wl, attrs={"excitation_wavelength_nm": 532.0}
    )
    k = to_wavenumber(cube, jacobian=False)
    # ν̃ = 1e7/λ_vac (common practice)
    np.testing.assert_allclose(k.wavenumber.values, np.sort(1e7 / air_to_vacuum(wl)), rtol=1e-13)
    r = to_raman_shift(cube)
    exp = 1e7 / air_to_vacuum(532.0) - 1e7 / air_to_vacuum(wl)
    np.testing.assert_allclose(r.raman_shift.values, exp, rtol=1e-12)
    assert r.attrs["units"] == "counts/cm-1"


def test_raman_shift_needs_excitation():
    cube = pmap.make_cube(np.ones((1, 1, 5)), wavelength_nm=np.arange(5) + 600.0)
    with pytest.raises(StepError, match="excitation wavelength"):
        to_raman_shift(cube)


def test_vacuum_axis_unchanged_energy():
    wl = np.linspace(600.0, 700.0, 11)
    cube = pmap.make_cube(np.ones((1, 1, 11)), wavelength_nm=wl)
    e1 = to_energy(to_vacuum(cube))
    e2 = to_energy(cube)
    np.testing.assert_allclose(e1.energy.values, e2.energy.values, rtol=1e-14)
    np.testing.assert_allclose(e1.values, e2.values, rtol=1e-5)


def test_bad_units_refused():
    cube = pmap.make_cube(np.ones((1, 1, 5)), wavelength_nm=np.arange(5) + 600.0, units="counts/eV")
    with pytest.raises(StepError, match="cannot convert intensity unit"):
        to_energy(cube)


def test_photon_flux_per_nm_file_converts_with_the_jacobian(tmp_path):
    """An absolute photon flux per nm read from a file becomes a flux per eV multiplied by
    |dλ/dE| = λ²/(hc) (Mooney & Kambhampati, J. Phys. Chem. Lett. 4, 3316, 2013)."""
    import pmap
    from pmap.conventions import HC_EV_NM

    lam = np.linspace(700.0, 800.0, 21)
    cube = pmap.make_cube(np.full((2, 3, 21), 1e18, np.float32), wavelength_nm=lam,
                          units="photons s-1 m-2 nm-1", attrs={"wavelength_medium": "vacuum"})
    pmap.save_cube(cube, tmp_path / "flux.zarr")
    back = pmap.open_cube(tmp_path / "flux.zarr")
    assert back.attrs["units"] == "photons/s/m2/nm"
    e = pmap.to_energy(back)
    assert e.attrs["units"] == "photons/s/m2/eV"
    lam_e = HC_EV_NM / e["energy"].values
    np.testing.assert_allclose(e.values[0, 0], 1e18 * lam_e**2 / HC_EV_NM, rtol=1e-5)
