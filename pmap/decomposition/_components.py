"""Do the components mean something? Checks on NMF components, and peak alignment.

NMF (a sum of fixed spectra per pixel) cannot represent a line that *shifts*
continuously across a map: it cuts the line into pieces, each component a part of it
with a hard edge, and the abundance maps then look like phases that are not there.
Two checks on the fitted sample say so:

* **edges sharper than the instrument**: the steepest slope of a component,
  relative to its maximum (after smoothing by σ = 1 channel), against the steepest
  slope a line can have — a Gaussian of the instrument's FWHM has at most
  e^(−1/2)/σ = 1.43/FWHM relative to its maximum — when the cube states its
  instrument FWHM (``instrument_fwhm_ev`` / ``instrument_fwhm_nm``), and against the
  steepest slope of the brightest sampled spectra (90th percentile, same smoothing)
  in any case; flagged above 1.5 × either;
* **one line shifting**: two components whose maxima are closer than the wider one's
  FWHM, where at least 20 % of the pixels carrying them are intermediate mixes
  (share of the first between 0.2 and 0.8), the pixels' own spectral centroid follows
  that share (|Pearson r| ≥ 0.9), and the intermediate pixels are no broader than the
  pure ones (median FWHM ratio < 1.1: two lines side by side would make them broader).

The shift-aware alternative, :func:`align_rows`, moves every spectrum so that its own
main peak (:func:`peak_offsets`) sits at a common reference position (linear interpolation in channel index);
NMF of aligned spectra separates shape from position, and the shift is a map of its own.
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import gaussian_filter1d

from ..conventions import HC_EV_NM

#: A component edge steeper than this many times the reference slope is flagged.
EDGE_FACTOR = 1.5
#: Intermediate-mix share, centroid correlation and width ratio of a shifting line.
MID_SHARE = 0.2
MIN_CORRELATION = 0.9
MAX_WIDTH_RATIO = 1.1


def _smooth(y: np.ndarray, sigma: float = 1.0) -> np.ndarray:
    return gaussian_filter1d(np.asarray(y, dtype=float), sigma, axis=-1, mode="nearest")


def max_relative_slope(spectra: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Steepest |dy/dS| / max(y) of each row after smoothing by σ = 1 channel (1/axis units)."""
    y = _smooth(np.atleast_2d(spectra))
    top = np.max(y, axis=-1)
    step = np.abs(np.diff(np.asarray(axis, dtype=float)))
    slope = np.abs(np.diff(y, axis=-1)) / np.where(step > 0, step, np.inf)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(top > 0, slope.max(axis=-1) / top, np.nan)


def fwhm_of(spectra: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """FWHM of the main peak of each row (channels above half its maximum, contiguous
    around it, times the local channel spacing), after smoothing by σ = 1 channel."""
    y = _smooth(np.atleast_2d(spectra))
    n, c = y.shape
    i = np.argmax(y, axis=-1)
    half = y[np.arange(n), i] / 2
    above = y > half[:, None]
    ch = np.arange(c)
    # contiguous run around the maximum: first channel below half on each side
    left = np.where(~above & (ch[None, :] < i[:, None]), ch[None, :], -1).max(axis=-1)
    right = np.where(~above & (ch[None, :] > i[:, None]), ch[None, :], c).min(axis=-1)
    ax = np.asarray(axis, dtype=float)
    lo = ax[np.clip(left + 1, 0, c - 1)]
    hi = ax[np.clip(right - 1, 0, c - 1)]
    spacing = np.abs(np.gradient(ax))[i]
    return np.abs(hi - lo) + spacing


def instrument_slope(attrs: dict, sdim: str, position: float) -> float | None:
    """Steepest relative slope (1/axis units) of a Gaussian of the stated instrument FWHM at
    ``position`` (axis units), or None when the cube does not state it."""
    fw = None
    if sdim == "energy":
        if attrs.get("instrument_fwhm_ev") is not None:
            fw = float(attrs["instrument_fwhm_ev"])
        elif attrs.get("instrument_fwhm_nm") is not None:
            fw = float(attrs["instrument_fwhm_nm"]) * position**2 / HC_EV_NM
    elif sdim == "wavelength" and attrs.get("instrument_fwhm_nm") is not None:
        fw = float(attrs["instrument_fwhm_nm"])
    if fw is None or not np.isfinite(fw) or fw <= 0:
        return None
    return float(np.exp(-0.5) / (fw / (2.0 * np.sqrt(2.0 * np.log(2.0)))))


def sharp_edges(
    spectra: np.ndarray, sample: np.ndarray, axis: np.ndarray, attrs: dict, sdim: str
) -> tuple[np.ndarray, np.ndarray, float, list]:
    """(flag per component, its steepest relative slope, the data's, the instrument's per
    component or None)."""
    slope = max_relative_slope(spectra, axis)
    bright = sample[np.argsort(np.nansum(sample, axis=1))[-200:]] if len(sample) else sample
    data = float(np.nanpercentile(max_relative_slope(bright, axis), 90)) if len(bright) else np.nan
    peaks = np.asarray(axis)[np.argmax(spectra, axis=1)]
    inst = [instrument_slope(attrs, sdim, float(p)) for p in peaks]
    flag = np.zeros(len(spectra), dtype=bool)
    for k in range(len(spectra)):
        if np.isfinite(data) and slope[k] > EDGE_FACTOR * data:
            flag[k] = True
        if inst[k] is not None and slope[k] > EDGE_FACTOR * inst[k]:
            flag[k] = True
    return flag, slope, data, inst


def shifting_pairs(
    spectra: np.ndarray, abundance: np.ndarray, sample: np.ndarray, axis: np.ndarray
) -> list[dict]:
    """Pairs of components (by peak order) that look like one line shifting across the map."""
    axis = np.asarray(axis, dtype=float)
    k = len(spectra)
    if k < 2 or len(sample) < 20:
        return []
    peaks = axis[np.argmax(spectra, axis=1)]
    widths = fwhm_of(spectra, axis)
    area = np.abs(np.trapezoid(spectra, axis, axis=1)) if hasattr(np, "trapezoid") else \
        np.abs(np.trapz(spectra, axis, axis=1))
    contrib = abundance * area[None, :]
    total = contrib.sum(axis=1)
    order = np.argsort(peaks)
    out = []
    for a, b in zip(order[:-1], order[1:]):
        if abs(peaks[b] - peaks[a]) >= max(widths[a], widths[b]):
            continue
        pair = contrib[:, a] + contrib[:, b]
        carried = (pair > 0.5 * total) & (pair > 0)
        if carried.sum() < 20:
            continue
        f = contrib[carried, a] / pair[carried]
        mid = (f > 0.2) & (f < 0.8)
        mid_share = float(mid.mean())
        x = np.clip(sample[carried], 0.0, None)
        window = (spectra[a] + spectra[b]) > 0.1 * max(spectra[a].max(), spectra[b].max())
        xw = x[:, window]
        tot = xw.sum(axis=1)
        ok = tot > 0
        if ok.sum() < 20:
            continue
        cen = (xw[ok] @ axis[window]) / tot[ok]
        r = float(np.corrcoef(f[ok], cen)[0, 1]) if np.std(f[ok]) > 0 and np.std(cen) > 0 else 0.0
        ends = (f < 0.15) | (f > 0.85)
        ratio = np.nan
        if mid.sum() >= 5 and ends.sum() >= 5:
            wd = fwhm_of(x, axis)
            ratio = float(np.median(wd[mid]) / np.median(wd[ends]))
        shift = mid_share >= MID_SHARE and abs(r) >= MIN_CORRELATION and (
            not np.isfinite(ratio) or ratio < MAX_WIDTH_RATIO)
        if shift:
            out.append({"components": [int(a), int(b)], "intermediate_share": mid_share,
                        "centroid_correlation": r, "width_ratio": ratio,
                        "span": float(np.ptp(cen))})
    return out


def peak_offsets(x: np.ndarray) -> np.ndarray:
    """Fractional channel of each row's main peak: the centroid of the part above half its
    maximum (contiguous around the maximum, weights y − max/2), after smoothing by σ = 1.5
    channels; for a symmetric line this is its maximum, and it is steadier than the
    maximum of a noisy spectrum."""
    y = _smooth(np.nan_to_num(np.atleast_2d(x)), 1.5)
    n, c = y.shape
    i = np.argmax(y, axis=-1)
    half = y[np.arange(n), i] / 2
    ch = np.arange(c)
    above = y > half[:, None]
    left = np.where(~above & (ch[None, :] < i[:, None]), ch[None, :], -1).max(axis=-1)
    right = np.where(~above & (ch[None, :] > i[:, None]), ch[None, :], c).min(axis=-1)
    run = (ch[None, :] > left[:, None]) & (ch[None, :] < right[:, None])
    w = np.where(run, y - half[:, None], 0.0)
    tot = w.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, (w @ ch) / tot, i.astype(float))


def align_rows(x: np.ndarray, *, reference: float) -> tuple[np.ndarray, np.ndarray]:
    """(spectra moved so their maximum sits at channel ``reference``, offset in channels).

    aligned[i] = x[i + offset] by linear interpolation in channel index; channels moved
    in from beyond the window take the value of the nearest end channel (no step).
    """
    x = np.asarray(x, dtype=np.float64)
    n, c = x.shape
    off = peak_offsets(x) - reference
    idx = np.arange(c)[None, :] + off[:, None]
    idx = np.clip(idx, 0.0, c - 1.0)
    i0 = np.clip(np.floor(idx).astype(np.int64), 0, max(c - 2, 0))
    w = idx - i0
    rows = np.arange(n)[:, None]
    out = (1 - w) * x[rows, i0] + w * x[rows, np.minimum(i0 + 1, c - 1)]
    return out, off
