"""Dead, saturated, hot and bad-channel masking."""

import numpy as np
import pytest

import pmap
from pmap.errors import StepError
from pmap.spectral import hot_channels, mask_bad_pixels


def _cube(rng, **attrs):
    wl = np.linspace(600, 700, 100)
    data = 100 + 400 * np.exp(-0.5 * ((wl - 650) / 10) ** 2) + rng.normal(0, 3, (8, 9, 100))
    return data, wl


def test_dead_saturated_hot(rng):
    data, wl = _cube(rng)
    data[5, 5, 48:52] = 1000.0  # saturated plateau
    data[:, :, 20] += 80.0  # hot detector channel in every spectrum
    data[2, 3] = 0.0  # dead pixel: no signal at all
    cube = pmap.make_cube(data, wavelength_nm=wl, attrs={"saturation_counts": 1000.0})
    out, code = mask_bad_pixels(cube, bad_channels=[99], return_mask=True)
    v, c = out.values, code.values
    assert np.all(np.isnan(v[2, 3])) and np.all(c[2, 3] & 1)
    assert np.all(np.isnan(v[5, 5, 48:52])) and np.all(c[5, 5, 48:52] & 2)
    assert np.all(np.isnan(v[:, :, 20])) and np.all(np.isnan(v[:, :, 99]))
    bad = c > 0
    assert bad.sum() == 100 + 4 + 2 * (8 * 9) - 2  # dead + plateau + two channels, no overlap
    np.testing.assert_array_equal(v[~bad], data[~bad])


def test_saturation_estimated_from_plateau(rng):
    data, wl = _cube(rng)
    data[1, 1, 40:45] = 700.0
    cube = pmap.make_cube(data, wavelength_nm=wl)
    out = mask_bad_pixels(cube, hot=False, dead=False).values
    assert np.isnan(out).sum() == 5
    # without a plateau the maximum is not taken for saturation
    data2, _ = _cube(rng)
    out2 = mask_bad_pixels(pmap.make_cube(data2, wavelength_nm=wl), hot=False).values
    assert not np.isnan(out2).any()


def test_hot_channels_function():
    s = np.linspace(10, 20, 50) + np.random.default_rng(0).normal(0, 0.1, 50)
    s[30] += 5
    assert np.flatnonzero(hot_channels(s)).tolist() == [30]


def test_bad_channel_errors(rng):
    data, wl = _cube(rng)
    with pytest.raises(StepError, match="bad_channels"):
        mask_bad_pixels(pmap.make_cube(data, wavelength_nm=wl), bad_channels=[100])


def test_hot_channel_vote_on_a_large_map_is_chunking_independent(rng):
    # 128 x 128 = 16384 spectra: the vote runs on the fixed lattice of one spectrum in
    # four; a detector defect adding counts to one channel of every spectrum (common
    # practice: a hot CCD column) must still win, a real line and spikes must not, and the
    # decision must not depend on the chunking.
    wl = np.linspace(600, 700, 64)
    line = 300 * np.exp(-0.5 * ((wl - 650) / 6) ** 2)
    data = (100 + line + rng.normal(0, 3, (128, 128, 64))).astype(np.float32)
    data[:, :, 17] += 60.0  # hot channel
    data[::3, ::5, 40] += 500.0  # spikes in one spectrum in 15: not a majority
    cube = pmap.make_cube(data, wavelength_nm=wl)
    masks = []
    for chunks in ({"y": 128, "x": 128}, {"y": 33, "x": 17}, {"y": 7, "x": 128}):
        _, code = mask_bad_pixels(cube.chunk(chunks), return_mask=True)
        masks.append(np.all(code.values & 4, axis=(0, 1)))
    assert np.flatnonzero(masks[0]).tolist() == [17]
    for m in masks[1:]:
        np.testing.assert_array_equal(m, masks[0])
