"""Wavelength calibration from a reference-lamp spectrum (Ne, Ar, Hg or a user's line list).

Calibration file (JSON, written by :meth:`WavelengthCalibration.save`), schema version 1::

    {
      "format": "pmap-wavelength-calibration",   # fixed tag
      "version": 1,
      "model": "polynomial",                     # λ(p) = Polynomial(coefficients,
      "domain_pixel": [p_min, p_max],            #   domain=domain_pixel, window=[-1, 1])
      "coefficients": [c0, c1, ...],             # numpy.polynomial coefficients (nm)
      "degree": 3,
      "n_pixels": 1024,                          # channels of the detector axis
      "medium": "air",                           # medium of the calibrated wavelengths
      "reference": "Ne+Ar",                      # lamp / line list used
      "rms_nm": 0.004,                           # RMS residual of the lines used
      "lines": [{"pixel": 12.34, "reference_nm": 585.2488, "fitted_nm": 585.2491,
                 "residual_pm": 0.3, "used": true}, ...],
      "pmap_version": "0.1.0"
    }

Pixel p is the channel index of the ascending spectral axis (0 … n_pixels − 1).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from scipy import ndimage, optimize, signal

from .._version import __version__
from ..errors import InputFileError, StepError
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
        return np.empty(0)
    widths = signal.peak_widths(r, peaks, rel_height=0.5)[0]
    out = []
    p_all = np.arange(y.size, dtype=float)
    for pk, w in zip(peaks, widths):
        hw = int(max(3, np.ceil(2.0 * w)))
        lo, hi = max(0, pk - hw), min(y.size, pk + hw + 1)
        pp, yy = p_all[lo:hi], r[lo:hi]
        centre = np.nan
        try:
            popt, _ = optimize.curve_fit(
                _gauss, pp, yy, p0=[r[pk], float(pk), max(w / 2.355, 0.5), 0.0], maxfev=2000
            )
            if abs(popt[1] - pk) < 1.5 and popt[0] > 0:
                centre = popt[1]
        except (RuntimeError, optimize.OptimizeWarning, ValueError):
            pass
        if not np.isfinite(centre) and 0 < pk < y.size - 1 and np.all(r[pk - 1 : pk + 2] > 0):
            la, lb, lc = np.log(r[pk - 1 : pk + 2])
            den = la - 2 * lb + lc
            centre = pk + 0.5 * (la - lc) / den if den < 0 else float(pk)
        out.append(centre if np.isfinite(centre) else float(pk))
    return np.asarray(sorted(out))


def _search_shift_scale(
    lam_det: np.ndarray, ref: np.ndarray, *, max_shift_nm: float, max_scale: float, sigma_nm: float
) -> tuple[float, float, float]:
    """Shift s (nm) and relative scale a maximising the overlap of detected and reference lines.

    Model: λ = λ_c + (λ_nom − λ_c)(1 + a) + s; score = Σ_j Σ_k exp(−½((λ_j − r_k)/σ)²),
    a cross-correlation of two synthetic line spectra, evaluated on a grid.
    """
    lc = 0.5 * (lam_det.min() + lam_det.max())
    half = max(0.5 * (lam_det.max() - lam_det.min()), 1e-9)
    shifts = np.arange(-max_shift_nm, max_shift_nm + 1e-12, sigma_nm / 2)
    n_a = int(np.ceil(max_scale * half / (sigma_nm / 2))) if max_scale > 0 else 0
    scales = np.linspace(-max_scale, max_scale, 2 * n_a + 1) if n_a else np.zeros(1)
    best = (-1.0, 0.0, 0.0)
    for a in scales:
        lam_a = lc + (lam_det - lc) * (1 + a)
        d = lam_a[None, :, None] + shifts[:, None, None] - ref[None, None, :]
        score = np.exp(-0.5 * (d / sigma_nm) ** 2).sum(axis=(1, 2))
        i = int(np.argmax(score))
        if score[i] > best[0]:
            best = (float(score[i]), float(shifts[i]), float(a))
    return best[1], best[2], lc


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


def _robust_polyfit(
    p: np.ndarray,
    lam: np.ndarray,
    degree: int,
    domain: list[float],
    clip_sigma: float,
    floor_nm: float,
) -> tuple[np.polynomial.Polynomial, np.ndarray]:
    """Polynomial fit with iterative sigma clipping (MAD scale); returns (poly, used mask)."""
    used = np.ones(p.size, dtype=bool)
    poly = None
    for _ in range(20):
        if used.sum() < degree + 2:
            raise StepError(
                f"only {int(used.sum())} lines survive outlier rejection, a degree-{degree} "
                f"fit needs at least {degree + 2}"
            )
        poly = np.polynomial.Polynomial.fit(p[used], lam[used], degree, domain=domain)
        res = lam - poly(p)
        scale = max(1.4826 * np.median(np.abs(res[used] - np.median(res[used]))), floor_nm)
        new = np.abs(res) <= clip_sigma * scale
        if np.array_equal(new, used):
            break
        used = new
    return poly, used


def _bic_degree(p: np.ndarray, lam: np.ndarray, domain: list[float], max_degree: int) -> int:
    """Lowest-BIC polynomial degree (BIC = n ln(RSS/n) + (d + 1) ln n)."""
    n = p.size
    best, best_bic = 1, np.inf
    for d in range(1, min(max_degree, n - 3) + 1):
        res = lam - np.polynomial.Polynomial.fit(p, lam, d, domain=domain)(p)
        rss = max(float(res @ res), 1e-30)
        bic = n * np.log(rss / n) + (d + 1) * np.log(n)
        if bic < best_bic - 1e-9:
            best, best_bic = d, bic
    return best


@dataclass
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
        Per matched line: pixel, reference_nm, fitted_nm, residual_pm, used.
    """

    coefficients: list[float]
    domain_pixel: tuple[float, float]
    degree: int
    n_pixels: int
    medium: str = "air"
    reference: str = ""
    lines: list[dict] = field(default_factory=list)

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
        return finish(
            out,
            cube,
            "apply_calibration",
            {"reference": self.reference, "degree": self.degree},
            attrs=attrs,
            rms_pm=round(self.rms_pm, 4),
            n_lines=int(self.used.sum()),
        )

    def to_dict(self) -> dict:
        """The JSON-ready record (schema in the module docstring)."""
        return {
            "format": _FORMAT_TAG,
            "version": 1,
            "model": "polynomial",
            "domain_pixel": [float(v) for v in self.domain_pixel],
            "coefficients": [float(c) for c in self.coefficients],
            "degree": int(self.degree),
            "n_pixels": int(self.n_pixels),
            "medium": self.medium,
            "reference": self.reference,
            "rms_nm": self.rms_nm,
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
        return WavelengthCalibration(
            coefficients=[float(c) for c in rec["coefficients"]],
            domain_pixel=tuple(float(v) for v in rec["domain_pixel"]),
            degree=int(rec["degree"]),
            n_pixels=int(rec["n_pixels"]),
            medium=str(rec.get("medium", "air")),
            reference=str(rec.get("reference", "")),
            lines=list(rec.get("lines", [])),
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


def calibrate_wavelength(
    lamp: Any,
    *,
    lines: Any = "Ne",
    nominal_nm: Any = None,
    degree: int | str = 3,
    max_shift_nm: float = 2.0,
    max_scale: float = 0.005,
    tolerance_nm: float | None = None,
    clip_sigma: float = 3.5,
    min_snr: float = 10.0,
    medium: str = "air",
) -> WavelengthCalibration:
    """Fit a pixel → wavelength polynomial from a reference-lamp spectrum.

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
        Polynomial degree (default 3); "auto": lowest Bayesian information criterion
        among degrees 1–5 on the matched lines.
    max_shift_nm : float
        Largest offset of the nominal axis searched (nm, default 2).
    max_scale : float
        Largest relative dispersion error searched (default 0.005 = 0.5 %).
    tolerance_nm : float, optional
        Match radius after the offset search (default: 4 channel widths, at least 0.1 nm).
    clip_sigma : float
        Outlier rejection threshold in robust s.d. of the residuals (default 3.5).
    min_snr : float
        Line detection threshold (prominence / noise s.d.).
    medium : {"air", "vacuum"}
        Medium of the calibrated wavelengths (reference lines are tabulated in air).

    Returns
    -------
    WavelengthCalibration
        With ``residuals_pm``, ``rms_nm``, ``apply(cube)`` and ``save(path)``.

    Notes
    -----
    1. Lines are found in pixel space with sub-pixel Gaussian centres (:func:`find_lines`).
    2. The offset and scale of the nominal axis are found by cross-correlating the
       detected and reference line patterns (Gaussian kernels, a grid search: coarse, then
       fine), so an axis off by ~1 nm is handled.
    3. Lines are matched to the nearest reference within the tolerance, one-to-one.
    4. The polynomial is fitted with iterative sigma clipping (MAD scale), then all lines
       are re-matched with the fitted solution and the fit repeated until stable, so a
       missing line or a spurious one does not spoil it.

    References
    ----------
    Line wavelengths: Sansonetti & Martin, J. Phys. Chem. Ref. Data 34, 1559 (2005).
    """
    y, nom = _lamp_and_axis(lamp, nominal_nm)
    ref_all = reference_lines(lines, medium=medium)
    disp = float(np.median(np.diff(nom)))
    ref = ref_all[(ref_all > nom[0] - max_shift_nm) & (ref_all < nom[-1] + max_shift_nm)]
    if ref.size < 3:
        raise StepError(
            f"only {ref.size} reference lines of {lines!r} fall in {nom[0]:.1f}–{nom[-1]:.1f} nm"
        )
    pix = find_lines(y, min_snr=min_snr)
    if pix.size < 3:
        raise StepError(f"only {pix.size} lines found in the lamp spectrum (min_snr={min_snr})")
    n = y.size
    lam_det = np.interp(pix, np.arange(n), nom)
    coarse = max(3 * disp, 0.1)
    s, a, lc = _search_shift_scale(
        lam_det, ref, max_shift_nm=max_shift_nm, max_scale=max_scale, sigma_nm=coarse
    )
    fine = max(disp, 0.02)
    lam0 = lc + (lam_det - lc) * (1 + a) + s
    s2, a2, lc2 = _search_shift_scale(
        lam0, ref, max_shift_nm=2 * coarse, max_scale=max_scale / 4, sigma_nm=fine
    )
    lam1 = lc2 + (lam0 - lc2) * (1 + a2) + s2
    tol = float(tolerance_nm) if tolerance_nm is not None else max(4 * disp, 0.1)
    j, k = _match(lam1, ref, tol)
    domain = [0.0, float(n - 1)]
    deg_auto = isinstance(degree, str)
    if deg_auto and degree != "auto":
        raise StepError(f"degree must be an integer or 'auto', got {degree!r}")
    if deg_auto:
        deg = _bic_degree(pix[j], ref[k], domain, 5) if j.size >= 5 else 1
    else:
        deg = int(degree)
        if not 1 <= deg <= 7:
            raise StepError(f"degree must be between 1 and 7, got {deg}")
    if j.size < deg + 2:
        raise StepError(
            f"only {j.size} lines matched the reference list {lines!r}; "
            f"a degree-{deg} fit needs at least {deg + 2}"
        )
    floor = max(0.02 * disp, 1e-4)
    poly, used = _robust_polyfit(pix[j], ref[k], deg, domain, clip_sigma, floor)
    for _ in range(5):
        j_new, k_new = _match(poly(pix), ref, tol)
        if j_new.size < deg + 2:
            break
        if deg_auto:
            deg = _bic_degree(pix[j_new], ref[k_new], domain, 5) if j_new.size >= 5 else 1
        poly_new, used_new = _robust_polyfit(pix[j_new], ref[k_new], deg, domain, clip_sigma, floor)
        same = np.array_equal(j_new, j) and np.array_equal(used_new, used)
        j, k, poly, used = j_new, k_new, poly_new, used_new
        if same:
            break
    fitted = poly(pix[j])
    recs = [
        {
            "pixel": float(pp),
            "reference_nm": float(rr),
            "fitted_nm": float(ff),
            "residual_pm": float((ff - rr) * 1e3),
            "used": bool(u),
        }
        for pp, rr, ff, u in zip(pix[j], ref[k], fitted, used)
    ]
    name = lines if isinstance(lines, str) else "user line list"
    return WavelengthCalibration(
        coefficients=[float(c) for c in poly.coef],
        domain_pixel=(domain[0], domain[1]),
        degree=deg,
        n_pixels=n,
        medium=medium,
        reference=str(name),
        lines=recs,
    )


@register_step("apply_calibration")
def apply_calibration(
    cube: xr.DataArray,
    *,
    calibration: Any = None,
    lamp: Any = None,
    lines: Any = "Ne",
    degree: int | str = 3,
    max_shift_nm: float = 2.0,
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
        on the fly with :func:`calibrate_wavelength` (``lines``, ``degree``, ``max_shift_nm``).

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
