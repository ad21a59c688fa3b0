"""The compiled block kernels of mask_bad_pixels, remove_baseline (constant) and the
channel order of to_energy, checked against plain numpy statements of the same rules."""

import warnings

import numpy as np
import pytest

import pmap
from pmap.spectral._badpixels import _hot_votes_rows, _mask_core
from pmap.spectral._baseline import _window_means


def _codes_reference(x, hot, level, top, dead):
    """The masking rules of mask_bad_pixels, one numpy statement each (uint8 codes)."""
    code = np.zeros(x.shape, dtype=np.uint8)
    if dead:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows
            lo, hi = np.nanmin(x, axis=-1), np.nanmax(x, axis=-1)
        code[~(lo < hi)] |= 1  # constant, or no number at all
    if level is not None:
        code[x >= level] |= 2
    elif top is not None:
        a = x >= top
        run = np.zeros_like(a)
        run[..., 1:] |= a[..., :-1]
        run[..., :-1] |= a[..., 1:]
        code[a & run] |= 2
    code[..., hot] |= 4
    return code


def _bad_rows(rng, n):
    """Rows (40, n) with plateaus, lone maxima, dead rows, NaN and infinities
    (planted on at least 10 channels, then cut to n)."""
    width = max(n, 10)
    x = rng.normal(100.0, 10.0, (40, width)).astype(np.float32)
    top = np.float32(500.0)
    x[1, 3:6] = top  # plateau
    x[2, 7] = top  # lone maximum: not a plateau
    x[3, :2] = top  # plateau at the first channels
    x[4, -2:] = top  # ... and at the last
    x[5, -1] = top
    x[6] = 0.0  # constant
    x[7] = np.nan  # no number
    x[8, ::2] = np.nan  # half NaN
    x[9, 1:] = np.nan  # one number: constant
    x[10, 2:] = 7.0
    x[10, :2] = np.nan  # constant after NaN
    x[11] = np.inf
    x[12, 5] = -np.inf
    x[13] = -0.0
    x[13, 4] = 0.0  # -0 and +0: constant
    x[14, rng.random(width) < 0.3] = np.nan
    return np.ascontiguousarray(x[:, :n]), top


@pytest.mark.parametrize("n", [1, 2, 3, 64, 301])
@pytest.mark.parametrize("dead", [True, False])
@pytest.mark.parametrize("sat", ["fixed", "estimated", "none"])
def test_mask_kernel_follows_the_rules(rng, n, dead, sat):
    x, top = _bad_rows(rng, n)
    hot = np.zeros(n, dtype=bool)
    hot[[0, n // 2]] = True
    level = 120.0 if sat == "fixed" else None
    est = float(top) if sat == "estimated" else None
    kw = {"sat_level": level, "auto_sat": sat == "estimated", "dead": dead}
    code = _mask_core(x.reshape(4, 10, n), np.float32(top), hot, **kw).reshape(-1, n)
    ref = _codes_reference(x, hot, level, est, dead)
    np.testing.assert_array_equal(code, ref)
    masked = _mask_core(x, np.float32(top), hot, masked=True, **kw)
    assert masked.dtype == x.dtype
    np.testing.assert_array_equal(masked, np.where(ref > 0, np.nan, x))


@pytest.mark.parametrize("n", [1, 5, 8, 9, 52, 128, 129, 300, 1000, 2049])
@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.int32])
def test_window_means_equal_numpy_nanmean_bit_for_bit(rng, n, dtype):
    """As np.nanmean of the gathered channels of a block of several spectra."""
    shape = (3, 20, n)
    if dtype == np.int32:
        x = rng.integers(-(10**9), 10**9, shape).astype(dtype)
    else:  # values over 40 decades: any change of the summation order shows
        x = rng.choice([-1.0, 1.0], shape) * 10.0 ** rng.uniform(-20, 20, shape)
        x = x.astype(dtype)
        x[rng.random(x.shape) < 0.1] = np.nan
        x[0, :3] = np.nan  # no number: NaN
        x[0, 3:6] = -0.0
    mask = rng.random(n) < 0.75
    mask[0] = True
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = np.nanmean(x[..., mask], axis=-1, dtype=np.float64)
    got = _window_means(x, np.flatnonzero(mask))
    assert got.tobytes() == ref.tobytes()  # NaN and zero signs too


def test_to_energy_blocks_are_in_channel_order(rng):
    wl = np.linspace(600.0, 800.0, 50)
    data = rng.normal(100.0, 5.0, (6, 7, 50)).astype(np.float32)
    cube = pmap.make_cube(data, wavelength_nm=wl).chunk({"y": 3, "x": 4})
    out = pmap.to_energy(cube)
    block = out.data.blocks[1, 1].compute()
    assert block.flags["C_CONTIGUOUS"]
    assert np.all(np.diff(out["energy"].values) > 0)
    np.testing.assert_array_equal(out.values, pmap.to_energy(cube.compute()).values)


def test_hot_votes_at_the_ends_inside_and_next_to_nan(rng):
    n = 40
    x = rng.normal(0.0, 1.0, (5, n))
    x[0, 0] += 100.0  # first channel: above its one neighbour
    x[1, n - 1] += 100.0  # last channel
    x[2, 7] += 100.0  # inside
    x[3, 7] += 100.0
    x[3, 8] = np.nan  # a NaN neighbour: no vote
    x[4, 20] += 100.0
    x[4, 21] += 100.0  # two channels: no vote
    votes = np.zeros(n)
    _hot_votes_rows(x, 10.0, votes)
    expected = np.zeros(n)
    expected[[0, n - 1, 7]] = 1.0
    np.testing.assert_array_equal(votes, expected)
