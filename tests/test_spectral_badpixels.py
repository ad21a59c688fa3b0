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


def test_hot_channel_vote_on_tiles_spread_over_a_large_map(rng, monkeypatch):
    # A large chunked map votes only in tiles spread over the map (lowered here to 8 of
    # 64 tiles of 50 x 50 pixels, 20000 spectra, 5000 voters on the lattice). Hot
    # channels (common practice: a hot CCD column adds counts in every spectrum, or in
    # part of them when it flickers) with vote shares 1.0, 0.8 and 0.2 are decided as by
    # the whole map (binomial s.e. of a share <= 0.007 at n = 5000), whatever the
    # chunking, and only the chunks holding a tile are read.
    import dask.array as da

    from pmap.spectral import _badpixels
    from pmap.steps import WholeMapPass

    monkeypatch.setattr(_badpixels, "HOT_VOTE_TILE", 50)
    assert _badpixels._vote_tiles(300, 300) is None  # <= 131072 spectra: all vote
    monkeypatch.setattr(_badpixels, "HOT_VOTE_SAMPLE_SPECTRA", 20000)
    tiles = _badpixels._vote_tiles(400, 400)
    assert len(tiles) == 8 and tiles[0] == (0, 50, 0, 50) and tiles[-1] == (350, 400, 350, 400)
    wl = np.linspace(600, 700, 24)
    full = 100 + rng.normal(0, 3, (400, 400, 24))
    full[:, :, 5] += 60.0
    full[:, :, 11] += 60.0 * (rng.random((400, 400)) < 0.8)
    full[:, :, 19] += 60.0 * (rng.random((400, 400)) < 0.2)
    full = full.astype(np.float32)
    read = []

    def make(block_info=None):
        (y0, y1), (x0, x1), _ = block_info[None]["array-location"]
        read.append((y0, x0))
        return full[y0:y1, x0:x1]

    masks = []
    for cy, cx in ((100, 100), (30, 70)):
        data = da.map_blocks(make, chunks=(_split(400, cy), _split(400, cx), (24,)),
                             dtype=np.float32)
        cube = pmap.make_cube(data, wavelength_nm=wl)
        read.clear()
        wm = WholeMapPass()  # the vote alone, as the pipeline's whole-map pass runs it
        mask_bad_pixels(cube, dead=False, saturated=False, whole_map=wm)
        masks.append(wm.records[-1]["values"]["hot_channels"]["true_at"])
        holding = {(y - y % cy, x - x % cx) for t in tiles
                   for y in range(t[0], t[1]) for x in range(t[2], t[3])}
        assert set(read) == holding, (cy, cx)
    monkeypatch.setattr(_badpixels, "HOT_VOTE_SAMPLE_SPECTRA", 10**9)  # the whole map votes
    wm = WholeMapPass()
    mask_bad_pixels(pmap.make_cube(full, wavelength_nm=wl).chunk({"y": 100, "x": 100}),
                    dead=False, saturated=False, whole_map=wm)
    assert masks[0] == masks[1] == wm.records[-1]["values"]["hot_channels"]["true_at"] == [5, 11]


def _split(n, c):
    return (c,) * (n // c) + ((n % c,) if n % c else ())
