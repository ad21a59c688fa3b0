"""Cosmic-spike removal on synthetic maps with known spikes."""

import numpy as np
import pytest

import pmap
from pmap.spectral import remove_spikes, spike_candidates


def _map_with_spikes(rng, ny=40, nx=48, n=256, n_spikes=300, dtype="float32"):
    wl = np.linspace(700.0, 900.0, n)
    yy, xx = np.mgrid[0:ny, 0:nx]
    centre = 780 + 20 * np.sin(xx / 9.0)[..., None] + 0.3 * yy[..., None]
    amp = 400 + 300 * np.cos(yy / 7.0)[..., None]
    clean = 50 + amp * np.exp(-0.5 * ((wl - centre) / 15.0) ** 2)
    noisy = rng.poisson(clean).astype(float)
    truth = np.zeros(noisy.shape, dtype=bool)
    iy = rng.integers(0, ny, n_spikes)
    ix = rng.integers(0, nx, n_spikes)
    ic = rng.integers(0, n - 2, n_spikes)
    width = rng.integers(1, 3, n_spikes)  # 1- or 2-channel spikes
    for a, b, c, w in zip(iy, ix, ic, width):
        sigma = np.sqrt(clean[a, b, c])
        noisy[a, b, c : c + w] += rng.uniform(15, 150) * sigma
        truth[a, b, c : c + w] = True
    return pmap.make_cube(noisy.astype(dtype), wavelength_nm=wl, chunks={"y": 16, "x": 20}), truth


def test_recall_and_false_positives(rng):
    # Whitaker & Hayes, Chemometr. Intell. Lab. Syst. 179, 82 (2018), with the spatial test
    cube, truth = _map_with_spikes(rng)
    cleaned, mask = remove_spikes(cube, threshold=6.0, return_mask=True)
    m = mask.values
    recall = (m & truth).sum() / truth.sum()
    fpr = (m & ~truth).sum() / (~truth).sum()
    assert recall >= 0.95
    assert fpr <= 1e-4
    before = cube.values
    after = cleaned.values
    # untouched data stay bit-identical
    np.testing.assert_array_equal(after[~m].view(np.uint32), before[~m].view(np.uint32))
    assert after.dtype == np.float32
    # replaced values are close to the clean level (within a few noise s.d.)
    assert np.all(after[m] < before[m])


def test_single_spectrum_fallback():
    rng = np.random.default_rng(2)
    wl = np.linspace(500, 600, 300)
    y = 100 + 500 * np.exp(-0.5 * ((wl - 550) / 8) ** 2) + rng.normal(0, 3, wl.size)
    y[[50, 200, 201]] += [400.0, 300.0, 250.0]
    cube = pmap.make_cube(y, wavelength_nm=wl)
    cleaned, mask = remove_spikes(cube, return_mask=True)
    flagged = np.flatnonzero(mask.values[0, 0])
    np.testing.assert_array_equal(flagged, [50, 200, 201])
    # linear interpolation from the neighbours (common practice)
    assert cleaned.values[0, 0, 50] == pytest.approx(0.5 * (y[49] + y[51]))


def test_no_spikes_in_smooth_map_with_sharp_peak():
    # a real narrow line present in every pixel must not be removed (spatial test)
    rng = np.random.default_rng(4)
    wl = np.linspace(600, 700, 200)
    line = 2000 * np.exp(-0.5 * ((wl - 650) / 0.2) ** 2)
    data = rng.normal(100, 3, (12, 12, 200)) + line
    cube = pmap.make_cube(data, wavelength_nm=wl)
    _, mask = remove_spikes(cube, return_mask=True)
    assert int(mask.sum()) == 0


def test_candidates_mad_zero():
    # quantised flat data: MAD of the difference is 0, the scaled mean |dev| takes over
    x = np.zeros((1, 50))
    x[0, 20] = 10.0
    cand, _ = spike_candidates(x, 6.0)
    assert cand[0, 20]
    flat = np.ones((1, 50))
    cand, sigma = spike_candidates(flat, 6.0)
    assert not cand.any() and sigma[0, 0] == 0


def test_stack_dims_and_chunk_borders():
    # a spike on a chunk border is judged with its neighbours from the next chunk
    rng = np.random.default_rng(8)
    wl = np.linspace(600, 700, 64)
    data = rng.normal(100, 2, (2, 8, 8, 64))
    data[1, 3, 4, 30] += 200.0  # y=3 is the last row of the first chunk
    arr = pmap.make_cube(data[0], wavelength_nm=wl)
    import xarray as xr

    cube = xr.concat([arr, arr.copy(data=data[1])], dim="temperature").chunk(
        {"temperature": 1, "y": 4, "x": 4}
    )
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    assert m.sum() == 1 and m[1, 3, 4, 30]
    assert abs(cleaned.values[1, 3, 4, 30] - 100) < 10


@pytest.mark.parametrize("chunks", [(1, 10, 7, 5), (2, 37, 29, 5), (1, 1, 3, 5)])
def test_halo_equals_dask_map_overlap(rng, chunks):
    # The copied-edge halo must hand each block exactly what dask's own map_overlap
    # (reference implementation, dask.array) gives with depth 1 and a NaN boundary.
    import dask.array as da

    from pmap.spectral._halo import map_with_halo

    x = rng.normal(size=(2, 37, 29, 5)).astype(np.float32)
    d = da.from_array(x, chunks=chunks)

    def neighbourhood(b):  # every one of the 9 positions with its own weight
        out = np.zeros(b.shape[:-3] + (b.shape[-3] - 2, b.shape[-2] - 2, b.shape[-1]))
        for k, (dy, dx) in enumerate((a, c) for a in range(3) for c in range(3)):
            win = b[..., dy : dy + out.shape[-3], dx : dx + out.shape[-2], :]
            out += np.where(np.isnan(win), -1000.0, win) * 10.0**k
        return out

    got = map_with_halo(neighbourhood, d, dtype=np.float64).compute()
    ref = da.map_overlap(
        neighbourhood, d, depth={0: 0, 1: 1, 2: 1, 3: 0},
        boundary={0: "none", 1: np.nan, 2: np.nan, 3: "none"},
        trim=False, chunks=d.chunks, dtype=np.float64,
    ).compute()
    np.testing.assert_array_equal(got, ref)
