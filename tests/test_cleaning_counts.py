"""What a run masked and replaced, counted per pixel (pmap.spectral._changes).

Ground truth: a cube built here with a known saturated run, known spikes and a known
number of NaN-free channels (common practice: count what was planted)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import pmap
from pmap.errors import StepError
from pmap.spectral._changes import channel_changes

LAM = np.linspace(700.0, 800.0, 96)


@pytest.fixture(scope="module")
def steps():
    rng = np.random.default_rng(4)
    mu = 100 + 2000 * np.exp(-0.5 * ((LAM - 750.0) / 6.0) ** 2)
    d = rng.poisson(mu, (8, 9, LAM.size)).astype(np.float32)
    d[1, 1, 40:46] = 65535.0  # a saturated run of 6 channels
    d[2, 3, 10] += 5000.0  # one-channel spike in the wing (~50 sigma)
    d[5, 6, 70:72] += 8000.0  # two-channel spike (~80 sigma)
    cube = pmap.make_cube(d, wavelength_nm=LAM, units="counts",
                          attrs={"gain_e_per_count": 1.0, "read_noise_counts": 1.0,
                                 "dark_level_counts": 0.0, "saturation_counts": 65535.0})
    cube = pmap.attach_noise_model(cube.chunk({"y": 4}))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        masked = pmap.mask_bad_pixels(cube)
        clean = pmap.remove_spikes(masked)
    return cube, masked, clean


def test_masked_channels_count_the_saturated_run(steps):
    cube, masked, _ = steps
    got = channel_changes(cube, masked, "masked")
    assert got.name == "masked_channels" and got.attrs["units"] == "1"
    want = np.zeros((8, 9), int)
    want[1, 1] = 6
    np.testing.assert_array_equal(got.values, want)


def test_replaced_values_count_the_spikes(steps):
    _, masked, clean = steps
    got = channel_changes(masked, clean, "replaced").values
    assert got[2, 3] == 1 and got[5, 6] == 2, got
    assert got.sum() == 3  # nothing else touched (false replacements <= 1e-5 of values)


def test_mismatched_cubes_refused(steps):
    cube, masked, _ = steps
    with pytest.raises(StepError):
        channel_changes(cube, masked.isel(x=slice(0, 3)), "masked")
    with pytest.raises(StepError):
        channel_changes(cube, masked, "smoothed")
