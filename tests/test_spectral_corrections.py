"""Dark subtraction, spectral response, exposure normalisation on known values."""

import numpy as np
import pytest
import xarray as xr

import pmap
from pmap.errors import StepError
from pmap.spectral import correct_response, normalise_exposure, response_from_lamp, subtract_dark

WL = np.linspace(600.0, 700.0, 21)


def _cube(values, **attrs):
    return pmap.make_cube(
        values,
        wavelength_nm=WL,
        y_um=np.arange(values.shape[0]) * 2.0,
        x_um=np.arange(values.shape[1]) * 2.0,
        attrs=attrs,
    )


def test_dark_constant_spectrum_cube_file(tmp_path, rng):
    data = rng.uniform(100, 200, (3, 4, 21))
    cube = _cube(data)
    np.testing.assert_allclose(subtract_dark(cube, dark=10.0).values, data - 10.0)
    dark_spec = np.linspace(5, 15, 21)
    np.testing.assert_allclose(
        subtract_dark(cube, dark=xr.DataArray(dark_spec, dims=("wavelength",))).values,
        data - dark_spec,
    )
    dark_cube = _cube(rng.uniform(0, 5, (3, 4, 21)))
    np.testing.assert_allclose(subtract_dark(cube, dark=dark_cube).values, data - dark_cube.values)
    # a dark spectrum given as a 2-column text file (as a pipeline TOML would)
    path = tmp_path / "dark.txt"
    np.savetxt(path, np.column_stack([WL, dark_spec]), header="wavelength_nm counts")
    before = path.read_bytes()
    out = subtract_dark(cube, dark=str(path))
    np.testing.assert_allclose(out.values, data - dark_spec)
    assert path.read_bytes() == before
    with pytest.raises(StepError, match="channels"):
        subtract_dark(cube, dark=xr.DataArray(np.ones(5), dims=("wavelength",)))


def test_dark_region(rng):
    data = rng.uniform(100, 200, (5, 6, 21))
    data[:2, :2] = 30.0 + np.arange(21)  # off-sample corner: dark signal only
    cube = _cube(data)
    out = subtract_dark(cube, region={"x": (0, 2), "y": (0, 2)})  # µm → pixels 0, 1
    np.testing.assert_allclose(out.values, data - (30.0 + np.arange(21)), atol=1e-12)
    with pytest.raises(StepError, match="holds no pixels"):
        subtract_dark(cube, region={"x": (100, 200)})


def test_response(tmp_path, rng):
    data = rng.uniform(100, 200, (2, 3, 21))
    cube = _cube(data)
    wl_r = np.linspace(550, 750, 41)
    resp = 0.5 + (wl_r - 550) / 400
    r = xr.DataArray(resp, dims=("wavelength",), coords={"wavelength": wl_r})
    out = correct_response(cube, response=r)
    np.testing.assert_allclose(out.values, data / np.interp(WL, wl_r, resp), rtol=1e-12)
    path = tmp_path / "resp.csv"
    np.savetxt(path, np.column_stack([wl_r, resp]), delimiter=",")
    np.testing.assert_allclose(correct_response(cube, response=path).values, out.values)
    short = r.sel(wavelength=slice(620, 750))
    with pytest.raises(StepError, match="must cover"):
        correct_response(cube, response=short)
    neg = r.copy(data=resp - 0.7)
    with pytest.raises(StepError, match="not positive"):
        correct_response(cube, response=neg)


def test_response_from_lamp_round_trip():
    # known instrument response × certified lamp = measured; the derived response undoes it
    cert_wl = np.linspace(550, 750, 201)
    certified = xr.DataArray(
        1e-3 * (cert_wl / 600) ** 4, dims=("wavelength",), coords={"wavelength": cert_wl}
    )
    true_resp = np.exp(-0.5 * ((WL - 640) / 40) ** 2)
    measured = xr.DataArray(
        true_resp * 1e-3 * (WL / 600) ** 4 * 5e6, dims=("wavelength",), coords={"wavelength": WL}
    )
    resp = response_from_lamp(measured, certified)
    np.testing.assert_allclose(resp.values, true_resp / true_resp.max(), rtol=1e-3)
    sample = _cube(np.broadcast_to(2.0 * true_resp, (2, 2, 21)).copy())
    np.testing.assert_allclose(
        correct_response(sample, response=resp).values, 2.0 * true_resp.max(), rtol=1e-3
    )


def test_normalise_exposure():
    data = np.full((2, 2, 21), 600.0)
    cube = _cube(data, exposure_s=2.0, excitation_power_W=1e-3)
    a = normalise_exposure(cube)
    assert a.attrs["units"] == "counts/s"
    np.testing.assert_allclose(a.values, 300.0)
    b = normalise_exposure(cube, per_power=True)
    assert b.attrs["units"] == "counts/s/W"
    np.testing.assert_allclose(b.values, 3e5)
    c = normalise_exposure(_cube(data), exposure_s=0.5)
    np.testing.assert_allclose(c.values, 1200.0)
    with pytest.raises(StepError, match="exposure time unknown"):
        normalise_exposure(_cube(data))
    with pytest.raises(StepError, match="excitation power unknown"):
        normalise_exposure(_cube(data, exposure_s=1.0), per_power=True)


def test_normalise_exposure_power_stack():
    data = np.ones((3, 2, 2, 21)) * np.array([1.0, 2.0, 4.0])[:, None, None, None]
    arr = xr.DataArray(
        data,
        dims=("excitation_power", "y", "x", "wavelength"),
        coords={
            "excitation_power": ("excitation_power", [1.0, 2.0, 4.0], {"units": "mW"}),
            "wavelength": WL,
            "y": ("y", [0.0, 1.0], {"units": "um"}),
            "x": ("x", [0.0, 1.0], {"units": "um"}),
        },
        attrs={"units": "counts", "exposure_s": 1.0},
    )
    cube = pmap.validate_cube(arr)
    out = normalise_exposure(cube, per_power=True)
    np.testing.assert_allclose(out.values, 1000.0)  # counts/s/W, same for every power
