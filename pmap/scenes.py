"""A bank of synthetic PL map scenes, each shipped with its truth.

Every scene is an invented scenario of our own (a different material system
*and* instrument), made so that cleaning, detection, fitting and segmentation
methods can be tried on maps they were not tuned on. Nothing here was measured.
The scenes are listed in :data:`SCENES` and documented in ``demo_maps/README.md``.

How a scene is rendered
-----------------------
* Every emission line is defined in **photon energy** (vacuum) by a location
  ``line_center_ev``, an intrinsic Gaussian σ ``line_sigma_ev``, and either a
  Lorentzian half width ``line_gamma_ev`` (a Voigt line) or an exponential
  low-energy tail of decay energy ``line_tail_ev`` (an exponentially modified
  Gaussian: a band-tail line); with neither it is a Gaussian. Phonon replicas
  are separate Gaussian lines ħω apart with Poisson (Huang–Rhys) weights.
* The instrument function is a Gaussian of constant FWHM in nm
  (``instrument_fwhm_nm``, wavelength axes) or in eV (``instrument_fwhm_ev``,
  energy axes). It is convolved into each line analytically (the Gaussian σ's
  add in quadrature); on a wavelength axis its energy width at a line is
  σ_E = σ_λ·E0²/hc, taken at the line's ``line_center_ev``.
* Counts in a channel are the integral of the broadened line over the
  channel's energy interval: exact CDF differences for Gaussian and band-tail
  lines, 6-point Gauss–Legendre quadrature per channel near a Voigt line and the
  Lorentzian CDF with its σ² correction in its far wings. Channel edges are the
  midpoints of the channel centres; wavelength edges are converted to vacuum
  (IAU formula for air axes) and to energy by E = hc/λ, so the Jacobian is built
  in and the channel counts of a line add up to its area times the fraction of
  the line inside the window.
* Detector: Poisson photoelectrons (expected counts × gain) / gain, plus
  Normal(dark level, read noise), rounded to whole counts and clipped to
  0…``saturation_counts``. Then the defects: cosmic spikes (1–5 channels wide,
  narrower than the instrument function, ≥ 15σ above the expected value in each
  channel, put on peak tops, in the wings and anywhere), dead pixels (no
  photons), hot pixels (a read-out glitch: a flat offset and extra noise),
  saturated pixels (a bright spot that clips) and, on one scene, hot and dead
  detector channels.

Truth (``Scene.truth``)
-----------------------
``region`` (y, x, int16; 0 = no emission, names in its attr ``region_names``),
``signal`` (y, x), ``expected`` (y, x, S; noise-free raw counts with dark level
and background, without spikes and defects), ``background`` (y, x, S; counts
above the dark level that are not emission lines), ``spike_mask`` (y, x, S),
``bad_pixel`` (y, x; 0 good, 1 dead, 2 hot, 3 saturated), ``bad_channel`` (S;
0 good, 1 dead, 2 hot), ``peak_energy_ev``, ``peak_fwhm_ev``,
``peak_area_counts`` (y, x; the main line = the brightest line as recorded,
the one with the highest noise-free count in one channel: the energy of the
maximum of its intrinsic profile, its intrinsic FWHM before the instrument, its
total area over all energies), ``narrow_line`` (y, x), and every line's
parameters on (line, y, x): ``line_center_ev``, ``line_sigma_ev``,
``line_gamma_ev``, ``line_tail_ev``, ``line_area_counts``, ``line_energy_ev``
(maximum), ``line_fwhm_ev`` (intrinsic FWHM), ``line_peak_counts`` (highest
noise-free channel count); NaN where a line is absent. Attrs:
``snr_range`` (2nd and 98th percentile over good signal pixels of the line
signal at its brightest channel over the noise σ there), ``minority_regions``
and ``minority_fractions``, ``notes``.

Everything is a function of the scene name, ``seed`` and ``shape``.

Example
-------
>>> from pmap.synthetic import make_scene, scene_names
>>> scene = make_scene("ingan_led_wafer", seed=1)          # doctest: +SKIP
>>> scene.cube, scene.truth.region                           # doctest: +SKIP
"""

from __future__ import annotations

import json
import math
import zlib
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr
from scipy import special

from .conventions import HC_EV_NM
from .cube import validate_cube
from .errors import StepError
from .provenance import with_step

__all__ = ["SCENES", "Scene", "make_scene", "scene_names"]

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_GL_X, _GL_W = np.polynomial.legendre.leggauss(6)
_MIN_SIDE = 16


@dataclass
class Scene:
    """A synthetic PL map with its truth.

    Attributes
    ----------
    name : str
        Scene name (a key of :data:`SCENES`).
    description : str
        Material system, instrument, and what is hard about the scene.
    cube : xarray.DataArray
        Canonical pmap cube (y, x, wavelength nm or energy eV), raw detector counts.
    truth : xarray.Dataset
        Known truth (see the module docstring).
    """

    name: str
    description: str
    cube: xr.DataArray
    truth: xr.Dataset


# --------------------------------------------------------------------------- building blocks


@dataclass
class _Axis:
    """Spectral axis: channel centres (ascending), edge energies (eV), instrument function."""

    dim: str  # "wavelength" or "energy"
    centres: np.ndarray
    edge_ev: np.ndarray  # n + 1 edges, descending for wavelength axes
    medium: str | None
    instrument_fwhm: float  # nm or eV

    def instrument_sigma_ev(self, e0_ev: np.ndarray) -> np.ndarray:
        """σ (eV) of the instrument Gaussian at photon energy ``e0_ev``."""
        sig = self.instrument_fwhm / _FWHM_PER_SIGMA
        if self.dim == "energy":
            return np.full_like(np.asarray(e0_ev, dtype=float), sig)
        return sig * np.asarray(e0_ev, dtype=float) ** 2 / HC_EV_NM


def _wavelength_axis(lo_nm: float, hi_nm: float, n: int, medium: str, fwhm_nm: float) -> _Axis:
    from .synthetic import DemoScenario, _edge_energies_ev
    from .synthetic import _wavelength_axis as demo_axis

    centres, edges = demo_axis(n, DemoScenario(wavelength_min_nm=lo_nm, wavelength_max_nm=hi_nm))
    return _Axis("wavelength", centres, _edge_energies_ev(edges, medium), medium, fwhm_nm)


def _energy_axis(lo_ev: float, hi_ev: float, n: int, fwhm_ev: float) -> _Axis:
    centres = np.linspace(lo_ev, hi_ev, n)
    half = (centres[1] - centres[0]) / 2
    edges = np.linspace(lo_ev - half, hi_ev + half, n + 1)
    return _Axis("energy", centres, edges, None, fwhm_ev)


@dataclass(frozen=True)
class _Detector:
    gain_e_per_count: float
    read_noise_counts: float
    dark_level_counts: float
    saturation_counts: float
    exposure_s: float


@dataclass
class _Line:
    """One emission line as per-pixel maps; ``area`` 0 where the line is absent."""

    name: str
    area: Any  # counts over all energies
    center_ev: Any
    sigma_ev: Any = 0.0
    gamma_ev: Any = 0.0  # Lorentzian HWHM (Voigt line)
    tail_ev: Any = 0.0  # exponential low-energy tail decay energy (band-tail line)


@dataclass
class _Spec:
    """Everything a scene builder decides; :func:`_finish` renders it."""

    name: str
    description: str
    axis: _Axis
    det: _Detector
    pixel_um: float
    region: np.ndarray
    region_names: list[str]
    lines: list[_Line]
    background: np.ndarray  # (ny, nx, nch) counts above the dark level
    minority: list[int] = field(default_factory=list)
    narrow: np.ndarray | None = None
    n_bad: tuple[int, int, int] = (1, 1, 1)  # dead, hot, saturated spatial pixels
    hot_channels: int = 0
    dead_channels: int = 0
    spike_widths: tuple[int, ...] = (1,)
    spike_rate_per_spectrum: float = 0.1
    acquisition: dict[str, Any] = field(default_factory=dict)
    notes: str = ""


def _rng(seed: int, name: str, stream: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed), zlib.crc32(name.encode()), stream]))


def _field(rng: np.random.Generator, shape: tuple[int, int], corr_px: float) -> np.ndarray:
    """Smooth random field, zero mean, unit s.d., correlation length ``corr_px`` pixels."""
    from .synthetic import _smooth_field

    return _smooth_field(rng, shape, corr_px)


def _top(score: np.ndarray, eligible: np.ndarray, n: int) -> np.ndarray:
    """Mask of the ``n`` eligible pixels of highest ``score``."""
    out = np.zeros(score.shape, dtype=bool)
    idx = np.flatnonzero(eligible)
    n = int(min(max(n, 0), idx.size))
    if n:
        out.flat[idx[np.argsort(score.flat[idx])[::-1][:n]]] = True
    return out


def _grid(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    yy, xx = np.indices(shape, dtype=float)
    return yy, xx


def _fwhm_to_sigma(fwhm_ev):
    return np.asarray(fwhm_ev, dtype=float) / _FWHM_PER_SIGMA


# --------------------------------------------------------------------------- line shapes


def _gauss_cdf(edge_ev, c, s):
    return special.ndtr((edge_ev[None, :] - c[:, None]) / s[:, None])


def _tail_cdf(edge_ev, c, s, tau):
    """CDF of a Gaussian (c, s) with an exponential low-energy tail of decay energy tau."""
    k = (s / tau)[:, None]
    u = (c[:, None] - edge_ev[None, :]) / s[:, None]
    return special.ndtr(-u) + np.exp(-k * u + 0.5 * k * k + special.log_ndtr(u - k))


def _voigt_channels(edge_ev, c, s, g):
    """Fraction of unit-area Voigt lines (c, σ s, HWHM g) in each channel, (n, nch)."""
    x = edge_ev[None, :] - c[:, None]
    gg = g[:, None]
    prim = 0.5 + np.arctan(x / gg) / np.pi  # Lorentzian CDF ...
    prim -= s[:, None] ** 2 * gg * x / (np.pi * (x * x + gg * gg) ** 2)  # ... + σ²/2·L'(x)
    out = np.abs(np.diff(prim, axis=1))
    lo = np.minimum(edge_ev[:-1], edge_ev[1:])
    hi = np.maximum(edge_ev[:-1], edge_ev[1:])
    mid, half = (lo + hi) / 2, (hi - lo) / 2
    near = np.abs(mid[None, :] - c[:, None]) < 10.0 * (s + g)[:, None] + half[None, :]
    pi, ci = np.nonzero(near)
    for a in range(0, pi.size, 200_000):
        p, q = pi[a : a + 200_000], ci[a : a + 200_000]
        nodes = mid[q, None] + half[q, None] * _GL_X[None, :] - c[p, None]
        prof = special.voigt_profile(nodes, s[p, None], g[p, None])
        out[p, q] = (prof @ _GL_W) * half[q]
    return out


def _line_channels(edge_ev, c, s_tot, g, tau):
    """Channel fractions (n, nch) of unit-area lines, instrument included in ``s_tot``."""
    if np.any(g > 0):
        return _voigt_channels(edge_ev, c, s_tot, g)
    if np.any(tau > 0):
        return np.abs(np.diff(_tail_cdf(edge_ev, c, s_tot, tau), axis=1))
    return np.abs(np.diff(_gauss_cdf(edge_ev, c, s_tot), axis=1))


def _bisect(fun, lo, hi, n_iter=60):
    """Vectorised bisection for fun(x) = 0 with fun(lo) > 0 > fun(hi) (or the reverse)."""
    lo, hi = np.array(lo, dtype=float), np.array(hi, dtype=float)
    flo = fun(lo)
    for _ in range(n_iter):
        mid = (lo + hi) / 2
        fm = fun(mid)
        same = np.sign(fm) == np.sign(flo)
        lo = np.where(same, mid, lo)
        flo = np.where(same, fm, flo)
        hi = np.where(same, hi, mid)
    return (lo + hi) / 2


def _intrinsic_stats(c, s, g, tau):
    """Energy of the maximum and FWHM (eV) of the intrinsic (pre-instrument) line profiles."""
    c, s, g, tau = (np.asarray(v, dtype=float) for v in (c, s, g, tau))
    mode = c.copy()
    fwhm = _FWHM_PER_SIGMA * s
    v = g > 0
    if v.any():
        sv, gv = s[v], g[v]
        half = 0.5 * special.voigt_profile(0.0, sv, gv)
        fwhm[v] = 2 * _bisect(
            lambda x: special.voigt_profile(x, sv, gv) - half, np.zeros_like(sv), 5 * (sv + gv)
        )
    t = tau > 0
    if t.any():
        # standard form: t = (c - E)/σ has density k·exp(-k t + k²/2)·Φ(t - k), k = σ/τ
        k = s[t] / tau[t]

        def logpdf(x):
            return np.log(k) - k * x + 0.5 * k * k + special.log_ndtr(x - k)

        a, b = np.full_like(k, -3.0), 3.0 + 2.0 / k
        for _ in range(80):  # golden section (the density is log-concave)
            m1, m2 = b - 0.618034 * (b - a), a + 0.618034 * (b - a)
            up = logpdf(m1) < logpdf(m2)
            a, b = np.where(up, m1, a), np.where(up, b, m2)
        tm = (a + b) / 2
        lhalf = logpdf(tm) - math.log(2.0)
        left = _bisect(lambda x: logpdf(x) - lhalf, tm - 12.0, tm)
        right = _bisect(lambda x: logpdf(x) - lhalf, tm, tm + 12.0 + 12.0 / k)
        mode[t] = c[t] - s[t] * tm
        fwhm[t] = s[t] * (right - left)
    return mode, fwhm


# --------------------------------------------------------------------------- rendering


def _render_lines(spec: _Spec):
    """Line counts (ny, nx, nch) and the per-line truth arrays (n_lines, ny, nx)."""
    ny, nx = spec.region.shape
    nch = spec.axis.centres.size
    counts = np.zeros((ny, nx, nch))
    names = ("center", "sigma", "gamma", "tail", "area", "energy", "fwhm", "peak")
    par = {k: np.full((len(spec.lines), ny, nx), np.nan) for k in names}
    for i, ln in enumerate(spec.lines):
        area = np.broadcast_to(np.asarray(ln.area, dtype=float), (ny, nx))
        on = np.isfinite(area) & (area > 0)
        if not on.any():
            continue
        c, s, g, tau = (
            np.broadcast_to(np.asarray(v, dtype=float), (ny, nx))[on]
            for v in (ln.center_ev, ln.sigma_ev, ln.gamma_ev, ln.tail_ev)
        )
        if np.any(g > 0) and np.any(tau > 0):
            raise StepError(f"line {ln.name!r}: a Voigt line cannot also have a band tail")
        s_tot = np.sqrt(s**2 + spec.axis.instrument_sigma_ev(c) ** 2)
        this = area[on][:, None] * _line_channels(spec.axis.edge_ev, c, s_tot, g, tau)
        counts[on] += this
        mode, fwhm = _intrinsic_stats(c, s, g, tau)
        for k, val in zip(names, (c, s, g, tau, area[on], mode, fwhm, this.max(axis=1))):
            par[k][i][on] = val
    return counts, par


def _detector_variance(mean_counts: np.ndarray, det: _Detector) -> np.ndarray:
    """Photon-transfer variance (counts²) of a reading with expected value ``mean_counts``."""
    return (
        np.maximum(mean_counts - det.dark_level_counts, 0.0) / det.gain_e_per_count
        + det.read_noise_counts**2
        + 1.0 / 12.0
    )


def _pick_pixels(rng, candidates: np.ndarray, n: int, min_sep: float = 3.0) -> list[tuple[int, int]]:
    """Up to ``n`` candidate pixels at least ``min_sep`` pixels apart."""
    idx = rng.permutation(np.flatnonzero(candidates))
    out: list[tuple[int, int]] = []
    for f in idx:
        yx = np.unravel_index(f, candidates.shape)
        if all(math.hypot(yx[0] - a, yx[1] - b) >= min_sep for a, b in out):
            out.append((int(yx[0]), int(yx[1])))
        if len(out) == n:
            break
    return out


def _finish(spec: _Spec, seed: int) -> Scene:
    """Render a scene spec into a cube and its truth."""
    det, axis = spec.det, spec.axis
    ny, nx = spec.region.shape
    nch = axis.centres.size
    rng = _rng(seed, spec.name, 1)
    narrow = np.zeros((ny, nx), bool) if spec.narrow is None else spec.narrow
    lines, par = _render_lines(spec)
    photons = spec.background + lines  # counts above the dark level
    expected = photons + det.dark_level_counts
    signal = np.nansum(par["area"], axis=0) > 0

    # spatial defects, away from the border, minority regions and narrow emitters
    inner = np.zeros((ny, nx), bool)
    inner[2:-2, 2:-2] = True
    ok = inner & signal & ~narrow & ~np.isin(spec.region, spec.minority)
    n_dead, n_hot, n_sat = spec.n_bad
    picks = _pick_pixels(rng, ok, n_dead + n_hot + n_sat, min_sep=4.0)
    bad = np.zeros((ny, nx), np.int8)
    for j, yx in enumerate(picks):
        bad[yx] = 1 if j < n_dead else 2 if j < n_dead + n_hot else 3
    detected = photons.copy()
    detected[bad == 1] = 0.0
    head = det.saturation_counts - det.dark_level_counts
    for yx in zip(*np.nonzero(bad == 3)):
        peak = lines[yx].max()
        detected[yx] = spec.background[yx] + lines[yx] * (1.8 * head / peak)

    # detector channels
    bad_ch = np.zeros(nch, np.int8)
    order = rng.permutation(np.arange(3, nch - 3))
    bad_ch[order[: spec.dead_channels]] = 1
    bad_ch[order[spec.dead_channels : spec.dead_channels + spec.hot_channels]] = 2
    detected[:, :, bad_ch == 1] = 0.0
    hot_ch = np.flatnonzero(bad_ch == 2)
    detected[:, :, hot_ch] += rng.uniform(80.0, 400.0, size=hot_ch.size) * det.read_noise_counts

    g = det.gain_e_per_count
    raw = rng.poisson(detected * g) / g
    raw += rng.normal(det.dark_level_counts, det.read_noise_counts, size=raw.shape)
    hot = bad == 2
    raw[hot] += 40.0 * det.read_noise_counts + rng.normal(
        0.0, 3.0 * det.read_noise_counts, size=(int(hot.sum()), nch)
    )

    # cosmic spikes: on peak tops, in the wings, anywhere
    sigma = np.sqrt(_detector_variance(expected, det))
    mask = np.zeros((ny, nx, nch), bool)
    good_px = np.flatnonzero(bad.ravel() == 0)
    n_spikes = rng.poisson(spec.spike_rate_per_spectrum * ny * nx)
    for _ in range(n_spikes):
        p = np.unravel_index(good_px[rng.integers(good_px.size)], (ny, nx))
        sig_line = lines[p]
        kind = rng.random()
        peak_ch = int(np.argmax(sig_line))
        top = sig_line[peak_ch]
        wing = np.flatnonzero((sig_line > 0.05 * top) & (sig_line < 0.5 * top)) if top > 0 else []
        if kind < 0.35 and top > 0:
            ch = peak_ch + int(rng.integers(-1, 2))
        elif kind < 0.7 and len(wing):
            ch = int(wing[rng.integers(len(wing))])
        else:
            ch = int(rng.integers(nch))
        w = int(spec.spike_widths[rng.integers(len(spec.spike_widths))])
        ch0 = min(max(ch - (w - 1) // 2, 0), nch - w)
        sl = slice(ch0, ch0 + w)
        ref = sigma[p][sl].max()
        amp = ref * math.exp(rng.uniform(math.log(20.0), math.log(400.0)))
        amp = np.maximum(amp * rng.uniform(0.5, 1.0, size=w), 15.0 * sigma[p][sl])
        amp[bad_ch[sl] > 0] = 0.0
        raw[p][sl] += amp
        mask[p][sl] |= amp > 0
    cube_vals = np.clip(np.rint(raw), 0.0, det.saturation_counts).astype(np.float32)

    # truth of the main line (highest noise-free channel count)
    heights = np.where(np.isfinite(par["peak"]), par["peak"], -np.inf)
    main = np.argmax(heights, axis=0)[None]
    pick = {k: np.where(signal, np.take_along_axis(par[k], main, 0)[0], np.nan) for k in par}
    sig_main = np.take_along_axis(lines, np.argmax(lines, axis=2)[..., None], 2)[..., 0]
    var_main = _detector_variance(
        np.take_along_axis(expected, np.argmax(lines, axis=2)[..., None], 2)[..., 0], det
    )
    snr = sig_main / np.sqrt(var_main)
    good_sig = signal & (bad == 0)
    snr_range = [round(float(np.percentile(snr[good_sig], q)), 1) for q in (2, 98)]

    sdim = axis.dim
    sunits = "nm" if sdim == "wavelength" else "eV"
    y_um = np.arange(ny) * spec.pixel_um
    x_um = np.arange(nx) * spec.pixel_um
    coords = {
        "y": ("y", y_um, {"units": "um", "long_name": "y position"}),
        "x": ("x", x_um, {"units": "um", "long_name": "x position"}),
        sdim: (sdim, axis.centres, {"units": sunits}),
    }
    attrs: dict[str, Any] = {
        "units": "counts",
        "long_name": "PL intensity (raw detector counts)",
        **spec.acquisition,
        "exposure_s": det.exposure_s,
        "gain_e_per_count": det.gain_e_per_count,
        "read_noise_counts": det.read_noise_counts,
        "dark_level_counts": det.dark_level_counts,
        "saturation_counts": det.saturation_counts,
        "instrument_notes": (
            f"SYNTHETIC data from pmap.scenes, scene {spec.name!r}, seed {int(seed)}: an "
            "invented scenario, not a measurement. " + spec.description
        ),
    }
    if sdim == "wavelength":
        attrs["wavelength_medium"] = axis.medium
        attrs["instrument_fwhm_nm"] = axis.instrument_fwhm
    else:
        attrs["instrument_fwhm_ev"] = axis.instrument_fwhm
    attrs = with_step(attrs, "synthetic_scene", {"name": spec.name, "seed": int(seed),
                                                  "shape": [ny, nx]})
    cube = validate_cube(
        xr.DataArray(cube_vals, dims=("y", "x", sdim), coords=coords, name="intensity",
                     attrs=attrs)
    )

    yx, yxs, lyx = ("y", "x"), ("y", "x", sdim), ("line", "y", "x")
    ev = {"units": "eV"}
    frac = {
        str(r): round(float(np.mean(spec.region == r)), 4) for r in spec.minority
    }
    tv = {
        "region": (yx, spec.region.astype(np.int16), {
            "long_name": "emission type (0 = no emission)", "units": "1",
            "region_names": json.dumps(spec.region_names)}),
        "signal": (yx, signal, {"long_name": "pixel has real emission"}),
        "expected": (yxs, expected.astype(np.float32), {
            "long_name": "noise-free expected raw counts (dark level and background included; "
                         "spikes, bad pixels and bad channels excluded)", "units": "counts"}),
        "background": (yxs, spec.background.astype(np.float32), {
            "long_name": "noise-free background above the dark level (not emission lines)",
            "units": "counts"}),
        "spike_mask": (yxs, mask, {"long_name": "value carries a cosmic spike",
                                   "spike_widths_channels": list(spec.spike_widths)}),
        "bad_pixel": (yx, bad, {"long_name": "spatial pixel defect",
                                "flag_values": [0, 1, 2, 3],
                                "flag_meanings": "good dead hot saturated"}),
        "bad_channel": (sdim, bad_ch, {"long_name": "detector channel defect",
                                       "flag_values": [0, 1, 2],
                                       "flag_meanings": "good dead hot"}),
        "peak_energy_ev": (yx, pick["energy"], {
            "long_name": "main line: photon energy of its maximum (intrinsic profile)", **ev}),
        "peak_fwhm_ev": (yx, pick["fwhm"], {
            "long_name": "main line: intrinsic FWHM (before the instrument)", **ev}),
        "peak_area_counts": (yx, pick["area"], {
            "long_name": "main line: total area over all energies", "units": "counts"}),
        "narrow_line": (yx, narrow, {"long_name": "pixel holds a single-pixel narrow emitter"}),
    }
    long = {
        "center": "location parameter", "sigma": "intrinsic Gaussian sigma",
        "gamma": "Lorentzian half width (Voigt lines)",
        "tail": "decay energy of the exponential low-energy tail (band-tail lines)",
        "energy": "photon energy of the maximum (intrinsic)", "fwhm": "intrinsic FWHM",
    }
    for k, text in long.items():
        tv[f"line_{k}_ev"] = (lyx, par[k], {"long_name": text, **ev})
    tv["line_area_counts"] = (lyx, par["area"], {"long_name": "total line area",
                                                 "units": "counts"})
    tv["line_peak_counts"] = (lyx, par["peak"], {
        "long_name": "highest noise-free count of the line in one channel (instrument "
                     "included, dark level and background excluded)", "units": "counts"})
    tcoords = {k: v for k, v in coords.items()}
    tcoords["line"] = ("line", np.arange(len(spec.lines)))
    tcoords["line_name"] = ("line", np.array([ln.name for ln in spec.lines], dtype=object))
    truth = xr.Dataset(tv, coords=tcoords, attrs={
        "title": f"truth of the pmap synthetic scene {spec.name!r}",
        "scene": spec.name,
        "seed": int(seed),
        "snr_range": snr_range,
        "minority_regions": list(spec.minority),
        "minority_fractions": json.dumps(frac),
        "notes": spec.notes,
    })
    return Scene(spec.name, spec.description, cube, truth)


# --------------------------------------------------------------------------- the scenes


def _halide_perovskite_graded_film(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "halide_perovskite_graded_film"
    shape = shape or (48, 64)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    axis = _wavelength_axis(640.0, 860.0, 384, "air", 1.4)
    # scratch through the film down to the glass: a 2-pixel wide line
    theta = rng.uniform(0.9, 1.3)
    x0 = rng.uniform(0.35, 0.65) * nx
    scratch = np.abs((xx - x0) * math.sin(theta) - (yy - ny / 2) * math.cos(theta)) < 1.0
    region = np.where(scratch, 0, 1).astype(np.int16)
    film = region == 1
    seg = _top(_field(rng, shape, 1.5), film, round(0.03 * ny * nx))
    region[seg] = 2
    wedge = 0.2 + 0.8 / (1.0 + np.exp(-(yy - 0.45 * ny) / 4.55))  # 0.2 -> 1 over ~20 px
    be_area = 150_000.0 * wedge * (1 + 0.1 * _field(rng, shape, 6.0))
    be_e = 1.64 + 0.08 * xx / (nx - 1) + 0.003 * _field(rng, shape, 3.0)
    be_s = _fwhm_to_sigma(0.095 + 0.004 * _field(rng, shape, 5.0))
    seg_area = np.where(seg, 1.6 * be_area, 0.0)
    be_area = np.where(film, np.where(seg, 0.3 * be_area, be_area), 0.0)
    lines = [
        _Line("band_edge", be_area, be_e, be_s),
        _Line("segregated", seg_area, 1.565 + 0.005 * _field(rng, shape, 2.0), _fwhm_to_sigma(0.060)),
    ]
    amp = 10.0 * (0.5 + yy / (ny - 1)) * (1 + 0.15 * _field(rng, shape, 8.0))
    background = amp[..., None] * np.exp(-(axis.centres - 640.0) / 110.0) + 2.0
    spec = _Spec(
        name=name,
        description=(
            "Graded mixed-halide perovskite-like film on glass, 1 um pixels, 485 nm laser; "
            "300 mm spectrograph with a Si CCD, axis linear in air wavelength 640-860 nm "
            "(384 channels, instrument FWHM 1.4 nm). Hard: a band-edge Gaussian whose energy "
            "drifts 1.64->1.72 eV across x while a thickness wedge raises the intensity 5x "
            "over ~20 pixels in y; 3 % segregated low-gap domains at 1.565 eV; a scratch to "
            "the glass; stray light that triples across the map."),
        axis=axis,
        det=_Detector(2.0, 3.5, 500.0, 65535.0, 0.2),
        pixel_um=1.0,
        region=region,
        region_names=["glass (scratch)", "1.64-1.72 eV graded band-edge film",
                      "1.565 eV segregated low-gap domains"],
        lines=lines,
        background=background,
        minority=[2],
        spike_widths=(1, 2),
        spike_rate_per_spectrum=0.15,
        acquisition={"excitation_wavelength_nm": 485.0, "temperature_K": 295.0,
                     "excitation_power_W": 5e-6},
        notes="segregated domains keep 30 % of the band-edge line; the scratch has "
              "background only",
    )
    return _finish(spec, seed)


def _ingan_led_wafer(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "ingan_led_wafer"
    shape = shape or (48, 64)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    pixel_um = 500.0 * math.hypot(47, 63) / math.hypot(ny - 1, nx - 1)
    axis = _wavelength_axis(400.0, 720.0, 512, "air", 2.2)
    # wafer centre at pixel (0, 0); the wafer edge crosses the far corner
    rn = np.hypot(yy, xx) / (0.78 * math.hypot(ny - 1, nx - 1))
    wafer = rn < 1.0
    region = np.where(wafer, 1, 0).astype(np.int16)
    score = _field(rng, shape, 2.0) + 1.5 * rn
    cluster = _top(score, wafer & (rn < 0.95), round(0.03 * ny * nx))
    region[cluster] = 2
    edge = 1.0 / (1.0 + np.exp((rn - 0.96) / 0.012))  # edge exclusion
    mqw = np.where(wafer, 2.0e5 * (1 - 0.35 * rn**2) * edge * (1 + 0.08 * _field(rng, shape, 5)), 0.0)
    yl = np.where(wafer, 0.04 * 2.0e5 * (1 + 0.3 * _field(rng, shape, 6.0)).clip(0.3), 0.0)
    yl = np.where(cluster, 2.5 * mqw, yl)
    mqw = np.where(cluster, 0.25 * mqw, mqw)
    e_mqw = 2.70 + 0.08 * rn**2 + 0.004 * _field(rng, shape, 3.0)
    s_mqw = _fwhm_to_sigma(0.110 + 0.03 * rn**2)
    huang_rhys, lo_ev = 0.3, 0.092
    lines = [
        _Line("mqw_zero_phonon", mqw, e_mqw, s_mqw),
        _Line("mqw_1LO", mqw * huang_rhys, e_mqw - lo_ev, s_mqw),
        _Line("mqw_2LO", mqw * huang_rhys**2 / 2, e_mqw - 2 * lo_ev, s_mqw),
        _Line("yellow_band", yl, 2.20 + 0.01 * _field(rng, shape, 4.0), _fwhm_to_sigma(0.42)),
    ]
    amp = 20.0 * (1 + 4.0 / (1 + np.exp(-(rn - 0.9) / 0.05))) * (1 + 0.1 * _field(rng, shape, 6))
    background = amp[..., None] * (np.exp(-(axis.centres - 400.0) / 45.0) + 0.15)
    spec = _Spec(
        name=name,
        description=(
            "InGaN/GaN multi-quantum-well LED wafer quadrant (wafer centre at the first "
            "pixel), ~0.5 mm pixels, 375 nm laser; compact spectrograph with a Si CCD, axis "
            "linear in air wavelength 400-720 nm (512 channels, instrument FWHM 2.2 nm). "
            "Hard: radial emission-energy gradient 2.70->2.78 eV, LO-phonon replicas "
            "(92 meV, Huang-Rhys 0.3) shaping the low-energy side, a weak very broad yellow "
            "band everywhere and a 3 % yellow-band defect cluster where it dominates, an "
            "edge-exclusion roll-off, and laser-tail background 5x stronger at the wafer "
            "edge and on the chuck."),
        axis=axis,
        det=_Detector(1.0, 6.0, 1000.0, 65535.0, 0.05),
        pixel_um=pixel_um,
        region=region,
        region_names=["off-wafer chuck", "2.70-2.78 eV InGaN MQW",
                      "2.2 eV yellow-band defect cluster"],
        lines=lines,
        background=background,
        minority=[2],
        n_bad=(2, 1, 1),
        spike_widths=(1, 2, 3),
        spike_rate_per_spectrum=0.2,
        acquisition={"excitation_wavelength_nm": 375.0, "temperature_K": 295.0,
                     "excitation_power_W": 1e-3},
        notes="phonon replicas are Gaussians 92 and 184 meV below the zero-phonon line with "
              "areas S and S^2/2 of it (S = 0.3); the main line is the zero-phonon line, "
              "or the yellow band in the defect cluster",
    )
    return _finish(spec, seed)


def _tmd_flake_emitters(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "tmd_flake_emitters"
    shape = shape or (48, 64)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    axis = _wavelength_axis(690.0, 830.0, 512, "air", 0.35)
    cy, cx = ny * rng.uniform(0.42, 0.58), nx * rng.uniform(0.42, 0.58)
    r0 = 0.31 * math.sqrt(ny * nx)
    th = np.arctan2(yy - cy, xx - cx)
    ph = rng.uniform(0, 2 * math.pi, 2)
    rr = r0 * (1 + 0.22 * np.cos(3 * th + ph[0]) + 0.1 * np.cos(5 * th + ph[1]))
    flake = np.hypot(yy - cy, xx - cx) < rr
    alpha = rng.uniform(0, 2 * math.pi)
    bi = flake & (((xx - cx) * math.cos(alpha) + (yy - cy) * math.sin(alpha)) > 0.4 * r0)
    mono = flake & ~bi
    region = np.zeros(shape, np.int16)
    region[mono] = 1
    region[bi] = 2
    strain = 0.010 * ((xx - cx) / r0) * math.cos(alpha + 1.0)
    x0_e = 1.735 - strain + 0.0015 * _field(rng, shape, 3.0)
    x0_area = np.where(mono, 10000.0 * (1 + 0.15 * _field(rng, shape, 4.0)), 0.0)
    x0_area = np.where(bi, 300.0, x0_area)
    x0_e = np.where(bi, x0_e - 0.007, x0_e)
    # single-pixel narrow emitters in the monolayer, 4 px apart at least
    inner = mono.copy()
    inner[:2], inner[-2:], inner[:, :2], inner[:, -2:] = False, False, False, False
    n_em = max(6, round(ny * nx / 250))
    em = _pick_pixels(rng, inner, n_em, min_sep=4.0)
    narrow = np.zeros(shape, bool)
    em_area, em_e, em_g = (np.zeros(shape) for _ in range(3))
    for p in em:
        narrow[p] = True
        em_area[p] = math.exp(rng.uniform(math.log(1.5e4), math.log(6e4)))
        em_e[p] = rng.uniform(1.60, 1.715)
        em_g[p] = rng.uniform(0.25e-3, 1.5e-3) / 2  # Lorentzian FWHM 0.25-1.5 meV
    lines = [
        _Line("neutral_exciton", x0_area, x0_e, 0.0025 + 0.0004 * _field(rng, shape, 3.0).clip(-2, 2),
              0.002),
        _Line("trion", np.where(mono, 0.6 * x0_area, 0.0), x0_e - 0.031, 0.003, 0.0025),
        _Line("localized_band", np.where(mono, 0.5 * x0_area, 0.0),
              1.665 + 0.005 * _field(rng, shape, 4.0), _fwhm_to_sigma(0.045)),
        _Line("bilayer_indirect", np.where(bi, 4000.0 * (1 + 0.1 * _field(rng, shape, 4.0)), 0.0),
              1.555 + 0.004 * _field(rng, shape, 4.0), _fwhm_to_sigma(0.070)),
        _Line("narrow_emitter", em_area, np.where(narrow, em_e, 1.65), 0.0,
              np.where(narrow, em_g, 1e-4)),
    ]
    glow = 3.0 + 9.0 * (0.5 * yy / (ny - 1) + 0.5 * xx / (nx - 1)) ** 2
    glow = glow * (1 + 0.1 * _field(rng, shape, 8.0))
    background = glow[..., None] * (0.6 + 0.4 * (axis.centres - 690.0) / 140.0)
    spec = _Spec(
        name=name,
        description=(
            "Monolayer/bilayer WSe2-like TMD flake on SiO2/Si at 6 K, 0.3 um pixels, 532 nm "
            "laser; 750 mm spectrograph with a deep-depletion Si CCD, axis linear in air "
            "wavelength 690-830 nm (512 channels, instrument FWHM 0.35 nm = 1.3 channels). "
            "Hard: most pixels are substrate; Voigt exciton and trion lines with a strain "
            "shift; a broad localized band under them; single-pixel Lorentzian emitters "
            "only ~1.5-3 channels wide that look like spikes (spikes here are 1 channel); a "
            "cryostat-window glow that grows towards one corner."),
        axis=axis,
        det=_Detector(1.0, 3.0, 300.0, 65535.0, 1.0),
        pixel_um=0.3,
        region=region,
        region_names=["SiO2/Si substrate", "1.735 eV monolayer", "1.555 eV bilayer"],
        lines=lines,
        background=background,
        narrow=narrow,
        spike_widths=(1,),
        spike_rate_per_spectrum=0.3,
        acquisition={"excitation_wavelength_nm": 532.0, "temperature_K": 6.0,
                     "excitation_power_W": 2e-6},
        notes="narrow emitters are Lorentzian lines (intrinsic FWHM 0.25-1.5 meV) at 1.60-"
              "1.715 eV in single monolayer pixels and are their pixel's main line",
    )
    return _finish(spec, seed)


def _qd_film_size_gradient(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "qd_film_size_gradient"
    shape = shape or (48, 64)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    axis = _energy_axis(1.80, 2.40, 300, 0.012)
    # a dried drop centred left of the map: coffee ring where its edge crosses the map
    dcy, dcx = ny * rng.uniform(0.4, 0.6), -0.55 * nx
    rad = 1.35 * nx
    d = np.hypot(yy - dcy, xx - dcx)
    film = d < rad
    region = np.where(film, 1, 0).astype(np.int16)
    agg = _top(_field(rng, shape, 1.5), film & (d < rad - 2), round(0.02 * ny * nx))
    region[agg] = 2
    ring = 1 + 4.0 * np.exp(-(((rad - d) / 7.0) ** 2))  # up to 5x over ~15-20 px
    dmin = d.min()
    t = np.clip((d - dmin) / (rad - dmin), 0, 1)
    qd_e = 2.00 + 0.16 * t + 0.004 * _field(rng, shape, 3.0)
    qd_area = np.where(film, 6.0e4 * ring * (1 + 0.1 * _field(rng, shape, 5.0)), 0.0)
    agg_area = np.where(agg, 1.8 * qd_area, 0.0)
    trap = np.where(film, 0.15 * qd_area, 0.0)
    qd_area = np.where(agg, 0.35 * qd_area, qd_area)
    lines = [
        _Line("qd_band_edge", qd_area, qd_e, _fwhm_to_sigma(0.080 + 0.03 * t)),
        _Line("aggregate", agg_area, qd_e - 0.055, _fwhm_to_sigma(0.060)),
        _Line("surface_trap_band", trap, 1.88 + 0.01 * _field(rng, shape, 6.0),
              _fwhm_to_sigma(0.25)),
    ]
    amp = 15.0 + 25.0 * (xx / (nx - 1)) * (1 + 0.2 * _field(rng, shape, 8.0)).clip(0.2)
    background = amp[..., None] * (1 + 0.6 * (2.40 - axis.centres) / 0.6)
    spec = _Spec(
        name=name,
        description=(
            "CdSe/ZnS-like core/shell quantum-dot film drop-cast on glass, 2 um pixels, "
            "405 nm laser; prism spectrograph whose Si CCD channels are equal in photon "
            "energy, axis linear in energy 1.80-2.40 eV (300 channels, instrument FWHM "
            "12 meV = 6 channels). Hard: a dot-size gradient moves the line 2.00->2.16 eV and "
            "widens it; a coffee ring raises the intensity 5x over ~15-20 pixels; a broad "
            "surface-trap band runs off the low-energy end; 2 % red-shifted aggregates; "
            "spikes up to 5 channels wide; bare glass fluorescence that grows across x."),
        axis=axis,
        det=_Detector(4.0, 2.5, 200.0, 65535.0, 0.1),
        pixel_um=2.0,
        region=region,
        region_names=["bare glass", "2.00-2.16 eV quantum-dot film",
                      "red-shifted aggregated-dot clusters"],
        lines=lines,
        background=background,
        minority=[2],
        spike_widths=(1, 2, 3, 4, 5),
        spike_rate_per_spectrum=0.2,
        acquisition={"excitation_wavelength_nm": 405.0, "temperature_K": 295.0,
                     "excitation_power_W": 1e-5},
        notes="the axis is linear in energy and the counts are raw counts per channel "
              "(independent noise per channel)",
    )
    return _finish(spec, seed)


def _gaas_algaas_qw_low_snr(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "gaas_algaas_qw_low_snr"
    shape = shape or (40, 56)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    axis = _wavelength_axis(780.0, 940.0, 256, "vacuum", 1.6)
    pad = (yy < 0.3 * ny) & (xx > 0.72 * nx)  # Au contact pad
    region = np.where(pad, 0, 1).astype(np.int16)
    oval = _top(_field(rng, shape, 1.2), ~pad, round(0.02 * ny * nx))
    region[oval] = 2
    qw_area = np.where(pad, 0.0, 1400.0 * np.maximum(1 + 0.2 * _field(rng, shape, 6.0), 0.1))
    qw_e = 1.500 + 0.020 * yy / (ny - 1) + 0.002 * _field(rng, shape, 3.0)
    defect = np.where(oval, 2.5 * qw_area, 0.0)
    bulk = np.where(pad, 0.0, 0.6 * qw_area)
    qw_area = np.where(oval, 0.2 * qw_area, qw_area)
    lines = [
        _Line("qw_e1hh1", qw_area, qw_e, _fwhm_to_sigma(0.020)),
        _Line("qw_e1lh1", 0.3 * qw_area, qw_e + 0.028, _fwhm_to_sigma(0.022)),
        _Line("gaas_buffer", bulk, 1.424, _fwhm_to_sigma(0.035)),
        _Line("oval_defect_band", defect, 1.36 + 0.005 * _field(rng, shape, 2.0),
              _fwhm_to_sigma(0.090)),
    ]
    # (a smooth field's rare deep minima on large maps must not make the stray light
    # negative: the factor is kept above 0.1)
    amp = 12.0 * np.maximum(1 + 0.25 * _field(rng, shape, 10.0), 0.1) * np.where(pad, 2.0, 1.0)
    background = amp[..., None] * (0.5 + (axis.centres - 780.0) / 160.0)
    spec = _Spec(
        name=name,
        description=(
            "GaAs/Al0.3Ga0.7As single quantum well on GaAs at room temperature, 1.5 um pixels, "
            "660 nm laser; spectrograph with a visible-extended 256-pixel InGaAs line array "
            "(14-bit), axis linear in vacuum wavelength 780-940 nm (instrument FWHM 1.6 nm). "
            "Hard: SNR ~5 (high read noise, large dark level); a 20 meV well-width gradient "
            "in y; light-hole shoulder and GaAs buffer line beside the main line; 2 % oval "
            "defects with a broad band running off the red end; 3 hot and 1 dead detector "
            "channels in every spectrum; a reflective contact pad with no emission."),
        axis=axis,
        det=_Detector(8.0, 12.0, 2000.0, 16383.0, 0.05),
        pixel_um=1.5,
        region=region,
        region_names=["Au contact pad", "1.50-1.52 eV GaAs quantum well",
                      "oval defects (1.36 eV band)"],
        lines=lines,
        background=background,
        minority=[2],
        hot_channels=3,
        dead_channels=1,
        spike_widths=(1, 2),
        spike_rate_per_spectrum=0.05,
        acquisition={"excitation_wavelength_nm": 660.0, "temperature_K": 295.0,
                     "excitation_power_W": 5e-6},
        notes="bad_channel marks the hot (extra dark current) and dead (no photon response) "
              "detector channels; expected is what a good channel would read",
    )
    return _finish(spec, seed)


def _kesterite_band_tail(seed: int, shape: tuple[int, int] | None) -> Scene:
    name = "kesterite_band_tail"
    shape = shape or (48, 64)
    ny, nx = shape
    rng = _rng(seed, name, 0)
    yy, xx = _grid(shape)
    axis = _energy_axis(0.80, 1.55, 400, 0.011)
    sx = round(0.7 * nx)
    scribe = (xx >= sx) & (xx < sx + 2)  # P1 scribe line down to the Mo back contact
    region = np.where(scribe, 0, 1).astype(np.int16)
    deep = _top(_field(rng, shape, 1.2), ~scribe, round(0.01 * ny * nx))
    region[deep] = 2
    grad = 0.5 * (xx / (nx - 1) + yy / (ny - 1))
    bt_e = 1.38 + 0.05 * grad + 0.004 * _field(rng, shape, 3.0)
    tau = 0.026 + 0.006 * _field(rng, shape, 5.0).clip(-1.5, 1.5)
    bright = 0.5 * (1 + np.tanh(_field(rng, shape, 6.0)))
    bt_area = np.where(scribe, 0.0, 1.85e6 * (0.65 + 0.35 * bright))
    deep_area = np.where(deep, 1.4 * bt_area, 0.0)
    bt_area = np.where(deep, 0.25 * bt_area, bt_area)
    lines = [
        _Line("band_tail", bt_area, bt_e, 0.022, 0.0, tau),
        _Line("deep_defect_band", deep_area, 0.98 + 0.01 * _field(rng, shape, 2.0),
              _fwhm_to_sigma(0.17)),
    ]
    amp = 1 + 0.3 * _field(rng, shape, 8.0).clip(-2, 2)
    thermal = 40.0 * np.exp(-(axis.centres - 0.80) / 0.08)
    laser_tail = 60.0 * np.exp(-(1.55 - axis.centres) / 0.015)
    background = amp[..., None] * thermal + laser_tail * (1 + 0.3 * yy / (ny - 1))[..., None]
    spec = _Spec(
        name=name,
        description=(
            "Cu2ZnSnS4-like kesterite absorber on Mo/glass, 1 um pixels, 785 nm laser; "
            "near-IR spectrograph with a cooled InGaAs camera read out in channels equal in "
            "photon energy, axis linear in energy 0.80-1.55 eV (400 channels, instrument FWHM "
            "11 meV = 6 channels). Hard: an asymmetric band-tail line (Gaussian with an "
            "exponential low-energy tail, tail energy 17-35 meV varying across the map) whose "
            "maximum is not its location parameter; SNR up to ~500; a 1 % deep-defect "
            "minority with a very broad 0.98 eV band; thermal background at low energy and "
            "the laser's tail at the high-energy end; a scribe line to the back contact; "
            "spikes up to 5 channels wide."),
        axis=axis,
        det=_Detector(5.0, 8.0, 800.0, 65535.0, 0.5),
        pixel_um=1.0,
        region=region,
        region_names=["Mo back contact (P1 scribe)", "1.38-1.43 eV band-tail absorber",
                      "0.98 eV deep-defect spots"],
        lines=lines,
        background=background,
        minority=[2],
        spike_widths=(1, 2, 3, 4, 5),
        spike_rate_per_spectrum=0.25,
        acquisition={"excitation_wavelength_nm": 785.0, "temperature_K": 295.0,
                     "excitation_power_W": 2e-4},
        notes="band-tail line: E = c - sigma*t with t an exponentially modified Gaussian "
              "(tail to low energy, decay energy line_tail_ev); peak_energy_ev is its maximum",
    )
    return _finish(spec, seed)


#: Scene name -> builder(seed, shape) -> Scene.
SCENES: dict[str, Callable[[int, tuple[int, int] | None], Scene]] = {
    "halide_perovskite_graded_film": _halide_perovskite_graded_film,
    "ingan_led_wafer": _ingan_led_wafer,
    "tmd_flake_emitters": _tmd_flake_emitters,
    "qd_film_size_gradient": _qd_film_size_gradient,
    "gaas_algaas_qw_low_snr": _gaas_algaas_qw_low_snr,
    "kesterite_band_tail": _kesterite_band_tail,
}


def scene_names() -> list[str]:
    """Names of the scenes in the bank, in a fixed order.

    Returns
    -------
    list of str
        Keys of :data:`SCENES`.
    """
    return list(SCENES)


def make_scene(name: str, *, seed: int = 0, shape: tuple[int, int] | None = None) -> Scene:
    """Generate one scene of the bank with its truth.

    Parameters
    ----------
    name : str
        One of :func:`scene_names`.
    seed : int
        Seed of everything random (maps, noise, spikes, defects).
    shape : (int, int), optional
        Map size (ny, nx) in pixels, each at least 16; default per scene
        (about 48 × 64). Pixel sizes (µm) are the scene's own.

    Returns
    -------
    Scene
        ``cube`` (raw counts, canonical pmap cube) and ``truth``.

    Raises
    ------
    StepError
        Unknown scene name or a bad shape.
    """
    if name not in SCENES:
        raise StepError(f"unknown scene {name!r}; choose one of {scene_names()}")
    if shape is not None:
        if len(shape) != 2 or min(int(s) for s in shape) < _MIN_SIDE:
            raise StepError(f"shape must be (ny, nx), both at least {_MIN_SIDE}, got {shape}")
        shape = (int(shape[0]), int(shape[1]))
    return SCENES[name](int(seed), shape)
