"""The "Regions" panel: a property's histogram per region, the region table, highlight on the map."""

from __future__ import annotations

from typing import Any

import numpy as np
from qtpy.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from .._model import (
    MapSource,
    map_label,
    region_colour,
    region_histograms,
    region_legend,
    region_stats_table,
)
from ._common import PlotCanvas, SourceList, labelled_row, layer_meta

__all__ = ["RegionPanel"]

#: Largest processed cube (bytes) whose region mean spectra the panel computes itself.
_MAX_CUBE_BYTES_FOR_MEANS = 256 * 2**20


class RegionPanel(QWidget):
    """Compare regions: histogram of a property per region, statistics, mean spectra.

    Selecting a row of the table (or calling :meth:`select_region`) shows
    only that region on the map's region layer.

    Parameters
    ----------
    napari_viewer : napari.Viewer

    Attributes
    ----------
    selected : int or None
        The highlighted region (None: all shown).
    hist_lines : dict int -> matplotlib artist
        The histogram of each region from the last drawing.
    """

    def __init__(self, napari_viewer: Any):
        super().__init__()
        self.setMinimumWidth(420)
        self.viewer = napari_viewer
        self.selected: int | None = None
        self.hist_lines: dict[int, Any] = {}
        self.sources = SourceList(self.viewer, kinds=("result",), need=lambda s: s.has_regions)
        self.sources.setToolTip("Result store with a region map")
        self.property = QComboBox()
        self.property.setToolTip("map whose distribution is shown per region")
        self.show_all = QPushButton("Show all regions")
        self.show_all.clicked.connect(lambda: self.select_region(None))
        self.table = QTableWidget()
        self.table.setSelectionBehavior(QAbstractItemView.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.NoEditTriggers)
        self.table.verticalHeader().setVisible(False)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeToContents)
        self.table.itemSelectionChanged.connect(self._row_selected)
        self.table.setMinimumHeight(120)
        self.note = QLabel("")
        self.note.setWordWrap(True)
        self.plot = PlotCanvas(height_in=3.4)

        lay = QVBoxLayout(self)
        lay.addLayout(labelled_row("Result", self.sources))
        lay.addLayout(labelled_row("Property", self.property))
        lay.addWidget(self.plot, 2)
        lay.addWidget(self.table, 1)
        bottom = QHBoxLayout()
        bottom.addWidget(self.note, 1)
        bottom.addWidget(self.show_all)
        lay.addLayout(bottom)

        self.sources.currentIndexChanged.connect(self._source_changed)
        self.property.currentIndexChanged.connect(self.redraw)
        self._source_changed()

    def source(self) -> MapSource | None:
        """The result store shown (one with regions)."""
        return self.sources.source()

    # ------------------------------------------------------------------ state
    def _source_changed(self, *_: Any) -> None:
        src = self.source()
        self.property.blockSignals(True)
        self.property.clear()
        if src is not None:
            ds = src.ds
            names = [
                n
                for n in sorted(ds.data_vars, key=_property_order)
                if {"y", "x"} <= set(ds[n].dims)
                and n not in ("region", "fit_status", "intensity")
                and not n.endswith("_err")
                and ds[n].dtype.kind == "f"
            ]
            for n in names:
                var = ds[n]
                split = next((d for d in ("peak", "component") if d in var.dims), None)
                for k in range(var.sizes[split]) if split else [None]:
                    self.property.addItem(
                        map_label(n, var.attrs.get("units"), dim=split, index=k)
                        if split
                        else map_label(n, var.attrs.get("units")),
                        (n, split, k),
                    )
        self.property.blockSignals(False)
        self._fill_table()
        self.selected = None
        self.redraw()

    def _fill_table(self) -> None:
        src = self.source()
        titles, rows, labels = region_stats_table(src.ds) if src is not None else ([], [], [])
        self._row_regions = labels
        self.table.blockSignals(True)
        self.table.clear()
        self.table.setColumnCount(len(titles))
        self.table.setRowCount(len(rows))
        self.table.setHorizontalHeaderLabels(titles)
        legend = region_legend(src.ds) if src is not None else {}
        for i, cells in enumerate(rows):
            for j, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if j == 0 and labels[i] in legend:
                    item.setToolTip(legend[labels[i]])
                self.table.setItem(i, j, item)
        self.table.blockSignals(False)
        self.note.setText("" if src is not None else "Open a result with regions.")

    def _row_selected(self) -> None:
        rows = {i.row() for i in self.table.selectedIndexes()}
        if rows:
            self.select_region(self._row_regions[min(rows)])

    def region_layer(self) -> Any:
        """The Labels layer of the current result's region map, or None."""
        src = self.source()
        for layer in self.viewer.layers:
            meta = layer_meta(layer)
            if (
                src is not None
                and meta
                and meta.get("variable") == "region"
                and meta.get("path") == (str(src.path) if src.path else None)
            ):
                return layer
        return None

    def select_region(self, region: int | None) -> None:
        """Highlight one region on the map and in the plots (None: show all regions)."""
        self.selected = None if region is None else int(region)
        layer = self.region_layer()
        if layer is not None:
            offset = layer_meta(layer).get("label_offset", 0)
            if self.selected is None:
                layer.show_selected_label = False
                layer.contour = 0
            else:
                layer.visible = True
                layer.selected_label = self.selected + offset
                layer.show_selected_label = True
                layer.contour = 1  # outline: the map underneath stays readable
        if self.selected is None:
            self.table.clearSelection()
        self.redraw()

    def region_colour(self, region: int) -> str:
        """Colour of a region, the same as on the map's region layer."""
        return region_colour(region)

    # ------------------------------------------------------------------ drawing
    def redraw(self, *_: Any) -> None:
        """Draw the histograms of the chosen property and the region mean spectra."""
        fig = self.plot.figure
        fig.clear()
        self.hist_lines = {}
        src = self.source()
        ax = self.plot.style(fig.add_subplot(2, 1, 1))
        axs = self.plot.style(fig.add_subplot(2, 1, 2))
        choice = self.property.currentData()
        if src is None or choice is None:
            ax.set_title("no result with regions open")
            self.plot.draw()
            return
        name, split, k = choice
        var = src.ds[name]
        if split:
            var = var.isel({split: k})
        var = var.isel({d: 0 for d in var.dims if d not in ("y", "x")}).transpose("y", "x")
        region = np.asarray(src.ds["region"].transpose("y", "x").values)
        edges, counts = region_histograms(var.values, region)
        for r, c in counts.items():
            hi = self.selected is None or self.selected == r
            self.hist_lines[r] = ax.stairs(
                c,
                edges,
                color=self.region_colour(r),
                lw=2.0 if self.selected == r else 1.2,
                alpha=1.0 if hi else 0.3,
                label=f"region {r}",
            )
        ax.set_xlabel(self.property.currentText())
        ax.set_ylabel("pixels")
        self.plot.legend(ax, loc="upper right", ncols=2)
        self._draw_mean_spectra(src, axs, region)
        self.plot.draw()

    def _draw_mean_spectra(self, src: MapSource, ax: Any, region: np.ndarray) -> None:
        ds = src.ds
        sdim, unit = src.spectral_name()
        means: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        if "region_mean_spectrum" in ds:
            m = ds["region_mean_spectrum"]
            rdim = "region_id" if "region_id" in m.dims else "region"
            s = next(d for d in m.dims if d != rdim)
            axis = np.asarray(m[s].values, dtype=float)
            for i, r in enumerate(np.asarray(m[rdim].values)):
                means[int(r)] = (axis, np.asarray(m.isel({rdim: i}).values, dtype=float))
            yunit = m.attrs.get("units", "")
        elif src.cube is not None and src.cube.nbytes <= _MAX_CUBE_BYTES_FOR_MEANS:
            for r in np.unique(region[region >= 0]):
                got = src.mean_spectrum(region == r)
                if got is not None:
                    means[int(r)] = (got[0], got[1])
            yunit = src.cube.attrs.get("units", "")
        else:
            ax.set_title("no region mean spectra stored")
            return
        for r, (axis, mean) in means.items():
            hi = self.selected is None or self.selected == r
            ax.plot(
                axis,
                mean,
                color=self.region_colour(r),
                lw=1.8 if self.selected == r else 1.0,
                alpha=1.0 if hi else 0.3,
            )
        ax.set_xlabel(f"{'photon energy' if sdim == 'energy' else sdim} [{unit}]")
        ax.set_ylabel(f"mean [{yunit}]" if yunit else "mean spectrum")


def _property_order(name: str) -> tuple[int, str]:
    order = (
        "peak_energy",
        "peak_fwhm",
        "peak_area",
        "peak_height",
        "max_energy",
        "centroid_energy",
        "integrated_intensity",
    )
    return (order.index(name) if name in order else len(order), name)
