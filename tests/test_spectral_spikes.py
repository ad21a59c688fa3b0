"""Cosmic-spike removal that spares real emission, on maps and spectra with known truth.

Every scene here is rendered from its noise-free expected counts with the photon-transfer
model of a CCD (Poisson photoelectrons, Gaussian read noise and a dark level: Janesick,
*Photon Transfer*, SPIE Press 2007; common practice for simulated detectors), so each
check compares the cleaned values with the clean truth, never with the input alone.
Spikes are boxes of 1-5 channels added after the noise (common practice: a cosmic ray
deposits charge in a few adjacent pixels, independent of the light). The published basis
of the step is Whitaker & Hayes, Chemometr. Intell. Lab. Syst. 179, 82 (2018) (spike
candidates from a modified z-score of differences); the line-shape test rests on the
projection theorem for the convex cone of channel-integrated Gaussian instrument
profiles (non-negative least squares: Lawson & Hanson, *Solving Least Squares Problems*,
1974); frames are scaled to each other by a consensus ratio (random-sample consensus:
Fischler & Bolles, Commun. ACM 24, 381 (1981)); thresholds keep their Gaussian tail
probability under the skew of shot noise (Cornish-Fisher expansion, common practice).
"""

import json

import numpy as np
import pytest
import xarray as xr

import pmap
from pmap.spectral import remove_spikes, spike_candidates

STEP_NM = 0.1  # channel width of the test spectrometer (nm)
INSTRUMENT_NM = 0.5  # its instrument FWHM (nm): 5 channels
GAIN, READ, DARK = 1.0, 3.0, 100.0  # e-/count, counts, counts
DETECTOR = {"gain_e_per_count": GAIN, "read_noise_counts": READ, "dark_level_counts": DARK}


def _sigma(expected):
    """Noise s.d. of a raw reading (photon transfer: var = (mu - dark)/gain + read^2)."""
    return np.sqrt(np.maximum(expected - DARK, 0.0) / GAIN + READ**2)


def _render(rng, expected):
    """Raw counts from the expected counts (Poisson photoelectrons + read noise)."""
    return rng.poisson((expected - DARK) * GAIN) / GAIN + DARK + rng.normal(0.0, READ, expected.shape)


def _gauss(wl, centre, fwhm):
    return np.exp(-0.5 * ((wl - centre) / (fwhm / 2.3548200450309493)) ** 2)


def _band_map(grad, ny=21, nx=21):
    """A PL band (FWHM 20 nm at 730 nm) whose intensity grows by ``grad`` across x."""
    wl = np.arange(700.0, 760.0, STEP_NM)
    scale = grad ** (np.arange(nx) / (nx - 1))
    band = 1000.0 * _gauss(wl, 730.0, 20.0)
    expected = DARK + 20.0 + scale[None, :, None] * band[None, None, :] * np.ones((ny, 1, 1))
    return wl, expected


def _add_spikes(rng, noisy, expected, wl, *, where, widths, n_spikes=60, amp_sigma=10.0):
    """Boxes of ``amp_sigma`` noise s.d. per channel, one per pixel, on the band's top
    (within 2 nm of its peak) or in its wing (where it is 15-50 % of the peak)."""
    ny, nx, n = noisy.shape
    truth = np.zeros(noisy.shape, dtype=bool)
    band = expected[0, 0] - expected[0, 0].min()
    top = np.flatnonzero(np.abs(wl - wl[np.argmax(band)]) < 2.0)
    wing = np.flatnonzero((band > 0.15 * band.max()) & (band < 0.5 * band.max()))
    pixels = rng.permutation(ny * nx)[:n_spikes]
    for k, p in enumerate(pixels):
        iy, ix = divmod(int(p), nx)
        w = widths[k % len(widths)]
        pool = top if where == "top" else wing
        c = int(pool[rng.integers(pool.size)])
        sl = slice(c, c + w)
        noisy[iy, ix, sl] += amp_sigma * _sigma(expected[iy, ix, sl])
        truth[iy, ix, sl] = True
    return truth


def _cube(noisy, wl, attrs=None, chunks=None):
    cube = pmap.make_cube(
        noisy.astype(np.float32), wavelength_nm=wl,
        attrs={"instrument_fwhm_nm": INSTRUMENT_NM, **DETECTOR, **(attrs or {})},
        chunks=chunks or {"y": 8, "x": 8},
    )
    cube.attrs["units"] = "counts"
    return cube


def _check_replaced(after, expected, mask, n_sigma=5.0):
    """Replaced values lie within n_sigma noise s.d. of the clean truth."""
    err = np.abs(after[mask] - expected[mask]) / _sigma(expected[mask])
    assert err.size == 0 or err.max() < n_sigma, f"replaced value {err.max():.1f} sd off"


# --------------------------------------------------------------------------- (a) gradients


@pytest.mark.parametrize("grad", [1.0, 1.5, 5.0])
def test_recall_on_peak_tops_under_intensity_gradients(grad):
    # issue 12, item 5: spikes of 10 sd on the peak top of a map whose intensity grows by
    # 1, 1.5 or 5 times across 21 pixels; target recall >= 99 %, false <= 1e-5
    rng = np.random.default_rng(int(grad * 10))
    wl, expected = _band_map(grad)
    noisy = _render(rng, expected)
    truth = _add_spikes(rng, noisy, expected, wl, where="top", widths=(1, 2, 3))
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    assert (m & truth).sum() / truth.sum() >= 0.99
    assert (m & ~truth).sum() / (~truth).sum() <= 1e-5
    _check_replaced(after, expected, m)
    before = _cube(noisy, wl).values
    np.testing.assert_array_equal(after[~m].astype(np.float32).view(np.uint32),
                                  before[~m].view(np.uint32))  # untouched: bit-identical


def test_recall_without_stated_noise():
    # the same 5x gradient with no gain/read noise attrs: the noise law is fitted to each
    # spectrum (second differences against level)
    rng = np.random.default_rng(7)
    wl, expected = _band_map(5.0)
    noisy = _render(rng, expected)
    truth = _add_spikes(rng, noisy, expected, wl, where="top", widths=(1, 2, 3))
    cube = pmap.make_cube(noisy.astype(np.float32), wavelength_nm=wl,
                          attrs={"instrument_fwhm_nm": INSTRUMENT_NM}, chunks={"y": 8, "x": 8})
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    assert (m & truth).sum() / truth.sum() >= 0.99
    assert (m & ~truth).sum() / (~truth).sum() <= 1e-5
    _check_replaced(cleaned.values.astype(float), expected, m)


# --------------------------------------------------------------------------- (c) widths


@pytest.mark.parametrize("width", [1, 2, 3, 4, 5])
@pytest.mark.parametrize("where", ["top", "wing"])
def test_spikes_one_to_five_channels_wide(width, where):
    # spikes narrower than the 5-channel instrument function, on the peak top and in the
    # wing of a 5x-gradient map; the whole spike is replaced, middle channel included
    rng = np.random.default_rng(100 * width + (where == "wing"))
    wl, expected = _band_map(5.0)
    noisy = _render(rng, expected)
    truth = _add_spikes(rng, noisy, expected, wl, where=where, widths=(width,), n_spikes=80)
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    m = mask.values
    assert (m & truth).sum() / truth.sum() >= (0.99 if width <= 3 else 0.98)
    assert (m & ~truth).sum() / (~truth).sum() <= 1e-5
    whole = [m[iy, ix][truth[iy, ix]].all() for iy, ix in zip(*np.nonzero(truth.any(-1)))]
    assert np.mean(whole) >= 0.97
    _check_replaced(cleaned.values.astype(float), expected, m)


# --------------------------------------------------------------------------- (b) emitters


def _line_map(rng, lines, grad=5.0):
    """A 5x-gradient band map with real lines in single pixels: lines = [(iy, ix, centre,
    fwhm, peak in sd, lorentz fraction)]; returns wl, expected, noisy, line part."""
    wl, expected = _band_map(grad)
    part = np.zeros_like(expected)
    for iy, ix, c, fwhm, peak_sd, lor in lines:
        g = (1 - lor) * _gauss(wl, c, fwhm) + lor / (1 + ((wl - c) / (fwhm / 2)) ** 2)
        part[iy, ix] = peak_sd * _sigma(expected[iy, ix, np.argmin(np.abs(wl - c))]) * g
    expected = expected + part
    return wl, expected, _render(rng, expected), part


def test_single_pixel_emitters_keep_their_area():
    # issue 12, item 5: a real 0.7 nm line in one pixel only was erased. Emitters of
    # 0.7 nm (and exactly the instrument's 0.5 nm; one with Lorentzian wings), faint to
    # bright, on the top and in the wing, each in a pixel of its own; their area is kept
    # within 1 % (in the +-3 FWHM window) and no value there is touched, while spikes
    # elsewhere in the same map are still removed.
    rng = np.random.default_rng(21)
    lines = [(3, 4, 730.0, 0.7, 200.0, 0.0), (5, 10, 729.4, 0.7, 12.0, 0.0),
             (9, 15, 741.0, 0.7, 60.0, 0.0), (12, 3, 731.0, 0.5, 100.0, 0.0),
             (15, 17, 727.5, 0.5, 15.0, 0.0), (18, 8, 735.0, 0.7, 400.0, 0.3),
             (8, 19, 744.0, 0.5, 30.0, 0.0)]
    wl, expected, noisy, part = _line_map(rng, lines)
    spikes = _add_spikes(rng, noisy, expected, wl, where="top", widths=(1, 2, 3))
    for iy, ix, *_ in lines:  # spikes elsewhere only
        noisy[iy, ix][spikes[iy, ix]] = _render(rng, expected[iy, ix][spikes[iy, ix]])
        spikes[iy, ix] = False
    cube = _cube(noisy, wl)
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    for iy, ix, c, fwhm, *_ in lines:
        win = np.abs(wl - c) < 3 * fwhm
        area = part[iy, ix, win].sum()
        change = (after[iy, ix, win] - noisy[iy, ix, win]).sum()
        assert abs(change) <= 0.01 * area and not m[iy, ix, win].any(), (iy, ix)
    assert (m & spikes).sum() / spikes.sum() >= 0.99
    assert (m & ~spikes).sum() / (~spikes).sum() <= 1e-5


def test_lines_in_every_pixel_that_move_and_broaden():
    # a narrow line (1-1.3 instrument widths) in every pixel whose position drifts by 2
    # nm across the map and jitters by 0.1 nm, whose width and brightness change from
    # pixel to pixel (by up to 30x): the neighbours predict it only roughly, yet it is
    # real emission and must not be touched
    rng = np.random.default_rng(31)
    wl, expected = _band_map(1.5)
    ny, nx, _ = expected.shape
    part = np.zeros_like(expected)
    for iy in range(ny):
        for ix in range(nx):
            c = 734.0 + 2.0 * ix / nx + rng.normal(0, 0.1)
            fwhm = INSTRUMENT_NM * rng.uniform(1.0, 1.3)
            part[iy, ix] = 10 ** rng.uniform(1.5, 3.0) * 30.0 * _gauss(wl, c, fwhm)
    expected = expected + part
    noisy = _render(rng, expected)
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    assert mask.values.sum() / mask.size <= 1e-5
    win = part > 1e-3 * part.max(axis=-1, keepdims=True)
    change = np.abs(np.where(win, cleaned.values - noisy, 0.0).sum(-1))
    assert np.all(change <= 0.01 * part.sum(-1))


def test_sharp_line_in_every_pixel_kept():
    # a line narrower than a channel (sigma 0.2 nm at 0.5 nm per channel) in every pixel,
    # no instrument width stated: the neighbours hold it, so it is not a spike
    rng = np.random.default_rng(4)
    wl = np.linspace(600, 700, 200)
    line = 2000 * np.exp(-0.5 * ((wl - 650) / 0.2) ** 2)
    data = rng.normal(100, 3, (12, 12, 200)) + line
    cube = pmap.make_cube(data, wavelength_nm=wl)
    _, mask = remove_spikes(cube, return_mask=True)
    assert int(mask.sum()) == 0


# --------------------------------------------------------------------------- (d) spectrum


@pytest.mark.parametrize("fwhm", [0.5, 0.7])
def test_single_spectrum_keeps_real_narrow_line(fwhm):
    # issue 12, item 5: a single spectrum with a real narrow line had its flanks
    # re-interpolated (area +10 %). No neighbours: the line-shape test alone decides.
    rng = np.random.default_rng(int(fwhm * 10))
    wl = np.arange(700.0, 760.0, STEP_NM)
    expected = DARK + 50.0 + 800.0 * _gauss(wl, 730.0, 20.0)
    part = 3000.0 * _gauss(wl, 733.0, fwhm) + 400.0 * _gauss(wl, 712.0, fwhm)
    expected = expected + part
    noisy = _render(rng, expected)
    truth = np.zeros(wl.size, bool)
    for c, w in ((150, 1), (300, 2), (420, 3), (500, 1)):  # spikes away from the lines
        noisy[c : c + w] += 15.0 * _sigma(expected[c : c + w])
        truth[c : c + w] = True
    cube = _cube(noisy[None, None], wl)
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values[0, 0]
    after = cleaned.values[0, 0].astype(float)
    for c in (733.0, 712.0):
        win = np.abs(wl - c) < 3 * fwhm
        area = part[win].sum() - 0  # the line's own counts in the window
        assert abs((after[win] - noisy[win]).sum()) <= 0.01 * area
        assert not m[win].any()
    np.testing.assert_array_equal(m, truth)
    _check_replaced(after[None], expected[None], m[None])


def test_single_spectrum_interpolates_across_spike():
    # no instrument width stated (2 channels assumed); linear interpolation from the
    # channels beside the spike (common practice)
    rng = np.random.default_rng(2)
    wl = np.linspace(500, 600, 300)
    y = 100 + 500 * np.exp(-0.5 * ((wl - 550) / 8) ** 2) + rng.normal(0, 3, wl.size)
    y[[50, 200, 201]] += [400.0, 300.0, 250.0]
    cube = pmap.make_cube(y, wavelength_nm=wl)
    cleaned, mask = remove_spikes(cube, return_mask=True)
    np.testing.assert_array_equal(np.flatnonzero(mask.values[0, 0]), [50, 200, 201])
    assert cleaned.values[0, 0, 50] == pytest.approx(0.5 * (y[49] + y[51]))


# --------------------------------------------------------------------------- (e) frames


@pytest.mark.parametrize("n_frames", [2, 5])
def test_frames_spike_in_one_acquisition(n_frames):
    # repeated acquisitions (a "frame" dim): a spike is in one frame only, whatever its
    # shape, even a line-like bump 0.7 nm wide; real emission (a narrow line in every
    # frame, the intensity drifting by 10 % between frames) is left alone
    rng = np.random.default_rng(n_frames)
    wl, base = _band_map(1.5, ny=6, nx=6)
    base = base + 800.0 * _gauss(wl, 736.0, 0.6)
    drift = 1.0 + 0.1 * np.arange(n_frames) / n_frames
    expected = DARK + (base[None] - DARK) * drift[:, None, None, None]
    noisy = _render(rng, expected)
    added = np.zeros(noisy.shape)
    for k in range(40):
        f, iy, ix = rng.integers(n_frames), rng.integers(6), rng.integers(6)
        c = int(rng.integers(100, 500))
        if k % 4 == 0:  # a 0.7-nm-wide bump in one frame: not emission (not in the others)
            added[f, iy, ix] += 12.0 * _sigma(expected[f, iy, ix, c]) * _gauss(wl, wl[c], 0.7)
        else:
            w = 1 + k % 3
            added[f, iy, ix, c : c + w] += 10.0 * _sigma(expected[f, iy, ix, c : c + w])
    noisy += added
    big = added >= 10.0 * _sigma(expected)  # what recall counts
    clean = added < 0.5 * _sigma(expected)  # what must not be touched
    cube = xr.concat([_cube(noisy[f], wl) for f in range(n_frames)], dim="frame")
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    assert cleaned.dims == cube.dims
    # with two frames the reference is the other frame, whose noise adds: a 10-sd spike
    # stands ~7 sd above it, so a few fall short
    assert (m & big).sum() / big.sum() >= (0.99 if n_frames > 2 else 0.95)
    assert (m & clean).sum() / clean.sum() <= 1e-5
    _check_replaced(cleaned.values.astype(float), expected, m & big)
    assert "frames" in json.loads(cleaned.attrs["pmap_provenance"])["steps"][-1]["results"]["mode"]


def test_frames_false_replacements_bounded_by_the_gaussian_tail():
    # clean repeated acquisitions (2 and 3 frames, light drifting by 10 % between frames,
    # dark level 100 counts): a value is replaced only when it exceeds the scaled median of
    # the other frames by threshold = 4.5 s.d. of the difference (the noise law stated).
    # Under the null each value is tested once, so the false rate is the Gaussian tail
    # P(Z > 4.5) = 3.4e-6 (Abramowitz & Stegun 26.2.12; skew of shot noise corrected,
    # Cornish-Fisher) plus what widening adds; the target is 1e-5 per clean value.
    # n = 2 x 30 x 30 x 600 = 1.08e6 and 1.62e6 values; the bound is the binomial mean at
    # 1e-5 plus 3 of its standard deviations.
    from scipy.stats import norm

    tail = norm.sf(4.5)
    assert tail < 1e-5
    for n_frames in (2, 3):
        rng = np.random.default_rng(40 + n_frames)
        wl, base = _band_map(2.0, ny=30, nx=30)
        base = base + 800.0 * _gauss(wl, 736.0, 0.6)
        drift = 1.0 + 0.1 * np.arange(n_frames) / n_frames
        expected = DARK + (base[None] - DARK) * drift[:, None, None, None]
        noisy = _render(rng, expected)
        cube = xr.concat([_cube(noisy[f], wl) for f in range(n_frames)], dim="frame")
        _, mask = remove_spikes(cube, return_mask=True)
        n = mask.size
        count = int(mask.sum())
        assert count <= 1e-5 * n + 3.0 * np.sqrt(1e-5 * n), (n_frames, count, n)


def test_spikes_at_the_ends_of_the_axis():
    # the first and last channels are candidates too (above the next channels inward);
    # with the neighbours the spatial test decides there (common practice: a cosmic ray
    # can hit any detector column)
    rng = np.random.default_rng(12)
    wl, expected = _band_map(1.5, ny=8, nx=8)
    noisy = _render(rng, expected)
    n = wl.size
    truth = np.zeros(noisy.shape, bool)
    for iy, ix, c in ((2, 3, 0), (5, 5, n - 1), (6, 1, 0), (1, 6, n - 1)):
        noisy[iy, ix, c] += 30.0 * _sigma(expected[iy, ix, c])
        truth[iy, ix, c] = True
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    np.testing.assert_array_equal(mask.values, truth)
    _check_replaced(cleaned.values.astype(float), expected, truth)


def test_narrow_instrument_two_spikes_side_by_side_and_emitters():
    # an instrument 1.3 channels wide (FWHM 0.13 nm at 0.1 nm per channel): a 1-channel
    # spike differs from a line of the instrument width only by its neighbours (the
    # channel-integrated Gaussian puts 18 % of a centred line's area in each neighbour);
    # spikes of 20 s.d. (one channel; half of them beside a second spike of 200 s.d., which
    # is removed first, then the first is judged again against the cleaned spectrum) are
    # removed and restored within 5 s.d. of the truth, while single-pixel emitters of
    # exactly the instrument width (channel-integrated, at random sub-channel positions,
    # 30-1000 s.d.) keep every value. n = 60 spike values, 25 emitters.
    from scipy.special import erf

    rng = np.random.default_rng(13)
    fwhm = 0.13
    wl, expected = _band_map(5.0)
    s = fwhm / 2.3548200450309493
    part = np.zeros_like(expected)
    em = [(int(p) // 21, int(p) % 21) for p in rng.permutation(21 * 21)[:25]]
    for iy, ix in em:
        c = rng.uniform(715.0, 745.0)
        prof = 0.5 * (erf((wl + 0.05 - c) / (s * np.sqrt(2))) - erf((wl - 0.05 - c) / (s * np.sqrt(2))))
        k = int(np.argmax(prof))
        part[iy, ix] = np.exp(rng.uniform(np.log(30), np.log(1000))) * _sigma(expected[iy, ix, k]) * prof / prof.max()
    expected = expected + part
    noisy = _render(rng, expected)
    truth = np.zeros(noisy.shape, bool)
    free = [p for p in range(21 * 21) if (p // 21, p % 21) not in em]
    for k, p in enumerate(rng.permutation(free)[:40]):
        iy, ix = divmod(int(p), 21)
        c = int(rng.integers(100, 500))
        chans = (c, c + 1) if k % 2 else (c,)
        for j, cc in enumerate(chans):
            noisy[iy, ix, cc] += (20.0 + 180.0 * j) * _sigma(expected[iy, ix, cc])
            truth[iy, ix, cc] = True
    cube = _cube(noisy, wl, attrs={"instrument_fwhm_nm": fwhm})
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    ok = m & (np.abs(after - expected) <= 5.0 * _sigma(expected))
    assert (ok & truth).sum() >= 0.97 * truth.sum(), ((ok & truth).sum(), truth.sum())
    for iy, ix in em:
        assert not m[iy, ix].any(), (iy, ix)
    assert (m & ~truth).sum() / (~truth).sum() <= 1e-5


@pytest.mark.parametrize("relative", [False, True])
def test_narrow_instrument_spike_on_an_emitter_flank_spares_the_emitter(relative):
    # an instrument 1.28 channels wide (the bank's TMD scene): a bright 1-channel spike
    # (100-400 s.d.) on the flank of a single-pixel emitter of exactly the instrument
    # width (channel-integrated Gaussian, random sub-channel position, 40-300 s.d. at its
    # peak) one channel from its peak. Where the line-shape test's box takes in the
    # emitter's channels, a joint fit (a line of at least the instrument width on a
    # straight or quadratic level, plus a free box; each box channel must lower chi2 by
    # 25) keeps only the spike's channels and replaces them by the fitted line (choice
    # between nested models by their chi2 difference: Wilks, Ann. Math. Stat. 9, 60
    # (1938)). Against the clean truth: every spike value is replaced; the emitter keeps
    # its other values and its area (spike channel left out) within 1 % (issue 12), and
    # the spike value is restored within 5 s.d., in >= 25 and >= 23 of n = 30 (observed
    # 29 and 27, ~3 binomial s.e. below; before the joint fit: 0 of 30 and 0 of 30, the
    # box took the emitter's peak and both flanks, 37-95 s.d. off). A 1-channel box
    # beside a steep side of the pixel's own emission gets the fitted line too (an
    # interpolation across it would cut the line and leave its peak looking like a
    # spike of its own).
    # relative=True: the spike is 0.3-0.9 of the emitter's peak excess, so that the
    # emitter's peak, not the spike, is the most significant channel (the bank's TMD scene,
    # seed 3: before the joint fit also tried boxes without that channel, the box took
    # the peak and both flanks and the emitter lost 53 % of its area)
    from scipy.special import erf

    rng = np.random.default_rng(29)
    fwhm = 0.128
    wl, expected = _band_map(5.0)
    s = fwhm / 2.3548200450309493
    part = np.zeros_like(expected)
    em = [(int(p) // 21, int(p) % 21) for p in rng.permutation(21 * 21)[:30]]
    peaks = []
    for iy, ix in em:
        c = rng.uniform(715.0, 745.0)
        prof = 0.5 * (erf((wl + 0.05 - c) / (s * np.sqrt(2))) - erf((wl - 0.05 - c) / (s * np.sqrt(2))))
        k = int(np.argmax(prof))
        part[iy, ix] = np.exp(rng.uniform(np.log(40), np.log(300))) * _sigma(expected[iy, ix, k]) * prof / prof.max()
        peaks.append(k)
    expected = expected + part
    noisy = _render(rng, expected)
    spike_at = []
    for (iy, ix), k in zip(em, peaks):
        cc = k + (1 if rng.random() < 0.5 else -1)
        if relative:
            noisy[iy, ix, cc] += rng.uniform(0.3, 0.9) * part[iy, ix, k]
        else:
            noisy[iy, ix, cc] += rng.uniform(100.0, 400.0) * _sigma(expected[iy, ix, cc])
        spike_at.append(cc)
    cube = _cube(noisy, wl, attrs={"instrument_fwhm_nm": fwhm})
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    kept = restored = found = 0
    for (iy, ix), k, cc in zip(em, peaks, spike_at):
        # a spike of a few tenths of the line beside its peak can pass for part of the
        # line (a line a little wider than the instrument): then it must be left whole
        assert m[iy, ix, cc] or relative, (iy, ix)
        found += m[iy, ix, cc]
        restored += abs(after[iy, ix, cc] - expected[iy, ix, cc]) <= 5 * _sigma(expected[iy, ix, cc])
        win = np.zeros(wl.size, bool)
        win[k - 6 : k + 7] = True
        win[cc] = False
        area = part[iy, ix].sum()
        kept += (not m[iy, ix][win].any()
                 and abs((after[iy, ix] - noisy[iy, ix])[win].sum()) <= 0.01 * area)
    if relative:  # observed: kept 29, found 22, restored 20 of 30; before: kept 21, restored 14
        assert kept >= 27, kept
        assert found >= 18 and restored >= found - 3, (found, restored)
    else:
        assert kept >= 25, kept
        assert restored >= 23, restored


@pytest.mark.parametrize("seed", [5, 6, 10])
def test_scene_bank_voigt_emitters_keep_their_area(seed):
    # the bank's TMD scene (instrument 1.28 channels; single-pixel emitters are Voigt
    # lines, Lorentzian FWHM 0.25-1.5 meV, i.e. 0.3-2 x the instrument's): where a spike
    # sits on an emitter's top channel, the joint fit of line and spike must model the
    # line as a Voigt (pseudo-Voigt: Thompson, Cox & Hastings, J. Appl. Cryst. 20, 79
    # (1987)); with a Gaussian line only, the Lorentzian wings cost chi2 and the box took
    # the emitter's other top channel: seed 5 lost 11 % of an emitter's area, seed 10
    # 48 % (seeds found by the bank run; seeds 0-4 and 8, 9, 11 lose none either way).
    # Seed 6: two spikes on either side of an emitter's top channel (channels 179 and 181,
    # top 180): the joint fit's contiguous box took the top with them and the emitter
    # lost 30.6 % of its area; boxes of 3+ channels are now also tried without an inner
    # channel, which the line then explains (0.0 %).
    # Truth: every emitter (n = 12 per scene) keeps its area within 1 % (issue 12),
    # spike channels left out, window +-4 (instrument + line FWHM) as in test_scene_bank.
    from pmap.conventions import HC_EV_NM
    from pmap.scenes import make_scene

    sc = make_scene("tmd_flake_emitters", seed=seed)
    cube, tr = sc.cube, sc.truth
    cleaned = remove_spikes(cube)
    raw = cube.values.astype(float)
    after = cleaned.values.astype(float)
    sp = tr.spike_mask.values
    ax = cube["wavelength"].values
    fw = cube.attrs["instrument_fwhm_nm"]
    li = [str(v) for v in tr.line_name.values].index("narrow_emitter")
    n = 0
    for iy, ix in zip(*np.nonzero(tr.narrow_line.values)):
        pos = HC_EV_NM / tr.line_energy_ev.values[li, iy, ix]
        width = tr.line_fwhm_ev.values[li, iy, ix] * pos**2 / HC_EV_NM
        win = (np.abs(ax - pos) < 4 * (fw + width)) & ~sp[iy, ix]
        change = (after[iy, ix] - raw[iy, ix])[win].sum()
        assert abs(change) <= 0.01 * tr.line_area_counts.values[li, iy, ix], (iy, ix, change)
        n += 1
    assert n >= 6


def test_spike_on_a_pixel_unlike_its_neighbours():
    # half the pixels, at random, of another kind (a red-shifted line 3-5x brighter than
    # the band: aggregates); 40 of them carry a 1-channel spike of 20-30 s.d. on their line.
    # Neighbours of either kind, each scaled to the pixel, with a median prediction
    # corrected for shift and width, and the line-shape test (a cosmic ray is narrower
    # than any line the spectrograph passes: common practice) must still find them.
    # n = 40 pixels: >= 38 found and restored within 5 s.d. (observed 40 and 40), no
    # other value of those pixels touched
    rng = np.random.default_rng(41)
    wl, expected = _band_map(1.0)
    kind_b = [(int(p) // 21, int(p) % 21) for p in rng.permutation(21 * 21)[:220]]
    for iy, ix in kind_b:  # half the pixels: the neighbours are a mixture of both kinds
        expected[iy, ix] = DARK + 20.0 + rng.uniform(3000.0, 5000.0) * _gauss(
            wl, rng.uniform(738.0, 742.0), 12.0)
    isl = kind_b[:40]
    noisy = _render(rng, expected)
    at = []
    for iy, ix in isl:
        k = int(np.argmax(expected[iy, ix])) + int(rng.integers(-3, 4))
        noisy[iy, ix, k] += rng.uniform(20.0, 30.0) * _sigma(expected[iy, ix, k])
        at.append(k)
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    m, after = mask.values, cleaned.values.astype(float)
    found = sum(bool(m[iy, ix, k]) for (iy, ix), k in zip(isl, at))
    ok = sum(bool(m[iy, ix, k]) and abs(after[iy, ix, k] - expected[iy, ix, k])
             <= 5 * _sigma(expected[iy, ix, k]) for (iy, ix), k in zip(isl, at))
    others = sum(int(m[iy, ix].sum() - m[iy, ix, k]) for (iy, ix), k in zip(isl, at))
    assert found >= 38 and ok >= 38, (found, ok)
    assert others == 0, others


# --------------------------------------------------------------------------- (f) scene bank


def _bank_names():
    try:
        from pmap.scenes import scene_names
    except ImportError:  # pragma: no cover - the bank is another engineer's module
        return []
    return scene_names()


@pytest.mark.parametrize("name", _bank_names())
def test_scene_bank(name):
    # every scene of the bank (pmap.scenes, its truth: expected counts, spike_mask,
    # narrow_line): recall of spike values >= 10 sd, false replacements among clean
    # values, replaced values against the truth, narrow emitters untouched
    from pmap.conventions import HC_EV_NM
    from pmap.scenes import make_scene

    sc = make_scene(name, seed=0)
    cube, tr = sc.cube, sc.truth
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    raw = cube.values.astype(float)
    after = cleaned.values.astype(float)
    exp = tr.expected.values.astype(float)
    a = 1.0 / cube.attrs["gain_e_per_count"]
    sd = np.sqrt(a * np.maximum(exp - cube.attrs["dark_level_counts"], 0)
                 + cube.attrs["read_noise_counts"] ** 2)
    sp = tr.spike_mask.values
    big = sp & ((raw - exp) / sd >= 10)
    sdim = cube.dims[-1]
    ax = cube[sdim].values
    fw = cube.attrs.get("instrument_fwhm_nm", cube.attrs.get("instrument_fwhm_ev"))
    fwhm_ch = fw / np.median(np.abs(np.diff(ax)))
    if sdim == "energy" and "instrument_fwhm_ev" not in cube.attrs:  # pragma: no cover
        fwhm_ch = np.nan
    # an instrument under 2 channels wide leaves a 1-channel spike and a 1.5-channel
    # emitter little to tell them apart by (a 1-channel spike of h s.d. gives a line-shape
    # statistic of only 0.36 h there); n = 160-2300 spike values >= 10 sd per scene
    narrow = fwhm_ch < 2
    assert (m & big).sum() / big.sum() >= (0.96 if narrow else 0.99)
    restored = m & (np.abs(after - exp) <= 5 * sd)  # issue 12: within 5 sd of the truth
    assert (restored & big).sum() / big.sum() >= (0.96 if narrow else 0.98)
    good = (tr.bad_pixel.values == 0)[..., None]
    # issue 12's own target, on every scene whatever its instrument: spikes >= 10 sd on
    # peak tops (pixels whose emission stands > 10 sd above their 5th percentile, values at
    # half that height or more) restored in >= 99 %, less 3 binomial s.e. of n values
    sig = exp - cube.attrs["dark_level_counts"]
    base = np.percentile(sig, 5, axis=-1, keepdims=True)
    top = sig.max(axis=-1, keepdims=True) - base
    emits = top > 10 * np.sqrt(a * np.maximum(top, 0) + cube.attrs["read_noise_counts"] ** 2)
    on_top = big & emits & (sig - base >= 0.5 * top) & good
    n_top = int(on_top.sum())
    if n_top:  # (the low-SNR scene has no peak top 10 sd high)
        share = (restored & on_top).sum() / n_top
        assert share >= 0.99 - 3 * np.sqrt(0.99 * 0.01 / n_top), (share, n_top)
    assert (m & ~sp & good).sum() / (~sp & good).sum() <= 1e-5
    assert (m & ~sp).sum() / (~sp).sum() <= 2e-5
    err = np.abs(after - exp)[m & sp] / sd[m & sp]
    assert np.median(err) < 1.0 and np.quantile(err, 0.95) < 5.0
    names = [str(v) for v in tr.line_name.values]
    for iy, ix in zip(*np.nonzero(tr.narrow_line.values)):
        for li, ln in enumerate(names):
            e0 = tr.line_energy_ev.values[li, iy, ix]
            if "emitter" not in ln or not np.isfinite(e0):
                continue
            pos = HC_EV_NM / e0 if sdim == "wavelength" else e0
            width = tr.line_fwhm_ev.values[li, iy, ix] * (pos**2 / HC_EV_NM
                                                          if sdim == "wavelength" else 1.0)
            win = (np.abs(ax - pos) < 4 * (fw + width)) & ~sp[iy, ix]
            change = (after[iy, ix] - raw[iy, ix])[win].sum()
            assert abs(change) <= 0.01 * tr.line_area_counts.values[li, iy, ix]


@pytest.mark.parametrize("name", _bank_names())
def test_scene_bank_as_two_frames(name):
    # the scene acquired twice (a frame dim): each frame rendered from the clean truth with
    # the scene's own detector (Poisson photoelectrons, read noise, dark level: Janesick
    # 2007), each spiky pixel's spikes put into one of the two frames. A clean value is
    # replaced only when it exceeds the other frame by 4.5 s.d. of the difference
    # (Gaussian tail 3.4e-6); target <= 1e-5 per clean value, with a tolerance of 3
    # binomial standard deviations at n ~ 2e6-6e6 clean values; spike values >= 10 sd
    # are restored within 5 sd of the truth.
    from pmap.scenes import make_scene

    sc = make_scene(name, seed=0)
    cube, tr = sc.cube, sc.truth
    rng = np.random.default_rng(77)
    exp = tr.expected.values.astype(float)
    g = float(cube.attrs["gain_e_per_count"])
    dark = float(cube.attrs["dark_level_counts"])
    rn = float(cube.attrs["read_noise_counts"])
    good = tr.bad_pixel.values == 0
    raw = cube.values.astype(float)
    sp = tr.spike_mask.values
    owner = rng.integers(2, size=sp.shape[:2])
    frames, masks = [], []
    for f in range(2):
        r = rng.poisson(np.maximum(exp - dark, 0.0) * g) / g + rng.normal(dark, rn, exp.shape)
        mine = (owner == f)[..., None] & sp
        r = r + np.where(mine, raw - exp, 0.0)
        r[~good] = raw[~good]
        frames.append(np.clip(np.rint(r), 0, cube.attrs["saturation_counts"]).astype(np.float32))
        masks.append(mine)
    two = xr.concat([cube.copy(data=fr) for fr in frames], dim="frame")
    cleaned, mask = remove_spikes(two, return_mask=True)
    m = mask.values
    spk = np.stack(masks)
    sd = np.sqrt(np.maximum(exp - dark, 0) / g + rn**2)[None]
    val = np.stack(frames).astype(float)
    okpx = np.broadcast_to(good[None, ..., None], spk.shape)
    clean = ~spk & okpx
    n = int(clean.sum())
    assert (m & clean).sum() <= 1e-5 * n + 3.0 * np.sqrt(1e-5 * n)
    big = spk & okpx & ((val - exp[None]) / sd >= 10)
    restored = m & (np.abs(cleaned.values.astype(float) - exp[None]) <= 5 * sd)
    assert (restored & big).sum() >= 0.99 * big.sum()


@pytest.fixture(scope="module")
def bank_seeds_1_2():
    """remove_spikes on every scene of the bank at seeds 1 and 2 (seed 0 is
    test_scene_bank's; seeds 5-7 are held out of all tuning): per scene and seed the
    truth's arrays and the cleaned values, computed once for the tests below."""
    from scipy import ndimage

    from pmap.scenes import make_scene

    out = []
    for name in _bank_names():
        for seed in (1, 2):
            sc = make_scene(name, seed=seed)
            cube, tr = sc.cube, sc.truth
            cleaned, mask = remove_spikes(cube, return_mask=True)
            raw = cube.values.astype(float)
            exp = tr.expected.values.astype(float)
            sd = np.sqrt(np.maximum(exp - cube.attrs["dark_level_counts"], 0)
                         / cube.attrs["gain_e_per_count"] + cube.attrs["read_noise_counts"] ** 2)
            sp = tr.spike_mask.values
            big = sp & ((raw - exp) / sd >= 10) & (tr.bad_pixel.values == 0)[..., None]
            # spike values whose spectrum holds another spike within 18 channels (the
            # reach of one judgement's references: max_width + 1 + 12 flank channels)
            n = sp.shape[-1]
            near = np.zeros_like(sp)
            for iy, ix in zip(*np.nonzero(sp.sum(-1) > 0)):
                lab, k = ndimage.label(sp[iy, ix])
                if k < 2:
                    continue
                cen = np.array(ndimage.mean(np.arange(n), lab, range(1, k + 1)))
                for i in range(k):
                    if np.any(np.abs(np.delete(cen, i) - cen[i]) <= 18):
                        near[iy, ix, lab == i + 1] = True
            # pixels of a minority region whose 3x3 neighbours are all of other regions
            mino = np.isin(tr.region.values, list(tr.attrs["minority_regions"]))
            unlike = mino & (ndimage.minimum_filter(mino.astype(int), size=3, mode="nearest") == 0)
            m = mask.values
            ok = m & (np.abs(cleaned.values.astype(float) - exp) <= 5 * sd)
            out.append({"big": big, "near": near, "unlike": unlike[..., None], "m": m, "ok": ok})
    return out


def test_scene_bank_several_spikes_in_one_spectrum(bank_seeds_1_2):
    # every scene of the bank, seeds 1 and 2 (truth: pmap.scenes' expected counts and
    # spike_mask): spike values >= 10 sd in a spectrum holding another spike within the
    # judgement's reach are restored within 5 sd of the truth (issue 12) as well as
    # spikes alone. The other spike must not bias the neighbours' scaling, the shift fit
    # or the flanks' scatter (before it was left out: 0.851 of n = 275). Target 0.99;
    # n = 275 here, 3 binomial s.e. = 0.018.
    sel = sum(int((r["big"] & r["near"]).sum()) for r in bank_seeds_1_2)
    hit = sum(int((r["ok"] & r["big"] & r["near"]).sum()) for r in bank_seeds_1_2)
    assert sel >= 200
    assert hit / sel >= 0.99 - 3.0 * np.sqrt(0.99 * 0.01 / sel), (hit, sel)


def test_scene_bank_spikes_in_pixels_unlike_their_neighbours(bank_seeds_1_2):
    # pixels of a minority region (1-3 % of each scene) whose 3x3 neighbours all belong
    # to other regions: the scaled neighbours' median predicts them poorly and switches
    # between neighbours channel by channel, so a spike value found there is restored
    # from a fit to the residual or to the pixel's own spectrum over the channels beside
    # it, within 5 sd of the truth (issue 12). Before: 0.848 of n = 217 replaced values.
    # Target 0.97; n ~ 220, 3 binomial s.e. = 0.035.
    sel = sum(int((r["big"] & r["unlike"] & r["m"]).sum()) for r in bank_seeds_1_2)
    hit = sum(int((r["ok"] & r["big"] & r["unlike"]).sum()) for r in bank_seeds_1_2)
    assert sel >= 150
    assert hit / sel >= 0.97 - 3.0 * np.sqrt(0.97 * 0.03 / sel), (hit, sel)


# --------------------------------------------------------------------------- plumbing


def test_provenance_and_noise_model_notes():
    rng = np.random.default_rng(5)
    wl, expected = _band_map(1.0, ny=6, nx=6)
    cube = pmap.spectral.attach_noise_model(_cube(_render(rng, expected), wl))
    out = remove_spikes(cube, threshold=4.5)
    step = json.loads(out.attrs["pmap_provenance"])["steps"][-1]
    assert step["step"] == "remove_spikes" and step["params"]["threshold"] == 4.5
    assert step["results"]["instrument_fwhm_source"] == "attr instrument_fwhm_nm"
    assert step["results"]["instrument_fwhm_channels"] == pytest.approx(5.0, rel=1e-3)
    assert "spike_mask.sum()" in step["results"]["replaced_values"]
    model = json.loads(out.attrs["noise_model"])
    assert any("remove_spikes" in note for note in model["notes"])
    assert not model["correlated"]  # the law is kept: replaced values are noted only


def test_energy_axis_and_parameter_width():
    # the instrument FWHM stated in nm is converted to the energy axis (dE = E^2/hc dl);
    # a width given as a parameter (axis units) gives the same result
    rng = np.random.default_rng(6)
    wl, expected = _band_map(1.0, ny=6, nx=6)
    cube = _cube(_render(rng, expected), wl)
    e_cube = pmap.spectral.to_energy(cube)
    e_cube.attrs["units"] = "counts"
    out = remove_spikes(e_cube)
    step = json.loads(out.attrs["pmap_provenance"])["steps"][-1]
    assert step["results"]["instrument_fwhm_source"].startswith("attr instrument_fwhm_nm")
    a = remove_spikes(cube).values
    b = remove_spikes(cube.drop_attrs() if hasattr(cube, "drop_attrs") else cube,
                      instrument_fwhm=INSTRUMENT_NM).values
    np.testing.assert_array_equal(a, b)


def test_chunking_does_not_change_the_result():
    rng = np.random.default_rng(9)
    wl, expected = _band_map(5.0)
    noisy = _render(rng, expected)
    _add_spikes(rng, noisy, expected, wl, where="top", widths=(1, 3, 5))
    ref = remove_spikes(_cube(noisy, wl, chunks={"y": 21, "x": 21})).values
    for chunks in ({"y": 4, "x": 5}, {"y": 1, "x": 21}):
        np.testing.assert_array_equal(remove_spikes(_cube(noisy, wl, chunks=chunks)).values, ref)


def test_nan_values_and_pixels():
    # NaN channels (masked bad values) and an all-NaN pixel: nothing breaks, NaN stays
    # NaN, and a spike beside them is still removed
    rng = np.random.default_rng(10)
    wl, expected = _band_map(1.0, ny=8, nx=8)
    noisy = _render(rng, expected)
    noisy[:, :, 250] = np.nan
    noisy[4, 4] = np.nan
    noisy[3, 4, 300] += 30 * _sigma(expected[3, 4, 300])
    cleaned, mask = remove_spikes(_cube(noisy, wl), return_mask=True)
    out = cleaned.values
    assert np.isnan(out[:, :, 250]).all() and np.isnan(out[4, 4]).all()
    assert mask.values[3, 4, 300] and int(mask.sum()) == 1


def test_stack_dims_and_chunk_borders():
    # a spike on a chunk border is judged with its neighbours from the next chunk
    rng = np.random.default_rng(8)
    wl = np.linspace(600, 700, 64)
    data = rng.normal(100, 2, (2, 8, 8, 64))
    data[1, 3, 4, 30] += 200.0  # y=3 is the last row of the first chunk
    arr = pmap.make_cube(data[0], wavelength_nm=wl)
    cube = xr.concat([arr, arr.copy(data=data[1])], dim="temperature").chunk(
        {"temperature": 1, "y": 4, "x": 4}
    )
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    assert m.sum() == 1 and m[1, 3, 4, 30]
    assert abs(cleaned.values[1, 3, 4, 30] - 100) < 10


def test_bad_parameters():
    cube = pmap.make_cube(np.ones((2, 2, 10)), wavelength_nm=np.arange(10.0) + 600)
    for kw in ({"threshold": 0}, {"max_width": 0}, {"max_width": 20}, {"instrument_fwhm": -1}):
        with pytest.raises(pmap.errors.StepError):
            remove_spikes(cube, **kw)


def test_candidates_mad_zero():
    # quantised flat data: MAD of the difference is 0, the scaled mean |dev| takes over
    x = np.zeros((1, 50))
    x[0, 20] = 10.0
    cand, _ = spike_candidates(x, 6.0)
    assert cand[0, 20]
    flat = np.ones((1, 50))
    cand, sigma = spike_candidates(flat, 6.0)
    assert not cand.any() and sigma[0, 0] == 0


def test_shape_kernels_pass_every_real_line():
    # the property the line-shape test rests on: each test vector w_W is <= 0 on every
    # instrument profile (channel-integrated Gaussian, any position), so no sum of them
    # (real emission of any intrinsic shape) can look like a spike. Checked against
    # profiles computed here with scipy.special.erf at positions the kernels did not use.
    from scipy.special import erf

    from pmap.spectral._spikes import _box_kernels

    for fwhm in (1.3, 2.0, 4.5, 9.0):
        kern, m = _box_kernels(fwhm, 5)
        s = fwhm / 2.3548200450309493
        for w in range(1, 6):
            n = w + 2 * m
            c = np.arange(n)
            for mu in np.linspace(-3 * s, n - 1 + 3 * s, 997):
                prof = erf((c + 0.5 - mu) / (s * np.sqrt(2))) - erf((c - 0.5 - mu) / (s * np.sqrt(2)))
                assert kern[w - 1, :n] @ prof <= 2e-3 * prof.max()
            box = np.zeros(n)
            box[m : m + w] = 1
            assert kern[w - 1, :n] @ box > 0.05  # yet a box of w channels responds


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


@pytest.mark.parametrize("seed", [0, 1])
def test_spikes_beside_masked_detector_channels_after_mask_bad_pixels(seed):
    """The pipeline's order (mask_bad_pixels, then remove_spikes) on the GaAs scene, whose
    detector has dead and hot channels: a spike that spans a masked channel must still be
    replaced whole (before the bridge its channels beside the mask were kept: seed 0, 10
    of 160 spike values >= 10 sigma left at up to 67 sigma). Truth from the scene bank;
    recall >= 0.99 - 3 binomial s.e. of the values >= 10 sigma (n about 160 per seed),
    within 5 sigma of the clean truth; masked channels stay NaN, and no value away from a
    spike changes by more than the bank's false-replacement bound allows."""
    from pmap.scenes import make_scene

    sc = make_scene("gaas_algaas_qw_low_snr", seed=seed)
    cube, tr = sc.cube, sc.truth
    masked = pmap.mask_bad_pixels(cube)
    clean, mask = remove_spikes(masked, return_mask=True)
    before = masked.values.astype(float)
    after = clean.values.astype(float)
    exp = tr.expected.values.astype(float)
    dark = float(cube.attrs["dark_level_counts"])
    sd = np.sqrt(np.maximum(exp - dark, 0.0) / float(cube.attrs["gain_e_per_count"])
                 + float(cube.attrs["read_noise_counts"]) ** 2)
    good = (tr.bad_pixel.values == 0)[..., None] & np.isfinite(before)
    sp = tr.spike_mask.values
    big = sp & ((cube.values.astype(float) - exp) >= 10 * sd) & good
    n = int(big.sum())
    ok = np.abs(after - exp) <= 5 * sd
    recall = float((ok & big).sum() / n)
    assert recall >= 0.99 - 3 * np.sqrt(0.99 * 0.01 / n), (recall, n)
    assert np.array_equal(np.isnan(after), np.isnan(before))  # the mask is kept
    clean_vals = good & ~sp
    assert int((mask.values & clean_vals).sum()) <= max(1, 1e-5 * clean_vals.sum())


def test_narrow_instrument_spike_on_the_pixels_own_broad_emission():
    # an instrument 1.28 channels wide (the bank's TMD scene) and 1-channel spikes of 20
    # s.d. on a broad band of the pixel's own (8 s.d., FWHM 2 nm = 20 channels, absent from
    # its neighbours: the residual after the neighbour prediction holds a level under the
    # spike). The fixed test vector of a 1-channel box weighs the level with its
    # neighbours' negative weights, so the level takes most of the spike's statistic
    # (before: 70 of n = 120 restored); the generalised likelihood ratio of a line of at
    # least the instrument width on a quadratic level, with and without the spike channel
    # left out (Wilks, Ann. Math. Stat. 9, 60 (1938); variance at the fitted model:
    # Baker & Cousins, Nucl. Instrum. Methods 221, 437 (1984)), fits the level: >= 0.94
    # restored within 5 s.d. of the truth (observed 118 of 120; 0.94 is 3 binomial s.e.
    # below).
    # Emitters of exactly the instrument width (channel-integrated Gaussian, 30-300 s.d.)
    # on such bands in 25 other pixels keep every value, and the bands keep their area
    # within 1 % (issue 12).
    from scipy.special import erf

    rng = np.random.default_rng(3)
    fwhm = 0.128
    s = fwhm / 2.3548200450309493
    wl, expected = _band_map(1.0)
    own = np.zeros_like(expected)
    pix = rng.permutation(21 * 21)
    spikes, em = [], []
    for k, p in enumerate(pix[:145]):
        iy, ix = divmod(int(p), 21)
        c = int(rng.integers(150, 450))
        own[iy, ix] = 8.0 * _sigma(expected[iy, ix, c]) * _gauss(wl, wl[c] + rng.uniform(-0.5, 0.5), 2.0)
        if k < 120:
            spikes.append((iy, ix, c))
        else:
            cl = wl[c] + rng.uniform(-0.3, 0.3)
            prof = 0.5 * (erf((wl + 0.05 - cl) / (s * np.sqrt(2))) - erf((wl - 0.05 - cl) / (s * np.sqrt(2))))
            j = int(np.argmax(prof))
            own[iy, ix] += np.exp(rng.uniform(np.log(30), np.log(300))) * _sigma(expected[iy, ix, j]) * prof / prof.max()
            em.append((iy, ix))
    expected = expected + own
    noisy = _render(rng, expected)
    truth = np.zeros(noisy.shape, bool)
    for iy, ix, c in spikes:
        noisy[iy, ix, c] += 20.0 * _sigma(expected[iy, ix, c])
        truth[iy, ix, c] = True
    cube = _cube(noisy, wl, attrs={"instrument_fwhm_nm": fwhm})
    cleaned, mask = remove_spikes(cube, return_mask=True)
    m = mask.values
    after = cleaned.values.astype(float)
    ok = m & (np.abs(after - expected) <= 5.0 * _sigma(expected))
    assert (ok & truth).sum() >= 0.94 * truth.sum(), ((ok & truth).sum(), truth.sum())
    for iy, ix in em:
        assert not m[iy, ix].any(), (iy, ix)
    change = np.where(truth, 0.0, after - noisy).sum(axis=-1)
    area = own.sum(axis=-1)
    assert np.all(np.abs(change) <= 0.01 * np.maximum(area, 1e-9) + (area == 0) * 1e9)
    assert (m & ~truth).sum() / (~truth).sum() <= 1e-5
