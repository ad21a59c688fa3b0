"""The "Process map" panel: run pmap's pipeline on an open cube in a background thread."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from qtpy.QtCore import Signal
from qtpy.QtWidgets import (
    QCheckBox,
    QComboBox,
    QFileDialog,
    QFormLayout,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QProgressBar,
    QPushButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from ..._version import DIST_NAME
from .._model import run_process
from ._common import SourceList, layer_meta

__all__ = ["ProcessPanel"]

#: Line shapes offered (the models of pmap.fitting.fit_peaks).
MODELS = ("gaussian", "lorentzian", "voigt", "pseudo_voigt", "split_gaussian")
#: Choices of the region count ("none": no segmentation).
REGION_CHOICES = ("none", "auto", *(str(k) for k in range(2, 11)))


class ProcessPanel(QWidget):
    """Fit and map the open cube without leaving the viewer.

    The run (:func:`pmap.process`) happens in a worker thread
    (``napari.qt.threading``); the progress bar counts finished tasks and the
    result store opens as layers when it is written.

    Parameters
    ----------
    napari_viewer : napari.Viewer

    Attributes
    ----------
    worker : napari.qt.threading.FunctionWorker or None
        The running (or last) job.
    last_output : Path or None
        The store written by the last successful run.
    """

    progressed = Signal(int, int)

    def __init__(self, napari_viewer: Any):
        super().__init__()
        self.setMinimumWidth(420)
        self.viewer = napari_viewer
        self.worker = None
        self.last_output: Path | None = None
        self.sources = SourceList(self.viewer, kinds=("cube",))
        self.sources.setToolTip("cube to process (file or demo cube in memory)")
        self.peaks = QSpinBox()
        self.peaks.setRange(0, 4)
        self.peaks.setValue(1)
        self.peaks.setSpecialValueText("no fit")
        self.peaks.setToolTip("number of peaks fitted in every spectrum (no fit: descriptor maps)")
        self.model = QComboBox()
        self.model.addItems(MODELS)
        self.model.setToolTip("line shape of each peak")
        self.regions = QComboBox()
        self.regions.addItems(REGION_CHOICES)
        self.regions.setToolTip("cluster the pixels into this many regions ('auto': choose)")
        self.components = QSpinBox()
        self.components.setRange(0, 12)
        self.components.setSpecialValueText("none")
        self.components.setToolTip("NMF components to extract (none: skip)")
        self.pipeline = QLineEdit()
        self.pipeline.setPlaceholderText("default pipeline")
        self.pipeline.setToolTip("pipeline TOML file (plcube process --print-config gives one)")
        self.output = QLineEdit()
        self.output.setToolTip("result store to write (NAME.zarr)")
        self.overwrite = QCheckBox("replace an existing result")
        self.run_button = QPushButton("Run")
        self.run_button.clicked.connect(self.run)
        self.bar = QProgressBar()
        self.bar.setRange(0, 1)
        self.bar.setValue(0)
        self.status = QLabel("")
        self.status.setWordWrap(True)

        form = QFormLayout()
        form.addRow("Cube", self.sources)
        form.addRow("Peaks", self.peaks)
        form.addRow("Line shape", self.model)
        form.addRow("Regions", self.regions)
        form.addRow("Components", self.components)
        form.addRow("Pipeline", _with_browse(self.pipeline, self._browse_pipeline))
        form.addRow("Output", _with_browse(self.output, self._browse_output))
        form.addRow("", self.overwrite)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.run_button)
        lay.addWidget(self.bar)
        lay.addWidget(self.status)
        lay.addStretch(1)

        self.progressed.connect(self._show_progress)
        self.sources.currentIndexChanged.connect(self._suggest_output)
        self._suggest_output()

    # ------------------------------------------------------------------ options
    def _suggest_output(self, *_: Any) -> None:
        if self.output.isModified():
            return  # the user typed a path: keep it
        src = self.sources.source()
        if src is not None and src.path is not None:
            name = src.path.name
            for ext in (".zarr", ".nc", ".npy", ".tif", ".tiff", ".csv", ".txt"):
                name = name.removesuffix(ext)
            self.output.setText(str(src.path.with_name(name + "_result.zarr")))
        elif not self.output.text():
            self.output.setText(str(Path.cwd() / "pmap_result.zarr"))

    def _browse_pipeline(self) -> None:
        path, _ = QFileDialog.getOpenFileName(self, "Pipeline file", "", "TOML (*.toml)")
        if path:
            self.pipeline.setText(path)

    def _browse_output(self) -> None:
        path, _ = QFileDialog.getSaveFileName(
            self, "Result store", self.output.text(), "Zarr store (*.zarr)"
        )
        if path:
            self.output.setText(path if path.endswith(".zarr") else path + ".zarr")

    def options(self) -> dict:
        """The keyword options given to :func:`pmap.process` by the current settings."""
        reg = self.regions.currentText()
        opts: dict[str, Any] = {
            "fit": self.peaks.value() > 0,
            "peaks": self.peaks.value() or None,
            "model": self.model.currentText(),
            "regions": None if reg == "none" else (reg if reg == "auto" else int(reg)),
            "components": self.components.value() or None,
            "overwrite": self.overwrite.isChecked(),
        }
        if self.pipeline.text().strip():
            opts["pipeline"] = Path(self.pipeline.text().strip())
        return opts

    # ------------------------------------------------------------------ running
    def run(self) -> Any:
        """Start processing the selected cube in a worker thread; return the worker (or None)."""
        from napari.qt.threading import create_worker

        src = self.sources.source()
        if src is None:
            self._say("Open a cube first (File > Open, or the demo sample).", error=True)
            return None
        out = self.output.text().strip()
        if not out:
            self._say("Choose an output path.", error=True)
            return None
        source = src.path if src.path is not None else src.cube
        self.run_button.setEnabled(False)
        self.bar.setRange(0, 0)  # busy until the first tasks are known
        self._say(f"processing {src.label} …")
        worker = create_worker(
            run_process,
            source,
            out,
            report=self.progressed.emit,
            **self.options(),
            _connect={
                "returned": self._done,
                "errored": self._failed,
                "finished": lambda: self.run_button.setEnabled(True),
            },
            _start_thread=False,
        )
        self.worker = worker
        worker.start()
        return worker

    def _show_progress(self, done: int, total: int) -> None:
        if total > 0:
            self.bar.setRange(0, total)
            self.bar.setValue(min(done, total))
            self.bar.setFormat(f"{done} / {total} tasks")

    def _done(self, path: Path) -> None:
        self.last_output = Path(path)
        for layer in list(self.viewer.layers):
            meta = layer_meta(layer)
            if meta and meta.get("path") == str(path):
                self.viewer.layers.remove(layer)  # an earlier result at the same path
            elif meta and meta.get("kind") == "cube":
                layer.visible = False
        self.viewer.open(str(path), plugin=DIST_NAME)
        self.bar.setRange(0, 1)
        self.bar.setValue(1)
        self.bar.setFormat("done")
        self._say(f"written: {path}")

    def _failed(self, exc: BaseException) -> None:
        self.bar.setRange(0, 1)
        self.bar.setValue(0)
        self.bar.setFormat("failed")
        self._say(f"failed: {exc}", error=True)

    def _say(self, text: str, *, error: bool = False) -> None:
        self.status.setText(text)
        self.status.setStyleSheet("color: #ef5350;" if error else "")


def _with_browse(edit: QLineEdit, slot) -> QWidget:
    w = QWidget()
    lay = QHBoxLayout(w)
    lay.setContentsMargins(0, 0, 0, 0)
    lay.addWidget(edit, 1)
    b = QPushButton("…")
    b.setFixedWidth(28)
    b.clicked.connect(slot)
    lay.addWidget(b)
    return w
