"""Wavelength calibration from a reference-lamp spectrum (Ne, Ar, Hg or a user's line list).

Calibration file (JSON, written by :meth:`WavelengthCalibration.save`), schema version 1::

    {
      "format": "pmap-wavelength-calibration",   # fixed tag
      "version": 1,
      "model": "polynomial",                     # λ(p) = Polynomial(coefficients,
      "domain_pixel": [p_min, p_max],            #   domain=domain_pixel, window=[-1, 1])
      "coefficients": [c0, c1, ...],             # numpy.polynomial coefficients (nm)
      "covariance": [[...], ...],                # their covariance (nm², optional)
      "degree": 3,
      "n_pixels": 1024,                          # channels of the detector axis
      "medium": "air",                           # medium of the calibrated wavelengths
      "reference": "Ne+Ar",                      # lamp / line list used
      "rms_nm": 0.004,                           # RMS residual of the lines used
      "sigma_max_nm": 0.002,                     # largest 1σ prediction over the channels
      "identification": {"offset_nm": 1.02,      # calibrated − nominal at the centre
                         "searched_nm": 2.9,     # ± offset range searched
                         "n_detected": 25,       # lines found in the lamp spectrum
                         "log10_chance": -60.1}, # log10 expected random matches as good
      "lines": [{"pixel": 12.34, "reference_nm": 585.2488, "fitted_nm": 585.2491,
                 "residual_pm": 0.3, "sigma_pm": 0.4, "used": true}, ...],
      "pmap_version": "0.1.0"
    }

"covariance", "sigma_max_nm", "identification" and "sigma_pm" are optional (files written
before they existed lack them; ``sigma_nm()`` is then NaN).
Pixel p is the channel index of the ascending spectral axis (0 … n_pixels − 1).
"""

from __future__ import annotations

import json
import math
import os
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from scipy import ndimage

from .._version import __version__
from ..errors import InputFileError, PmapWarning, StepError
from ..steps import register_step
from ._airvac import air_to_vacuum
from ._common import check_cube, finish, load_spectrum
from ._robust import robust_sigma_of_diff

__all__ = [
    "reference_lines",
    "available_line_lists",
    "find_lines",
    "calibrate_wavelength",
    "WavelengthCalibration",
    "load_calibration",
    "apply_calibration",
    "CalibrationExtrapolationWarning",
]

_LINES_FILE = Path(__file__).resolve().parent.parent / "data" / "lines_nist.csv"
_FORMAT_TAG = "pmap-wavelength-calibration"


def _line_table() -> dict[str, np.ndarray]:
    table: dict[str, list[float]] = {}
    for line in _LINES_FILE.read_text(encoding="utf-8").splitlines():
        s = line.strip()
        if not s or s.startswith("#") or s.startswith("element"):
            continue
        el, wl = s.split(",")
        table.setdefault(el.strip(), []).append(float(wl))
    return {k: np.sort(np.asarray(v)) for k, v in table.items()}


def available_line_lists() -> list[str]:
    """Names of the built-in line lists ("Ar", "Hg", "Ne"); combine them with "+"."""
    return sorted(_line_table())


def reference_lines(name: Any = "Ne", *, medium: str = "air") -> np.ndarray:
    """Reference emission-line wavelengths in nm, ascending.

    Parameters
    ----------
    name : str, path or sequence of float
        A built-in list ("Ne", "Ar", "Hg", case-insensitive) or a mix joined by "+"
        ("Ne+Ar"); a text file of wavelengths in nm (first column); or the numbers themselves.
    medium : {"air", "vacuum"}
        Medium of the returned wavelengths; built-in and user lists are taken as air.

    Returns
    -------
    numpy.ndarray
        Line wavelengths in nm.

    References
    ----------
    Sansonetti & Martin, NIST Handbook of Basic Atomic Spectroscopic Data,
    J. Phys. Chem. Ref. Data 34, 1559 (2005) (table in ``pmap/data/lines_nist.csv``).
    """
    if medium not in ("air", "vacuum"):
        raise StepError(f"medium must be 'air' or 'vacuum', got {medium!r}")
    if isinstance(name, str) and not Path(name).suffix:
        table = _line_table()
        lookup = {k.lower(): k for k in table}
        parts = [p.strip().lower() for p in name.split("+") if p.strip()]
        unknown = [p for p in parts if p not in lookup]
        if not parts or unknown:
            raise StepError(
                f"unknown line list {name!r}; built-in lists: {', '.join(sorted(table))} "
                "(combine with '+'), or give a file or a list of wavelengths in nm"
            )
        lines = np.unique(np.concatenate([table[lookup[p]] for p in parts]))
    elif isinstance(name, (str, os.PathLike)):
        path = Path(name)
        if not path.is_file():
            raise InputFileError(f"line list file not found: {path}")
        vals = []
        for row in path.read_text(encoding="utf-8").splitlines():
            s = row.strip().replace(",", " ").split()
            if not s or s[0].startswith("#"):
                continue
            try:
                vals.append(float(s[0]))
            except ValueError:
                continue
        if not vals:
            raise InputFileError(f"{path} holds no wavelengths")
        lines = np.unique(np.asarray(vals, dtype=float))
    else:
        lines = np.unique(np.asarray(name, dtype=float).ravel())
    if lines.size == 0 or np.any(~np.isfinite(lines)) or np.any(lines <= 0):
        raise StepError("reference lines must be positive, finite wavelengths in nm")
    return air_to_vacuum(lines) if medium == "vacuum" else lines


def _gauss(p: np.ndarray, a: float, mu: float, sig: float, c: float) -> np.ndarray:
    return a * np.exp(-0.5 * ((p - mu) / sig) ** 2) + c


def find_lines(spectrum: Any, *, min_snr: float = 10.0, max_lines: int = 200) -> np.ndarray:
    """Sub-pixel positions of emission lines in a 1-D spectrum (pixel units, ascending).

    Parameters
    ----------
    spectrum : array (n,)
        Lamp spectrum on the detector's channels.
    min_snr : float
        Minimum line prominence in units of the white-noise s.d. (from the MAD of the
        first difference).
    max_lines : int
        Keep at most this many of the most prominent lines.

    Returns
    -------
    numpy.ndarray
        Line centres in pixels.

    Notes
    -----
    The smooth background (running median over 41 channels) is removed, peaks are found
    with :func:`scipy.signal.find_peaks`, and each centre comes from a least-squares
    Gaussian + constant fit over ±2 FWHM (fallback: the vertex of a parabola through the
    log of the three top values, exact for a sampled Gaussian).
    """
    return _find_lines(spectrum, min_snr=min_snr, max_lines=max_lines)[0]


def _find_lines(
    spectrum: Any, *, min_snr: float = 10.0, max_lines: int = 200
) -> tuple[np.ndarray, np.ndarray]:
    """Line centres (pixels, ascending) and their 1σ statistical uncertainties (pixels).

    The uncertainty of a Gaussian fit's centre uses the fit's own residual variance pooled
    with the spectrum's white-noise variance (4 pseudo degrees of freedom), so a fit
    window with few points neither collapses to zero nor ignores shot noise at the peak.
    """
    from scipy import signal  # on use: scipy.signal (with scipy.stats) costs ~0.5 s to import

    y = np.asarray(spectrum, dtype=float).ravel()
    if y.size < 8 or not np.all(np.isfinite(y)):
        raise StepError("lamp spectrum must be finite with at least 8 channels")
    bg = ndimage.median_filter(y, size=min(41, y.size | 1), mode="nearest")
    r = y - bg
    # noise s.d. from the first difference away from the lines: estimate, mask what stands
    # above 5 s.d. (widened by 3 channels), estimate again on the rest
    keep = np.ones(y.size, dtype=bool)
    noise = 0.0
    for _ in range(3):
        d = np.diff(r)[keep[1:] & keep[:-1]]
        noise = (
            float(robust_sigma_of_diff(np.concatenate([[0.0], np.cumsum(d)])))
            if (d.size > 4)
            else noise
        )
        line = ndimage.binary_dilation(r > 5 * noise, iterations=3)
        if line.all() or noise <= 0:
            break
        keep = ~line
    noise = max(noise, 1e-6 * float(np.max(np.abs(r))), 1e-300)
    peaks, props = signal.find_peaks(r, prominence=min_snr * noise, distance=2)
    if peaks.size > max_lines:
        keep = np.argsort(props["prominences"])[::-1][:max_lines]
        peaks = np.sort(peaks[keep])
    if peaks.size == 0:
        return np.empty(0), np.empty(0)
    widths = signal.peak_widths(r, peaks, rel_height=0.5)[0]
    from scipy import optimize  # on use: ~0.15 s of every run's imports otherwise

    out, err = [], []
    p_all = np.arange(y.size, dtype=float)
    pooled_dof = 4.0
    for pk, w in zip(peaks, widths):
        hw = int(max(3, np.ceil(2.0 * w)))
        lo, hi = max(0, pk - hw), min(y.size, pk + hw + 1)
        pp, yy = p_all[lo:hi], r[lo:hi]
        centre, sd = np.nan, np.nan
        try:
            popt, pcov = optimize.curve_fit(
                _gauss,
                pp,
                yy,
                p0=[r[pk], float(pk), max(w / 2.355, 0.5), 0.0],
                maxfev=2000,
                absolute_sigma=True,
            )
            if abs(popt[1] - pk) < 1.5 and popt[0] > 0 and np.isfinite(pcov[1, 1]):
                centre = popt[1]
                rss = float(np.sum((yy - _gauss(pp, *popt)) ** 2))
                dof = max(pp.size - 4, 0)
                s2 = (rss + pooled_dof * noise**2) / (dof + pooled_dof)
                sd = float(np.sqrt(max(pcov[1, 1], 0.0) * s2))
        except (RuntimeError, optimize.OptimizeWarning, ValueError):
            pass
        if not np.isfinite(centre) and 0 < pk < y.size - 1 and np.all(r[pk - 1 : pk + 2] > 0):
            la, lb, lc = np.log(r[pk - 1 : pk + 2])
            den = la - 2 * lb + lc
            centre = pk + 0.5 * (la - lc) / den if den < 0 else float(pk)
            # centre s.d. of a sampled Gaussian of s.d. sg and height A in white noise:
            # σ_μ² ≈ 2 σ_n² sg / (√π A²)
            sg = max(w / 2.355, 0.5)
            sd = float(np.sqrt(2 * noise**2 * sg / (np.sqrt(np.pi) * r[pk] ** 2)))
        if not np.isfinite(centre):
            centre, sd = float(pk), 1 / np.sqrt(12)  # integer position: uniform rounding
        out.append(centre)
        err.append(sd if np.isfinite(sd) else 0.5)
    order = np.argsort(out)
    return np.asarray(out)[order], np.asarray(err)[order]


def _correlation(
    lam_det: np.ndarray,
    ref: np.ndarray,
    lc: float,
    shifts: np.ndarray,
    scales: np.ndarray,
    sigma_nm: float,
) -> np.ndarray:
    """Overlap of the detected and reference line patterns on a (scale, shift) grid.

    Model: λ = λ_c + (λ_nom − λ_c)(1 + a) + s; score = Σ_j Σ_k exp(−½((λ_j − r_k)/σ)²),
    the cross-correlation of two synthetic line spectra. Only reference lines within
    4σ of some shifted detection contribute, so the cost grows with the line counts,
    not with the shift range squared.
    """
    score = np.zeros((scales.size, shifts.size))
    for i, a in enumerate(scales):
        lam_a = lc + (lam_det - lc) * (1 + a)
        # every pairwise shift that would align detection j with reference k
        d = (ref[None, :] - lam_a[:, None]).ravel()
        d = d[(d > shifts[0] - 4 * sigma_nm) & (d < shifts[-1] + 4 * sigma_nm)]
        if d.size == 0:
            continue
        diff = shifts[:, None] - d[None, :]
        score[i] = np.exp(-0.5 * (diff / sigma_nm) ** 2).sum(axis=1)
    return score


def _scale_grid(max_scale: float, half: float, step_nm: float) -> np.ndarray:
    n_a = int(np.ceil(max_scale * half / step_nm)) if max_scale > 0 else 0
    return np.linspace(-max_scale, max_scale, 2 * n_a + 1) if n_a else np.zeros(1)


def _coarse_candidates(
    lam_det: np.ndarray,
    ref: np.ndarray,
    *,
    max_shift_nm: float,
    max_scale: float,
    sigma_nm: float,
    n_max: int = 8,
) -> tuple[list[tuple[float, float, float]], float]:
    """Distinct (score, shift, scale) maxima of the line-pattern correlation, best first.

    The whole ±max_shift_nm range is scanned in steps of σ/2; maxima closer than 2σ in
    shift to a better one, or scoring below half the best, are dropped.
    """
    lc = 0.5 * (lam_det.min() + lam_det.max())
    half = max(0.5 * (lam_det.max() - lam_det.min()), 1e-9)
    shifts = np.arange(-max_shift_nm, max_shift_nm + 1e-12, sigma_nm / 2)
    scales = _scale_grid(max_scale, half, sigma_nm / 2)
    score = _correlation(lam_det, ref, lc, shifts, scales, sigma_nm)
    prof = score.max(axis=0)
    best_a = scales[score.argmax(axis=0)]
    padded = np.concatenate([[-np.inf], prof, [-np.inf]])
    peaks = np.flatnonzero((padded[1:-1] >= padded[:-2]) & (padded[1:-1] > padded[2:]))
    peaks = peaks[np.argsort(prof[peaks])[::-1]]
    out: list[tuple[float, float, float]] = []
    for i in peaks:
        if prof[i] <= 0 or (out and prof[i] < 0.5 * out[0][0]):
            break
        if any(abs(shifts[i] - s) < 2 * sigma_nm for _, s, _ in out):
            continue
        out.append((float(prof[i]), float(shifts[i]), float(best_a[i])))
        if len(out) >= n_max:
            break
    return out, lc


def _refine(
    lam_det: np.ndarray,
    ref: np.ndarray,
    shift: float,
    scale: float,
    lc: float,
    *,
    coarse_nm: float,
    fine_nm: float,
    max_scale: float,
) -> np.ndarray:
    """Detected lines on the axis of a candidate, re-centred by a fine correlation search."""
    lam0 = lc + (lam_det - lc) * (1 + scale) + shift
    half = max(0.5 * (lam0.max() - lam0.min()), 1e-9)
    shifts = np.arange(-2 * coarse_nm, 2 * coarse_nm + 1e-12, fine_nm / 2)
    scales = _scale_grid(max_scale / 4, half, fine_nm / 2)
    score = _correlation(lam0, ref, lc, shifts, scales, fine_nm)
    ia, i_s = np.unravel_index(int(np.argmax(score)), score.shape)
    return lc + (lam0 - lc) * (1 + scales[ia]) + shifts[i_s]


def _match(lam: np.ndarray, ref: np.ndarray, tol_nm: float) -> tuple[np.ndarray, np.ndarray]:
    """Nearest reference line for each detected line within ``tol_nm``, one-to-one."""
    k = (
        np.clip(np.searchsorted(ref, lam), 1, ref.size - 1)
        if ref.size > 1
        else np.zeros(lam.size, dtype=int)
    )
    if ref.size > 1:
        k = np.where(np.abs(ref[k - 1] - lam) <= np.abs(ref[k] - lam), k - 1, k)
    dist = np.abs(ref[k] - lam)
    ok = dist <= tol_nm
    # one-to-one: a reference line keeps only its closest detection
    for kk in np.unique(k[ok]):
        js = np.flatnonzero(ok & (k == kk))
        if js.size > 1:
            ok[js[js != js[np.argmin(dist[js])]]] = False
    return np.flatnonzero(ok), k[ok]


def _design(p: np.ndarray, degree: int, domain: list[float]) -> np.ndarray:
    """Power-basis design matrix in the window [−1, 1] (numpy Polynomial convention)."""
    x = np.polynomial.polyutils.mapdomain(np.asarray(p, float), domain, [-1.0, 1.0])
    return np.polynomial.polynomial.polyvander(x, degree)


def _wfit(
    p: np.ndarray, lam: np.ndarray, sig: np.ndarray, degree: int, domain: list[float]
) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least-squares coefficients and their unscaled covariance (AᵀWA)⁻¹ (nm²)."""
    a = _design(p, degree, domain) / sig[:, None]
    b = lam / sig
    q, rr = np.linalg.qr(a)
    coef = np.linalg.solve(rr, q.T @ b)
    rinv = np.linalg.inv(rr)
    return coef, rinv @ rinv.T


def _poly(coef: np.ndarray, domain: list[float]) -> np.polynomial.Polynomial:
    return np.polynomial.Polynomial(coef, domain=list(domain), window=[-1, 1])


def _robust_polyfit(
    p: np.ndarray,
    lam: np.ndarray,
    sig: np.ndarray,
    degree: int,
    domain: list[float],
    clip_sigma: float,
) -> tuple[np.polynomial.Polynomial, np.ndarray]:
    """Weighted polynomial fit with iterative clipping; returns (poly, used mask).

    Residuals are normalised by each line's uncertainty; the clipping scale is their MAD
    (robust s.d.), never below 1, so lines consistent with their own errors are kept.
    """
    used = np.ones(p.size, dtype=bool)
    poly = None
    for _ in range(20):
        if used.sum() < degree + 2:
            raise StepError(
                f"only {int(used.sum())} lines survive outlier rejection, a degree-{degree} "
                f"fit needs at least {degree + 2}"
            )
        coef, _ = _wfit(p[used], lam[used], sig[used], degree, domain)
        poly = _poly(coef, domain)
        z = (lam - poly(p)) / sig
        scale = max(1.4826 * np.median(np.abs(z[used] - np.median(z[used]))), 1.0)
        new = np.abs(z) <= clip_sigma * scale
        if np.array_equal(new, used):
            break
        used = new
    return poly, used


def _chance_alignments(
    *,
    n_det: int,
    n_used: int,
    degree: int,
    delta_nm: float,
    density_per_nm: float,
    shift_max_nm: float,
    max_scale: float,
    half_range_nm: float,
    tol_nm: float,
) -> float:
    """Expected number of wrong alignments in the search that would match as well (log10).

    A wrong offset/scale puts each of the ``n_det`` detected lines within ±δ of some
    reference line with probability q = 2δρ (ρ: reference lines per nm), so it matches at
    least ``n_used`` lines with probability P = P(Binomial(n_det, q) ≥ n_used). The search
    holds about (2S/δ + 1)(2aH/δ + 1) distinct alignments at resolution δ (S: offset range,
    a: scale range, H: half the range), times (2 tol/δ + 1) for each polynomial term
    beyond the linear ones. Returns log10 of their product; a real identification gives
    a tiny value, a coincidence one near or above 0.
    """
    delta = max(float(delta_nm), 1e-9)
    q = min(1.0, 2.0 * delta * float(density_per_nm))
    if n_used > n_det:
        return -np.inf
    if q >= 1.0:
        log_p = 0.0
    elif q <= 0.0:
        return -np.inf
    else:
        terms = [
            math.lgamma(n_det + 1)
            - math.lgamma(x + 1)
            - math.lgamma(n_det - x + 1)
            + x * math.log(q)
            + (n_det - x) * math.log1p(-q)
            for x in range(n_used, n_det + 1)
        ]
        top = max(terms)
        log_p = top + math.log(sum(math.exp(t - top) for t in terms))
    log_cells = (
        math.log(2 * shift_max_nm / delta + 1)
        + math.log(2 * max_scale * half_range_nm / delta + 1)
        + max(degree - 1, 0) * math.log(2 * tol_nm / delta + 1)
    )
    return (log_p + log_cells) / math.log(10)


def _max_auto_degree(n_lines: int, cap: int = 5) -> int:
    """Highest degree ``degree="auto"`` may pick: n_lines ≥ 2 (degree + 1), at least 1."""
    return int(max(1, min(cap, n_lines // 2 - 1)))


def _bic_degree(
    p: np.ndarray, lam: np.ndarray, sig: np.ndarray, domain: list[float], max_degree: int
) -> int:
    """Lowest-BIC degree (BIC = n ln(χ²/n) + (d + 1) ln n, weighted χ²) up to max_degree."""
    n = p.size
    best, best_bic = 1, np.inf
    for d in range(1, max_degree + 1):
        coef, _ = _wfit(p, lam, sig, d, domain)
        z = (lam - _poly(coef, domain)(p)) / sig
        chi2 = max(float(z @ z), 1e-30)
        bic = n * np.log(chi2 / n) + (d + 1) * np.log(n)
        if bic < best_bic - 1e-9:
            best, best_bic = d, bic
    return best


class CalibrationExtrapolationWarning(PmapWarning):
    """Part of the detector lies well beyond the outermost calibration lines (extrapolated)."""


_EDGE_FRACTION = 0.05  # warn when channels lie this far (fraction of the range) beyond lines
_GUARD_FACTOR = 3.0  # offsets up to 3× max_shift_nm are examined for better matches (refusal)
_LOG10_MAX_CHANCE = -2.0  # refuse an identification a coincidence matches 1 time in 100
# 99th percentiles of χ² with 1–4 degrees of freedom (Abramowitz & Stegun, Table 26.8)
_CHI2_99 = {1: 6.635, 2: 9.210, 3: 11.345, 4: 13.277}


@dataclass(repr=False)
class WavelengthCalibration:
    """A pixel → wavelength solution λ(p) in nm (polynomial), with its line residuals.

    Attributes
    ----------
    coefficients : list of float
        :class:`numpy.polynomial.Polynomial` coefficients (nm) in the window [−1, 1].
    domain_pixel : (float, float)
        Pixel range mapped onto the window.
    degree : int
        Polynomial degree.
    n_pixels : int
        Number of detector channels.
    medium : str
        "air" or "vacuum": medium of the calibrated wavelengths.
    reference : str
        The line list used.
    lines : list of dict
        Per matched line: pixel, reference_nm, fitted_nm, residual_pm, used, sigma_pm
        (1σ of the line's measured position, in nm of the axis × 1000).
    covariance : list of list of float, optional
        Covariance of ``coefficients`` (nm²), from the weighted line fit; None for
        records written before it was stored.
    identification : dict, optional
        How the lines were identified: ``offset_nm`` (calibrated − nominal wavelength at
        the detector centre), ``searched_nm`` (± offset range searched), ``n_detected``
        and ``log10_chance`` (log10 of the expected number of random alignments that
        would match as well).
    """

    coefficients: list[float]
    domain_pixel: tuple[float, float]
    degree: int
    n_pixels: int
    medium: str = "air"
    reference: str = ""
    lines: list[dict] = field(default_factory=list)
    covariance: list[list[float]] | None = None
    identification: dict | None = None

    @property
    def polynomial(self) -> np.polynomial.Polynomial:
        """The solution as a numpy Polynomial (pixel → nm)."""
        return np.polynomial.Polynomial(
            self.coefficients, domain=list(self.domain_pixel), window=[-1, 1]
        )

    def wavelength_nm(self, pixel: Any = None) -> np.ndarray:
        """Wavelength in nm at pixel positions (default: every channel 0 … n_pixels − 1)."""
        p = np.arange(self.n_pixels, dtype=float) if pixel is None else np.asarray(pixel, float)
        return self.polynomial(p)

    def sigma_nm(self, pixel: Any = None) -> np.ndarray:
        """1σ prediction uncertainty of the calibrated wavelength in nm at pixel positions.

        Propagated from the coefficient covariance, σ(p)² = v(p)ᵀ C v(p) with v the
        polynomial's basis at p (default: every channel). It covers the statistical error
        of the line positions (and a misfit seen in the residuals), not an inadequate
        polynomial beyond the lines. NaN when the record holds no covariance.
        """
        p = np.arange(self.n_pixels, dtype=float) if pixel is None else np.asarray(pixel, float)
        if self.covariance is None:
            return np.full(p.shape, np.nan)
        c = np.asarray(self.covariance, dtype=float)
        v = _design(p.ravel(), self.degree, list(self.domain_pixel))
        var = np.einsum("ij,jk,ik->i", v, c, v)
        return np.sqrt(np.clip(var, 0.0, None)).reshape(p.shape)

    @property
    def sigma_max_nm(self) -> float:
        """Largest 1σ prediction uncertainty over the detector's channels, in nm."""
        s = self.sigma_nm()
        return float(np.max(s)) if s.size and np.all(np.isfinite(s)) else float("nan")

    @property
    def line_span_pixel(self) -> tuple[float, float]:
        """Pixel positions of the outermost lines used in the fit (first, last)."""
        p = np.asarray([ln["pixel"] for ln in self.lines], dtype=float)[self.used]
        return (float(p.min()), float(p.max())) if p.size else (float("nan"), float("nan"))

    @property
    def residuals_pm(self) -> np.ndarray:
        """Fitted − reference wavelength of each matched line in pm (rejected lines included)."""
        return np.asarray([ln["residual_pm"] for ln in self.lines], dtype=float)

    @property
    def used(self) -> np.ndarray:
        """Which matched lines entered the final fit (False: rejected as outliers)."""
        return np.asarray([ln["used"] for ln in self.lines], dtype=bool)

    @property
    def rms_pm(self) -> float:
        """RMS residual of the lines used in the fit, in pm."""
        r = self.residuals_pm[self.used]
        return float(np.sqrt(np.mean(r**2))) if r.size else float("nan")

    @property
    def rms_nm(self) -> float:
        """RMS residual of the lines used in the fit, in nm."""
        return self.rms_pm * 1e-3

    def summary(self) -> str:
        """One line: lines used, RMS residual (pm), largest 1σ prediction uncertainty (pm)."""
        lam = self.wavelength_nm(np.asarray([0.0, self.n_pixels - 1.0]))
        smax = self.sigma_max_nm
        sig = f"{smax * 1e3:.1f} pm" if np.isfinite(smax) else "unknown"
        return (
            f"{self.reference or 'lines'}, degree {self.degree}, "
            f"{int(self.used.sum())}/{len(self.lines)} lines used, rms {self.rms_pm:.1f} pm, "
            f"1σ up to {sig}, {lam[0]:.2f}–{lam[1]:.2f} nm ({self.medium}, "
            f"{self.n_pixels} channels)"
        )

    def __repr__(self) -> str:
        return f"WavelengthCalibration({self.summary()})"

    def apply(self, cube: xr.DataArray) -> xr.DataArray:
        """Cube on the calibrated wavelength axis (nm, ascending; data unchanged, lazy).

        Raises StepError if the cube has another number of channels or if the solution
        is not strictly ascending over the channels.
        """
        cube, sdim = check_cube(cube)
        if sdim != "wavelength":
            raise StepError(f"a wavelength calibration needs a wavelength axis, got {sdim!r}")
        n = cube.sizes[sdim]
        if n != self.n_pixels:
            raise StepError(f"calibration is for {self.n_pixels} channels, the cube has {n}")
        lam = self.wavelength_nm()
        if not np.all(np.diff(lam) > 0):
            raise StepError("the calibration is not strictly ascending over the detector")
        attrs_c = dict(cube[sdim].attrs)
        out = cube.assign_coords({sdim: (sdim, lam, attrs_c)})
        attrs = dict(cube.attrs)
        attrs["wavelength_medium"] = self.medium
        smax = self.sigma_max_nm
        return finish(
            out,
            cube,
            "apply_calibration",
            {"reference": self.reference, "degree": self.degree},
            attrs=attrs,
            rms_pm=round(self.rms_pm, 4),
            n_lines=int(self.used.sum()),
            sigma_max_pm=round(smax * 1e3, 4) if np.isfinite(smax) else None,
        )

    def to_dict(self) -> dict:
        """The JSON-ready record (schema in the module docstring)."""
        smax = self.sigma_max_nm
        return {
            "format": _FORMAT_TAG,
            "version": 1,
            "model": "polynomial",
            "domain_pixel": [float(v) for v in self.domain_pixel],
            "coefficients": [float(c) for c in self.coefficients],
            "covariance": (
                None
                if self.covariance is None
                else [[float(v) for v in row] for row in self.covariance]
            ),
            "degree": int(self.degree),
            "n_pixels": int(self.n_pixels),
            "medium": self.medium,
            "reference": self.reference,
            "rms_nm": self.rms_nm,
            "sigma_max_nm": smax if np.isfinite(smax) else None,
            "identification": self.identification,
            "lines": self.lines,
            "pmap_version": __version__,
        }

    def save(self, path: str | os.PathLike) -> Path:
        """Write the calibration as a small JSON file; returns the path."""
        p = Path(path)
        p.write_text(json.dumps(self.to_dict(), indent=2), encoding="utf-8")
        return p


def load_calibration(path: str | os.PathLike) -> WavelengthCalibration:
    """Read a calibration written by :meth:`WavelengthCalibration.save` (JSON, schema v1)."""
    p = Path(path)
    if not p.is_file():
        raise InputFileError(f"calibration file not found: {p}")
    try:
        rec = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise InputFileError(f"{p} is not a readable JSON calibration: {exc}") from None
    if not isinstance(rec, dict) or rec.get("format") != _FORMAT_TAG:
        raise InputFileError(f"{p} is not a pmap wavelength calibration (format tag missing)")
    if rec.get("version") != 1 or rec.get("model") != "polynomial":
        raise InputFileError(
            f"{p}: unsupported calibration version/model "
            f"{rec.get('version')!r}/{rec.get('model')!r}"
        )
    try:
        cov = rec.get("covariance")
        degree = int(rec["degree"])
        if cov is not None:
            cov = [[float(v) for v in row] for row in cov]
            if len(cov) != degree + 1 or any(len(row) != degree + 1 for row in cov):
                raise ValueError(f"covariance is not {degree + 1} × {degree + 1}")
        return WavelengthCalibration(
            coefficients=[float(c) for c in rec["coefficients"]],
            domain_pixel=tuple(float(v) for v in rec["domain_pixel"]),
            degree=degree,
            n_pixels=int(rec["n_pixels"]),
            medium=str(rec.get("medium", "air")),
            reference=str(rec.get("reference", "")),
            lines=list(rec.get("lines", [])),
            covariance=cov,
            identification=(
                rec.get("identification") if isinstance(rec.get("identification"), dict) else None
            ),
        )
    except (KeyError, TypeError, ValueError) as exc:
        raise InputFileError(f"{p}: calibration record is incomplete ({exc})") from None


def _lamp_and_axis(lamp: Any, nominal_nm: Any) -> tuple[np.ndarray, np.ndarray]:
    spec = load_spectrum(lamp, what="lamp spectrum")
    if isinstance(spec, float):
        raise StepError("the lamp spectrum must be a spectrum, not a number")
    if "wavelength" in spec.dims:
        other = [d for d in spec.dims if d != "wavelength"]
        if other:
            spec = spec.mean(other)
        y = np.asarray(spec.values, dtype=float)
        axis = np.asarray(spec["wavelength"].values, dtype=float)
    else:
        y = np.asarray(spec.values, dtype=float).ravel()
        axis = None
    if nominal_nm is not None:
        nom = np.asarray(nominal_nm, dtype=float).ravel()
        if nom.size == 2 and y.size != 2:
            nom = np.linspace(nom[0], nom[1], y.size)
        if nom.size != y.size:
            raise StepError(f"nominal_nm has {nom.size} values for {y.size} channels")
        axis = nom
    if axis is None:
        raise StepError("the lamp spectrum has no wavelength axis: give nominal_nm=")
    if not np.all(np.diff(axis) > 0):
        raise StepError("the nominal wavelength axis must be strictly ascending")
    return y, axis


@dataclass
class _Candidate:
    """One line identification tried: a coarse (shift, scale) and what its fit became."""

    shift_nm: float
    scale: float
    score: float
    offset_nm: float = float("nan")  # solution − nominal at the detector centre (nm)
    n_matched: int = 0
    n_used: int = 0
    rms_nm: float = float("inf")
    log10_chance: float = float("inf")  # expected chance alignments as good (log10)
    degree: int = 1
    poly: Any = None
    j: Any = None
    k: Any = None
    used: Any = None
    problem: str = ""
    inside: bool = True  # coarse offset within the searched range (else a guard-band rival)
    delta_nm: float = float("inf")  # largest |residual| of the lines used
    n_ref_cal: int = 0  # reference lines inside the calibrated range

    def describe(self) -> str:
        where = "" if self.inside else " (beyond the searched range)"
        if self.poly is None or self.problem:
            why = f"; {self.problem}" if self.problem else ""
            return f"offset {self.offset_nm:+.2f} nm{where}: {self.n_matched} lines matched{why}"
        return (
            f"offset {self.offset_nm:+.2f} nm{where}: {self.n_used} lines used "
            f"(rms {self.rms_nm * 1e3:.1f} pm, chance {10.0**self.log10_chance:.1g})"
        )


def _describe(cands: list[_Candidate], n: int = 4) -> str:
    return "; ".join(c.describe() for c in cands[:n]) or "none"


def _solve_candidate(
    cand: _Candidate,
    *,
    pix: np.ndarray,
    lam1: np.ndarray,
    sig_nm: np.ndarray,
    ref: np.ndarray,
    tol: float,
    degree: int | None,
    min_lines: int,
    clip_sigma: float,
    nom: np.ndarray,
    max_dev_nm: float,
) -> _Candidate:
    """Match, fit (sigma clipping), re-match with the fit until stable; fill ``cand``."""
    n = nom.size
    domain = [0.0, float(n - 1)]
    p_mid = 0.5 * (n - 1)
    j, k = _match(lam1, ref, tol)
    cand.n_matched = int(j.size)

    def pick(jj: np.ndarray, kk: np.ndarray) -> int:
        if degree is not None:
            return degree
        top = _max_auto_degree(jj.size)
        return _bic_degree(pix[jj], ref[kk], sig_nm[jj], domain, top) if top > 1 else 1

    deg = pick(j, k)
    cand.degree = deg
    need = max(min_lines, deg + 2)
    if j.size < need:
        cand.problem = f"a degree-{deg} fit needs {need}"
        return cand
    try:
        poly, used = _robust_polyfit(pix[j], ref[k], sig_nm[j], deg, domain, clip_sigma)
        for _ in range(5):
            j_new, k_new = _match(poly(pix), ref, tol)
            if j_new.size < need:
                break
            deg_new = pick(j_new, k_new)
            poly_new, used_new = _robust_polyfit(
                pix[j_new], ref[k_new], sig_nm[j_new], deg_new, domain, clip_sigma
            )
            same = np.array_equal(j_new, j) and np.array_equal(used_new, used) and deg_new == deg
            j, k, poly, used, deg = j_new, k_new, poly_new, used_new, deg_new
            if same:
                break
        # "auto": the rule n ≥ 2 (d + 1) holds for the lines kept, not only those matched
        while degree is None and deg > _max_auto_degree(int(used.sum())):
            top = _max_auto_degree(int(used.sum()))
            ju, ku = j[used], k[used]
            deg = _bic_degree(pix[ju], ref[ku], sig_nm[ju], domain, top) if top > 1 else 1
            poly, used = _robust_polyfit(pix[j], ref[k], sig_nm[j], deg, domain, clip_sigma)
    except StepError as exc:
        cand.problem = str(exc)
        return cand
    cand.poly, cand.j, cand.k, cand.used, cand.degree = poly, j, k, used, deg
    cand.n_matched = int(j.size)
    cand.n_used = int(used.sum())
    res = ref[k][used] - poly(pix[j][used])
    cand.rms_nm = float(np.sqrt(np.mean(res**2)))
    cand.offset_nm = float(poly(p_mid) - np.interp(p_mid, np.arange(n), nom))
    lam = poly(np.arange(n, dtype=float))
    dev = float(np.max(np.abs(lam - nom)))
    if cand.n_used < max(min_lines, deg + 2):
        cand.problem = f"only {cand.n_used} lines kept, a degree-{deg} fit needs more"
    elif not np.all(np.diff(lam) > 0):
        cand.problem = "not ascending over the detector"
    elif dev > max_dev_nm:
        cand.problem = f"departs {dev:.1f} nm from the nominal axis"
    return cand


def calibrate_wavelength(
    lamp: Any,
    *,
    lines: Any = "Ne",
    nominal_nm: Any = None,
    degree: int | str = 3,
    max_shift_nm: float | None = None,
    max_scale: float = 0.005,
    tolerance_nm: float | None = None,
    clip_sigma: float = 3.5,
    min_snr: float = 10.0,
    medium: str = "air",
    min_lines: int = 3,
    min_matched_fraction: float = 0.5,
    centroid_floor_px: float = 0.01,
) -> WavelengthCalibration:
    """Fit a pixel → wavelength polynomial from a reference-lamp spectrum, or refuse.

    Parameters
    ----------
    lamp : DataArray, path or array
        Lamp spectrum on the detector's channels: a 1-D DataArray on ``wavelength`` (its
        coordinate is the nominal axis), a cube (averaged over space), a 2-column text file
        (nominal nm, counts) or a 1-D array with ``nominal_nm``.
    lines : str, path or sequence
        Reference lines, see :func:`reference_lines` ("Ne", "Ar", "Hg", "Ne+Ar", file, list).
    nominal_nm : array or (start, stop), optional
        Nominal wavelength of each channel (nm), overriding the lamp's coordinate.
    degree : int or "auto"
        Polynomial degree (default 3). "auto": lowest Bayesian information criterion
        among the degrees the matched lines support with margin: degree d only if
        n_lines ≥ 2 (d + 1), i.e. twice as many lines as coefficients, at most 5;
        degree 1 when fewer than 6 lines match.
    max_shift_nm : float, optional
        Largest offset of the nominal axis searched (nm); default 2 % of the nominal range.
    max_scale : float
        Largest relative dispersion error searched (default 0.005 = 0.5 %).
    tolerance_nm : float, optional
        Match radius after the offset search (default: 4 channel widths, at least 0.1 nm).
    clip_sigma : float
        Outlier rejection threshold in robust s.d. of the normalised residuals (default 3.5).
    min_snr : float
        Line detection threshold (prominence / noise s.d.).
    medium : {"air", "vacuum"}
        Medium of the calibrated wavelengths (reference lines are tabulated in air).
    min_lines : int
        Fewest lines a solution must use (default 3; a degree-d fit needs at least d + 2).
    min_matched_fraction : float
        Fraction of the lines that could match (the fewer of: lines detected, reference
        lines inside the calibrated range) that the solution must use (default 0.5).
    centroid_floor_px : float
        Systematic floor on each line's position uncertainty (channels, default 0.01),
        added in quadrature to the fit's statistical uncertainty.

    Returns
    -------
    WavelengthCalibration
        With ``residuals_pm``, ``rms_nm``, ``sigma_nm()`` (1σ per channel, nm),
        ``apply(cube)`` and ``save(path)``.

    Raises
    ------
    StepError
        When no solution can be trusted: too few lines detected or matched, a best
        solution that uses too few of the lines, or an ambiguous match (another offset
        uses nearly as many lines with a similar residual). The message names the best
        candidates (offset from the nominal axis at the detector centre in nm, lines used).

    Warns
    -----
    CalibrationExtrapolationWarning
        When channels lie beyond the outermost used lines by more than 5 % of the range;
        the message gives the extrapolated 1σ at the detector edge.

    Notes
    -----
    1. Lines are found in pixel space with sub-pixel Gaussian centres and their 1σ
       (:func:`find_lines`; the fit's residual variance pooled with the white noise).
    2. The detected and reference line patterns are cross-correlated (Gaussian kernels of
       3 channel widths) over ±3 ``max_shift_nm`` in offset and ±``max_scale`` in relative
       scale; every distinct maximum scoring at least half the best is a candidate,
       refined by a finer correlation. Candidates beyond ±``max_shift_nm`` are never
       applied; they are only looked at as rivals.
    3. For each candidate, lines are matched to the nearest reference within the tolerance
       (one-to-one), the polynomial is fitted weighted by the line uncertainties with
       iterative clipping, then all lines are re-matched with the fit until stable.
    4. Each fitted candidate gets the expected number of random alignments in the search
       that would match as many lines as closely (lines matched by chance with
       probability 2δρ each, δ the largest residual, ρ the reference lines per nm; a
       binomial tail times the number of alignments the search resolves at δ). The
       candidate least likely by chance wins, and it is refused (StepError) when that
       expectation exceeds 0.01, when it uses fewer than ``max(min_lines, degree + 2)``
       lines or less than ``min_matched_fraction`` of the matchable ones, when it is not
       ascending or departs from the nominal axis by more than the search allows, or when
       another distinct candidate (inside or beyond the range) is also that unlikely, as
       unlikely, or uses nearly as many lines (all but max(1, 10 %)) with an RMS within 3×.
    5. The coefficient covariance is (AᵀWA)⁻¹ with weights 1/σᵢ² from the line
       uncertainties, multiplied by the reduced χ² when it exceeds 1 and either at least 5
       degrees of freedom are left or the χ² exceeds its 99th percentile (a misfit the
       line uncertainties cannot explain); with fewer degrees of freedom and a plausible
       χ², the residuals say too little and the line uncertainties alone are used. The
       1σ covers line-position noise and misfit seen in the residuals, not the bending of
       the true dispersion between and beyond the lines that a too-low degree misses.

    References
    ----------
    Line wavelengths: Sansonetti & Martin, J. Phys. Chem. Ref. Data 34, 1559 (2005).
    """
    y, nom = _lamp_and_axis(lamp, nominal_nm)
    if isinstance(degree, str):
        if degree != "auto":
            raise StepError(f"degree must be an integer or 'auto', got {degree!r}")
        deg_fixed = None
    else:
        deg_fixed = int(degree)
        if not 1 <= deg_fixed <= 7:
            raise StepError(f"degree must be between 1 and 7, got {deg_fixed}")
    min_lines = int(min_lines)
    if min_lines < 3:
        raise StepError(f"min_lines must be at least 3, got {min_lines}")
    if not 0 < min_matched_fraction <= 1:
        raise StepError(f"min_matched_fraction must be in (0, 1], got {min_matched_fraction}")
    if not (np.isfinite(max_scale) and max_scale >= 0):
        raise StepError(f"max_scale must be ≥ 0, got {max_scale}")
    if not (np.isfinite(centroid_floor_px) and centroid_floor_px >= 0):
        raise StepError(f"centroid_floor_px must be ≥ 0, got {centroid_floor_px}")
    n = y.size
    span = float(nom[-1] - nom[0])
    shift_max = 0.02 * span if max_shift_nm is None else float(max_shift_nm)
    if not (np.isfinite(shift_max) and shift_max >= 0):
        raise StepError(f"max_shift_nm must be a finite number ≥ 0, got {max_shift_nm!r}")
    ref_all = reference_lines(lines, medium=medium)
    label = repr(lines) if isinstance(lines, str) else "the given line list"
    disp = float(np.median(np.diff(nom)))
    coarse = max(3 * disp, 0.1)
    fine = max(disp, 0.02)
    tol = float(tolerance_nm) if tolerance_nm is not None else max(4 * disp, 0.1)
    if not (np.isfinite(tol) and tol > 0):
        raise StepError(f"tolerance_nm must be > 0, got {tolerance_nm!r}")
    guard = _GUARD_FACTOR * shift_max  # offsets beyond the search, looked at for rivals only
    reach = guard + max_scale * span + 2 * coarse
    ref = ref_all[(ref_all > nom[0] - reach - tol) & (ref_all < nom[-1] + reach + tol)]
    need0 = max(min_lines, (deg_fixed or 1) + 2)
    need_why = (
        f"min_lines={min_lines}"
        if need0 == min_lines
        else f"a degree-{deg_fixed} fit needs degree + 2 lines to check itself"
    )
    n_ref_in = int(np.sum((ref_all > nom[0] - shift_max) & (ref_all < nom[-1] + shift_max)))
    if n_ref_in < need0:
        raise StepError(
            f"only {n_ref_in} reference lines of {label} fall in "
            f"{nom[0]:.1f}–{nom[-1]:.1f} nm (± {shift_max:.2f} nm searched); at least "
            f"{need0} are needed ({need_why})"
        )
    pix, sig_px = _find_lines(y, min_snr=min_snr)
    if pix.size < need0:
        raise StepError(
            f"only {pix.size} lines found in the lamp spectrum (min_snr={min_snr}); "
            f"at least {need0} are needed ({need_why})"
        )
    ch = np.arange(n, dtype=float)
    lam_det = np.interp(pix, ch, nom)
    sig_nm = np.hypot(sig_px, centroid_floor_px) * np.abs(np.interp(pix, ch, np.gradient(nom)))
    sig_nm = np.maximum(sig_nm, 1e-9 * max(abs(disp), 1e-9))

    coarse_c, lc = _coarse_candidates(
        lam_det, ref, max_shift_nm=guard, max_scale=max_scale, sigma_nm=coarse, n_max=12
    )
    mid = float(np.interp(0.5 * (n - 1), ch, nom))
    bend = max_scale * float(np.max(np.abs(nom - mid))) + 2 * tol + 2 * coarse
    cands = []
    for score, sh, sc in coarse_c:
        lam1 = _refine(
            lam_det, ref, sh, sc, lc, coarse_nm=coarse, fine_nm=fine, max_scale=max_scale
        )
        cand = _Candidate(shift_nm=sh, scale=sc, score=score, offset_nm=sh + sc * (mid - lc))
        cand.inside = abs(sh) <= shift_max + 0.5 * coarse
        _solve_candidate(
            cand,
            pix=pix,
            lam1=lam1,
            sig_nm=sig_nm,
            ref=ref,
            tol=tol,
            degree=deg_fixed,
            min_lines=min_lines,
            clip_sigma=clip_sigma,
            nom=nom,
            max_dev_nm=(shift_max if cand.inside else guard) + bend,
        )
        if cand.poly is not None and not cand.problem:
            lam_edges = cand.poly(np.asarray([0.0, n - 1.0]))
            n_cal = int(np.sum((ref_all >= lam_edges.min()) & (ref_all <= lam_edges.max())))
            res = np.abs(ref[cand.k] - cand.poly(pix[cand.j]))[cand.used]
            # a match is never credited as tighter than the lines' own uncertainty
            cand.delta_nm = max(float(res.max()), float(np.median(sig_nm[cand.j][cand.used])))
            cand.n_ref_cal = n_cal
            cand.log10_chance = _chance_alignments(
                n_det=pix.size,
                n_used=cand.n_used,
                degree=cand.degree,
                delta_nm=cand.delta_nm,
                density_per_nm=max(n_cal, 1) / max(float(np.ptp(lam_edges)), 1e-9),
                shift_max_nm=shift_max if cand.inside else guard,
                max_scale=max_scale,
                half_range_nm=0.5 * span,
                tol_nm=tol,
            )
        cands.append(cand)
    good = sorted(
        (c for c in cands if c.poly is not None and not c.problem),
        key=lambda c: (c.log10_chance, -c.n_used, c.rms_nm),
    )
    distinct: list[_Candidate] = []
    for c in good:  # the same identification reached from two starts counts once
        if not any(np.all(np.abs(c.poly(pix) - d.poly(pix)) < tol) for d in distinct):
            distinct.append(c)
    failed = sorted((c for c in cands if c not in good), key=lambda c: -c.n_matched)
    listing = _describe(distinct + failed)
    inside = [c for c in distinct if c.inside]
    outside = [c for c in distinct if not c.inside]
    hint = (
        f"the nominal axis may be off by more than the ±{shift_max:.2f} nm searched "
        "(max_shift_nm=), or the line list may not match the lamp"
    )
    legend = (
        " (offset: calibrated − nominal wavelength at the detector centre; chance: "
        "expected number of random alignments that would match as well)"
    )
    if not inside and outside and outside[0].log10_chance <= _LOG10_MAX_CHANCE:
        c = outside[0]
        raise StepError(
            f"line identification refused: no match within ±{shift_max:.2f} nm of the nominal "
            f"axis, but {c.describe()}{legend}; if the nominal axis can be that far "
            f"off, give max_shift_nm={abs(c.offset_nm) + coarse:.1f} or more"
        )
    if not inside:
        raise StepError(
            f"no trustworthy line identification against {label} within ±{shift_max:.2f} nm "
            f"of the nominal axis ({pix.size} lines detected); candidates{legend}: {listing}; "
            f"{hint}"
        )
    best = inside[0]
    n_expect = min(pix.size, best.n_ref_cal)
    if best.n_used < min_matched_fraction * n_expect:
        raise StepError(
            f"line identification refused: the best candidate uses only {best.n_used} of "
            f"{n_expect} matchable lines ({pix.size} detected, {best.n_ref_cal} reference "
            f"lines of {label} in range; min_matched_fraction={min_matched_fraction}); "
            f"candidates{legend}: {listing}; {hint}"
        )
    if best.log10_chance > _LOG10_MAX_CHANCE:
        raise StepError(
            f"line identification refused: the best candidate could be a coincidence "
            f"({best.n_used} of {pix.size} lines within {best.delta_nm * 1e3:.0f} pm, "
            f"{10**best.log10_chance:.2g} random alignments as good expected in the search); "
            f"candidates{legend}: {listing}; {hint}"
        )
    slack = max(1, int(np.ceil(0.1 * best.n_used)))
    rms_ref = 3 * max(best.rms_nm, float(np.median(sig_nm)))

    def rival(c: _Candidate) -> bool:
        return (
            (c.n_used >= best.n_used - slack and c.rms_nm <= rms_ref)
            or c.log10_chance <= _LOG10_MAX_CHANCE
            or c.log10_chance <= best.log10_chance
        )

    rivals = [c for c in inside[1:] if rival(c)]
    if rivals:
        raise StepError(
            f"ambiguous line identification against {label}: {_describe([best, *rivals])} "
            f"fit nearly as well{legend}; give a nominal axis closer to the truth, a smaller "
            "max_shift_nm, or a lamp with more lines"
        )
    far = [c for c in outside if rival(c)]
    if far:
        need = max(abs(c.offset_nm) for c in far) + coarse
        raise StepError(
            f"line identification refused: {_describe(far)} fits as well as or better "
            f"than the best match within ±{shift_max:.2f} nm "
            f"({best.describe()}){legend}; if the nominal axis can be that far off, give "
            f"max_shift_nm={need:.1f} or more"
        )

    # final solution, its covariance and the line records
    deg, j, k, used = best.degree, best.j, best.k, best.used
    domain = [0.0, float(n - 1)]
    pu, lu, su = pix[j][used], ref[k][used], sig_nm[j][used]
    coef, cov = _wfit(pu, lu, su, deg, domain)
    poly = _poly(coef, domain)
    dof = pu.size - (deg + 1)
    if dof >= 1:
        chi2 = float(np.sum(((lu - poly(pu)) / su) ** 2))
        if dof >= 5 or chi2 > _CHI2_99[dof]:
            cov = cov * max(1.0, chi2 / dof)
    fitted = poly(pix[j])
    recs = [
        {
            "pixel": float(pp),
            "reference_nm": float(rr),
            "fitted_nm": float(ff),
            "residual_pm": float((ff - rr) * 1e3),
            "sigma_pm": float(ss * 1e3),
            "used": bool(u),
        }
        for pp, rr, ff, ss, u in zip(pix[j], ref[k], fitted, sig_nm[j], used)
    ]
    name = lines if isinstance(lines, str) else "user line list"
    cal = WavelengthCalibration(
        coefficients=[float(c) for c in coef],
        domain_pixel=(domain[0], domain[1]),
        degree=deg,
        n_pixels=n,
        medium=medium,
        reference=str(name),
        lines=recs,
        covariance=[[float(v) for v in row] for row in cov],
        identification={
            "offset_nm": round(float(poly(0.5 * (n - 1)) - mid), 6),
            "searched_nm": round(shift_max, 6),
            "n_detected": int(pix.size),
            "log10_chance": round(float(max(best.log10_chance, -999.0)), 2),
        },
    )
    _warn_extrapolation(cal)
    return cal


def _warn_extrapolation(cal: WavelengthCalibration) -> None:
    """CalibrationExtrapolationWarning when the detector reaches > 5 % beyond the lines."""
    n = cal.n_pixels
    lo, hi = cal.line_span_pixel
    full = max(n - 1.0, 1.0)
    sides = []
    for edge, gap in ((0.0, lo / full), (n - 1.0, (n - 1.0 - hi) / full)):
        if gap > _EDGE_FRACTION:
            lam = float(cal.wavelength_nm(np.asarray([edge]))[0])
            sig = float(cal.sigma_nm(np.asarray([edge]))[0])
            sides.append(f"{gap:.0%} of the range at the {lam:.1f} nm edge (1σ {sig * 1e3:.0f} pm)")
    if sides:
        inner = float(np.max(cal.sigma_nm(np.linspace(lo, hi, 64))))
        warnings.warn(
            "wavelength calibration extrapolated beyond the outermost lines by "
            + " and ".join(sides)
            + f"; 1σ within the lines ≤ {inner * 1e3:.0f} pm. The polynomial is not "
            "constrained there and the error may exceed this 1σ if the true dispersion "
            "bends: use a lamp with lines nearer the edges or a lower degree",
            CalibrationExtrapolationWarning,
            stacklevel=3,
        )


@register_step("apply_calibration")
def apply_calibration(
    cube: xr.DataArray,
    *,
    calibration: Any = None,
    lamp: Any = None,
    lines: Any = "Ne",
    degree: int | str = 3,
    max_shift_nm: float | None = None,
) -> xr.DataArray:
    """Put the cube on a calibrated wavelength axis (from a saved calibration or a lamp).

    Parameters
    ----------
    cube : xarray.DataArray
        Cube on its nominal wavelength axis (nm).
    calibration : WavelengthCalibration or path, optional
        A calibration object or its JSON file (see :func:`load_calibration`).
    lamp : DataArray or path, optional
        Instead of ``calibration``: a lamp spectrum on the same detector axis, calibrated
        on the fly with :func:`calibrate_wavelength` (``lines``, ``degree``,
        ``max_shift_nm`` in nm, default 2 % of the nominal range).

    Returns
    -------
    xarray.DataArray
        The cube with the calibrated axis (lazy; data unchanged).
    """
    if (calibration is None) == (lamp is None):
        raise StepError("give exactly one of calibration= (file or object) or lamp=")
    if calibration is None:
        cube_c, sdim = check_cube(cube)
        spec = load_spectrum(lamp, what="lamp spectrum")
        nominal = None
        if isinstance(spec, xr.DataArray) and "wavelength" not in spec.dims:
            nominal = np.asarray(cube_c[sdim].values)
        calibration = calibrate_wavelength(
            spec, lines=lines, nominal_nm=nominal, degree=degree, max_shift_nm=max_shift_nm
        )
    elif not isinstance(calibration, WavelengthCalibration):
        calibration = load_calibration(calibration)
    return calibration.apply(cube)
