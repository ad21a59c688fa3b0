"""Figures of maps, histograms, spectra and region labels (PNG files).

An edge module: it only reads xarray objects that follow pmap's conventions
(``units`` and ``long_name`` attrs, y and x in µm) and writes PNG files.
matplotlib is imported inside the functions and used through its
object-oriented API (:class:`matplotlib.figure.Figure`, rendered by Agg), so
importing :mod:`pmap.report` is light and no pyplot state or GUI backend is
touched.

The visual language (titles with units, colour maps, the region palette,
the NaN colour, y up with the origin lower left) comes from
:mod:`pmap._style`, which the napari viewer uses too. Maps are drawn with y
increasing upwards (``origin="lower"``), axes in µm, equal aspect, NaN,
masked and no-signal pixels in one neutral grey (said so under the map),
integer and status maps with discrete colours, a scale bar of a round
length, and the clipping of robust colour limits stated on the colour bar.
Each PNG carries a ``Description`` text chunk (JSON: variable, units, colour
limits, scale-bar length) and ``Software`` = ``pmap <version>``.
"""

from __future__ import annotations

import contextlib
import json
import math
import re
import threading
import warnings
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import xarray as xr

from . import _style
from ._version import __version__
from .conventions import SPECTRAL_DIMS
from .errors import PmapNotice, StepError

__all__ = [
    "plot_map",
    "plot_histogram",
    "plot_spectra",
    "plot_labels",
    "write_figures",
    "summarise_result",
    "nice_scale_length",
    "figure_output",
    "parse_size_cm",
    "plot_small_multiples",
]

DPI = 120
#: Output settings of every figure written: dots per inch and, when set, the figure
#: size in inches (:func:`figure_output`); otherwise each figure picks its own size.
_OUTPUT: dict[str, Any] = {"dpi": DPI, "size_in": None}
CM_PER_INCH = 2.54
NAN_COLOUR = _style.NAN_COLOUR
#: write_figures draws one map per slice of a 3-D variable only up to this many slices.
MAX_SLICES = 32
_UNIT_TEXT = {"um": "µm", "1": "", "": "", "pixel": "pixel", "counts": "counts"}


# --------------------------------------------------------------------------- helpers


def _unit_text(units: Any) -> str:
    return _style.unit_text(units)


def _label(da: xr.DataArray | xr.Variable, fallback: str = "") -> str:
    """``Human name (units)`` of a variable (:func:`pmap._style.map_title`)."""
    name = getattr(da, "name", None)
    if name is None:
        name = da.attrs.get("long_name") or fallback
    return _style.map_title(str(name), attrs=da.attrs)


def _title(da: xr.DataArray, stem: str | None = None) -> str:
    """Figure title of a map or a slice of one: human name, units, slice."""
    name = str(da.name or stem or "")
    dim = index = None
    for d in ("peak", "component"):
        if d in da.coords and da[d].ndim == 0:
            dim, index = d, da[d].values.item()
            for cname, c in da.coords.items():
                if cname != d and c.ndim == 0 and c.dtype.kind in "OUS" and d in cname:
                    index = f"{index} ({c.values.item()})"
    title = _style.map_title(name, attrs=da.attrs, dim=dim, index=index)
    # a slice along a stack dim (temperature, excitation power, time...): say which
    for cname, c in da.coords.items():
        if c.ndim == 0 and cname not in ("y", "x", "peak", "component") \
                and c.dtype.kind in "fiu" and cname in _STACK_DIMS:
            unit = _style.unit_text(c.attrs.get("units"))
            title += f" — {cname.replace('_', ' ')} {c.values.item():g} {unit}".rstrip()
    return title


#: Stack dims whose value is named in the title of a slice (pmap.stack, plcube stack).
_STACK_DIMS = ("temperature", "excitation_power", "time", "exposure", "position", "field",
               "pressure", "voltage", "current", "angle", "polarization", "index")


def nice_scale_length(width: float) -> float:
    """Round scale-bar length (1, 2 or 5 × 10ⁿ) closest in ratio to ``width / 5``.

    Parameters
    ----------
    width : float
        Width of the map, in its length unit (µm); must be positive.

    Returns
    -------
    float
        The bar length in the same unit.
    """
    if not (width > 0 and math.isfinite(width)):
        raise StepError(f"map width must be a positive finite length, got {width!r}")
    target = width / 5.0
    exp = math.floor(math.log10(target))
    cands = [m * 10.0**e for e in (exp - 1, exp, exp + 1) for m in (1, 2, 5)]
    return min(cands, key=lambda c: abs(math.log(c / target)))


def _as_map(da: xr.DataArray, what: str = "map") -> xr.DataArray:
    """Squeeze size-1 dims and check the result is a (y, x) map."""
    if not isinstance(da, xr.DataArray):
        raise StepError(f"{what} must be an xarray DataArray, got {type(da).__name__}")
    extra = [d for d in da.dims if d not in ("y", "x") and da.sizes[d] == 1]
    da = da.squeeze(extra, drop=False) if extra else da
    if set(da.dims) != {"y", "x"}:
        raise StepError(
            f"{what} {da.name!r} must have dims (y, x) (size-1 others are squeezed), "
            f"got {dict(da.sizes)}; select one slice first"
        )
    return da.transpose("y", "x")


def _axis_values(da: xr.DataArray, dim: str) -> tuple[np.ndarray, str]:
    if dim in da.coords:
        return np.asarray(da[dim].values, dtype=float), str(da[dim].attrs.get("units", "pixel"))
    return np.arange(da.sizes[dim], dtype=float), "pixel"


def _extent(vals: np.ndarray) -> tuple[float, float]:
    step = float(np.median(np.diff(vals))) if vals.size > 1 else 1.0
    return float(vals[0] - step / 2), float(vals[-1] + step / 2)


def _robust_limits(values: np.ndarray, robust: bool) -> tuple[float, float] | None:
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return None
    lo, hi = np.percentile(finite, [2, 98]) if robust else (finite.min(), finite.max())
    lo, hi = float(lo), float(hi)
    if hi <= lo:
        pad = abs(lo) * 1e-3 or 1.0
        lo, hi = lo - pad, hi + pad
    return lo, hi


def _new_figure(nrows_over_ncols: float, *, width_in: float = 6.4, side_in: float = 1.9,
                map_layout: bool = False):
    """A figure whose height fits a map of that aspect beside ``side_in`` of colour bar.

    ``map_layout``: one map (or histogram) with its colour bar, legend or text panel,
    placed by :func:`_map_layout`
    (margins measured once from the texts, no constraint solver); else matplotlib's
    constrained layout.
    """
    from matplotlib.figure import Figure

    # a map figure is at least MAP_MIN_HEIGHT_IN high: room for a colour bar's label
    # along its side beside a wide, flat map
    height = min(max((width_in - side_in) * nrows_over_ncols + 1.3,
                     MAP_MIN_HEIGHT_IN if map_layout else 2.8), 9.0)
    return Figure(figsize=(width_in, height),
                  layout=_map_layout()() if map_layout else "constrained")


#: Least height (inches) of a one-map figure (a colour bar label of two lines of up to
#: ~50 characters at 8.5 pt runs along the bar).
MAP_MIN_HEIGHT_IN = 3.6
#: Space (inches) kept between a figure's edge and its outermost text, and between the
#: map and its colour bar, in the fixed map layout.
LAYOUT_PAD_IN = 0.08
COLORBAR_GAP_IN = 0.14
#: Gap (inches) between a histogram and the statistics written beside it.
SIDE_GAP_IN = 0.25
#: Colour bar: this fraction of the map's height, and its width as a fraction of its
#: height (within 0.12-0.22 in).
COLORBAR_SHRINK = 0.9
COLORBAR_ASPECT = 20.0

_MAP_LAYOUT: list = []


def _map_layout():
    """The class of the fixed layout of a one-map figure (made on first use, so that
    importing this module does not import matplotlib).

    At every draw (so at any figure size or dpi set by :func:`figure_output`) it places
    the map's axes at the largest box of the map's aspect that leaves room for the
    outer texts, measured from the texts themselves: y tick labels and label on the
    left, x tick labels, label and the footer note below, the title above, the colour
    bar (with its tick labels and label), the legend or a panel of text (a histogram's
    statistics) on the right; an axes without equal aspect fills the space. The texts are
    measured with the map placed by a first guess, then again where that put it, and
    the map is placed for good (cheaper than matplotlib's constrained layout, which
    measures every artist while it solves).
    """
    if _MAP_LAYOUT:
        return _MAP_LAYOUT[0]
    from matplotlib.layout_engine import LayoutEngine

    class MapLayout(LayoutEngine):
        _adjust_compatible = False
        _colorbar_gridspec = False

        def __init__(self) -> None:
            super().__init__()
            self.ax = None  # the map
            self.cax = None  # its colour bar (plot_map)
            self.legend = None  # or its legend (plot_labels)
            self.side = None  # or an axes of text on the right (plot_histogram)
            self._bar_label_in = 0.0  # length of the colour bar's label, inches
            self.image = None  # the map's image and its values at full resolution
            self.values = None
            self._extent = None  # the image's extent as drawn first (whole map)
            self._step = (1, 1)  # the image holds every ky-th row, kx-th column

        def execute(self, fig) -> None:
            ax = self.ax
            if ax is None:
                return
            renderer = fig._get_renderer()
            w_in, h_in = (float(v) for v in fig.get_size_inches())
            pad = LAYOUT_PAD_IN
            # first guess: matplotlib's default font sizes; the right side from the
            # colour bar or legend measured below
            margins = [0.85, 1.3 if self.cax is not None else 1.9 if self.side is not None
                       else 0.3, 0.75, 0.45]
            # measured again only where the first placement was far off: the number of
            # ticks (so the width of their labels) follows the lengths of the axes and of
            # the colour bar (as long as its label beside a flat map)
            box = self._place(fig, w_in, h_in, margins)
            bar = self._bar_in()
            margins = self._measure(fig, renderer, box, w_in, h_in, pad)
            placed = self._place(fig, w_in, h_in, margins)
            if (abs(placed[2] - box[2]) > 0.1 * box[2] or abs(placed[3] - box[3]) > 0.1 * box[3]
                    or abs(self._bar_in() - bar) > 0.1 * max(bar, 1e-9)):
                margins = self._measure(fig, renderer, placed, w_in, h_in, pad)
                placed = self._place(fig, w_in, h_in, margins)
            box = placed
            self._decimate(box[2] * fig.dpi, box[3] * fig.dpi)

        def _decimate(self, w_px: float, h_px: float) -> None:
            """Give the image every k-th pixel of a map with over k times as many pixels
            as the axes have along that side (nearest-pixel sampling, as the drawing does
            anyway when it shrinks a map, on fewer values: colour mapping and resampling
            cost follow the map's size). The statistics stated on the figure come from
            the whole map."""
            full = self.values
            if self.image is None or full is None or full.ndim != 2:
                return
            ny, nx = full.shape
            ky = max(int(ny // max(h_px, 1.0)), 1)
            kx = max(int(nx // max(w_px, 1.0)), 1)
            if (ky, kx) == self._step:  # as drawn already (the whole map at first)
                return
            self._step = (ky, kx)
            if self._extent is None:
                self._extent = tuple(self.image.get_extent())
            x0, x1, y0, y1 = self._extent
            # each sampled pixel keeps the place and size of its k original pixels (the
            # last row or column may reach past the map: the axes' limits clip it)
            mx, my = -(-nx // kx), -(-ny // ky)
            extent = (x0, x0 + (x1 - x0) * mx * kx / nx, y0, y0 + (y1 - y0) * my * ky / ny)
            ax = self.ax
            xlim, ylim = ax.get_xlim(), ax.get_ylim()
            self.image.set_data(full[::ky, ::kx] if ky > 1 or kx > 1 else full)
            self.image.set_extent(extent)
            ax.set_xlim(xlim)
            ax.set_ylim(ylim)

        def _bar_in(self) -> float:
            """Length of the colour bar as placed, inches (0 without one)."""
            if self.cax is None:
                return 0.0
            return float(self.cax.get_position().height * self.cax.figure.get_size_inches()[1])

        def _place(self, fig, w_in, h_in, margins):
            """Place the map (and colour bar) for margins (left, right, bottom, top), in
            inches; returns the map's box (x0, y0, width, height) in inches."""
            ax = self.ax
            left, right, bottom, top = margins
            avail_w = max(w_in - left - right, 0.2 * w_in)
            avail_h = max(h_in - bottom - top, 0.2 * h_in)
            x0, x1 = ax.get_xlim()
            y0, y1 = ax.get_ylim()
            aspect = abs((y1 - y0) / (x1 - x0)) if x1 != x0 and y1 != y0 else 1.0
            if ax.get_aspect() != 1.0:  # not an equal-aspect map: fill the space
                aspect = avail_h / avail_w
            w = min(avail_w, avail_h / aspect)
            h = w * aspect
            # centred in the space left by the margins
            bx = left + (avail_w - w) / 2
            by = bottom + (avail_h - h) / 2
            ax.set_position((bx / w_in, by / h_in, w / w_in, h / h_in))
            if self.cax is not None:
                # as long as its label (centred on the map), within the figure
                ch = min(max(COLORBAR_SHRINK * h, self._bar_label_in + 0.1),
                         h_in - 2 * LAYOUT_PAD_IN)
                cw = min(max(ch / COLORBAR_ASPECT, 0.12), 0.22)
                self.cax.set_position(((bx + w + COLORBAR_GAP_IN) / w_in,
                                       (by + (h - ch) / 2) / h_in, cw / w_in, ch / h_in))
            if self.side is not None:  # its texts hang from its top left corner
                self.side.set_position(((bx + w + SIDE_GAP_IN) / w_in, by / h_in,
                                        max(w_in - bx - w - SIDE_GAP_IN, 0.1) / w_in,
                                        h / h_in))
            return bx, by, w, h

        def _measure(self, fig, renderer, box, w_in, h_in, pad):
            """Margins (inches) that the texts around the map at ``box`` need."""
            dpi = fig.dpi
            bx, by, w, h = box
            lo_x, lo_y, hi_x, hi_y = bx, by, bx + w, by + h  # extents of all texts, inches

            def grow(bb):
                nonlocal lo_x, lo_y, hi_x, hi_y
                if bb is None or bb.width == 0 and bb.height == 0:
                    return
                lo_x, lo_y = min(lo_x, bb.x0 / dpi), min(lo_y, bb.y0 / dpi)
                hi_x, hi_y = max(hi_x, bb.x1 / dpi), max(hi_y, bb.y1 / dpi)

            ax = self.ax
            for axis in (ax.xaxis, ax.yaxis):
                grow(axis.get_tightbbox(renderer))
            if ax.title.get_text():
                grow(ax.title.get_window_extent(renderer))
            if self.cax is not None:
                label = self.cax.yaxis.label
                self._bar_label_in = (label.get_window_extent(renderer).height / dpi
                                      if label.get_text() else 0.0)
                grow(self.cax.get_tightbbox(renderer))
            if self.legend is not None:
                grow(self.legend.get_window_extent(renderer))
            if self.side is not None:
                for t in self.side.texts:
                    grow(t.get_window_extent(renderer))
            foot = getattr(fig, "_supxlabel", None)
            foot_h = (foot.get_window_extent(renderer).height / dpi + 0.01 * h_in
                      if foot is not None and foot.get_text() else 0.0)
            return [bx - lo_x + pad, hi_x - (bx + w) + pad,
                    by - lo_y + pad + foot_h, hi_y - (by + h) + pad]

    _MAP_LAYOUT.append(MapLayout)
    return MapLayout


def _colorbar(ax, im, **kw):
    """A colour bar beside the map ``ax``: in the fixed map layout, on its own axes
    placed by the layout; else taken from ``ax`` (shrunk to 0.9 of its height)."""
    fig = ax.figure
    engine = fig.get_layout_engine()
    if _MAP_LAYOUT and isinstance(engine, _MAP_LAYOUT[0]) and engine.ax is ax:
        engine.cax = fig.add_axes((0.9, 0.1, 0.02, 0.8))
        cb = fig.colorbar(im, cax=engine.cax, **kw)
        # a multiplier ("1e-7") centred over the bar, not reaching back over the map
        cb.ax.yaxis.get_offset_text().set(x=0.5, horizontalalignment="center")
        return cb
    return fig.colorbar(im, ax=ax, shrink=COLORBAR_SHRINK, **kw)


def parse_size_cm(text: str) -> tuple[float, float]:
    """Parse a figure size ``"WIDTHxHEIGHT"`` in centimetres (e.g. ``"8.5x6"``) → (w, h) cm."""
    parts = str(text).lower().replace("cm", "").replace("×", "x").split("x")
    try:
        w, h = (float(v) for v in parts)
    except ValueError:
        raise StepError(f"figure size must be WIDTHxHEIGHT in cm, e.g. 8.5x6, got {text!r}") \
            from None
    if not (2.0 <= w <= 100.0 and 2.0 <= h <= 100.0):
        raise StepError(f"figure size {w:g} x {h:g} cm is outside 2-100 cm per side")
    return w, h


@contextlib.contextmanager
def figure_output(*, dpi: float | None = None, size_cm: tuple[float, float] | None = None
                  ) -> Iterator[None]:
    """Within the block, every figure is saved at ``dpi`` (dots per inch) and ``size_cm``.

    Parameters
    ----------
    dpi : float, optional
        Resolution of the PNG files, dots per inch (default :data:`DPI`, 120).
    size_cm : (float, float), optional
        Figure width and height in centimetres (e.g. (8.5, 6) for one journal
        column); default: each figure's own size, fitted to its map's aspect.
        Font sizes stay in points, as a journal asks.
    """
    if dpi is not None and not (20 <= float(dpi) <= 2400):
        raise StepError(f"dpi must be between 20 and 2400, got {dpi}")
    if size_cm is not None:
        size_cm = parse_size_cm(f"{size_cm[0]}x{size_cm[1]}")
    old = dict(_OUTPUT)
    _OUTPUT["dpi"] = float(dpi) if dpi is not None else old["dpi"]
    if size_cm is not None:
        _OUTPUT["size_in"] = (size_cm[0] / CM_PER_INCH, size_cm[1] / CM_PER_INCH)
    try:
        yield
    finally:
        _OUTPUT.clear()
        _OUTPUT.update(old)


#: At a chosen figure size smaller than a figure's own, the figure is laid out at up to
#: this factor of the chosen size and scaled down into it (text shrinks by the same
#: factor: 10 pt → 6.3 pt at most), so a one-column figure keeps room for its map.
MAX_SHRINK = 1.6


def _apply_output(fig) -> float:
    """Set ``fig``'s size and dpi for the output settings; returns the rendering dpi."""
    dpi = float(_OUTPUT["dpi"])
    size = _OUTPUT["size_in"]
    if size is not None:
        natural = getattr(fig, "_pmap_natural_width_in", None)
        if natural is None:
            natural = float(fig.get_size_inches()[0])
            fig._pmap_natural_width_in = natural
        k = min(max(natural / size[0], 1.0), MAX_SHRINK)
        fig.set_size_inches(size[0] * k, size[1] * k)
        dpi /= k  # same pixels as size × dpi: the layout is scaled down by k
    fig.set_dpi(dpi)
    return dpi


def _save(fig, path: str | Path, info: Mapping[str, Any]) -> Path:
    """Write ``fig`` as PNG with ``info`` (JSON) in its metadata, drawn once.

    A figure already drawn by :func:`_render` (to measure its layout for ``info``) is
    encoded from that drawing, not drawn a second time.
    """
    from PIL import Image, PngImagePlugin

    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    info = dict(info)
    info.setdefault("dpi", float(_OUTPUT["dpi"]))
    if _OUTPUT["size_in"] is not None:
        info.setdefault("size_cm", [round(v * CM_PER_INCH, 3) for v in _OUTPUT["size_in"]])
    if getattr(fig, "_pmap_rendered", None) != _output_key():
        _render(fig)
    png = PngImagePlugin.PngInfo()
    png.add_text("Software", f"pmap {__version__}")
    png.add_text("Description", json.dumps(info))
    rgba = np.asarray(fig.canvas.buffer_rgba())
    # an opaque drawing (every figure here: white background) is written as RGB, the same
    # pixels with a quarter less to compress
    image = Image.fromarray(np.array(rgba[..., :3] if rgba[..., 3].min() == 255 else rgba))
    # the chosen dpi goes into the file, so the PNG prints at its size
    kw = {"format": "png", "dpi": (_OUTPUT["dpi"], _OUTPUT["dpi"]), "pnginfo": png,
          "compress_level": PNG_COMPRESS_LEVEL}
    pending = getattr(_SAVES, "pending", None)
    if pending is None:
        image.save(p, **kw)
    else:  # inside _deferred_saves: PNG encoding (zlib, GIL released) beside the next drawing
        pending.append(_SAVES.pool.submit(image.save, p, **kw))
    _release(fig)
    return p


def _release(fig) -> None:
    """Drop the arrays a saved figure holds (its images' values and, in the map layout,
    the map at full resolution). A figure is a reference cycle, freed only by the garbage
    collector's next full pass; until then each figure of a large map kept a copy of
    the map (about 22 MB at 1397 x 1397 pixels), so memory grew with every figure."""
    for ax in fig.axes:
        for im in ax.images:  # the image keeps its own copy of the values drawn
            im.set_data(_NO_PIXELS)
    eng = fig.get_layout_engine()
    if hasattr(eng, "values"):  # the map layout's full-resolution map (_decimate)
        eng.values = None


_NO_PIXELS = np.zeros((1, 1))


#: zlib level of the PNG files (lossless at any level). The 21 figures of a 698 x 698
#: result as RGB (noisy maps compress little): 0.70 CPU s and 10.11 MB at level 1,
#: 1.60 s and 9.69 MB at zlib's default (6).
PNG_COMPRESS_LEVEL = 1


_SAVES = threading.local()


@contextlib.contextmanager
def _deferred_saves() -> Iterator[None]:
    """Within the block, :func:`_save` encodes and writes PNGs on one background thread
    (the same bytes), so the next figure is drawn meanwhile; every file is written (or
    its error raised) when the block ends."""
    from concurrent.futures import ThreadPoolExecutor

    if getattr(_SAVES, "pending", None) is not None:  # nested: the outer block waits
        yield
        return
    _SAVES.pending, _SAVES.pool = [], ThreadPoolExecutor(1, thread_name_prefix="pmap-png")
    try:
        yield
    finally:
        pending, pool = _SAVES.pending, _SAVES.pool
        _SAVES.pending = _SAVES.pool = None
        pool.shutdown(wait=True)
        for f in pending:
            f.result()


def _output_key() -> tuple:
    return (float(_OUTPUT["dpi"]), None if _OUTPUT["size_in"] is None
            else tuple(_OUTPUT["size_in"]))


def _render(fig) -> None:
    """Lay out and draw ``fig`` on an Agg canvas at the output dpi and size, as :func:`_save`.

    Figures of one pixel size drawn one after another in a thread share one Agg renderer:
    its measurements of texts (cached per renderer) serve the next figure too (the same
    pixels; 10-25 ms less per map figure). A figure is saved (its pixels copied) before
    the next one is drawn.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    _apply_output(fig)
    canvas = FigureCanvasAgg(fig)
    key = (*canvas.get_width_height(physical=True), fig.dpi)
    last = getattr(_RENDERER, "last", None)
    if last is not None and last[0] == key:
        canvas.renderer, canvas._lastKey = last[1], key  # as the canvas keys its own
    canvas.draw()
    _RENDERER.last = (key, canvas.renderer)
    fig._pmap_rendered = _output_key()


_RENDERER = threading.local()


def _axes_px(ax) -> list[float]:
    """Axes box in PNG pixels (x0, y0, x1, y1), y from the top of the image, as saved."""
    fig = ax.figure
    if getattr(fig, "_pmap_rendered", None) != _output_key():
        _render(fig)
    x0, y0, x1, y1 = ax.get_window_extent().extents
    h = fig.bbox.height
    return [float(x0), float(h - y1), float(x1), float(h - y0)]


#: Titles longer than this many characters are wrapped onto more lines (never cut).
TITLE_WIDTH = 54


def _set_title(ax, text: str) -> str:
    """Set the axes title, wrapped at :data:`TITLE_WIDTH` characters; returns the text."""
    import textwrap

    text = str(text)
    ax.set_title("\n".join(textwrap.wrap(text, TITLE_WIDTH)) if len(text) > TITLE_WIDTH
                 else text)
    return text


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", str(text)).strip("_") or "figure"


class _MapArtists(NamedTuple):
    image: Any
    colorbar: Any
    scale_bar_um: float | None
    levels: list[int] | None = None
    n_nan: int = 0
    n_value: int = 0  # pixels with a finite value


def _draw_scale_bar(ax, x_ext, y_ext) -> float:
    from matplotlib import patheffects
    from matplotlib.patches import Rectangle

    width = x_ext[1] - x_ext[0]
    height = y_ext[1] - y_ext[0]
    length = nice_scale_length(width)
    margin = 0.04 * width
    bar_h = max(0.015 * height, 0.004 * width)
    x1 = x_ext[1] - margin
    y0 = y_ext[0] + 0.04 * height
    ax.add_patch(
        Rectangle(
            (x1 - length, y0),
            length,
            bar_h,
            facecolor="white",
            edgecolor="black",
            linewidth=0.8,
            zorder=5,
            gid="scale_bar",
        )
    )
    ax.text(
        x1 - length / 2,
        y0 + bar_h * 1.6,
        f"{length:g} µm",
        ha="center",
        va="bottom",
        color="white",
        fontsize=9,
        zorder=6,
        path_effects=[patheffects.withStroke(linewidth=2, foreground="black")],
    )
    return length


def _colormap(cmap):
    import matplotlib as mpl

    if isinstance(cmap, mpl.colors.Colormap):
        return cmap.with_extremes(bad=NAN_COLOUR)
    if cmap in mpl.colormaps:
        return mpl.colormaps[cmap].with_extremes(bad=NAN_COLOUR)
    raise StepError(f"unknown colormap {cmap!r} (use a matplotlib colormap name)")


def _draw_map(
    ax, da: xr.DataArray, *, cmap=None, robust=True, scale_bar=True, norm=None, vlim=None,
    discrete: bool = True, note: str | None = None,
) -> _MapArtists:
    """Draw a (y, x) map on ``ax``: image, colour bar, scale bar, NaN note. Returns the artists.

    Integer maps (:func:`pmap._style.discrete_levels`) get one colour per value
    and a colour bar ticked at the values; continuous maps with robust limits
    say on the colour bar how many pixels lie beyond them.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap

    yv, yunit = _axis_values(da, "y")
    xv, xunit = _axis_values(da, "x")
    values = np.asarray(da.values, dtype=float)
    if yv.size > 1 and yv[1] < yv[0]:
        values, yv = values[::-1], yv[::-1]
    if xv.size > 1 and xv[1] < xv[0]:
        values, xv = values[:, ::-1], xv[::-1]
    x_ext, y_ext = _extent(xv), _extent(yv)
    name = str(da.name or "")
    levels = _style.discrete_levels(values, da.attrs) if (discrete and norm is None) else None
    clip_note = ""
    kw: dict[str, Any] = {}
    if levels is not None:
        base = _colormap(cmap or _style.colormap_for(name))
        n = len(levels)
        cm = ListedColormap([base(0.5 if n == 1 else i / (n - 1)) for i in range(n)],
                            name=f"{base.name} ({n} levels)")
        cm = cm.with_extremes(bad=NAN_COLOUR)
        index = np.full(values.shape, np.nan)
        for i, lv in enumerate(levels):
            index[values == lv] = i
        values = index
        kw["norm"] = BoundaryNorm(np.arange(n + 1) - 0.5, n)
    else:
        cm = _colormap(cmap or _style.colormap_for(name))
        if norm is not None:
            kw["norm"] = norm
        else:
            lim = vlim if vlim is not None else _robust_limits(values, robust)
            if lim is not None:
                kw.update(vmin=lim[0], vmax=lim[1])
                below = int(np.sum(values < lim[0]))
                above = int(np.sum(values > lim[1]))
                if below or above:
                    how = "2–98 % limits" if (robust and vlim is None) else "limits"
                    clip_note = f"\n{how}; clipped: {below} px below, {above} above"
    shown = np.ma.masked_invalid(values)
    im = ax.imshow(
        shown,
        origin="lower",
        cmap=cm,
        aspect="equal",
        extent=(*x_ext, *y_ext),
        interpolation="nearest",
        # nearest samples taken from the values, then coloured (matplotlib 3.11's default
        # below 3x magnification colours every value of the map first): the same pixels
        # (every colour map of matplotlib 3.11 compared at 4 map sizes), 13 ms less per
        # 698 x 698 map
        interpolation_stage="data",
        **kw,
    )
    engine = ax.figure.get_layout_engine()
    if _MAP_LAYOUT and isinstance(engine, _MAP_LAYOUT[0]) and engine.ax is ax:
        engine.image, engine.values = im, shown  # sampled to the axes' size at drawing
    ax.set_facecolor(NAN_COLOUR)
    ax.set_xlabel(f"x ({_unit_text(xunit)})")
    ax.set_ylabel(f"y ({_unit_text(yunit)})")
    cb = None
    if levels is not None:
        cb = _colorbar(ax, im, ticks=np.arange(len(levels)))
        names = _style.flag_names(da.attrs) or {}
        cb.ax.set_yticklabels([names.get(lv, str(lv)) for lv in levels], fontsize=8)
        cb.set_label(_label(da, "value"))
    elif norm is None:
        extend = "neither"
        if "vmin" in kw:
            lo_c, hi_c = np.nanmin(values) < kw["vmin"], np.nanmax(values) > kw["vmax"]
            extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(
                (bool(lo_c), bool(hi_c)), "neither")
        cb = _colorbar(ax, im, extend=extend)
        fmt = cb.ax.yaxis.get_major_formatter()
        if hasattr(fmt, "set_useOffset"):  # whole values on the bar, not "+1.576" and 0.0005
            fmt.set_useOffset(False)
        cb.set_label(_label(da, "value") + clip_note, fontsize=8.5 if clip_note else None)
    n_nan = int(np.sum(~np.isfinite(values)))
    footer = _style.ORIENTATION_NOTE
    if n_nan:
        footer += f" · {_style.NAN_TEXT}: {n_nan} px"
    if note:  # what the map assumes (e.g. the Planck fit's), under the orientation note
        import textwrap

        footer += "\n" + "\n".join(textwrap.wrap(str(note), 110))
    ax.figure.supxlabel(footer, fontsize=7.5 if not note else 6.5, color="0.3")
    length = None
    if scale_bar and xunit == "um" and x_ext[1] > x_ext[0]:
        length = _draw_scale_bar(ax, x_ext, y_ext)
    return _MapArtists(im, cb, length, levels, n_nan, int(values.size) - n_nan)


#: Maps of the Planck fit: their figures state the fit's assumptions under the map.
_PLANCK_MAPS = ("qfls", "qfls_err", "carrier_temperature", "carrier_temperature_err",
                "implied_voc", "implied_voc_err", "plqy", "plqy_err", "urbach_energy",
                "urbach_energy_err", "planck_chi2_red")


# --------------------------------------------------------------------------- public


def plot_map(
    da: xr.DataArray,
    path: str | Path,
    *,
    title: str | None = None,
    cmap: str | None = None,
    robust: bool = True,
    scale_bar: bool = True,
    vlim: tuple[float, float] | None = None,
    note: str | None = None,
) -> Path:
    """Save one 2-D map (y, x in µm) as a PNG with colour bar and scale bar.

    Parameters
    ----------
    da : xarray.DataArray
        Map with dims (y, x) (size-1 extra dims are squeezed); ``long_name``
        and ``units`` attrs label the colour bar.
    path : str or Path
        Output PNG file (parent folders are created).
    title : str, optional
        Figure title; default the human name with units
        (:func:`pmap._style.map_title`).
    cmap : str, optional
        matplotlib colormap name (default :func:`pmap._style.colormap_for`
        the variable); NaN is drawn in :data:`pmap._style.NAN_COLOUR`.
        Integer-valued maps get one colour per value and a discrete colour bar.
    robust : bool
        Colour limits at the 2nd and 98th percentiles of the finite values
        (else min and max).
    scale_bar : bool
        Draw a scale bar of a round length near 1/5 of the width (µm maps only).
    vlim : (float, float), optional
        Colour limits in the map's units (overrides ``robust``); values beyond
        them are counted on the colour bar.
    note : str, optional
        Text printed under the map (what the map assumes, e.g. the Planck fit's
        assumptions).

    Returns
    -------
    Path
        The PNG written (dpi 120 unless :func:`figure_output` says otherwise).
    """
    da = _as_map(da)
    fig = _new_figure(da.sizes["y"] / da.sizes["x"], map_layout=True)
    ax = fig.add_subplot()
    fig.get_layout_engine().ax = ax
    art = _draw_map(ax, da, cmap=cmap, robust=robust, scale_bar=scale_bar, vlim=vlim,
                    note=note)
    title_text = _set_title(ax, title if title is not None else _title(da))
    return _save(
        fig,
        path,
        {
            "variable": str(da.name),
            "title": title_text,
            "units": da.attrs.get("units"),
            "cmap": art.image.get_cmap().name,
            "clim": [float(v) for v in art.image.get_clim()],
            "colorbar_label": art.colorbar.ax.get_ylabel(),
            "discrete_levels": art.levels,
            "colorbar_ticklabels": [t.get_text() for t in art.colorbar.ax.get_yticklabels()]
            if art.levels is not None else None,
            "n_no_value": art.n_nan,
            "n_value": art.n_value,
            "origin": "lower",
            "extent": [float(v) for v in art.image.get_extent()],
            "axes_px": _axes_px(ax),
            "scale_bar_um": art.scale_bar_um,
            "note": note,
        },
    )


def plot_histogram(
    da: xr.DataArray,
    path: str | Path,
    *,
    bins: int = 80,
    title: str | None = None,
    log: bool = False,
) -> Path:
    """Save a histogram of a map's finite values, with median and robust spread.

    The histogram spans the 0.5–99.5 percentile range; the statistics stand
    beside the bars (not over them) and say how many values lie outside that
    range and are not drawn. The robust spread is σ_MAD = 1.4826 × median absolute
    deviation (equal to σ for normally distributed values).

    Parameters
    ----------
    da : xarray.DataArray
        Values of any shape (a map); units from ``attrs["units"]``.
    path : str or Path
        Output PNG file.
    bins : int
        Number of bins.
    log : bool
        Logarithmic value axis with bins of equal ratio (for positive
        quantities spanning decades, e.g. a reduced χ²); values <= 0 are
        counted as not drawn.
    title : str, optional
        Figure title; default the variable name.

    Returns
    -------
    Path
        The PNG written.
    """
    if not isinstance(da, xr.DataArray):
        raise StepError(f"histogram input must be an xarray DataArray, got {type(da).__name__}")
    if bins < 1:
        raise StepError(f"bins must be a positive integer, got {bins}")
    values = np.asarray(da.values, dtype=float).ravel()
    finite = values[np.isfinite(values)]
    fig = _new_figure(0.6, width_in=7.2, map_layout=True)
    ax = fig.add_subplot()
    side = fig.add_axes((0.8, 0.1, 0.15, 0.8))
    side.set_axis_off()
    layout = fig.get_layout_engine()
    layout.ax, layout.side = ax, side
    unit = _unit_text(da.attrs.get("units"))
    info: dict[str, Any] = {
        "variable": str(da.name),
        "units": da.attrs.get("units"),
        "n": int(finite.size),
        "n_no_value": int(values.size - finite.size),
    }
    if finite.size:
        positive = finite[finite > 0]
        log = bool(log and positive.size)
        lo, hi = np.percentile(positive if log else finite, [0.5, 99.5])
        if hi <= lo:
            lo, hi = lo - (abs(lo) * 1e-3 or 1.0), hi + (abs(hi) * 1e-3 or 1.0)
        if log:
            lo, hi = (lo, hi) if lo > 0 else (hi * 1e-3, hi)
            ax.hist(finite, bins=np.geomspace(lo, hi, bins + 1), **_HIST_STYLE)
            ax.set_xscale("log")
        else:
            ax.hist(finite, bins=bins, range=(lo, hi), **_HIST_STYLE)
        med = float(np.median(finite))
        sig = float(1.4826 * np.median(np.abs(finite - med)))
        below, above = int(np.sum(finite < lo)), int(np.sum(finite > hi))
        ax.axvline(med, color="black", linestyle="--", linewidth=1)
        lines = [
            f"median = {med:.5g} {unit}".rstrip() + "\n(dashed line)",
            f"σ_MAD = {sig:.3g} {unit}".rstrip() + "\n(1.4826 × median\nabsolute deviation)",
            f"N = {finite.size} pixels\nwith a value",
        ]
        if below or above:
            lines.append(
                f"{below + above} not drawn:\n{below} below, {above} above\nthe 0.5–99.5th\n"
                "percentile range\nof the axis"
            )
        if values.size > finite.size:
            lines.append(f"{values.size - finite.size} pixels\nwithout a value\n(NaN, no signal)")
        side.text(0.0, 1.0, "\n\n".join(lines), transform=side.transAxes, ha="left", va="top",
                  fontsize=8.5)
        info.update(median=med, sigma_mad=sig, outside_below=below, outside_above=above, log=log,
                    range=[float(lo), float(hi)])
    else:
        ax.text(0.5, 0.5, "no finite values", transform=ax.transAxes, ha="center")
    ax.set_xlabel(_label(da, "value"))
    ax.set_ylabel("pixels")
    info["xlabel"] = ax.get_xlabel()
    info["title"] = _set_title(ax, title if title is not None else "Histogram: " + _title(da))
    _render(fig)
    info["stats_bbox_px"] = [float(v) for v in side.texts[0].get_window_extent().extents] \
        if side.texts else None
    info["axes_bbox_px"] = [float(v) for v in ax.get_window_extent().extents]
    return _save(fig, path, info)


#: The bars of a histogram as one filled outline: the same pixels as one rectangle per
#: bin (abutting bars without edges; compared on the bench result's histograms), drawn as
#: one artist instead of one per bin (~70 ms less per histogram of 80 bins).
_HIST_STYLE = {"histtype": "stepfilled", "color": _style.CATEGORY_PALETTE[0]}


def _spectra_list(obj: xr.DataArray, pixels) -> tuple[str, list[tuple[str, xr.DataArray]]]:
    """(spectral dim, [(label, 1-D spectrum)]) from a cube or a set of spectra."""
    from .cube import spectral_dim

    sdim = spectral_dim(obj)
    if "y" in obj.dims and "x" in obj.dims:
        ny, nx = obj.sizes["y"], obj.sizes["x"]
        if pixels is None:
            pixels = [(ny // 2, nx // 2), (ny // 4, nx // 4), (3 * ny // 4, 3 * nx // 4)]
        out = []
        for iy, ix in pixels:
            if not (-ny <= iy < ny and -nx <= ix < nx):
                raise StepError(f"pixel ({iy}, {ix}) is outside the {ny} × {nx} map")
            s = obj.isel(y=iy, x=ix)
            s = s.squeeze([d for d in s.dims if d != sdim and s.sizes[d] == 1])
            lab = (
                f"y = {float(s['y']):.4g}, x = {float(s['x']):.4g} "
                f"{_unit_text(obj['x'].attrs.get('units'))}".rstrip()
            )
            out.append((lab, s))
    else:
        other = [d for d in obj.dims if d != sdim]
        if len(other) > 1:
            raise StepError(f"spectra must be a cube or (n, {sdim}), got dims {obj.dims}")
        if not other:
            out = [(str(obj.name or "spectrum"), obj)]
        else:
            idx = range(obj.sizes[other[0]]) if pixels is None else pixels
            out = [(f"{other[0]} {i}", obj.isel({other[0]: i})) for i in idx]
    for _, s in out:
        if s.ndim != 1:
            raise StepError(f"could not reduce to single spectra: dims {s.dims} remain")
    return sdim, out


def plot_spectra(
    cube_or_spectra: xr.DataArray,
    path: str | Path,
    *,
    pixels: Sequence[tuple[int, int]] | Sequence[int] | None = None,
    reference: xr.DataArray | None = None,
    reference_label: str = "raw",
    title: str | None = None,
    colours: Sequence[str] | None = None,
    labels: Sequence[str] | None = None,
) -> Path:
    """Save a few spectra, optionally against a reference (e.g. raw against cleaned).

    With a ``reference`` the figure has three panels sharing the spectral
    axis: (a) the whole range, reference dashed and spectra solid, each pixel
    in its own colour; (b) a zoom on the emission, the intensity axis scaled
    to the spectra (reference values beyond it are cut); (c) the residual
    reference − spectrum, i.e. what the step removed.

    Parameters
    ----------
    cube_or_spectra : xarray.DataArray
        A cube (y, x, S) or spectra (S,) or (n, S), S the spectral dim
        (wavelength in nm, energy in eV...).
    path : str or Path
        Output PNG file.
    pixels : sequence, optional
        (iy, ix) index pairs for a cube (default: centre and two quarter
        points), or indices along the first dim for (n, S) spectra.
    reference : xarray.DataArray, optional
        Same-shaped cube or spectra, e.g. the raw data under cleaned ones.
    reference_label : str
        Legend label of the reference.
    title : str, optional
        Figure title.
    colours, labels : sequence of str, optional
        Colour and legend label of each spectrum (default: the categorical
        palette of :mod:`pmap._style` and the pixel positions).

    Returns
    -------
    Path
        The PNG written.
    """
    from matplotlib.lines import Line2D

    if not isinstance(cube_or_spectra, xr.DataArray):
        raise StepError("spectra must be an xarray DataArray (a cube or (n, S) spectra)")
    sdim, spectra = _spectra_list(cube_or_spectra, pixels)
    refs = _spectra_list(reference, pixels)[1] if reference is not None else []
    cols = list(colours) if colours is not None else [
        _style.category_colour(i) for i in range(len(spectra))]
    labs = list(labels) if labels is not None else [lab for lab, _ in spectra]
    if len(cols) < len(spectra) or len(labs) < len(spectra):
        raise StepError(f"need one colour and one label per spectrum ({len(spectra)})")
    xlabel = _label(cube_or_spectra[sdim], sdim)
    ylabel = _label(cube_or_spectra, "intensity")
    info: dict[str, Any] = {
        "variable": str(cube_or_spectra.name),
        "n_spectra": len(spectra),
        "units": cube_or_spectra.attrs.get("units"),
        "colours": cols[: len(spectra)],
        "labels": labs[: len(spectra)],
    }
    if not refs:
        fig = _new_figure(0.55, side_in=0.0)
        ax = fig.add_subplot()
        for i, (_, sp) in enumerate(spectra):
            ax.plot(sp[sdim].values, sp.values, color=cols[i], linewidth=1.2, label=labs[i])
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        ax.legend(fontsize=8, loc="best")
        ax.set_title(title if title is not None else "")
        info.update(xlabel=ax.get_xlabel(), ylabel=ax.get_ylabel(), title=title or "",
                    legend=[t.get_text() for t in ax.get_legend().get_texts()])
        return _save(fig, path, info)

    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.2, 8.0), layout="constrained")
    ax_full, ax_zoom, ax_res = fig.subplots(3, 1, sharex=True, height_ratios=[1.0, 1.3, 0.8])
    lo_z, hi_z = np.inf, -np.inf
    for i, (_, sp) in enumerate(spectra):
        r = refs[i][1]
        xv, sv, rv = sp[sdim].values, np.asarray(sp.values, float), np.asarray(r.values, float)
        for ax in (ax_full, ax_zoom):
            ax.plot(xv, rv, color=cols[i], linewidth=0.9, linestyle="--", alpha=0.9)
            ax.plot(xv, sv, color=cols[i], linewidth=1.3)
        ax_res.plot(xv, rv - sv, color=cols[i], linewidth=1.0)
        if np.isfinite(sv).any():
            lo_z, hi_z = min(lo_z, np.nanmin(sv)), max(hi_z, np.nanmax(sv))
    if np.isfinite(lo_z) and hi_z > lo_z:
        pad = 0.08 * (hi_z - lo_z)
        ax_zoom.set_ylim(lo_z - pad, hi_z + pad)
    handles = [Line2D([], [], color=cols[i], linewidth=2, label=labs[i])
               for i in range(len(spectra))]
    handles += [Line2D([], [], color="0.2", linestyle="--", label=reference_label),
                Line2D([], [], color="0.2", linestyle="-", label="cleaned")]
    ax_full.legend(handles=handles, fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                   frameon=False)
    ax_full.set_title("(a) whole range", fontsize=9, loc="left")
    ax_zoom.set_title("(b) zoom on the emission (intensity axis fitted to the cleaned spectra; "
                      "taller raw values cut)", fontsize=9, loc="left")
    ax_res.set_title(f"(c) removed: {reference_label} − cleaned", fontsize=9, loc="left")
    ax_full.set_ylabel(ylabel)
    ax_zoom.set_ylabel(ylabel)
    ax_res.set_ylabel(_style.unit_text(cube_or_spectra.attrs.get("units")) or "difference")
    ax_res.axhline(0, color="0.5", linewidth=0.6)
    ax_res.set_xlabel(xlabel)
    fig.suptitle(title if title is not None else "")
    info.update(
        xlabel=xlabel, ylabel=ylabel, title=title or "",
        legend=[h.get_label() for h in handles],
        zoom_ylim=[float(v) for v in ax_zoom.get_ylim()],
        full_ylim=[float(v) for v in ax_full.get_ylim()],
        panels=["whole range", "zoom", "residual"],
    )
    return _save(fig, path, info)


def _label_names(da: xr.DataArray, codes: np.ndarray, names) -> dict[int, str]:
    if names is not None:
        return {int(k): str(v) for k, v in dict(names).items()}
    raw = da.attrs.get("region_names")
    if raw:
        try:
            got = json.loads(raw) if isinstance(raw, str) else dict(raw)
            return {int(k): str(v) for k, v in got.items()}
        except (ValueError, TypeError):
            pass
    flags = _style.flag_names(da.attrs)  # CF flag convention
    if flags:
        return flags
    return {int(c): str(int(c)) for c in codes}


def plot_labels(
    region_da: xr.DataArray,
    path: str | Path,
    *,
    names: Mapping[int, str] | Sequence[str] | None = None,
    title: str | None = None,
    scale_bar: bool = True,
) -> Path:
    """Save a categorical map (region labels) with one colour per label and a legend.

    Parameters
    ----------
    region_da : xarray.DataArray
        Integer (or boolean) labels, dims (y, x); NaN (float input) is drawn grey.
    path : str or Path
        Output PNG file.
    names : mapping or sequence, optional
        Label code → name (a sequence names codes 0, 1, 2...). Default: the
        CF ``flag_values``/``flag_meanings`` attrs if present, else the codes.
    title : str, optional
        Figure title.
    scale_bar : bool
        Draw a scale bar (µm maps only).

    Returns
    -------
    Path
        The PNG written.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    da = _as_map(region_da, "label map")
    vals = np.asarray(da.values)
    if vals.dtype.kind == "f":
        finite = vals[np.isfinite(vals)]
        if finite.size and not np.all(finite == np.round(finite)):
            raise StepError(f"label map {da.name!r} holds non-integer values")
    elif vals.dtype.kind not in "iub":
        raise StepError(f"label map {da.name!r} must be integer or boolean, got {vals.dtype}")
    fvals = vals.astype(float)
    codes = np.unique(fvals[np.isfinite(fvals)]).astype(int)
    if names is not None and not isinstance(names, Mapping):
        names = dict(enumerate(names))
    label_names = _label_names(da, codes, names)
    if codes.size == 0:
        codes = np.array([0])
    flags = _style.discrete_levels(fvals, da.attrs) if "flag_values" in da.attrs else None
    if str(da.name) == "region" or flags is None:
        # regions (and plain labels) by code: the same colour in every figure and the viewer
        colours = [_style.region_colour(c) for c in codes]
    else:
        # status maps: by position in flag_values, stable whatever codes occur; no-value grey
        by_code = _style.status_colours(flags, da.attrs)
        colours = [by_code.get(int(c), _style.NAN_COLOUR) for c in codes]
    cmap = ListedColormap(colours)
    # map codes to 0..n-1 so that each gets one colour
    index = np.full(fvals.shape, np.nan)
    for i, c in enumerate(codes):
        index[fvals == c] = i
    norm = BoundaryNorm(np.arange(codes.size + 1) - 0.5, codes.size)
    longest = max((len(label_names.get(int(c), str(int(c)))) for c in codes), default=4)
    side = min(1.0 + 0.07 * (longest + 5), 4.2)
    fig = _new_figure(da.sizes["y"] / da.sizes["x"], width_in=4.6 + side, side_in=side,
                      map_layout=True)
    ax = fig.add_subplot()
    fig.get_layout_engine().ax = ax
    mapped = da.copy(data=index)
    art = _draw_map(ax, mapped, cmap=cmap, scale_bar=scale_bar, norm=norm, discrete=False)
    handles = [
        Patch(
            facecolor=colours[i],
            edgecolor="0.3",
            label=f"{label_names.get(int(c), str(int(c)))} ({int(c)})",
        )
        for i, c in enumerate(codes)
    ]
    fig.get_layout_engine().legend = ax.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(1.02, 1.0),
        fontsize=8,
        frameon=False,
        title=_label(da, "label"),
        title_fontsize=8,
    )
    title_text = _set_title(ax, title if title is not None else _title(da))
    return _save(
        fig,
        path,
        {
            "variable": str(da.name),
            "title": title_text,
            "colours": colours,
            "legend": [h.get_label() for h in handles],
            "extent": [float(v) for v in art.image.get_extent()],
            "axes_px": _axes_px(ax),
            "codes": codes.tolist(),
            "n_value": art.n_value,
            "names": [label_names.get(int(c), str(int(c))) for c in codes],
            "scale_bar_um": art.scale_bar_um,
        },
    )


def _is_label_map(v: xr.DataArray) -> bool:
    return v.dtype.kind in "iub" or "flag_values" in v.attrs


#: Maps drawn only when asked for by name: the cleaning's per-pixel counts (the run's
#: summary and the HTML report state them; the viewer shows them).
NO_DEFAULT_FIGURE = frozenset({"masked_channels", "spike_values_replaced"})


def write_figures(
    ds: xr.Dataset,
    out_dir: str | Path,
    *,
    variables: Sequence[str] | None = None,
    prefix: str = "",
) -> list[Path]:
    """Write one PNG per map of a result Dataset, plus a histogram of ``peak_energy``.

    2-D (y, x) variables give one map each; 3-D variables (d, y, x), e.g.
    (peak, y, x), give one map per index along d, named by a ``peak_name``
    (or other string) coordinate when present, up to :data:`MAX_SLICES` slices.
    Integer, boolean and CF-flag variables are drawn as label maps. Variables
    with other dims (spectra, masks with a spectral dim) are skipped unless
    named in ``variables`` (then it is an error).

    Parameters
    ----------
    ds : xarray.Dataset
        Result with maps carrying ``units`` and ``long_name`` attrs.
    out_dir : str or Path
        Folder for the PNG files (created if missing).
    variables : sequence of str, optional
        Variables to draw (default: every map-like data variable).
    prefix : str
        Prefix of every file name.

    Returns
    -------
    list of Path
        The PNG files written, in order.
    """
    if not isinstance(ds, xr.Dataset):
        raise StepError(f"write_figures needs an xarray Dataset, got {type(ds).__name__}")
    out = Path(out_dir)
    names = ([n for n in ds.data_vars if n not in NO_DEFAULT_FIGURE] if variables is None
             else list(variables))
    missing = [n for n in names if n not in ds.data_vars]
    if missing:
        raise StepError(f"variables {missing} are not in the dataset ({list(ds.data_vars)})")
    _trim_heap()  # the maps and drawings reuse the memory the computation freed
    try:
        with _deferred_saves():
            return _write_figures(ds, out, names, variables, prefix)
    finally:
        _RENDERER.last = None  # the drawing buffer shared by the figures (_render)


def _write_figures(ds: xr.Dataset, out: Path, names: list[str],
                   variables: Sequence[str] | None, prefix: str) -> list[Path]:
    written: list[Path] = []
    no_value = _no_value_mask(ds)
    maps = []
    for name in names:
        v = ds[name]
        extra = [d for d in v.dims if d not in ("y", "x") and v.sizes[d] > 1]
        not_map = (
            not {"y", "x"} <= set(v.dims)
            or len(extra) > 1
            or any(d in SPECTRAL_DIMS for d in extra)
            or (extra and v.sizes[extra[0]] > MAX_SLICES)
        )
        if not_map:
            if variables is not None:
                raise StepError(f"variable {name!r} with dims {v.dims} is not a map")
            continue
        maps.append(name)
    histogram = "peak_energy" in ds.data_vars and (variables is None or "peak_energy" in names)
    histograms: list[Path] = []
    for group in _map_groups(ds, maps):
        # one group's maps in memory at a time: this group's figures are drawn (and its
        # arrays dropped, with _draw_group's locals) before the next group is read
        done, n_maps = _draw_group(ds, group, out, prefix, no_value, histogram)
        del group
        written.extend(done[:n_maps])
        histograms.extend(done[n_maps:])
    if histogram and "peak_energy" not in maps:  # asked for, though not drawn as a map
        histograms.extend(_draw_jobs(_histogram_jobs(ds, ds["peak_energy"], out, prefix),
                                     parallel=False))
    written.extend(histograms)
    if variables is None:
        written.extend(_spectra_figures(ds, out, prefix))
    return written


def _draw_group(ds: xr.Dataset, group: list[tuple[str, xr.DataArray]], out: Path,
                prefix: str, no_value: xr.DataArray | None,
                histogram: bool) -> tuple[list[Path], int]:
    """Draw the figures of one group of maps in memory (in two processes, _draw_jobs);
    returns (paths: maps first, then histograms; the number of map figures)."""
    jobs: list[tuple[Path, Any]] = []
    hist_jobs: list[tuple[Path, Any]] = []
    for name, v in group:
        extra = [d for d in v.dims if d not in ("y", "x") and v.sizes[d] > 1]
        if extra:
            d = extra[0]
            labels = _slice_labels(ds, v, d)
            slices = [(v.isel({d: i}), f"{name}_{lab}") for i, lab in enumerate(labels)]
        else:
            slices = [(v, name)]
        for sl, stem in slices:
            path = out / f"{prefix}{_safe_name(stem)}.png"
            if sl.dtype.kind == "f" and not bool(np.isfinite(sl.values).any()):
                warnings.warn(f"no figure of {stem}: every pixel is NaN", PmapNotice,
                              stacklevel=4)
                continue
            if _is_label_map(v):
                jobs.append((path, (plot_labels, (sl, path), {})))
            else:
                mask = (no_value if no_value is not None and sl.dtype.kind == "f"
                        and name != "background_offset" else None)
                note = ds.attrs.get("planck_assumptions") if name in _PLANCK_MAPS else None
                jobs.append((path, (_plot_map_masked, (sl, mask, path), {"note": note})))
        if histogram and name == "peak_energy":  # from the map in memory, not read again
            hist_jobs = _histogram_jobs(ds, v, out, prefix)
    return _draw_jobs(jobs + hist_jobs), len(jobs)


def _plot_map_masked(sl: xr.DataArray, no_value: xr.DataArray | None, path: Path,
                     **kw: Any) -> Path:
    """:func:`plot_map` of ``sl`` with the ``no_value`` pixels (if given) set to NaN; the
    masked copy is made here, when this figure is drawn, so that a group's jobs hold
    one copy at a time rather than one per map."""
    return plot_map(sl if no_value is None else sl.where(~no_value), path, **kw)


def _histogram_jobs(ds: xr.Dataset, pe: xr.DataArray, out: Path, prefix: str) -> list:
    """(path, call) of the peak-energy histogram(s), one per peak."""
    extra = [d for d in pe.dims if d not in ("y", "x") and pe.sizes[d] > 1]
    if not extra:
        path = out / f"{prefix}peak_energy_histogram.png"
        return [(path, (plot_histogram, (pe, path), {}))]
    jobs = []
    for i, lab in enumerate(_slice_labels(ds, pe, extra[0])):
        path = out / f"{prefix}{_safe_name(f'peak_energy_{lab}_histogram')}.png"
        jobs.append((path, (plot_histogram, (pe.isel({extra[0]: i}), path), {})))
    return jobs


#: Figures are drawn in up to this many processes (the process itself and forked copies,
#: on Linux, when there are at least FORK_MIN_FIGURES to draw, and as many cores idle at
#: that moment: a copy costs about 1 CPU s more in all, which only an idle core repays);
#: drawing is single-threaded Python (matplotlib), so a second core nearly halves the
#: time. The environment variable ``PMAP_FIGURE_PROCESSES=N`` sets the number whatever
#: the load (1: every figure drawn here).
FIGURE_PROCESSES = 2
FORK_MIN_FIGURES = 4
#: A forked drawer that has not finished after this many seconds plus FORK_TIMEOUT_FACTOR
#: times the time the process took for its own share is stopped, and its figures are
#: drawn here.
FORK_TIMEOUT_S = 60.0
FORK_TIMEOUT_FACTOR = 10.0


def _figure_processes(n_jobs: int) -> int:
    """How many processes draw ``n_jobs`` figures (1: no fork)."""
    import os
    import sys

    if not sys.platform.startswith("linux") or not hasattr(os, "fork"):
        return 1
    if n_jobs < FORK_MIN_FIGURES or getattr(_SAVES, "in_child", False):
        return 1
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1
    stated = os.environ.get("PMAP_FIGURE_PROCESSES")
    try:
        want = int(stated) if stated is not None else FIGURE_PROCESSES
    except ValueError:
        want, stated = FIGURE_PROCESSES, None
    if stated is None:  # only onto cores that are idle now: a copy on a busy machine
        want = min(want, 1 + _idle_cores(cores))  # costs more CPU than it saves time
    return max(1, min(want, cores, n_jobs))


def _idle_cores(cores: int) -> int:
    """Cores with nothing to run now, besides this thread: ``cores`` less the tasks
    running or runnable (/proc/loadavg, this thread included) at the least of three
    looks 10 ms apart (a moment's work of another thread of this process, e.g. a PNG
    being saved, does not count); 0 where unknown."""
    import time

    running = []
    for k in range(3):
        try:
            with open("/proc/loadavg", encoding="ascii") as f:
                running.append(int(f.read().split()[3].split("/")[0]))
        except (OSError, ValueError, IndexError):
            return 0
        if k < 2:
            time.sleep(0.01)
    return max(cores - min(running), 0)


def _draw_jobs(jobs: Sequence[tuple[Path, Any]], *, parallel: bool = True) -> list[Path]:
    """Run the figure ``jobs`` ((path, (function, args, kwargs)) each) and return their
    paths, in order.

    With more than one process (:func:`_figure_processes`) the process forks: the
    forked copies and this process take the next figure to draw from one shared
    counter until none is left (so the process that also saves PNGs on a thread and
    read the maps does less), each drawing from the maps already in memory (numpy,
    matplotlib and PIL only: no store is read in a copy) and writing its PNG files. The
    same calls run everywhere, so the files are the same bytes as drawn here. Each copy
    reports the figures it finished through a pipe; a copy that fails or overruns its
    time is stopped and the figures it did not finish are drawn here.
    """
    import multiprocessing
    import os
    import sys
    import time

    n = _figure_processes(len(jobs)) if parallel else 1
    if n <= 1:
        return [fn(*args, **kw) for _, (fn, args, kw) in jobs]
    ctx = multiprocessing.get_context("fork")
    counter, lock = ctx.RawValue("i", 0), ctx.Lock()  # shared by the copies

    def take() -> int | None:
        with lock:
            i = counter.value
            counter.value = i + 1
        return i if i < len(jobs) else None

    sys.stdout.flush()
    sys.stderr.flush()
    _trim_heap()  # a copy starts with the pages this process holds: hand back the free ones
    children: dict[int, int] = {}  # pid -> read end of the pipe of its finished figures
    for _ in range(n - 1):
        read_fd, write_fd = os.pipe()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)  # fork with threads (3.12+)
            pid = os.fork()
        if pid == 0:  # the forked copy: draw, write the files, report them, leave at once
            code = 1
            try:
                os.close(read_fd)
                _SAVES.pending = None  # the PNG thread was not copied: save in this thread
                _SAVES.in_child = True
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    while (i := take()) is not None:
                        fn, args, kw = jobs[i][1]
                        fn(*args, **kw)
                        os.write(write_fd, i.to_bytes(4, "little"))
                code = 0
            except BaseException:  # noqa: BLE001 - the parent draws what is left
                code = 1
            finally:
                os._exit(code)
        os.close(write_fd)
        children[pid] = read_fd
    t0 = time.perf_counter()
    done: set[int] = set()
    while (i := take()) is not None:
        fn, args, kw = jobs[i][1]
        fn(*args, **kw)
        done.add(i)
    deadline = time.monotonic() + FORK_TIMEOUT_S + FORK_TIMEOUT_FACTOR * (
        time.perf_counter() - t0)
    for pid, read_fd in children.items():
        _wait_child(pid, deadline)
        with os.fdopen(read_fd, "rb") as f:
            raw = f.read()
        done.update(int.from_bytes(raw[k:k + 4], "little") for k in range(0, len(raw) - 3, 4))
    for i in range(len(jobs)):  # unfinished by a copy that failed or overran: drawn here
        if i not in done:
            fn, args, kw = jobs[i][1]
            fn(*args, **kw)
    return [path for path, _ in jobs]


def _trim_heap() -> None:
    """Return the C heap's free memory to the system (glibc ``malloc_trim``), if there."""
    import ctypes
    import ctypes.util

    try:
        ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


def _wait_child(pid: int, deadline: float) -> bool:
    """Wait for the forked drawer ``pid`` until ``deadline`` (monotonic seconds); True if
    it finished with status 0, else it is stopped (SIGKILL) and False."""
    import os
    import signal
    import time

    pause = 0.002
    while True:
        done, status = os.waitpid(pid, os.WNOHANG)
        if done:
            return os.waitstatus_to_exitcode(status) == 0
        if time.monotonic() > deadline:
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
            return False
        time.sleep(pause)
        pause = min(pause * 2, 0.05)


#: Maps read from the store together (one parallel read) hold at most this many bytes.
LOAD_GROUP_BYTES = 96 * 2**20


def _map_groups(ds: xr.Dataset, names: Sequence[str]) -> Iterator[list[tuple[str, xr.DataArray]]]:
    """Groups of (name, map in memory) for ``names``, each of up to LOAD_GROUP_BYTES bytes.

    One dask compute per group reads its maps' chunks in parallel (instead of one
    sequential read per map, and a second for the NaN check); memory stays bounded by
    a group, whatever the map size.
    """
    import dask

    group: list[str] = []
    size = 0
    for i, name in enumerate(names):
        group.append(name)
        size += ds[name].nbytes
        nxt = ds[names[i + 1]].nbytes if i + 1 < len(names) else 0
        if i + 1 == len(names) or size + nxt > LOAD_GROUP_BYTES:
            yield list(zip(group, dask.compute(*[ds[n] for n in group])))
            group, size = [], 0


def _no_value_mask(ds: xr.Dataset) -> xr.DataArray | None:
    """Pixels without a value in a result: fit status 'no signal' or 'masked', or region −1.

    One rule for every map drawn by :func:`write_figures`: such pixels are
    grey (:data:`pmap._style.NAN_COLOUR`), whatever a step stored there
    (NaN, or 0 for component amplitudes).
    """
    mask = None
    if "fit_status" in ds.variables:
        fs = ds["fit_status"]
        names = _style.flag_names(fs.attrs) or {}
        codes = [c for c, t in names.items() if t in ("no signal", "masked or nan")]
        if codes and {"y", "x"} <= set(fs.dims) and fs.ndim == 2:
            mask = fs.isin(codes)
    if mask is None and "region" in ds.variables and ds["region"].ndim == 2:
        mask = ds["region"] < 0
    return mask.load() if mask is not None else None


def _spectra_figures(ds: xr.Dataset, out: Path, prefix: str) -> list[Path]:
    """Component spectra (NMF/PCA) and mean spectrum per region, when the result has them."""
    written = []
    if "component_spectrum" in ds.data_vars:
        written.append(plot_spectra(ds["component_spectrum"].load(),
                                    out / f"{prefix}component_spectra.png",
                                    title="Component spectra (each scaled to maximum 1)"))
    if "region_mean_spectrum" in ds.data_vars:
        m = ds["region_mean_spectrum"].load()
        rdim = next(d for d in m.dims if d.startswith("region"))
        codes = (np.asarray(m[rdim].values).astype(int) if rdim in m.coords
                 else np.arange(m.sizes[rdim]))
        names = _label_names(ds["region"], codes, None) if "region" in ds.variables else {}
        if "region_name" in m.coords and m["region_name"].dims == (rdim,):
            names = {int(c): str(t) for c, t in zip(codes, m["region_name"].values)}
        m = m.rename({rdim: "region"}).assign_coords(region=np.arange(m.sizes[rdim]))
        written.append(plot_spectra(
            m, out / f"{prefix}region_mean_spectra.png",
            title="Mean spectrum per region (colours as in the region map)",
            colours=[_style.region_colour(c) for c in codes],
            labels=[f"{names.get(int(c), f'region {int(c)}')} ({int(c)})" for c in codes]))
    return written


def _slice_labels(ds: xr.Dataset, v: xr.DataArray, dim: str) -> list[str]:
    """Names of the slices along ``dim``: a string coordinate on it, else its values."""
    for cname, c in v.coords.items():
        if c.dims == (dim,) and c.dtype.kind in "OUS" and cname != dim:
            return [str(s) for s in c.values]
    if dim in v.coords:
        return [f"{dim}{val}" for val in v[dim].values]
    return [f"{dim}{i}" for i in range(v.sizes[dim])]


def summarise_result(ds: xr.Dataset) -> dict[str, float]:
    """One-row summary of a result: median and robust spread of every map.

    For each float (y, x) variable, and each slice of (d, y, x) variables,
    gives ``"<name> median (<units>)"``, ``"<name> sigma_MAD (<units>)"``
    (1.4826 × median absolute deviation) and ``"<name> finite fraction"``.
    Integer and boolean maps (labels, flags) and spectra are left out.

    Parameters
    ----------
    ds : xarray.Dataset
        A pmap result.

    Returns
    -------
    dict
        Column name → value, e.g. for a table of many results.
    """
    if not isinstance(ds, xr.Dataset):
        raise StepError(f"summarise_result needs an xarray Dataset, got {type(ds).__name__}")
    row: dict[str, float] = {}
    for name, v in ds.data_vars.items():
        extra = [d for d in v.dims if d not in ("y", "x")]
        if (
            not {"y", "x"} <= set(v.dims)
            or v.dtype.kind != "f"
            or len(extra) > 1
            or any(d in SPECTRAL_DIMS for d in extra)
            or (extra and v.sizes[extra[0]] > MAX_SLICES)
        ):
            continue
        unit = str(v.attrs.get("units", ""))
        suffix = f" ({unit})" if unit not in ("", "1") else ""
        slices = (
            [
                (v.isel({extra[0]: i}), f"{name}[{lab}]")
                for i, lab in enumerate(_slice_labels(ds, v, extra[0]))
            ]
            if extra
            else [(v, name)]
        )
        for sl, stem in slices:
            vals = np.asarray(sl.values, dtype=float).ravel()
            finite = vals[np.isfinite(vals)]
            med = float(np.median(finite)) if finite.size else float("nan")
            mad = float(1.4826 * np.median(np.abs(finite - med))) if finite.size else float("nan")
            row[f"{stem} median{suffix}"] = med
            row[f"{stem} sigma_MAD{suffix}"] = mad
            row[f"{stem} finite fraction"] = finite.size / max(vals.size, 1)
    return row


def plot_small_multiples(
    maps: Mapping[str, xr.DataArray],
    path: str | Path,
    *,
    vlim: tuple[float, float] | None = None,
    title: str | None = None,
    ncols: int | None = None,
) -> Path:
    """Save several maps of one quantity side by side on shared colour limits (one colour bar).

    For a batch of results: the same colour means the same value in every
    panel. The shared limits are the 2nd and 98th percentiles of all the maps'
    finite values pooled (unless ``vlim``), stated on the colour bar with the
    number of pixels beyond them.

    Parameters
    ----------
    maps : mapping of str to xarray.DataArray
        Panel label → (y, x) map (size-1 dims squeezed), all of one variable
        and units (the first map names the colour bar).
    path : str or Path
        Output PNG file.
    vlim : (float, float), optional
        Shared colour limits, in the maps' units.
    title : str, optional
        Figure title (default: the variable's human name and units).
    ncols : int, optional
        Panels per row (default up to 4).

    Returns
    -------
    Path
        The PNG written.
    """
    from matplotlib.colors import Normalize

    if not maps:
        raise StepError("small multiples need at least one map")
    items = [(str(k), _as_map(v)) for k, v in maps.items()]
    units = {str(v.attrs.get("units", "")) for _, v in items}
    if len(units) > 1:
        raise StepError(f"small multiples need maps in one unit, got {sorted(units)}")
    first = items[0][1]
    pooled = np.concatenate([np.asarray(v.values, float).ravel() for _, v in items])
    lim = vlim if vlim is not None else _robust_limits(pooled, True)
    if lim is None:
        raise StepError(f"no finite values in any map of {first.name!r}")
    lo, hi = float(lim[0]), float(lim[1])
    below = int(np.sum(pooled < lo))
    above = int(np.sum(pooled > hi))
    n = len(items)
    ncols = ncols or min(n, 4)
    nrows = math.ceil(n / ncols)
    aspect = max(first.sizes["y"] / first.sizes["x"], 0.2)
    width = 2.6 * ncols + 1.4
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, min(2.6 * aspect * nrows + 1.2, 14.0)), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrows, ncols, squeeze=False)).ravel()
    norm = Normalize(lo, hi)
    im = None
    n_nan = 0
    for ax, (label, da) in zip(axes, items):
        art = _draw_map(ax, da, norm=norm, cmap=_style.colormap_for(str(first.name or "")),
                        scale_bar=True, discrete=False)
        im = art.image
        n_nan += art.n_nan
        ax.set_title(label, fontsize=8)
        ax.tick_params(labelsize=7)
        ax.xaxis.label.set_size(7)
        ax.yaxis.label.set_size(7)
    for ax in axes[n:]:
        ax.set_axis_off()
    note = _style.ORIENTATION_NOTE  # one note for all panels (each map drew its own)
    if n_nan:
        note += f" · {_style.NAN_TEXT}: {n_nan} px in all panels"
    fig.supxlabel(note, fontsize=7.5, color="0.3")
    extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(
        (below > 0, above > 0), "neither")
    cb = fig.colorbar(im, ax=axes[:n].tolist(), shrink=0.9, extend=extend)
    how = "shared limits" if vlim is not None else "2–98 % of all maps' values"
    cb.set_label(f"{_label(first, 'value')}\n{how}\nclipped: {below} px below, {above} above",
                 fontsize=8)
    fig.suptitle(title if title is not None else _title(first) + " — same colour scale in "
                 "every panel", fontsize=10)
    return _save(fig, path, {
        "variable": str(first.name), "units": first.attrs.get("units"),
        "panels": [k for k, _ in items], "clim": [lo, hi],
        "colorbar_label": cb.ax.get_ylabel(), "clipped_below": below, "clipped_above": above,
    })

