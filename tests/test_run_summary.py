"""A run says what the cleaning did (masked values, replaced spikes) and how the
absolute-PL fit went: counts checked against what was planted in the cube (common
practice: count what you planted)."""

from __future__ import annotations

import numpy as np
import xarray as xr

import pmap
from pmap import cli

LAM = np.linspace(700.0, 800.0, 96)


def _cube_path(tmp_path):
    rng = np.random.default_rng(8)
    mu = 100 + 2000 * np.exp(-0.5 * ((LAM - 750.0) / 6.0) ** 2)
    d = rng.poisson(mu, (8, 10, LAM.size)).astype(np.float32)
    d[1, 1, 40:46] = 65535.0  # 6 saturated values in one pixel
    d[2, 3, 10] += 5000.0  # a one-channel spike in the wing (~50 sigma)
    d[5, 6, 70:72] += 8000.0  # a two-channel spike (~80 sigma)
    cube = pmap.make_cube(d, wavelength_nm=LAM, units="counts",
                          attrs={"wavelength_medium": "air", "gain_e_per_count": 1.0,
                                 "read_noise_counts": 1.0, "dark_level_counts": 0.0,
                                 "saturation_counts": 65535.0})
    p = tmp_path / "c.zarr"
    pmap.save_cube(cube, p)
    return p


def test_process_states_what_was_masked_and_replaced(tmp_path, capsys):
    src = _cube_path(tmp_path)
    out = tmp_path / "r.zarr"
    assert cli.main(["process", str(src), "-o", str(out), "-q", "--no-figures"]) == 0
    err = capsys.readouterr().err
    assert ("cleaning: 6 values masked (bad detector channels, saturated or dead values; "
            "left out of every fit), in 1 pixel (1.2 %; at most 6 in one pixel)") in err
    assert "cleaning: 3 values replaced as cosmic spikes, in 2 pixels (2.5 %" in err
    ds = xr.open_zarr(out)
    want = np.zeros((8, 10), int)
    want[1, 1] = 6
    np.testing.assert_array_equal(ds["masked_channels"].values, want)
    assert ds["spike_values_replaced"].values[2, 3] == 1
    assert ds["spike_values_replaced"].values[5, 6] == 2
    assert ds["masked_channels"].attrs["units"] == "1"


def test_run_summary_of_a_planck_result():
    from pmap.results import run_summary

    st = np.zeros((4, 5), np.int8)
    st[0, :2] = 1
    ds = xr.Dataset({"planck_status": (("y", "x"), st),
                     "planck_chi2_red": (("y", "x"), np.full((4, 5), 1.02))})
    assert run_summary(ds) == ["planck: 20 pixels: converged 18 (90.0 %), median reduced "
                               "chi-square 1.02"]
