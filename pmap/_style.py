"""pmap's visual language: titles, colour maps, the region palette, NaN colour, orientation.

One module, used by the figures (:mod:`pmap.report`) and by the napari viewer
(:mod:`pmap.napari_plugin`), so that a map looks the same in both:

- **titles** are human names with units, ``"Peak energy (eV) — peak 0"``
  (:func:`map_title`), from a short table of pmap's variables, else the
  ``long_name`` attr, and the ``units`` attr;
- **orientation**: y increases upwards, the origin (smallest y and x) is the
  lower-left corner, in figures (``origin="lower"``) and in the viewer (camera
  with the vertical axis pointing up) (:data:`ORIENTATION_NOTE`);
- **colour maps** are perceptually uniform, never rainbow-like
  (:func:`colormap_for`): viridis for energies and wavelengths, plasma for
  widths, magma for intensities, inferno for fit quality, cividis for 1σ
  uncertainties;
- **regions** and other categories take the colour-blind-safe palette of
  Okabe and Ito (2008, "Color Universal Design", J*FLY; hex values from that
  document, black left out because the viewer's background is dark), by
  code, so region 1 is the same colour in every figure and in the viewer
  (:func:`region_colour`);
- **NaN, masked and no-signal pixels** are one neutral grey
  (:data:`NAN_COLOUR`), said so in every map's legend (:data:`NAN_TEXT`);
- **integer and status maps** get discrete colours (:func:`discrete_levels`).

Plain Python: imports neither matplotlib nor napari.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = [
    "NAN_COLOUR",
    "NAN_TEXT",
    "ORIENTATION_NOTE",
    "CATEGORY_PALETTE",
    "region_colour",
    "category_colour",
    "status_colours",
    "NO_VALUE_TOKENS",
    "unit_text",
    "human_name",
    "map_title",
    "colormap_for",
    "discrete_levels",
    "flag_names",
    "MAX_DISCRETE",
]

#: Colour of NaN, masked and no-signal pixels (and of region −1, "no signal").
NAN_COLOUR = "#a0a0a0"
#: What that colour means, as written in every map's legend.
NAN_TEXT = "grey: no value (NaN, masked or no signal)"
#: Orientation shared by figures and viewer.
ORIENTATION_NOTE = "origin lower left, y up"

#: Okabe & Ito (2008) colour-blind-safe colours, black omitted; ordered so that
#: the first three (the usual number of regions) differ for every colour-vision type.
CATEGORY_PALETTE = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#D55E00",  # vermillion
    "#009E73",  # bluish green
    "#F0E442",  # yellow
)

#: Largest number of distinct integer values drawn with discrete colours.
MAX_DISCRETE = 24

_UNITS = {"um": "µm", "um2": "µm²", "pixel2": "px²", "1": "", "none": "", "dimensionless": ""}

#: Human names of pmap's variables (units come from the attrs).
_NAMES = {
    "peak_energy": "Peak energy",
    "peak_fwhm": "Peak FWHM",
    "peak_fwhm_apparent": "Apparent peak FWHM",
    "peak_height": "Peak height",
    "peak_area": "Peak area",
    "peak_wavelength": "Peak wavelength",
    "peak_shape": "Peak shape",
    "peak_status": "Peak fit status",
    "background_offset": "Background offset",
    "background_slope": "Background slope",
    "fit_status": "Fit status",
    "chi2_red": "Reduced χ²",
    "residual_variance": "Residual variance",
    "bic": "BIC (lower is better)",
    "n_iter": "Fit iterations",
    "max_energy": "Energy of the maximum",
    "centroid_energy": "Centroid energy",
    "integrated_intensity": "Integrated intensity",
    "fwhm_interp": "FWHM (interpolated)",
    "window_ratio": "Window ratio",
    "component_abundance": "Component amplitude",
    "region": "Regions",
    "qfls": "Quasi-Fermi-level splitting",
    "implied_voc": "Implied open-circuit voltage",
    "carrier_temperature": "Carrier temperature",
    "planck_chi2_red": "Planck fit: reduced χ²",
    "planck_status": "Planck fit status",
}


def region_colour(code: int) -> str:
    """Hex colour of region ``code``: the palette by code, grey for −1 (no signal)."""
    code = int(code)
    if code < 0:
        return NAN_COLOUR
    return CATEGORY_PALETTE[code % len(CATEGORY_PALETTE)]


def category_colour(index: int) -> str:
    """Hex colour of the ``index``-th category of a status or label map."""
    return CATEGORY_PALETTE[int(index) % len(CATEGORY_PALETTE)]


#: Status tokens that mean "no value here": drawn in :data:`NAN_COLOUR`, like NaN.
NO_VALUE_TOKENS = ("no signal", "masked or nan", "no emission", "masked")


def status_colours(levels: list[int], attrs: Mapping | None = None) -> dict[int, str]:
    """Colour of each code of a status (CF flag) map: no-value codes grey, the others the
    categorical palette in flag order (so "converged" is always the first colour)."""
    names = flag_names(attrs or {}) or {}
    out: dict[int, str] = {}
    i = 0
    for code in levels:
        if names.get(code, "") in NO_VALUE_TOKENS:
            out[code] = NAN_COLOUR
        else:
            out[code] = category_colour(i)
            i += 1
    return out


def unit_text(units: Any) -> str:
    """Units as printed: ``"um"`` → ``"µm"``, dimensionless → ``""``."""
    if units is None:
        return ""
    u = str(units).strip()
    return _UNITS.get(u, u)


def human_name(name: str, attrs: Mapping | None = None) -> str:
    """Readable name of a variable, capitalised (``"peak_energy"`` → ``"Peak energy"``)."""
    attrs = attrs or {}
    base = str(name)
    err = base.endswith("_err")
    if err:
        base = base.removesuffix("_err")
    text = _NAMES.get(base)
    if text is None and not err and attrs.get("long_name"):
        text = str(attrs["long_name"])
    if text is None:
        text = base.replace("_", " ")
    if err:
        text = f"{text} 1σ uncertainty"
    return text[:1].upper() + text[1:]


def map_title(
    name: str,
    units: Any = None,
    *,
    attrs: Mapping | None = None,
    dim: str | None = None,
    index: Any = None,
) -> str:
    """Title of a map with its units, e.g. ``"Peak energy (eV) — peak 0"``.

    ``units`` defaults to ``attrs["units"]``; dimensionless units are left out.
    """
    attrs = attrs or {}
    if units is None:
        units = attrs.get("units")
    u = unit_text(units)
    text = human_name(name, attrs)
    if u:
        text += f" ({u})"
    if dim is not None:
        text += f" — {dim} {index}"
    return text


_CMAP_RULES = (
    (("_err", "uncertainty"), "cividis"),
    (("chi2", "bic", "residual", "n_iter"), "inferno"),
    (("fwhm", "width"), "plasma"),
    (("energy", "wavelength", "centroid", "shift"), "viridis"),
    (("height", "area", "intensity", "background", "abundance"), "magma"),
)


def colormap_for(name: str) -> str:
    """Perceptually uniform colour map (matplotlib and napari name) for a variable."""
    for keys, cmap in _CMAP_RULES:
        if any(k in str(name) for k in keys):
            return cmap
    return "viridis"


def _flag_values(attrs: Mapping) -> list[int] | None:
    fv = attrs.get("flag_values")
    if fv is None:
        return None
    if isinstance(fv, str):
        fv = [t for t in fv.replace("[", " ").replace("]", " ").replace(",", " ").split() if t]
    try:
        return [int(v) for v in np.atleast_1d(fv)]
    except (TypeError, ValueError):
        return None


def flag_names(attrs: Mapping) -> dict[int, str] | None:
    """CF ``flag_values`` → ``flag_meanings`` tokens (underscores as spaces), or None."""
    fv = _flag_values(attrs)
    fm = attrs.get("flag_meanings")
    if fv is None or fm is None:
        return None
    return {v: t.replace("_", " ") for v, t in zip(fv, str(fm).split())}


def discrete_levels(values: Any, attrs: Mapping | None = None) -> list[int] | None:
    """The integer levels of a map drawn with discrete colours, or None for a continuous map.

    CF flag maps give their ``flag_values``; integer and boolean maps, and
    float maps whose finite values are all integers (NaN for missing), give
    their distinct values when there are at most :data:`MAX_DISCRETE` (float
    maps only when dimensionless: counts of iterations, not eV).
    """
    attrs = attrs or {}
    fv = _flag_values(attrs)
    if fv is not None:
        return sorted(fv)
    a = np.asarray(values)
    if a.dtype.kind == "b":
        return [0, 1]
    if a.dtype.kind in "iu":
        u = np.unique(a)
    elif a.dtype.kind == "f":
        if unit_text(attrs.get("units")):
            return None  # a physical quantity (eV, counts) is continuous even when whole
        f = a[np.isfinite(a)]
        if f.size == 0 or not np.all(f == np.round(f)):
            return None
        u = np.unique(f)
    else:
        return None
    if u.size > MAX_DISCRETE:
        return None
    return [int(v) for v in u]
