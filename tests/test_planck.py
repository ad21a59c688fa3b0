"""Absolute PL: generalized Planck law (Würfel, J. Phys. C 15, 3967 (1982))."""

import numpy as np
import pytest
import xarray as xr

from pmap.errors import StepError
from pmap.planck import fit_planck, planck_flux


def test_worked_value():
    # REFERENCES.md worked value: E = 1.5 eV, Δμ = 1.0 eV, T = 300 K, a = 1
    assert planck_flux(1.5, 1.0, 300.0) == pytest.approx(8.860409e18, rel=1e-6)


def test_tail_slope_is_minus_one_over_kt():
    # ln(Φ/E²) slope on the tail −1/kT = −38.68 eV⁻¹ at 300 K (REFERENCES.md)
    e = np.array([1.60, 1.61])
    slope = np.diff(np.log(planck_flux(e, 1.0, 300.0) / e**2))[0] / 0.01
    assert slope == pytest.approx(-38.68, abs=0.01)


def _cube(mu, temp, rng, shape=(40, 50), rel=0.01, relative_noise=False):
    e = np.linspace(1.55, 1.75, 60)
    ny, nx = shape
    clean = planck_flux(e[None, None, :], mu, temp) * np.ones((ny, nx, 1))
    peak = clean.max()
    sigma = rel * np.sqrt(clean * peak)  # shot-noise-like: variance ∝ flux
    if relative_noise:
        sigma = rel * clean
    noisy = clean + rng.normal(size=clean.shape) * sigma
    dims = ("y", "x", "energy")
    coords = {"energy": ("energy", e, {"units": "eV"})}
    attrs = {"units": "photons s-1 m-2 eV-1"}
    cube = xr.DataArray(noisy, dims=dims, coords=coords, attrs=attrs, name="intensity")
    return cube.chunk({"y": 20, "x": 25}), xr.DataArray(sigma, dims=dims, coords=coords)


def test_qfls_and_temperature_recovered_with_honest_pulls(rng):
    mu, temp = 1.10, 320.0
    cube, sigma = _cube(mu, temp, rng)
    out = fit_planck(cube, sigma=sigma, energy_range_ev=(1.55, 1.75)).compute()
    assert (out["planck_status"] == 0).all()
    assert out["qfls"].attrs["units"] == "eV" and out["implied_voc"].attrs["units"] == "V"
    assert out["carrier_temperature"].attrs["units"] == "K"
    n = 2000
    se_sd = 1 / np.sqrt(2 * n)  # s.e. of a sample s.d., n = 2000 (common practice)
    for name, true in (("qfls", mu), ("carrier_temperature", temp)):
        pull = ((out[name] - true) / out[f"{name}_err"]).values.ravel()
        assert pull.size == n
        assert abs(pull.std() - 1) < 3 * se_sd, (name, pull.std())
        assert abs(pull.mean()) < 3 / np.sqrt(n), (name, pull.mean())
    np.testing.assert_allclose(out["implied_voc"], out["qfls"])


def test_unweighted_and_refusals(rng):
    # without σ: equal relative errors assumed (true here: 1 % of the flux everywhere)
    cube, _ = _cube(1.0, 300.0, rng, shape=(4, 4), relative_noise=True)
    out = fit_planck(cube).compute()  # default window
    assert "relative" in out.attrs["uncertainty_method"]
    assert np.all(np.abs(out["qfls"] - 1.0) < 4 * out["qfls_err"])  # n = 16: 4σ
    assert np.all(np.abs(out["carrier_temperature"] - 300) < 4 * out["carrier_temperature_err"])
    with pytest.raises(StepError, match="photons"):
        fit_planck(cube.assign_attrs(units="counts"))
    with pytest.raises(StepError, match="energy axis"):
        fit_planck(cube.rename(energy="wavelength"))
    with pytest.raises(StepError, match="at least 4"):
        fit_planck(cube, energy_range_ev=(1.70, 1.71))


def test_planck_stage_in_process(tmp_path, rng):
    """``[planck]`` / ``pmap process --planck``: the maps land in the result store."""
    from pmap.cli import main
    from pmap.io import save_cube
    from pmap.pipeline import load_pipeline, process
    from pmap.results import open_result

    cube, _ = _cube(1.05, 300.0, rng, shape=(6, 8), relative_noise=True)
    cube = cube.assign_coords(y=("y", np.arange(6.0), {"units": "um"}),
                              x=("x", np.arange(8.0), {"units": "um"}))
    toml = '[descriptors]\n[planck]\nenergy_range_ev = [1.58, 1.75]\n[output]\nfigures = false\n'
    res = process(cube, tmp_path / "r.zarr", pipeline=load_pipeline(toml), progress=False)
    assert {"qfls", "qfls_err", "carrier_temperature", "implied_voc"} <= set(res.data_vars)
    res = open_result(tmp_path / "r.zarr")
    assert np.all(np.abs(res["qfls"] - 1.05) < 4 * res["qfls_err"])  # n = 48: 4σ
    with pytest.raises(StepError, match="did you mean|energy_range"):
        load_pipeline("[planck]\nenergy_range = [1, 2]\n")
    src = tmp_path / "c.zarr"
    save_cube(cube, src)
    assert main(["process", str(src), "-o", str(tmp_path / "p.zarr"), "--planck", "-q",
                 "--no-figures"]) == 0
    assert "implied_voc" in open_result(tmp_path / "p.zarr")
    save_cube(cube.assign_attrs(units="counts"), tmp_path / "k.zarr")
    assert main(["process", str(tmp_path / "k.zarr"), "-o", str(tmp_path / "q.zarr"),
                 "--planck", "-q", "--no-figures"]) == 2
