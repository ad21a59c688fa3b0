"""Synthetic PL maps with known truth: a graded mixed-halide perovskite-like alloy film.

The scenario is our own invention, made to exercise every part of pmap with a
known answer. A thin-film absorber is mapped with a 532 nm laser on a
spectrometer whose axis is linear in **air** wavelength (620–1000 nm, 512
channels by default).

Sample (all numbers are the defaults of :class:`DemoScenario`)
---------------------------------------------------------------
Regions in ``truth["region"]``:

* ``0`` **matrix** (graded film): one band-edge line whose centre drifts
  linearly across x from 1.60 eV (first column) to 1.66 eV (last column), plus
  a smooth random roughness of 4 meV rms (correlation length 2 µm). FWHM
  90 meV (± 3 meV smooth variation), area 30 000 counts (± 15 % smooth variation).
* ``1`` **segregated low-gap domains**: discs of radius 1.5–3 µm (about one
  per 250 µm²) emitting a narrower line at 1.52 eV (5 meV rms from domain to
  domain), FWHM 50 meV, area 45 000 counts; the band-edge line is still there
  at 25 % of its matrix area.
* ``2`` **grain boundaries**: the edges of a Voronoi network of grains (mean
  grain size 12 µm), 1.5 µm wide (3 pixels). The band-edge area drops smoothly
  towards the boundary (to 30 % on it) and a broad, weak defect band appears at
  1.38 eV, FWHM 160 meV, area 4 000 counts (× the same smooth profile).
* ``-1`` **off-sample**: the corner where ``x/W + y/H < 0.2`` (x = y = 0 corner):
  no photons at all, only dark offset and read noise.

Every line is a Gaussian in **photon energy** E with the given centre, FWHM
and area (area = expected total photon counts of the line, over all E). Peaks
absent from a pixel have NaN in the truth. The three lines are named
``band_edge``, ``segregated`` and ``defect`` (``truth.peak_name``).

Instrument
----------
* Channel centres are linear in air wavelength; channel edges are the midpoints
  (the outer edges half a step outside). Edges are converted to vacuum
  wavelengths with the IAU standard formula (Morton, ApJS 130, 403 (2000)) and
  to photon energy with E = hc/λ_vac (hc from scipy.constants, CODATA 2018).
  Set ``wavelength_medium="vacuum"`` to make the axis vacuum wavelengths.
* Counts in channel i are the exact integral of the line over the channel's
  energy interval, from the Gaussian CDF (so the Jacobian |dE/dλ| is built in
  and the areas are conserved: the channel counts of a line sum to its area
  times the fraction of the line inside the window).
* Background: weak stray light of 6 counts/channel at 620 nm decaying as
  ``exp(-(λ - 620 nm)/200 nm)``, ± 20 % smooth spatial variation, absent off-sample.
  It is given directly in counts per channel (``background_amplitude`` ×
  ``background_shape``).
* Detector: shot noise (Poisson on the expected electrons, gain 1 e⁻/count),
  Gaussian read noise 4 counts rms, dark offset 600 counts, 16-bit ADC
  (values rounded to whole counts and clipped to 0…65 535). Stored as float32.
* Cosmic-ray spikes: 2 events per 10⁴ channel values (about one spectrum in
  ten), each 1 or 2 channels wide, 500–20 000 counts (log-uniform); marked in
  ``truth.spike_mask``.
* One *dead* spatial pixel (zero response: offset and read noise only) and one
  *saturated* spatial pixel (a hot spot 300 × brighter than its neighbours,
  clipped at 65 535 counts), both in the matrix when the map has matrix pixels.

Truth (:class:`xarray.Dataset`)
-------------------------------
``region`` (y, x); ``peak_energy``, ``peak_fwhm`` (eV) and ``peak_area``
(counts) (peak, y, x) with coordinate ``peak_name``; ``background_amplitude``
(y, x, counts per channel) and ``background_shape`` (wavelength, 1);
``spike_mask`` (y, x, wavelength); ``dead_pixel`` and ``saturated_pixel``
(y, x) booleans, their indices also in attrs ``dead_pixel_yx`` and
``saturated_pixel_yx``; and, on request, ``expected`` (y, x, wavelength): the
noise-free mean signal in counts *above the dark offset, before detector
defects* (dead pixel, clipping, spikes). The truth energies are photon energies
(vacuum).

Determinism
-----------
Everything is a function of ``seed``. The maps (2-D truth) are drawn once for
the whole map; the noise is drawn per fixed block of :data:`NOISE_BLOCK` ×
:data:`NOISE_BLOCK` pixels from ``SeedSequence([seed, block_y, block_x])``, so
the cube is identical whatever the chunking used to write it (chunks that are
multiples of the block size waste no work). The same seed and shape give the
same data in memory (:func:`make_demo_cube`) and on disk (:func:`write_demo_cube`).

Example
-------
>>> from pmap.synthetic import make_demo_cube, write_demo_cube
>>> cube, truth = make_demo_cube(shape=(32, 48), seed=1)          # doctest: +SKIP
>>> paths = write_demo_cube("demo_maps/generated", size="small")  # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import math
import shutil
import warnings
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import xarray as xr
from scipy import ndimage, special
from scipy.spatial import cKDTree

from .airvac import air_to_vacuum
from .conventions import HC_EV_NM
from .cube import validate_cube
from .errors import InputFileError, StepError
from .provenance import with_step
from .scenes import SCENES, Scene, make_scene, scene_names

__all__ = [
    "SCENES",
    "Scene",
    "make_scene",
    "scene_names",
    "DEMO_SIZES",
    "NOISE_BLOCK",
    "PEAK_NAMES",
    "REGION_NAMES",
    "DemoScenario",
    "DemoPaths",
    "make_demo_cube",
    "write_demo_cube",
    "compare_with_truth",
]

#: Named demo sizes (y, x) in pixels. ``large`` is ≈ 4.1 GB uncompressed (float32, 512 channels).
DEMO_SIZES: dict[str, tuple[int, int]] = {
    "tiny": (16, 24),
    "small": (64, 96),
    "medium": (512, 512),
    "large": (1408, 1408),
}

#: Side (pixels) of the fixed noise blocks: the random numbers of a block depend only on
#: the seed and the block index, never on how the map is tiled for writing.
NOISE_BLOCK = 32

#: Names of the emission lines, in the order of the truth's ``peak`` dim.
PEAK_NAMES = ("band_edge", "segregated", "defect")

#: Region codes of ``truth["region"]``.
REGION_NAMES = {-1: "off_sample", 0: "matrix", 1: "segregated_domain", 2: "grain_boundary"}

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_MAX_IN_MEMORY_BYTES = 1 << 30


@dataclass(frozen=True)
class DemoScenario:
    """Numbers of the demo scenario (units in the names); defaults as in the module docstring."""

    pixel_size_um: float = 0.5
    wavelength_min_nm: float = 620.0
    wavelength_max_nm: float = 1000.0
    # matrix (graded film): band-edge line
    matrix_energy_ev: tuple[float, float] = (1.60, 1.66)
    roughness_ev: float = 0.004
    roughness_length_um: float = 2.0
    band_edge_fwhm_ev: float = 0.090
    band_edge_fwhm_variation_ev: float = 0.003
    band_edge_area_counts: float = 30_000.0
    area_variation: float = 0.15
    # segregated low-gap domains
    segregated_energy_ev: float = 1.52
    segregated_energy_spread_ev: float = 0.005
    segregated_fwhm_ev: float = 0.050
    segregated_area_counts: float = 45_000.0
    segregated_band_edge_factor: float = 0.25
    segregated_density_per_um2: float = 1.0 / 250.0
    segregated_radius_um: tuple[float, float] = (1.5, 3.0)
    # grain boundaries
    grain_size_um: float = 12.0
    grain_boundary_width_um: float = 1.5
    grain_boundary_band_edge_factor: float = 0.30
    defect_energy_ev: float = 1.38
    defect_fwhm_ev: float = 0.160
    defect_area_counts: float = 4_000.0
    # off-sample corner: x/W + y/H < off_sample_corner
    off_sample_corner: float = 0.2
    # background (stray light), counts per channel
    background_counts_per_channel: float = 6.0
    background_decay_nm: float = 200.0
    background_variation: float = 0.2
    # detector
    dark_offset_counts: float = 600.0
    read_noise_counts: float = 4.0
    gain_e_per_count: float = 1.0
    saturation_counts: float = 65535.0
    spike_rate_per_value: float = 2e-4
    spike_amplitude_counts: tuple[float, float] = (500.0, 20_000.0)
    saturated_pixel_factor: float = 300.0
    # acquisition metadata
    excitation_wavelength_nm: float = 532.0
    exposure_s: float = 0.5
    excitation_power_W: float = 2e-5
    temperature_K: float = 295.0


class DemoPaths(NamedTuple):
    """Where :func:`write_demo_cube` put the cube and its truth (Zarr stores).

    Fields are reachable as attributes, by position, or by name (``paths["cube"]``).
    """

    cube: Path
    truth: Path

    def __getitem__(self, key):
        if isinstance(key, str):
            if key not in self._fields:
                raise KeyError(key)
            return getattr(self, key)
        return tuple.__getitem__(self, key)


# --------------------------------------------------------------------------- axis


def _wavelength_axis(n_channels: int, scen: DemoScenario) -> tuple[np.ndarray, np.ndarray]:
    """Channel centres (nm) and channel edges (n_channels + 1, nm), both in the axis medium."""
    centres = np.linspace(scen.wavelength_min_nm, scen.wavelength_max_nm, n_channels)
    step = centres[1] - centres[0]
    edges = np.concatenate(
        [[centres[0] - step / 2], (centres[:-1] + centres[1:]) / 2, [centres[-1] + step / 2]]
    )
    return centres, edges


def _edge_energies_ev(edges_nm: np.ndarray, medium: str) -> np.ndarray:
    """Photon energies (eV, descending) of channel edges given in ``medium`` wavelengths."""
    vac = air_to_vacuum(edges_nm, method="iau") if medium == "air" else np.asarray(edges_nm, dtype=float)
    return HC_EV_NM / vac


# --------------------------------------------------------------------------- maps


def _smooth_field(rng: np.random.Generator, shape: tuple[int, int], sigma_px: float) -> np.ndarray:
    """Smooth random field with zero mean and unit standard deviation."""
    f = ndimage.gaussian_filter(
        rng.standard_normal(shape), sigma=max(sigma_px, 0.5), mode="reflect"
    )
    f -= f.mean()
    sd = f.std()
    return f / sd if sd > 0 else f


def _scenario_maps(shape: tuple[int, int], scen: DemoScenario, seed: int) -> dict[str, Any]:
    """All 2-D truth maps, drawn once for the whole map (deterministic from ``seed``)."""
    ny, nx = shape
    px = scen.pixel_size_um
    rng = np.random.default_rng(np.random.SeedSequence([seed, 0]))
    y_um = np.arange(ny) * px
    x_um = np.arange(nx) * px
    height, width = max(ny - 1, 1) * px, max(nx - 1, 1) * px
    yy, xx = np.meshgrid(y_um, x_um, indexing="ij")
    pts = np.column_stack([yy.ravel(), xx.ravel()])

    # Voronoi grain boundaries: distance to the bisector of the two nearest grain seeds,
    # (d2² - d1²) / (2 |s2 - s1|).
    margin = 2 * scen.grain_size_um
    n_grains = max(4, round((height + 2 * margin) * (width + 2 * margin) / scen.grain_size_um**2))
    seeds = rng.uniform([-margin, -margin], [height + margin, width + margin], size=(n_grains, 2))
    d, i = cKDTree(seeds).query(pts, k=2)
    sep = np.linalg.norm(seeds[i[:, 1]] - seeds[i[:, 0]], axis=1)
    gb_dist = ((d[:, 1] ** 2 - d[:, 0] ** 2) / (2 * sep)).reshape(shape)
    half_w = scen.grain_boundary_width_um / 2
    gb_profile = np.exp(-((gb_dist / half_w) ** 2) * math.log(2))  # 1 on the boundary, ½ at edge

    # Segregated domains: discs around random centres (nearest centre decides).
    n_dom = max(1, round(height * width * scen.segregated_density_per_um2))
    centres = rng.uniform([0, 0], [height, width], size=(n_dom, 2))
    radii = rng.uniform(*scen.segregated_radius_um, size=n_dom)
    dom_e = scen.segregated_energy_ev + scen.segregated_energy_spread_ev * rng.standard_normal(
        n_dom
    )
    dd, di = cKDTree(centres).query(pts, k=1)
    in_dom = (dd < radii[di]).reshape(shape)
    dom_idx = di.reshape(shape)

    rough = _smooth_field(rng, shape, scen.roughness_length_um / px)
    f_area = _smooth_field(rng, shape, 4.0 / px)
    f_fwhm = _smooth_field(rng, shape, 4.0 / px)
    f_bg = _smooth_field(rng, shape, 8.0 / px)

    region = np.zeros(shape, dtype=np.int8)
    region[gb_dist < half_w] = 2
    region[in_dom] = 1
    off = (xx / width + yy / height) < scen.off_sample_corner
    region[off] = -1

    n_pk = len(PEAK_NAMES)
    energy = np.full((n_pk, ny, nx), np.nan)
    fwhm = np.full((n_pk, ny, nx), np.nan)
    area = np.full((n_pk, ny, nx), np.nan)
    on = region >= 0
    e_lo, e_hi = scen.matrix_energy_ev
    grad = e_lo + (e_hi - e_lo) * (xx / width)
    be_area = scen.band_edge_area_counts * np.clip(1 + scen.area_variation * f_area, 0.2, None)
    be_area *= 1 - (1 - scen.grain_boundary_band_edge_factor) * gb_profile
    be_area[region == 1] *= scen.segregated_band_edge_factor
    energy[0][on] = (grad + scen.roughness_ev * rough)[on]
    fwhm[0][on] = (scen.band_edge_fwhm_ev + scen.band_edge_fwhm_variation_ev * f_fwhm)[on]
    area[0][on] = be_area[on]
    seg = region == 1
    energy[1][seg] = dom_e[dom_idx[seg]]
    fwhm[1][seg] = scen.segregated_fwhm_ev
    area[1][seg] = scen.segregated_area_counts
    gb = region == 2
    energy[2][gb] = scen.defect_energy_ev
    fwhm[2][gb] = scen.defect_fwhm_ev
    area[2][gb] = scen.defect_area_counts * gb_profile[gb]

    bg_amp = np.where(
        on,
        scen.background_counts_per_channel
        * np.clip(1 + scen.background_variation * f_bg, 0.0, None),
        0.0,
    )

    # One dead and one saturated (hot-spot) pixel, in the matrix, away from the edges.
    inner = np.zeros(shape, dtype=bool)
    inner[1:-1, 1:-1] = True
    cand = np.flatnonzero(((region == 0) & inner).ravel())
    if cand.size < 2:  # tiny maps: any on-sample pixel will do
        cand = np.flatnonzero(((region >= 0) & inner).ravel())
    if cand.size < 2:
        raise StepError(
            f"map shape {shape} has too few on-sample pixels for the dead and saturated "
            "pixels of the demo scenario; use a larger shape"
        )
    dead_flat, sat_flat = rng.choice(cand, size=2, replace=False)
    dead_yx = tuple(int(v) for v in np.unravel_index(dead_flat, shape))
    sat_yx = tuple(int(v) for v in np.unravel_index(sat_flat, shape))
    area[0][sat_yx] *= scen.saturated_pixel_factor
    return {
        "y_um": y_um,
        "x_um": x_um,
        "region": region,
        "energy": energy,
        "fwhm": fwhm,
        "area": area,
        "bg_amp": bg_amp,
        "dead_yx": dead_yx,
        "sat_yx": sat_yx,
    }


# --------------------------------------------------------------------------- rendering


class _Renderer:
    """Renders any rectangle of the demo cube from the global maps and per-block noise."""

    def __init__(self, shape, n_channels, seed, scen, medium, spikes):
        if n_channels < 8:
            raise StepError(f"n_channels must be at least 8, got {n_channels}")
        if len(shape) != 2 or min(shape) < 8:
            raise StepError(f"shape must be (ny, nx) with both at least 8 pixels, got {shape}")
        if medium not in ("air", "vacuum"):
            raise StepError(f"wavelength_medium must be 'air' or 'vacuum', got {medium!r}")
        self.shape = (int(shape[0]), int(shape[1]))
        self.seed = int(seed)
        self.scen = scen
        self.medium = medium
        self.spikes = spikes
        self.wavelength, edges = _wavelength_axis(n_channels, scen)
        self.edge_ev = _edge_energies_ev(edges, medium)
        self.bg_shape = np.exp(
            -(self.wavelength - scen.wavelength_min_nm) / scen.background_decay_nm
        )
        self.maps = _scenario_maps(self.shape, scen, self.seed)

    def expected(self, ys: slice, xs: slice) -> np.ndarray:
        """Noise-free signal (counts above offset, before detector defects), (ny, nx, nch)."""
        m = self.maps
        out = m["bg_amp"][ys, xs, None] * self.bg_shape
        for p in range(len(PEAK_NAMES)):
            a = m["area"][p, ys, xs]
            ok = np.isfinite(a) & (a > 0)
            if not ok.any():
                continue
            e0 = m["energy"][p, ys, xs][ok]
            sig = m["fwhm"][p, ys, xs][ok] / _FWHM_PER_SIGMA
            cdf = special.ndtr((self.edge_ev[None, :] - e0[:, None]) / sig[:, None])
            out[ok] += a[ok][:, None] * (cdf[:, :-1] - cdf[:, 1:])  # edges descend in E
        return out

    def _block(self, by: int, bx: int):
        """Counts, spike mask and expected signal of one noise block."""
        sc = self.scen
        ys = slice(by * NOISE_BLOCK, min((by + 1) * NOISE_BLOCK, self.shape[0]))
        xs = slice(bx * NOISE_BLOCK, min((bx + 1) * NOISE_BLOCK, self.shape[1]))
        mean = self.expected(ys, xs)
        rng = np.random.default_rng(np.random.SeedSequence([self.seed, 1, by, bx]))
        detected = mean
        dy, dx = self.maps["dead_yx"]
        if ys.start <= dy < ys.stop and xs.start <= dx < xs.stop:
            detected = mean.copy()
            detected[dy - ys.start, dx - xs.start] = 0.0
        counts = rng.poisson(detected * sc.gain_e_per_count) / sc.gain_e_per_count
        counts += rng.normal(sc.dark_offset_counts, sc.read_noise_counts, size=counts.shape)
        # Spikes are always drawn (after the noise) so spikes=False leaves the noise unchanged.
        flat = counts.reshape(-1)
        nch = counts.shape[-1]
        n = rng.poisson(sc.spike_rate_per_value * flat.size)
        pos = rng.integers(0, flat.size, size=n)
        wide = rng.random(n) < 0.5
        lo, hi = sc.spike_amplitude_counts
        amp = np.exp(rng.uniform(math.log(lo), math.log(hi), size=n))
        amp2 = amp * rng.uniform(0.3, 1.0, size=n)
        mask = np.zeros(flat.size, dtype=bool)
        if self.spikes and n:
            second = wide & (pos % nch < nch - 1)
            np.add.at(flat, pos, amp)
            np.add.at(flat, pos[second] + 1, amp2[second])
            mask[pos] = True
            mask[pos[second] + 1] = True
        np.clip(np.rint(counts, out=counts), 0.0, sc.saturation_counts, out=counts)
        return counts, mask.reshape(counts.shape), mean

    def render(self, y0: int, y1: int, x0: int, x1: int, *, want_expected: bool = False):
        """Counts (float32), spike mask and (optionally) expected signal of a rectangle."""
        nch = self.wavelength.size
        shp = (y1 - y0, x1 - x0, nch)
        counts = np.empty(shp, dtype=np.float32)
        mask = np.empty(shp, dtype=bool)
        expected = np.empty(shp, dtype=np.float64) if want_expected else None
        for by in range(y0 // NOISE_BLOCK, (y1 - 1) // NOISE_BLOCK + 1):
            for bx in range(x0 // NOISE_BLOCK, (x1 - 1) // NOISE_BLOCK + 1):
                c, m, e = self._block(by, bx)
                by0, bx0 = by * NOISE_BLOCK, bx * NOISE_BLOCK
                ya, yb = max(y0, by0), min(y1, by0 + c.shape[0])
                xa, xb = max(x0, bx0), min(x1, bx0 + c.shape[1])
                dst = (slice(ya - y0, yb - y0), slice(xa - x0, xb - x0))
                src = (slice(ya - by0, yb - by0), slice(xa - bx0, xb - bx0))
                counts[dst] = c[src]
                mask[dst] = m[src]
                if expected is not None:
                    expected[dst] = e[src]
        return counts, mask, expected

    # ----------------------------------------------------------------- xarray objects

    def coords(self) -> dict[str, Any]:
        m = self.maps
        long = f"{self.medium} wavelength"
        return {
            "y": ("y", m["y_um"], {"units": "um", "long_name": "y position"}),
            "x": ("x", m["x_um"], {"units": "um", "long_name": "x position"}),
            "wavelength": ("wavelength", self.wavelength, {"units": "nm", "long_name": long}),
        }

    def cube_attrs(self, params: Mapping[str, Any]) -> dict[str, Any]:
        sc = self.scen
        attrs = {
            "units": "counts",
            "long_name": "PL intensity",
            "excitation_wavelength_nm": sc.excitation_wavelength_nm,
            "exposure_s": sc.exposure_s,
            "excitation_power_W": sc.excitation_power_W,
            "temperature_K": sc.temperature_K,
            "wavelength_medium": self.medium,
            "saturation_counts": sc.saturation_counts,
            "read_noise_counts": sc.read_noise_counts,
            "gain_e_per_count": sc.gain_e_per_count,
            "dark_offset_counts": sc.dark_offset_counts,
            "instrument_notes": (
                "SYNTHETIC demo data generated by pmap.synthetic (graded mixed-halide "
                f"perovskite-like alloy film), seed {self.seed}; not a measurement"
            ),
        }
        return with_step(attrs, "synthetic_demo", dict(params))

    def truth_dataset(self, *, spike_mask: Any, expected: Any = None) -> xr.Dataset:
        """Truth Dataset; ``spike_mask``/``expected`` are full arrays (numpy or dask)."""
        m = self.maps
        yx = ("y", "x")
        pyx = ("peak", "y", "x")
        shape = self.shape
        dead = np.zeros(shape, dtype=bool)
        dead[m["dead_yx"]] = True
        sat = np.zeros(shape, dtype=bool)
        sat[m["sat_yx"]] = True
        data_vars = {
            "region": (
                yx,
                m["region"],
                {
                    "long_name": "region",
                    "units": "1",
                    "flag_values": np.array(sorted(REGION_NAMES), dtype=np.int8),
                    "flag_meanings": " ".join(REGION_NAMES[k] for k in sorted(REGION_NAMES)),
                },
            ),
            "peak_energy": (
                pyx,
                m["energy"],
                {"long_name": "peak centre photon energy", "units": "eV"},
            ),
            "peak_fwhm": (pyx, m["fwhm"], {"long_name": "peak FWHM in energy", "units": "eV"}),
            "peak_area": (
                pyx,
                m["area"],
                {
                    "long_name": "peak area (expected photon counts of the whole line)",
                    "units": "counts",
                },
            ),
            "background_amplitude": (
                yx,
                m["bg_amp"],
                {"long_name": "background at the first channel", "units": "counts"},
            ),
            "background_shape": (
                "wavelength",
                self.bg_shape,
                {"long_name": "background spectral shape (1 at the first channel)", "units": "1"},
            ),
            "dead_pixel": (yx, dead, {"long_name": "dead pixel (zero response)", "units": "1"}),
            "saturated_pixel": (yx, sat, {"long_name": "saturated hot-spot pixel", "units": "1"}),
            "spike_mask": (
                ("y", "x", "wavelength"),
                spike_mask,
                {"long_name": "cosmic-ray spike", "units": "1"},
            ),
        }
        if expected is not None:
            data_vars["expected"] = (
                ("y", "x", "wavelength"),
                expected,
                {
                    "long_name": "noise-free signal above dark offset, before detector defects",
                    "units": "counts",
                },
            )
        coords = self.coords()
        coords["peak"] = ("peak", np.arange(len(PEAK_NAMES)), {"long_name": "peak index"})
        coords["peak_name"] = ("peak", np.array(PEAK_NAMES, dtype=object))
        attrs = {
            "title": "truth of the pmap synthetic demo (graded perovskite-like alloy film)",
            "seed": self.seed,
            "dead_pixel_yx": list(m["dead_yx"]),
            "saturated_pixel_yx": list(m["sat_yx"]),
            "noise_block_px": NOISE_BLOCK,
            "scenario": repr(self.scen),
        }
        return xr.Dataset(data_vars, coords=coords, attrs=attrs)


def _params(shape, n_channels, seed, spikes, medium, scen) -> dict[str, Any]:
    changed = {
        f.name: getattr(scen, f.name)
        for f in dataclasses.fields(scen)
        if getattr(scen, f.name) != f.default
    }
    return {
        "shape": list(shape),
        "n_channels": n_channels,
        "seed": seed,
        "spikes": spikes,
        "wavelength_medium": medium,
        "scenario_changes": changed,
    }


# --------------------------------------------------------------------------- public API


def make_demo_cube(
    *,
    shape: Sequence[int] = (64, 96),
    n_channels: int = 512,
    seed: int = 0,
    spikes: bool = True,
    expected: bool = False,
    wavelength_medium: str = "air",
    scenario: DemoScenario | None = None,
) -> tuple[xr.DataArray, xr.Dataset]:
    """Generate the demo cube and its truth in memory.

    Parameters
    ----------
    shape : (int, int)
        Map size (ny, nx) in pixels, each at least 8; pixels are
        ``scenario.pixel_size_um`` apart (0.5 µm).
    n_channels : int
        Number of spectral channels (linear in wavelength, 620–1000 nm).
    seed : int
        Seed of everything random (maps and noise).
    spikes : bool
        Add cosmic-ray spikes (the other noise is the same either way).
    expected : bool
        Also return the noise-free ``expected`` cube (counts) in the truth.
    wavelength_medium : {"air", "vacuum"}
        Medium of the wavelength axis.
    scenario : DemoScenario, optional
        Scenario numbers; default :class:`DemoScenario()`.

    Returns
    -------
    cube : xarray.DataArray
        Canonical cube (``validate_cube``), dims (y, x, wavelength), float32 counts.
    truth : xarray.Dataset
        Known truth (see the module docstring).

    Raises
    ------
    StepError
        Bad shape, channel count or medium, or a cube too large for memory
        (more than 1 GiB: use :func:`write_demo_cube`).
    """
    scen = scenario or DemoScenario()
    shape = tuple(int(s) for s in shape)
    nbytes = math.prod(shape) * n_channels * (4 + 1 + (8 if expected else 0))
    if nbytes > _MAX_IN_MEMORY_BYTES:
        raise StepError(
            f"a {shape} × {n_channels} demo cube needs {nbytes / 2**30:.1f} GiB in memory; "
            "use write_demo_cube() to write it to Zarr tile by tile"
        )
    r = _Renderer(shape, n_channels, seed, scen, wavelength_medium, spikes)
    counts, mask, exp = r.render(0, shape[0], 0, shape[1], want_expected=expected)
    params = _params(shape, n_channels, seed, spikes, wavelength_medium, scen)
    cube = xr.DataArray(
        counts,
        dims=("y", "x", "wavelength"),
        coords=r.coords(),
        name="intensity",
        attrs=r.cube_attrs(params),
    )
    return validate_cube(cube), r.truth_dataset(spike_mask=mask, expected=exp)


def write_demo_cube(
    out_dir: str | Path,
    *,
    size: str = "small",
    shape: Sequence[int] | None = None,
    n_channels: int = 512,
    seed: int = 0,
    chunks: Sequence[int] = (64, 64),
    spikes: bool = True,
    expected: bool = False,
    wavelength_medium: str = "air",
    scenario: DemoScenario | None = None,
    name: str | None = None,
    workers: int = 1,
    overwrite: bool = False,
) -> DemoPaths:
    """Write the demo cube and its truth to Zarr, one spatial tile at a time.

    Memory stays bounded by a few tiles (plus the 2-D truth maps), so maps
    larger than RAM can be written. Each tile is computed independently; the
    data do not depend on ``chunks`` or ``workers``.

    Parameters
    ----------
    out_dir : str or Path
        Folder for ``<name>.zarr`` (the cube, variable ``intensity``) and
        ``<name>_truth.zarr``; created if missing.
    size : {"tiny", "small", "medium", "large"}
        Named size from :data:`DEMO_SIZES` (ignored when ``shape`` is given).
    shape : (int, int), optional
        Map size (ny, nx) in pixels.
    n_channels, seed, spikes, wavelength_medium, scenario
        As in :func:`make_demo_cube`.
    chunks : (int, int)
        Spatial chunk (= tile) size (cy, cx) in pixels; the spectral axis is
        whole. Multiples of :data:`NOISE_BLOCK` (32) waste no work.
    expected : bool
        Also write the noise-free ``expected`` cube (float32 counts) into the truth.
    name : str, optional
        Store name stem; default ``"demo_<size>"`` (or ``"demo_<ny>x<nx>"``).
    workers : int
        Threads writing tiles in parallel (distinct chunks, so safe).
    overwrite : bool
        Replace existing stores of the same name.

    Returns
    -------
    DemoPaths
        ``(cube, truth)`` paths of the two Zarr stores.

    Raises
    ------
    StepError
        Unknown size, bad shape, chunks or channel count.
    InputFileError
        A store of that name exists and ``overwrite`` is False.
    """
    import dask.array as dsa

    if shape is None:
        if size not in DEMO_SIZES:
            raise StepError(f"unknown demo size {size!r}; choose one of {list(DEMO_SIZES)}")
        shape = DEMO_SIZES[size]
        stem = name or f"demo_{size}"
    else:
        stem = name or f"demo_{int(shape[0])}x{int(shape[1])}"
    shape = tuple(int(s) for s in shape)
    if len(chunks) != 2 or min(chunks) < 1:
        raise StepError(f"chunks must be two positive tile sizes (cy, cx), got {chunks}")
    scen = scenario or DemoScenario()
    r = _Renderer(shape, n_channels, seed, scen, wavelength_medium, spikes)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = DemoPaths(out / f"{stem}.zarr", out / f"{stem}_truth.zarr")
    for p in paths:
        if p.exists():
            if not overwrite:
                raise InputFileError(f"{p} already exists (pass overwrite=True to replace it)")
            shutil.rmtree(p)

    cy, cx = min(chunks[0], shape[0]), min(chunks[1], shape[1])
    full = (*shape, n_channels)
    dchunks = (cy, cx, n_channels)
    params = _params(shape, n_channels, seed, spikes, wavelength_medium, scen)
    template = xr.DataArray(
        dsa.zeros(full, chunks=dchunks, dtype=np.float32),
        dims=("y", "x", "wavelength"),
        coords=r.coords(),
        name="intensity",
        attrs=r.cube_attrs(params),
    ).to_dataset()
    truth_t = r.truth_dataset(
        spike_mask=dsa.zeros(full, chunks=dchunks, dtype=bool),
        expected=dsa.zeros(full, chunks=dchunks, dtype=np.float32) if expected else None,
    )
    with warnings.catch_warnings():
        # Consolidated metadata (fast opening) is not yet in the Zarr v3 spec; zarr says so.
        warnings.filterwarnings("ignore", message="Consolidated metadata", category=UserWarning)
        template.to_zarr(paths.cube, mode="w-", compute=False)
        truth_t.to_zarr(paths.truth, mode="w-", compute=False)

    dims3 = ("y", "x", "wavelength")

    def tile(y0: int, x0: int) -> None:
        y1, x1 = min(y0 + cy, shape[0]), min(x0 + cx, shape[1])
        counts, mask, exp = r.render(y0, y1, x0, x1, want_expected=expected)
        region = {"y": slice(y0, y1), "x": slice(x0, x1), "wavelength": slice(None)}
        xr.Dataset({"intensity": (dims3, counts)}).to_zarr(paths.cube, region=region)
        tv = {"spike_mask": (dims3, mask)}
        if exp is not None:
            tv["expected"] = (dims3, exp.astype(np.float32))
        xr.Dataset(tv).to_zarr(paths.truth, region=region)

    starts = [(y0, x0) for y0 in range(0, shape[0], cy) for x0 in range(0, shape[1], cx)]
    if workers > 1:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(lambda s: tile(*s), starts))
    else:
        for s in starts:
            tile(*s)
    return paths


def compare_with_truth(result: xr.Dataset, truth: xr.Dataset | str | Path) -> str:
    """Text summary of how well a result recovers the demo truth.

    For each truth line, every pixel where it is present is matched to the
    result peak nearest in energy; the summary gives the median and 95th
    percentile of |ΔE| (meV), the median bias and the fraction of pixels
    recovered within 10 meV. When the result has a ``region`` map, the share of
    pixels whose label agrees with the truth after matching each result label
    to its most frequent truth region is given too.

    Parameters
    ----------
    result : xarray.Dataset
        pmap result with ``peak_energy`` (peak, y, x) or (y, x) in eV.
    truth : xarray.Dataset or path
        The truth of :func:`make_demo_cube` or a ``*_truth.zarr`` store.

    Returns
    -------
    str
        A few lines of text.

    Raises
    ------
    StepError
        Result and truth maps differ in shape.
    """
    if not isinstance(truth, xr.Dataset):
        truth = xr.open_zarr(truth)
    ny, nx = truth.sizes["y"], truth.sizes["x"]
    if (result.sizes.get("y"), result.sizes.get("x")) != (ny, nx):
        raise StepError(
            f"result map is {result.sizes.get('y')} x {result.sizes.get('x')} pixels, "
            f"truth is {ny} x {nx}: they cannot be compared"
        )
    lines = ["comparison with the synthetic truth:"]
    if "peak_energy" in result:
        fit = result["peak_energy"]
        fit = fit.expand_dims("peak") if "peak" not in fit.dims else fit
        fit_e = np.asarray(fit.transpose("peak", "y", "x").values, dtype=float)
        true_e = np.asarray(truth["peak_energy"].values, dtype=float)
        for k, name in enumerate(np.asarray(truth["peak_name"].values)):
            present = np.isfinite(true_e[k])
            if not present.any():
                continue
            diff = fit_e[:, present] - true_e[k][present]  # (n_fit_peaks, n_pixels)
            absd = np.where(np.isfinite(diff), np.abs(diff), np.inf)
            best = np.take_along_axis(diff, np.argmin(absd, axis=0)[None], axis=0)[0]
            ok = np.isfinite(best)
            if not ok.any():
                lines.append(f"  {name}: not recovered in any of {present.sum()} pixels")
                continue
            err = np.abs(best[ok]) * 1e3
            if np.median(err) > 50.0:
                lines.append(
                    f"  {name}: not resolved by the fit (nearest of its {fit_e.shape[0]} "
                    f"fitted peak(s) is {np.median(err):.0f} meV away in the median pixel; "
                    "fit more peaks with --peaks)"
                )
                continue
            lines.append(
                f"  {name}: |dE| median {np.median(err):.1f} meV, 95% {np.percentile(err, 95):.1f}"
                f" meV, bias {np.median(best[ok]) * 1e3:+.1f} meV, within 10 meV in "
                f"{np.mean(np.abs(best) < 0.010) * 100:.0f}% of {present.sum()} pixels"
            )
    if "region" in result:
        got = np.asarray(result["region"].values)
        want = np.asarray(truth["region"].values)
        agree = 0
        for lab in np.unique(got[np.isfinite(got)] if got.dtype.kind == "f" else got):
            sel = got == lab
            agree += np.bincount(want[sel] + 1).max()  # truth codes start at -1
        lines.append(
            f"  regions: {agree / want.size * 100:.0f}% of pixels agree after "
            "matching each label to its most frequent truth region"
        )
    return "\n".join(lines)
