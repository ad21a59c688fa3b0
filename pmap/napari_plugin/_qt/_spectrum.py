"""The "Spectrum at pixel" panel: a clicked pixel's spectrum, its fit, pinned pixels, area means."""

from __future__ import annotations

from typing import Any

import numpy as np
from qtpy.QtWidgets import (
    QCheckBox,
    QHBoxLayout,
    QLabel,
    QPushButton,
    QVBoxLayout,
    QWidget,
)

from .._model import MapSource, pixel_at, shape_mask
from ._common import PlotCanvas, SourceList, labelled_row, show_colorbar, world_units

__all__ = ["SpectrumPanel"]

#: Colours of pinned pixels and drawn areas (bright on the dark background).
PALETTE = ("#4fc3f7", "#ffb74d", "#81c784", "#f06292", "#ba68c8", "#fff176", "#4db6ac", "#a1887f")
DATA_COLOUR = "#f0f1f2"
FIT_COLOUR = "#ff7043"
COMPONENT_COLOURS = ("#26c6da", "#9ccc65", "#ec407a", "#ffee58")
MARKERS_LAYER = "selected pixels"
AREAS_LAYER = "areas (mean spectrum)"


class SpectrumPanel(QWidget):
    """Click a pixel to see its spectrum, fitted model, peak components and residual.

    Pin pixels to compare them; draw rectangles, ellipses or polygons in a
    Shapes layer ("Draw area") to see the mean spectrum of each area.

    Parameters
    ----------
    napari_viewer : napari.Viewer

    Attributes
    ----------
    current : (int, int) or None
        Indices of the selected pixel in the current source.
    pins : list of (MapSource, int, int, str)
        Pinned pixels with their colours.
    lines : dict str -> matplotlib Line2D
        The curves of the last drawing ("spectrum", "fit", "peak 0", …,
        "background", "residual", "raw", "pin 0", …, "area 0", …).
    """

    def __init__(self, napari_viewer: Any):
        super().__init__()
        self.setMinimumWidth(420)
        self.viewer = napari_viewer
        self.current: tuple[int, int] | None = None
        self._world: tuple[float, float] | None = None
        self.pins: list[tuple[MapSource, int, int, str]] = []
        self.lines: dict[str, Any] = {}
        self.series: dict | None = None
        self._shape_layers: list[Any] = []

        self.sources = SourceList(self.viewer)
        self.sources.setToolTip("Result store or cube whose spectra are shown")
        self.show_fit = QCheckBox("fit")
        self.show_peaks = QCheckBox("peaks")
        self.show_raw = QCheckBox("raw input")
        for cb, tip in (
            (self.show_fit, "fitted model and residual"),
            (self.show_peaks, "each fitted peak and the background"),
            (self.show_raw, "the input cube named in the provenance (right axis)"),
        ):
            cb.setChecked(True)
            cb.setToolTip(tip)
            cb.toggled.connect(self.redraw)
        self.pin_button = QPushButton("Pin pixel")
        self.pin_button.setToolTip("keep this pixel's spectrum for comparison")
        self.clear_button = QPushButton("Clear")
        self.clear_button.setToolTip("remove the pinned pixels")
        self.area_button = QPushButton("Draw area")
        self.area_button.setToolTip("draw rectangles or polygons: their mean spectra appear here")
        self.pin_button.clicked.connect(self.pin)
        self.clear_button.clicked.connect(self.clear_pins)
        self.area_button.clicked.connect(self.draw_area)
        self.info = QLabel("Click a pixel on the map.")
        self.info.setWordWrap(True)
        self.plot = PlotCanvas(height_in=3.6)

        top = labelled_row("Data", self.sources)
        shows = QHBoxLayout()
        shows.addWidget(QLabel("Show"))
        for cb in (self.show_fit, self.show_peaks, self.show_raw):
            shows.addWidget(cb)
        shows.addStretch(1)
        buttons = QHBoxLayout()
        for b in (self.pin_button, self.clear_button, self.area_button):
            buttons.addWidget(b)
        lay = QVBoxLayout(self)
        lay.addLayout(top)
        lay.addLayout(shows)
        lay.addWidget(self.plot, 1)
        lay.addWidget(self.info)
        lay.addLayout(buttons)

        self.sources.currentIndexChanged.connect(self._source_changed)
        self.viewer.dims.events.current_step.connect(self._step_changed)
        self.viewer.mouse_drag_callbacks.append(self._on_mouse)
        self.viewer.layers.events.inserted.connect(self._layers_changed)
        self.viewer.layers.events.removed.connect(self._layers_changed)
        callback, callbacks = self._on_mouse, self.viewer.mouse_drag_callbacks

        dims_event, step_slot = self.viewer.dims.events.current_step, self._step_changed

        def _forget(*_: Any) -> None:
            if callback in callbacks:
                callbacks.remove(callback)
            dims_event.disconnect(step_slot)

        self.destroyed.connect(_forget)
        self._layers_changed()
        self.redraw()

    # ------------------------------------------------------------------ selection
    def source(self) -> MapSource | None:
        """The result store or cube selected in the "Data" list."""
        return self.sources.source()

    def select_world(self, position: Any) -> bool:
        """Select the pixel at a world position (…, y, x in µm); False outside the map."""
        src = self.source()
        if src is None:
            return False
        ij = pixel_at(position, src.grid)
        if ij is None:
            return False
        self.select_pixel(*ij)
        return True

    def select_pixel(self, iy: int, ix: int) -> None:
        """Select pixel (iy, ix) of the current source and redraw."""
        src = self.source()
        if src is None:
            return
        self.current = (int(iy), int(ix))
        self._world = (float(src.grid.y[iy]), float(src.grid.x[ix]))
        self.info.setText(src.pixel_summary(iy, ix, at=self.stack_at(src)))
        self._update_markers()
        self.redraw()

    def pin(self) -> None:
        """Pin the selected pixel (its spectrum stays in the plot)."""
        src = self.source()
        if src is None or self.current is None:
            return
        colour = PALETTE[len(self.pins) % len(PALETTE)]
        self.pins.append((src, *self.current, colour))
        self._update_markers()
        self.redraw()

    def clear_pins(self) -> None:
        """Remove every pinned pixel."""
        self.pins.clear()
        self._update_markers()
        self.redraw()

    def draw_area(self) -> None:
        """Add (or select) the Shapes layer for areas and start drawing rectangles."""
        layer = next((lyr for lyr in self.viewer.layers if lyr.name == AREAS_LAYER), None)
        if layer is None:
            layer = self.viewer.add_shapes(
                name=AREAS_LAYER,
                edge_width=0.15,
                face_color=[0] * 4,
                edge_color=PALETTE[0],
                ndim=2,
                **world_units(self.viewer),
            )
        self.viewer.layers.selection.active = layer
        layer.mode = "add_rectangle"

    def stack_at(self, src: MapSource | None = None) -> dict:
        """{stack dim: index} of the viewer's slider for the source's stack dim ({} if none).

        Maps and cubes put their stack dim first with scale 1, so napari's own slider
        position along it is the index; a stack map (…, y, x) has it third from the end,
        a stack cube (…, S, y, x) fourth.
        """
        src = src or self.source()
        dim = src.stack_dim if src is not None else None
        if dim is None:
            return {}
        back = 4 if src.ds is None else 3
        steps = tuple(self.viewer.dims.current_step)
        if len(steps) < back:
            return {dim: 0}
        return {dim: int(max(0, round(float(steps[-back]))))}

    def _step_changed(self, *_: Any) -> None:
        src = self.source()
        if src is not None and src.stack_dim is not None and self.current is not None:
            self.info.setText(src.pixel_summary(*self.current, at=self.stack_at(src)))
            self.redraw()

    def _source_changed(self, *_: Any) -> None:
        src = self.source()
        self.current = None
        if src is not None and self._world is not None:
            ij = pixel_at(self._world, src.grid)
            if ij is not None:
                self.select_pixel(*ij)
                return
        self.redraw()

    def _on_mouse(self, viewer: Any, event: Any):
        """Click without dragging on the map selects a pixel (drags pan as usual)."""
        if getattr(event, "button", 1) != 1:
            return
        layer = viewer.layers.selection.active
        if getattr(layer, "mode", "pan_zoom") not in ("pan_zoom", "transform"):
            return  # drawing or painting
        press = tuple(event.position)
        yield
        moved = False
        while event.type == "mouse_move":
            moved = True
            yield
        if not moved:
            self.select_world(press)

    # ------------------------------------------------------------------ layers
    def _update_markers(self) -> None:
        src = self.source()
        pts, colours = [], []
        for psrc, iy, ix, colour in self.pins:
            pts.append((psrc.grid.y[iy], psrc.grid.x[ix]))
            colours.append(colour)
        if self.current is not None and src is not None:
            pts.append(self._world)
            colours.append(DATA_COLOUR)
        layer = next((lyr for lyr in self.viewer.layers if lyr.name == MARKERS_LAYER), None)
        size = 1.0
        if src is not None:
            size = 1.6 * max(src.grid.spacing)
        data = np.array(pts, dtype=float).reshape(-1, 2)
        if layer is None:
            if not len(data):
                return
            active = self.viewer.layers.selection.active
            layer = self.viewer.add_points(
                data,
                name=MARKERS_LAYER,
                symbol="square",
                size=size,
                face_color="transparent",
                border_color=colours,
                border_width=0.18,
                border_width_is_relative=True,
                **world_units(self.viewer),
            )
            if active is not None:
                self.viewer.layers.selection.active = active
            return
        layer.data = data
        layer.size = size
        if len(data):
            layer.border_color = colours

    def _layers_changed(self, *_: Any) -> None:
        from napari.layers import Shapes

        for layer in self.viewer.layers:
            show_colorbar(layer)
        for layer in self._shape_layers:
            layer.events.data.disconnect(self._shapes_changed)
        self._shape_layers = [lyr for lyr in self.viewer.layers if isinstance(lyr, Shapes)]
        for layer in self._shape_layers:
            layer.events.data.connect(self._shapes_changed)

    def _shapes_changed(self, event: Any) -> None:
        action = str(getattr(event, "action", "changed"))
        if action.endswith("ing"):  # adding / changing / removing: wait for the end
            return
        layer = event.source
        if action.endswith("added") and getattr(layer, "name", "") == AREAS_LAYER:
            layer.current_edge_color = PALETTE[len(layer.data) % len(PALETTE)]
        self.redraw()

    def area_means(self) -> list[tuple[str, str, np.ndarray, np.ndarray, int]]:
        """(label, colour, axis, mean spectrum, n pixels) for every closed shape in Shapes layers."""
        src = self.source()
        if src is None:
            return []
        out = []
        k = 0
        for layer in self._shape_layers:
            colours = np.asarray(layer.edge_color)
            for i, (verts, kind) in enumerate(zip(layer.data, layer.shape_type)):
                world = np.array([layer.data_to_world(v) for v in verts])
                mask = shape_mask(world, src.grid, shape_type=kind)
                got = src.mean_spectrum(mask)
                if got is None:
                    continue
                c = colours[i] if i < len(colours) else PALETTE[k % len(PALETTE)]
                from matplotlib.colors import to_hex

                out.append(
                    (
                        f"area {k}",
                        to_hex(c[:3]) if not isinstance(c, str) else c,
                        got[0],
                        got[1],
                        got[2],
                    )
                )
                k += 1
        return out

    # ------------------------------------------------------------------ drawing
    def redraw(self, *_: Any) -> None:
        """Redraw the plot from the current selection, pins and areas."""
        fig = self.plot.figure
        fig.clear()
        self.lines = {}
        src = self.source()
        series = src is not None and src.has_series and self.current is not None
        spectra = src is None or src.cube is not None
        if series and spectra:  # a stack result with its spectra: spectrum, residual, series
            gs = fig.add_gridspec(3, 1, height_ratios=(3, 1, 2.4))
        else:
            gs = fig.add_gridspec(2, 1, height_ratios=(3, 1))
        if series and not spectra:  # a series store: the series and its normalised residual
            ax = self.plot.style(fig.add_subplot(gs[0]))
            axr = self.plot.style(fig.add_subplot(gs[1], sharex=ax))
            ax.tick_params(labelbottom=False)
            self._draw_series(src, ax, axr)
            self.plot.legend(ax, loc="best")
            self.plot.draw()
            return
        ax = self.plot.style(fig.add_subplot(gs[0]))
        axr = self.plot.style(fig.add_subplot(gs[1], sharex=ax))
        ax.tick_params(labelbottom=False)
        if series:
            axs = self.plot.style(fig.add_subplot(gs[2]))
            self._draw_series(src, axs, None)
            self.plot.legend(axs, loc="best")
        sdim, sunit = src.spectral_name() if src is not None else ("energy", "eV")
        yunit = src.cube.attrs.get("units", "") if src is not None and src.cube is not None else ""
        ax.set_ylabel(f"intensity [{yunit}]" if yunit else "intensity")
        axr.set_ylabel("residual")
        axr.set_xlabel(f"{'photon energy' if sdim == 'energy' else sdim} [{sunit}]")
        for n, (psrc, iy, ix, colour) in enumerate(self.pins):
            got = psrc.spectrum(iy, ix)
            if got is not None:
                y, x = psrc.grid.y[iy], psrc.grid.x[ix]
                (self.lines[f"pin {n}"],) = ax.plot(
                    *got, color=colour, lw=1.0, alpha=0.9, label=f"pin {n}: y {y:.3g}, x {x:.3g} µm"
                )
        for label, colour, axis, mean, npx in self.area_means():
            (self.lines[label],) = ax.plot(
                axis, mean, color=colour, lw=1.4, label=f"{label}: mean of {npx} px"
            )
        if src is not None and self.current is not None:
            self._draw_pixel(src, ax, axr)
        elif src is None:
            ax.set_title("open a pmap result or cube")
        else:
            ax.set_title("click a pixel on the map")
        if "residual" not in self.lines:
            axr.axhline(0, color=self.plot.GRID, lw=0.8)
        self.plot.legend(ax, loc="best")
        self.plot.draw()

    def _draw_series(self, src: MapSource, ax: Any, axr: Any | None) -> None:
        """The selected pixel's series (quantity against the stack value, ±1σ) and its law."""
        from ... import _style
        from ...series import LAW_TITLES

        iy, ix = self.current
        at = self.stack_at(src)
        s = src.series(iy, ix, at=at)
        self.series = s
        if s is None:
            ax.set_title("no series at this pixel")
            return
        yerr = np.where(np.isfinite(s["yerr"]), s["yerr"], 0.0)
        self.lines["series"] = ax.errorbar(
            s["x"], s["y"], yerr=yerr, fmt="o", ms=3.5, capsize=2.5, color=DATA_COLOUR,
            ecolor=DATA_COLOUR, label=f"{s['quantity'].replace('_', ' ')} ±1σ")
        if s["curve_y"].size:
            how = "fitted to this pixel here" if s["fitted_here"] else "stored fit"
            (self.lines["law"],) = ax.plot(s["curve_x"], s["curve_y"], color=FIT_COLOUR, lw=1.5,
                                           label=f"{LAW_TITLES[s['law']]} ({how})")
        if s["law"] == "power_law":
            ax.set_xscale("log")
            ax.set_yscale("log")
        d = at.get(s["dim"])
        if d is not None and d < s["x"].size:
            ax.axvline(s["x"][d], color="#9e9e9e", lw=0.8, ls=":")
        xl = _style.map_title(s["dim"], s["dim_units"])
        ax.set_ylabel(_style.map_title(s["quantity"], s["units"]))
        parts = []
        for name, (v, e) in s["params"].items():
            parts.append(f"{name} = {v:.5g}" + (f" ± {e:.2g}" if np.isfinite(e) else ""))
        head = f"series at pixel ({iy}, {ix})"
        if s["law"]:
            head += f": {LAW_TITLES[s['law']]}"
        if np.isfinite(s["chi2_red"]):
            head += f", χ²_red {s['chi2_red']:.3g}"
        if s["status"] and s["status"] != "converged":
            head += f" ({s['status']})"
        ax.set_title(head, fontsize=9)
        law_line = (f"{LAW_TITLES[s['law']]}: " + ", ".join(parts)) if parts else s["note"]
        self.info.setText(src.pixel_summary(iy, ix, at=at) + ("\n" + law_line if law_line else ""))
        if axr is None:
            ax.set_xlabel(xl)
            return
        axr.set_xlabel(xl)
        axr.set_ylabel("(data − law)/σ")
        if s["curve_y"].size and np.isfinite(s["yerr"]).any():
            from ...series import evaluate_law

            vals = [v for v, _ in s["params"].values()]
            law_y = evaluate_law(s["law"], s["x"], vals,
                                 reference_power_w=s["reference_power_W"])
            (self.lines["residual"],) = axr.plot(s["x"], (s["y"] - law_y) / s["yerr"], "o",
                                                 ms=3, color=FIT_COLOUR)
        axr.axhline(0, color="#9e9e9e", lw=0.6)

    def _draw_pixel(self, src: MapSource, ax: Any, axr: Any) -> None:
        iy, ix = self.current
        at = self.stack_at(src)
        got = src.spectrum(iy, ix, at=at)
        where = "".join(f", {d} #{i}" for d, i in at.items())
        ax.set_title(f"pixel ({iy}, {ix}): y {src.grid.y[iy]:.4g}, x {src.grid.x[ix]:.4g} µm"
                     + where)
        if got is not None:
            axis, values = got
            (self.lines["spectrum"],) = ax.plot(
                axis, values, ".", ms=2.5, color=DATA_COLOUR, label="spectrum"
            )
            fit = src.fit_at(iy, ix, axis, at=at) if self.show_fit.isChecked() else None
            if fit is not None:
                (self.lines["fit"],) = ax.plot(
                    axis,
                    fit["total"].values,
                    color=FIT_COLOUR,
                    lw=1.6,
                    label=f"fit ({src.fit['model']})",
                )
                if self.show_peaks.isChecked():
                    comps = fit["peak_component"].values
                    bg = fit["background"].values
                    for k in range(comps.shape[0]):
                        if np.all(np.isnan(comps[k])):
                            continue
                        (self.lines[f"peak {k}"],) = ax.plot(
                            axis,
                            comps[k] + bg,
                            "--",
                            lw=1.0,
                            color=COMPONENT_COLOURS[k % len(COMPONENT_COLOURS)],
                            label=f"peak {k}",
                        )
                    (self.lines["background"],) = ax.plot(
                        axis, bg, ":", lw=1.0, color="#9e9e9e", label="background"
                    )
                resid = values - fit["total"].values
                (self.lines["residual"],) = axr.plot(axis, resid, lw=0.8, color=FIT_COLOUR)
                axr.axhline(0, color="#9e9e9e", lw=0.6)
        if self.show_raw.isChecked():
            raw = src.raw_spectrum(iy, ix, at=at)
            if raw is not None:
                ax2 = self.plot.style(ax.twinx())
                ax2.grid(False)
                (self.lines["raw"],) = ax2.plot(
                    raw[0], raw[1], lw=0.8, color="#8d93a0", alpha=0.7, label="raw input"
                )
                ax2.set_ylabel(f"raw input [{raw[2]}]" if raw[2] else "raw input")
                ax2.yaxis.label.set_color("#8d93a0")
