"""A result store other tools read natively (issue 13, item 6, first part): NetCDF export of
every map, CF flag tokens, Conventions and axis attributes (CF-1.10, §2.6.1, §3.5, §4)."""

from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

import pmap
from pmap import cli


def test_result_to_netcdf_keeps_every_map(tmp_path, capsys):
    rng = np.random.default_rng(2)
    lam = np.linspace(700.0, 800.0, 128)
    data = rng.poisson(20 + 800 * np.exp(-0.5 * ((lam - 752) / 6) ** 2), (6, 8, 128))
    cube = pmap.make_cube(data.astype(np.float32), wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "vacuum", "gain_e_per_count": 1.0,
                                 "read_noise_counts": 0.0, "dark_level_counts": 0.0})
    src = tmp_path / "c.zarr"
    pmap.save_cube(cube, src)
    res = tmp_path / "r.zarr"
    assert cli.main(["process", str(src), "-o", str(res), "-q", "--no-figures"]) == 0
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # consolidated metadata: plain open_zarr is silent
        zr = xr.open_zarr(res)
    assert cli.main(["convert", str(res), str(tmp_path / "r.nc")]) == 0
    nc = xr.open_dataset(tmp_path / "r.nc", engine="h5netcdf")
    assert set(zr.data_vars) == set(nc.data_vars)
    np.testing.assert_array_equal(nc.peak_energy.values, zr.peak_energy.values)
    assert nc.attrs["Conventions"] == "CF-1.10" and nc.attrs["pmap_complete"] == 1
    assert nc["x"].attrs["axis"] == "X" and nc["y"].attrs["axis"] == "Y"
    st = nc.fit_status
    assert st.dtype == np.int8 and st.attrs["flag_values"].dtype == np.int8
    tokens = st.attrs["flag_meanings"].split()
    assert len(tokens) == len(st.attrs["flag_values"]) and tokens[0] == "converged"
