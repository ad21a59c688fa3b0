"""A result store other tools read natively (issue 13, item 6, first part): NetCDF export of
every map, CF flag tokens, Conventions and axis attributes (CF-1.10, §2.6.1, §3.5, §4)."""

from __future__ import annotations

import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
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
    # no axis X/Y: CF §4 and its reference checker read them as the Earth's horizontal axes
    assert "axis" not in nc["x"].attrs and "axis" not in nc["y"].attrs
    st = nc.fit_status
    assert st.dtype == np.int8 and st.attrs["flag_values"].dtype == np.int8
    tokens = st.attrs["flag_meanings"].split()
    assert len(tokens) == len(st.attrs["flag_values"]) and tokens[0] == "converged"


def _checked_store(tmp_path, *, pixel_axes: bool):
    """A processed result (regions, components, noise model) exported to NetCDF."""
    rng = np.random.default_rng(5)
    lam = np.linspace(650.0, 850.0, 96)
    centre = np.where(np.arange(8)[None, :] < 4, 720.0, 780.0) + np.zeros((6, 1))
    clean = 30 + 900 * np.exp(-0.5 * ((lam - centre[..., None]) / 9) ** 2)
    data = rng.poisson(clean).astype(np.float32)
    kw = {} if pixel_axes else {"y_um": 0.5 * np.arange(6), "x_um": 0.5 * np.arange(8)}
    cube = pmap.make_cube(data, wavelength_nm=lam, units="counts",
                          attrs={"wavelength_medium": "vacuum"}, **kw)
    src = tmp_path / "c.zarr"
    pmap.save_cube(cube, src)
    res = tmp_path / "r.zarr"
    assert cli.main(["process", str(src), "-o", str(res), "-q", "--no-figures",
                     "--regions", "2"]) == 0
    out = tmp_path / "r.nc"
    assert cli.main(["convert", str(res), str(out)]) == 0
    return out


@pytest.mark.parametrize("pixel_axes", [False, True], ids=["um", "pixel"])
def test_netcdf_units_are_udunits(tmp_path, pixel_axes):
    """Every ``units`` attribute of the exported file parses as UDUNITS-2 (CF-1.10 §3.1
    requires UDUNITS strings; cf-units, the Met Office binding of UDUNITS-2, is the
    reference parser)."""
    cf_units = pytest.importorskip("cf_units", reason="cf-units comes with the test extra "
                                   "(compliance-checker)")
    nc = xr.open_dataset(_checked_store(tmp_path, pixel_axes=pixel_axes), engine="h5netcdf",
                         decode_cf=False)
    units = {n: v.attrs["units"] for n, v in nc.variables.items() if "units" in v.attrs}
    assert {"peak_energy", "y", "x"} <= set(units)
    for u in units.values():
        cf_units.Unit(u)  # raises ValueError on a string UDUNITS-2 cannot parse
    assert units["y"] == ("1" if pixel_axes else "um")


def test_netcdf_passes_cf_compliance_checker(tmp_path):
    """The exported result has no high-priority failure in the IOOS compliance checker's
    CF-1.10 suite (``compliance-checker --test cf:1.10``, the community's reference
    implementation of the CF conventions' requirements)."""
    exe = Path(sys.executable).with_name("compliance-checker")
    if not exe.exists():
        pytest.fail("compliance-checker is missing: it is part of the test extra "
                    "(pip install -e '.[test]')")
    path = _checked_store(tmp_path, pixel_axes=False)
    report = tmp_path / "cc.json"
    subprocess.run([str(exe), "--test", "cf:1.10", "-f", "json", "-o", str(report),
                    str(path)], capture_output=True, text=True, timeout=600)
    result = next(iter(json.loads(report.read_text()).values()))
    failed = [(c["name"], c["msgs"][:2]) for c in result["high_priorities"]
              if c["value"][0] < c["value"][1]]
    assert failed == []
    assert result["high_count"] == 0
