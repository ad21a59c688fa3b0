"""Features that separate what a pixel emits (spectral shape) from how much (intensity).

* **Shape**: each spectrum divided by its channel sum (unit area), so a pixel twice
  as bright has the same shape; each channel divided by the typical noise s.d. of
  unit-area spectra in that channel (noise whitening: hot or noisy channels do not
  dominate; cf. the noise-adjusted principal components of Green, Berman, Switzer &
  Craig, IEEE Trans. Geosci. Remote Sens. 26, 65 (1988)); then projected on the
  leading principal components of the fitted sample, keeping those whose variance
  exceeds 4 × that of the whitened noise (1), at most 10; rows whose channel-to-channel
  scatter is 4 × the typical one (a hot read-out, a missed spike) stay out of the fit.
  The scores are scaled together so that their summed variance is 1.
* **Intensity**: log of the channel sum, standardised and multiplied by
  ``intensity_weight`` (its own feature, so brightness gradients do not change the
  shape and a dim phase can still be told apart).

Also here: filling masked channels (NaN) by linear interpolation between the nearest
finite channels, and region names from the regions' mean spectra.
"""

from __future__ import annotations

import numpy as np

#: Components kept at most, and the variance (in noise units) a component needs.
MAX_COMPONENTS = 10
COMPONENT_SNR = 4.0
#: Rows noisier than this many times the typical row are left out of the PCA fit.
OUTLIER_NOISE = 4.0
#: At most this many rows (evenly spaced in the sample) form the channel covariance
#: of the PCA fit.
COV_ROWS = 10000


def fill_nan_channels(x: np.ndarray) -> np.ndarray:
    """Rows (n, C) with NaN channels filled by linear interpolation (ends: nearest value).

    Rows with no finite value stay NaN. Rows that share a NaN pattern (a hot channel
    masked everywhere) are filled together.
    """
    x = np.asarray(x, dtype=np.float64)
    rows = np.flatnonzero(~np.isfinite(x.sum(axis=1)))  # one pass; NaN/inf propagate
    if rows.size == 0:
        return x
    bad = ~np.isfinite(x)
    out = x.copy()
    n = x.shape[1]
    ch = np.arange(n)
    packed = np.packbits(bad[rows], axis=1)
    patterns, inverse = np.unique(packed, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    for k in range(len(patterns)):
        sel = rows[inverse == k]
        b = bad[sel[0]]
        good = np.flatnonzero(~b)
        if good.size == 0:
            continue
        miss = np.flatnonzero(b)
        pos = np.searchsorted(good, miss)
        lo = good[np.clip(pos - 1, 0, good.size - 1)]
        hi = good[np.clip(pos, 0, good.size - 1)]
        span = np.where(hi != lo, hi - lo, 1)
        w = np.where(hi != lo, (ch[miss] - lo) / span, 0.0)
        out[np.ix_(sel, miss)] = (1 - w) * x[np.ix_(sel, lo)] + w * x[np.ix_(sel, hi)]
    return out


def unit_area(x: np.ndarray, floor: float) -> tuple[np.ndarray, np.ndarray]:
    """(spectra / normaliser, normaliser): the channel sum, but at least half the sum of
    absolute values (a spectrum with little or negative net area, e.g. a baseline-
    subtracted continuum, still gets shape values of order 1) and at least ``floor``."""
    area = x.sum(axis=1)
    area_eff = np.maximum(np.maximum(area, 0.5 * np.abs(x).sum(axis=1)), floor)
    return x / area_eff[:, None], area_eff


class EmissionSpace:
    """The fitted shape + intensity transform (plain numpy attributes: picklable)."""

    def __init__(self, *, floor, inv_noise, mean, comps, scale, li_mu, li_sd, weight, ev, floor_ev):
        self.floor = float(floor)
        self.inv_noise = inv_noise
        self.mean = mean
        self.comps = comps
        self.scale = float(scale)
        self.li_mu = float(li_mu)
        self.li_sd = float(li_sd)
        self.weight = float(weight)
        self.explained = ev
        self.noise_floor = float(floor_ev)

    @property
    def n_components(self) -> int:
        return len(self.comps)

    @classmethod
    def fit(cls, x: np.ndarray, *, intensity_weight: float) -> EmissionSpace:
        """Fit on the (filled, finite) spectra of sampled pixels with signal."""
        from ._fit_kernel import second_difference_ratio_medians

        l1 = np.abs(x).sum(axis=1)
        pos = l1[l1 > 0]
        floor = 1e-6 * float(np.median(pos)) if pos.size else 1e-300
        # as unit_area(x, floor), its absolute sum taken from l1 (the same values)
        area = np.maximum(np.maximum(x.sum(axis=1), 0.5 * l1), floor)
        s = x / area[:, None]
        # Per-channel noise of unit-area spectra from second differences: for white
        # noise Var(x[i-1] - 2x[i] + x[i+1]) = 6 sigma^2 (median of squares / 0.4549
        # for the mean of a chi^2_1: robust to the curvature of lines in a few pixels).
        if s.shape[1] >= 3:
            sf = s[:: max(1, len(s) // 5000)]  # at most ~5000 rows for the channel noise
            few = sf[:, :-2] - 2 * sf[:, 1:-1] + sf[:, 2:]
            var = np.median(few * few, axis=0) / 0.4549 / 6.0
            var = np.concatenate([[var[0]], var, [var[-1]]])
        else:
            var = np.ones(s.shape[1])
        pos_var = var[var > 0]
        ref = float(np.median(pos_var)) if pos_var.size else 1.0
        var = np.maximum(var, 1e-3 * ref)
        inv_noise = 1.0 / np.sqrt(var)
        # Rows far noisier than the rest (a hot read-out, a missed spike) would fill
        # every principal direction: the fit leaves out rows whose median squared second
        # difference, in units of the channel noise, exceeds OUTLIER_NOISE times the
        # typical one (one compiled pass over the rows, no (n, C) temporaries).
        fit_rows = np.ones(len(s), dtype=bool)
        if s.shape[1] >= 3:
            ratio = second_difference_ratio_medians(
                np.ascontiguousarray(s), np.ascontiguousarray(var[1:-1])) / (0.4549 * 6.0)
            fit_rows = ratio < OUTLIER_NOISE
            if fit_rows.sum() < max(2, len(s) // 2):
                fit_rows[:] = True
        w = np.multiply(s, inv_noise, out=s)  # s is not needed any more
        wf = w if fit_rows.all() else w[fit_rows]
        mean = wf.mean(axis=0)
        m = min(20, wf.shape[1], max(len(wf) - 1, 1))
        # Principal axes from the channel covariance (C x C): cheaper than an SVD of the
        # sample when it has more rows than channels.
        from scipy.linalg import eigh

        # at most 10000 rows for the covariance (every ceil(n / 10000)-th row: before,
        # every (n // 10000)-th, which took every row up to 19999 and cost twice as much)
        few = wf[:: -(-len(wf) // COV_ROWS)] - mean
        cov = (few.T @ few) / max(len(few) - 1, 1)
        c = cov.shape[0]
        evals, evecs = eigh(cov, subset_by_index=[c - m, c - 1])  # the m largest only
        top = np.argsort(evals)[::-1]
        ev = np.clip(evals[top], 0.0, None)
        vt = evecs[:, top].T
        floor_ev = 1.0  # white noise in units of its own s.d.
        keep = int(np.sum(ev > COMPONENT_SNR * floor_ev))
        keep = int(np.clip(keep, min(2, len(ev)), MAX_COMPONENTS))
        # Each component's scores are divided by the fourth root of its variance: strong
        # directions (a high-SNR gradient) still count most, but a small population's
        # direction is not drowned by them (dynamic range of s.d. compressed to its root).
        comps = vt[:keep] / ev[:keep, None] ** 0.25
        z = np.subtract(w, mean, out=w) @ comps.T  # w is not needed any more
        scale = float(np.sqrt(z.var(axis=0).sum())) or 1.0
        li = np.log(area)
        li_sd = float(li.std()) or 1.0
        return cls(floor=floor, inv_noise=inv_noise, mean=mean, comps=comps, scale=scale,
                   li_mu=float(li.mean()), li_sd=li_sd, weight=intensity_weight,
                   ev=ev, floor_ev=floor_ev)

    def shape_and_intensity(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(shape scores (n, k), standardised log intensity (n,)) of finite rows."""
        area = x.sum(axis=1)
        area = np.maximum(np.maximum(area, 0.5 * np.abs(x).sum(axis=1)), self.floor)
        # ((x / area) * inv_noise - mean) @ comps.T / scale, folded into one product
        proj = (self.comps * self.inv_noise).T / self.scale
        z = (x @ proj) / area[:, None] - (self.mean @ self.comps.T) / self.scale
        return z, (np.log(area) - self.li_mu) / self.li_sd

    def unit_area_of(self, z: np.ndarray) -> np.ndarray:
        """Unit-area spectra (n, C) back from shape scores (n, k) (within the kept
        components; the inverse of the shape part of :meth:`features`)."""
        back = (self.comps * self.scale) / np.sum(self.comps * self.comps, axis=1)[:, None]
        return (self.mean + z @ back) / self.inv_noise

    def features(self, x: np.ndarray) -> np.ndarray:
        z, li = self.shape_and_intensity(x)
        if self.weight > 0:
            return np.concatenate([z, self.weight * li[:, None]], axis=1)
        return z


# ---------------------------------------------------------------- names


def _format_position(v: float, sdim: str, units: str) -> str:
    if sdim == "energy":
        return f"{v:.2f} eV"
    if sdim == "wavelength":
        return f"{v:.0f} nm"
    return f"{v:.4g} {units}".rstrip()


def _smooth(y: np.ndarray, sigma: float = 1.5) -> np.ndarray:
    from scipy.ndimage import gaussian_filter1d

    return gaussian_filter1d(y, sigma, mode="nearest")


def _smoothed_noise(raw: np.ndarray) -> float:
    """White-noise s.d. of a spectrum after :func:`_smooth` (σ = 1.5 channels): the
    median absolute second difference, 1.4826·MAD/√6, times 0.46 for the smoothing."""
    if raw.size < 3:
        return 0.0
    d2 = raw[:-2] - 2 * raw[1:-1] + raw[2:]
    return 1.4826 * float(np.median(np.abs(d2 - np.median(d2)))) / np.sqrt(6.0) * 0.46


def has_emission_peak(
    mean: np.ndarray, *, prominence: float = 0.25, snr: float = 5.0, edge: float = 0.03
) -> bool:
    """Whether a (mean) spectrum has a peak inside the window.

    A local maximum of the lightly smoothed spectrum (σ = 1.5 channels) at least
    ``edge`` × the channel count away from both ends, at least 20 % of the largest
    value, with a prominence of at least ``prominence`` × that value and ``snr`` ×
    the noise of the smoothed spectrum (white-noise s.d. from the median absolute
    second difference, 1.4826·MAD/√6, times 0.46 for the smoothing). A spectrum
    without one (a continuum rising to an edge of the window: stray light, the
    laser's tail, thermal background, a window glow, or a band whose maximum lies
    outside the window) is not counted as an emission type.
    """
    from scipy.signal import find_peaks

    raw = np.nan_to_num(np.asarray(mean, dtype=float))
    y = _smooth(raw)
    top = float(np.max(np.abs(y))) if y.size else 0.0
    if top <= 0:
        return False
    noise = _smoothed_noise(raw)
    peaks, _ = find_peaks(y, height=0.2 * top, prominence=max(prominence * top, snr * noise))
    margin = max(1, int(round(edge * len(y))))
    return bool(np.any((peaks >= margin) & (peaks < len(y) - margin)))


def describe_spectrum(mean: np.ndarray, axis: np.ndarray, sdim: str, units: str) -> tuple[str, float, float]:
    """("1.63 eV band [+ 1.38 eV]", main position, FWHM) of a region's mean spectrum.

    Main peak: the maximum of the lightly smoothed mean spectrum (σ = 1.5 channels);
    "line" when its FWHM is under 2 % of its position, else "band"; other maxima at
    least 25 % of the main one, one FWHM away from it, and standing out from the
    spectrum around them (prominence ≥ 10 % of the main peak and ≥ 5 noise s.d.;
    noise ripples on the top of a broad band are not peaks) are added with "+", the
    two largest.
    """
    from scipy.signal import find_peaks

    raw = np.nan_to_num(np.asarray(mean, dtype=float))
    y = _smooth(raw)
    if not np.any(y > 0):
        return "no clear peak", float("nan"), float("nan")
    i = int(np.argmax(y))
    half = y[i] / 2
    lo = i
    while lo > 0 and y[lo] > half:
        lo -= 1
    hi = i
    while hi < len(y) - 1 and y[hi] > half:
        hi += 1
    fwhm = abs(float(axis[hi] - axis[lo]))
    kind = "line" if fwhm < 0.02 * abs(float(axis[i])) else "band"
    text = f"{_format_position(float(axis[i]), sdim, units)} {kind}"
    peaks, _ = find_peaks(y, height=0.25 * y[i],
                          prominence=max(0.1 * y[i], 5.0 * _smoothed_noise(raw)))
    others = [int(j) for j in peaks if abs(axis[j] - axis[i]) > fwhm]
    others = sorted(others, key=lambda j: -y[j])[:2]
    for j in others:
        text += f" + {_format_position(float(axis[j]), sdim, units)}"
    return text, float(axis[i]), fwhm


def _format_width(w: float, sdim: str, units: str) -> str:
    """"FWHM 93 meV" (energy axis), "FWHM 12 nm" (wavelength), else in the axis units."""
    scale, unit, fmt = {"energy": (1000.0, "meV", ".0f"), "wavelength": (1.0, "nm", ".0f")}.get(
        sdim, (1.0, units, ".3g"))
    return f"FWHM {w * scale:{fmt}} {unit}".rstrip()


def region_descriptions(
    means: list[np.ndarray], intensities: list[float], axis: np.ndarray, sdim: str, units: str
) -> list[str]:
    """A description per region; regions whose main peaks lie within half a FWHM of each
    other are told apart by their widths (when those differ by more than 15 %: a broader
    band or a shoulder is what sets such a region apart) and by their median intensity
    relative to the brightest of them."""
    described = [describe_spectrum(m, axis, sdim, units) for m in means]
    out = []
    for j, (text, pos, fwhm) in enumerate(described):
        near = [k for k, (_, p, f) in enumerate(described)
                if k != j and np.isfinite(p) and np.isfinite(pos)
                and abs(p - pos) < 0.5 * max(fwhm, f)]
        if near:
            widths = [described[k][2] for k in [*near, j]]
            if np.all(np.isfinite(widths)) and max(widths) > 1.15 * min(widths) > 0:
                text += f" ({_format_width(fwhm, sdim, units)})"
            ref = max(intensities[k] for k in [*near, j])
            ratio = intensities[j] / ref if ref > 0 else float("nan")
            if np.isfinite(ratio) and ratio < 0.01:
                text += ", dim (<0.01x)"
            elif np.isfinite(ratio) and ratio < 0.95:
                text += f", dim ({ratio:.2g}x)"
            elif np.isfinite(ratio):
                text += ", bright"
        out.append(text)
    return out
