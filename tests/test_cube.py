"""The canonical cube model: validation turns claims into cubes or names the problem."""

import warnings

import dask.array as da
import numpy as np
import pytest
import xarray as xr

from pmap.cube import choose_spatial_chunks, make_cube, validate_cube
from pmap.errors import CubeValidationError, PmapNotice


def raw(shape=(3, 4, 8), spec=None, sdim="wavelength", **coords):
    data = np.arange(np.prod(shape), dtype=np.float32).reshape(shape)
    spec = np.linspace(600, 700, shape[-1]) if spec is None else spec
    c = {sdim: (sdim, spec, {"units": "nm" if sdim == "wavelength" else "eV"})}
    c.update(coords)
    dims = ("y", "x", sdim)[3 - len(shape):]
    return xr.DataArray(data, dims=dims, coords=c, attrs={"units": "counts"})


def coords_um(ny=3, nx=4, step=0.5):
    return {"y": ("y", np.arange(ny) * step, {"units": "um"}),
            "x": ("x", np.arange(nx) * step, {"units": "um"})}


def test_canonical_form():
    cube = validate_cube(raw(**coords_um()))
    assert cube.name == "intensity"
    assert cube.dims == ("y", "x", "wavelength")
    assert isinstance(cube.data, da.Array)
    assert cube.chunks[2] == (8,)  # spectral axis whole
    assert cube.x.attrs["units"] == "um" and cube.wavelength.attrs["units"] == "nm"
    assert cube.attrs["wavelength_medium"] == "air"  # air unless stated
    np.testing.assert_array_equal(cube.values, raw().values)


def test_descending_axis_is_flipped_with_data():
    r = raw(spec=np.linspace(700, 600, 8), **coords_um())
    cube = validate_cube(r)
    assert np.all(np.diff(cube.wavelength.values) > 0)
    np.testing.assert_array_equal(cube.values[..., 0], r.values[..., -1])


def test_transposed_dims_are_reordered():
    cube = validate_cube(raw(**coords_um()).transpose("wavelength", "x", "y"))
    assert cube.dims == ("y", "x", "wavelength")


def test_units_conversion_of_coords():
    c = {"y": ("y", [0, 500, 1000], {"units": "nm"}), "x": ("x", np.arange(4.0), {"units": "mm"})}
    r = raw(spec=np.linspace(0.6, 0.7, 8), **c)
    r.wavelength.attrs["units"] = "um"
    cube = validate_cube(r)
    np.testing.assert_allclose(cube.y.values, [0, 0.5, 1.0])
    np.testing.assert_allclose(cube.x.values, [0, 1000, 2000, 3000])
    np.testing.assert_allclose(cube.wavelength.values, np.linspace(600, 700, 8))


def test_missing_xy_coords_default_to_pixels_with_notice():
    with pytest.warns(PmapNotice, match="pixel"):
        cube = validate_cube(raw())
    assert cube.x.attrs["units"] == "pixel"
    np.testing.assert_array_equal(cube.x.values, np.arange(4))


def test_single_spectrum_and_line_scan():
    spec = xr.DataArray(np.ones(8), dims="wavelength",
                        coords={"wavelength": ("wavelength", np.linspace(600, 700, 8))})
    cube = validate_cube(spec)
    assert cube.shape == (1, 1, 8)
    line = raw(shape=(5, 8), x=("x", np.arange(5.0), {"units": "um"}))
    cube = validate_cube(line)
    assert cube.shape == (1, 5, 8) and cube.dims == ("y", "x", "wavelength")


def test_stack_of_maps():
    data = np.ones((2, 3, 4, 8))
    st = xr.DataArray(data, dims=("temperature", "y", "x", "wavelength"),
                      coords={"temperature": [77.0, 300.0],
                              "wavelength": np.linspace(600, 700, 8), **coords_um()})
    cube = validate_cube(st)
    assert cube.dims == ("temperature", "y", "x", "wavelength")
    assert cube.chunks[0] == (1, 1)


def test_energy_cube():
    cube = validate_cube(raw(spec=np.linspace(1.5, 2.0, 8), sdim="energy", **coords_um()))
    assert cube.dims[-1] == "energy" and cube.energy.attrs["units"] == "eV"
    assert "wavelength_medium" not in cube.attrs


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: xr.DataArray(np.ones((2, 2, 3)), dims=("a", "b", "c")), "no spectral dimension"),
        (lambda: raw(**coords_um()).rename(x="col"), "unexpected dimension"),
        (lambda: raw(spec=np.array([600, 610, 605, 620, 630, 640, 650, 660.0]), **coords_um()),
         "not monotonic"),
        (lambda: raw(spec=np.array([600, 610, 610, 620, 630, 640, 650, 660.0]), **coords_um()),
         "duplicate"),
        (lambda: raw(spec=np.array([600, 610, np.nan, 620, 630, 640, 650, 660.0]), **coords_um()),
         "NaN or infinite"),
        (lambda: raw(**{**coords_um(), "x": ("x", [0, 1, np.inf, 3], {"units": "um"})}),
         "NaN or infinite"),
        (lambda: raw(spec=np.linspace(-10, 60, 8), **coords_um()), "non-positive wavelengths"),
        (lambda: raw(shape=(3, 0, 8), **{**coords_um(), "x": ("x", [], {"units": "um"})}), "empty"),
        (lambda: raw(**coords_um()).astype(str), "real numbers"),
        (lambda: raw(**coords_um()).assign_attrs(units="bananas"), "not understood"),
        (lambda: raw(**{**coords_um(), "x": ("x", np.arange(4.0), {"units": "parsec"})}),
         "not understood"),
        (lambda: raw(**coords_um()).drop_vars("wavelength"), "no coordinate"),
        (lambda: raw(**coords_um()).assign_attrs(wavelength_medium="water"), "wavelength_medium"),
        (lambda: np.ones((2, 2, 3)), "make_cube"),
        (lambda: xr.Dataset({"a": raw(**coords_um()), "b": raw(**coords_um())}), "no 'intensity'"),
        (lambda: raw(**{**coords_um(), "x": ("x", [0, 1, 1, 3.0], {"units": "um"})}),
         "not strictly monotonic"),
    ],
)
def test_validation_errors_name_the_problem(make, match):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PmapNotice)
        with pytest.raises(CubeValidationError, match=match):
            validate_cube(make())


def test_validation_is_lazy(no_compute):
    arr = da.ones((50, 60, 100), chunks=(10, 10, 100))
    r = xr.DataArray(arr, dims=("y", "x", "wavelength"),
                     coords={"wavelength": np.linspace(500, 600, 100), **coords_um(50, 60)})
    cube = validate_cube(r)
    assert no_compute.count == 0 and isinstance(cube.data, da.Array)


def test_chunks_follow_memory_target():
    cy, cx = choose_spatial_chunks((1000, 1000), 512, 4, target_mib=64)
    assert cy * cx * 512 * 4 <= 64 * 2**20
    assert cy * cx * 512 * 4 > 16 * 2**20
    cube = make_cube(np.zeros((40, 50, 64), np.float32), wavelength_nm=np.arange(64) + 500.0,
                     chunks={"y": 16, "x": 25})
    assert cube.chunks[0] == (16, 16, 8) and cube.chunks[1] == (25, 25)


def test_make_cube_checks_axis_length():
    with pytest.raises(CubeValidationError, match="spectral values"):
        make_cube(np.zeros((2, 2, 5)), wavelength_nm=np.arange(4) + 500.0)
    with pytest.raises(CubeValidationError, match="exactly one"):
        make_cube(np.zeros((2, 2, 5)))
