"""Shared Qt pieces of the panels: a matplotlib canvas in napari's colours, source lists."""

from __future__ import annotations

from typing import Any

from qtpy.QtWidgets import QComboBox, QHBoxLayout, QLabel, QSizePolicy, QVBoxLayout, QWidget

from .._model import META_KEY, MapSource, open_source

__all__ = ["PlotCanvas", "SourceList", "layer_meta", "show_colorbar", "world_units", "labelled_row"]


def layer_meta(layer: Any) -> dict | None:
    """The ``metadata["pmap"]`` dict of a layer, or None for layers pmap did not make."""
    meta = getattr(layer, "metadata", {}).get(META_KEY)
    return meta if isinstance(meta, dict) else None


def show_colorbar(layer: Any) -> None:
    """Show the colour bar of a pmap map layer (images only; napari draws it while visible)."""
    meta = layer_meta(layer)
    bar = getattr(layer, "colorbar", None)
    if (
        meta
        and meta.get("kind") == "result"
        and bar is not None
        and hasattr(layer, "contrast_limits")
    ):
        bar.visible = True
        bar.font_size = 9
        # napari's colour bar has no label: the layer's name (title with units) is shown
        # on the canvas beside it, as the figures' colour bar label
        overlay = getattr(layer, "name_overlay", None)
        if overlay is not None:
            overlay.visible = True
            overlay.position = "top_right"


def world_units(viewer: Any) -> dict:
    """``{"units": ("um", "um")}`` when the viewer's pmap layers are in µm (for new layers)."""
    for layer in viewer.layers:
        if layer_meta(layer) and str(getattr(layer, "units", ("",))[-1]) in ("micrometer", "um"):
            return {"units": ("um", "um")}
    return {}


def labelled_row(text: str, *widgets: Any) -> QHBoxLayout:
    """A row: a label, then the widgets (the first one stretches)."""
    row = QHBoxLayout()
    row.addWidget(QLabel(text))
    for i, w in enumerate(widgets):
        row.addWidget(w, 1 if i == 0 else 0)
    return row


def _source_key(meta: dict) -> Any:
    return ("mem", id(meta["cube"])) if meta.get("cube") is not None else ("path", meta.get("path"))


class SourceList(QComboBox):
    """A drop-down of the result stores and cubes open in the viewer, kept up to date.

    Parameters
    ----------
    viewer : napari.Viewer
    kinds : tuple of str
        Source kinds to list ("result", "cube").
    need : callable, optional
        Extra filter on the :class:`MapSource`.
    """

    def __init__(self, viewer: Any, kinds: tuple[str, ...] = ("result", "cube"), need=None):
        super().__init__()
        self.viewer = viewer
        self.kinds = kinds
        self.need = need
        self._sources: dict[Any, MapSource] = {}
        self.setSizeAdjustPolicy(QComboBox.AdjustToMinimumContentsLengthWithIcon)
        self.setMinimumContentsLength(12)
        viewer.layers.events.inserted.connect(self.refresh)
        viewer.layers.events.removed.connect(self.refresh)
        self.refresh()

    def refresh(self, event: Any = None) -> None:
        """Re-list the sources; a newly added one becomes the current one."""
        seen: dict[Any, dict] = {}
        for layer in self.viewer.layers:
            meta = layer_meta(layer)
            if (
                meta
                and meta.get("kind") in self.kinds
                and (meta.get("path") or meta.get("cube") is not None)
            ):
                seen.setdefault(_source_key(meta), meta)
        old_keys = [self.itemData(i) for i in range(self.count())]
        current = self.currentData()
        for key, meta in seen.items():
            if key not in self._sources:
                try:
                    src = open_source(meta)
                except Exception:  # noqa: BLE001 - a layer whose file went away: skip it
                    continue
                if self.need is None or self.need(src):
                    self._sources[key] = src
        keys = [k for k in seen if k in self._sources]
        new = [k for k in keys if k not in old_keys]
        self.blockSignals(True)
        self.clear()
        for k in keys:
            self.addItem(self._sources[k].label, k)
        target = new[-1] if new else current
        idx = keys.index(target) if target in keys else (0 if keys else -1)
        self.setCurrentIndex(idx)
        self.blockSignals(False)
        if self.currentData() != current or new:
            self.currentIndexChanged.emit(self.currentIndex())

    def source(self) -> MapSource | None:
        """The selected source (None when nothing is open)."""
        key = self.currentData()
        return self._sources.get(key) if key is not None else None

    def disconnect_viewer(self) -> None:
        """Stop following the viewer's layer list."""
        for ev in (self.viewer.layers.events.inserted, self.viewer.layers.events.removed):
            ev.disconnect(self.refresh)


class PlotCanvas(QWidget):
    """A matplotlib figure in a Qt widget, styled like napari's dark theme."""

    BG = "#262930"
    FG = "#d6d9de"
    GRID = "#454b57"

    def __init__(self, *, height_in: float = 3.2):
        super().__init__()
        from matplotlib.backends.backend_qtagg import FigureCanvasQTAgg
        from matplotlib.figure import Figure

        self.figure = Figure(
            figsize=(4.6, height_in), dpi=100, facecolor=self.BG, layout="constrained"
        )
        self.canvas = FigureCanvasQTAgg(self.figure)
        self.canvas.setSizePolicy(QSizePolicy.Expanding, QSizePolicy.Expanding)
        self.canvas.setMinimumHeight(int(height_in * 75))
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.canvas)

    def style(self, ax: Any) -> Any:
        """Apply the panel colours to an axes; return it."""
        ax.set_facecolor(self.BG)
        for s in ax.spines.values():
            s.set_color(self.GRID)
        ax.tick_params(colors=self.FG, labelsize=8)
        ax.xaxis.label.set_color(self.FG)
        ax.yaxis.label.set_color(self.FG)
        ax.xaxis.label.set_fontsize(9)
        ax.yaxis.label.set_fontsize(9)
        ax.title.set_color(self.FG)
        ax.title.set_fontsize(9)
        ax.grid(True, color=self.GRID, lw=0.5, alpha=0.6)
        ax.ticklabel_format(axis="y", style="sci", scilimits=(-3, 4), useMathText=True)
        ax.yaxis.get_offset_text().set_color(self.FG)
        ax.yaxis.get_offset_text().set_fontsize(8)
        return ax

    def legend(self, ax: Any, **kw: Any) -> None:
        """A small legend in the panel colours (only when something is labelled)."""
        handles, labels = ax.get_legend_handles_labels()
        if handles:
            leg = ax.legend(
                fontsize=7,
                frameon=True,
                facecolor=self.BG,
                edgecolor=self.GRID,
                labelcolor=self.FG,
                **kw,
            )
            leg.get_frame().set_alpha(0.85)

    def draw(self) -> None:
        """Redraw the canvas."""
        self.canvas.draw_idle()
