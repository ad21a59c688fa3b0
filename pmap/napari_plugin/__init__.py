"""pmap's napari plugin: open result stores and cubes, look at spectra, fits and regions.

Contents (declared in ``pmap/napari.yaml``):

- a reader for pmap result stores (one layer per map, µm scale, units in the
  layer names, regions as labels) and for cubes in every format pmap reads
  (lazy, spectral axis as a slider);
- the panels "Spectrum at pixel" (click a pixel: its spectrum, fitted model,
  peak components and residual; pin pixels; mean spectrum of drawn areas),
  "Regions" (per-region histograms, statistics table, highlight on the map)
  and "Process map" (run :func:`pmap.process` in a background thread);
- the synthetic demo map as sample data.

Importing this package does not import napari or Qt; :func:`view` and the
panels do. The logic without Qt lives in :mod:`pmap.napari_plugin._model`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from .._version import DIST_NAME
from ..errors import InputFileError

__all__ = ["view", "open_viewer", "orient_y_up", "PANELS"]

#: Display names of the dock panels (as in the manifest), in docking order.
PANELS = ("Spectrum at pixel", "Regions", "Process map")


def open_viewer(
    path: str | Path | None = None, *, viewer: Any = None, panels: tuple[str, ...] = PANELS
) -> Any:
    """Set up a napari viewer for pmap: open ``path``, dock the panels, show a scale bar.

    Parameters
    ----------
    path : path, optional
        Result store or cube to open with pmap's reader.
    viewer : napari.Viewer, optional
        Viewer to use (a new one titled "pmap" by default).
    panels : tuple of str
        Panels to dock (display names from :data:`PANELS`).

    Returns
    -------
    napari.Viewer
    """
    import napari

    if path is not None and not Path(path).exists():
        raise InputFileError(f"no such file or store: {path}")
    if viewer is None:
        viewer = napari.Viewer(title="pmap - PL maps")
    # spectrum on top; below it the processing and (in front) the regions, as tabs
    order = sorted(panels, key=lambda n: {"Regions": 2, "Process map": 1}.get(n, 0))
    for i, name in enumerate(order):
        viewer.window.add_plugin_dock_widget(DIST_NAME, name, tabify=i >= 2)
    if path is not None:
        viewer.open(str(path), plugin=DIST_NAME)
    bar = viewer.canvas.overlays.scale_bar if hasattr(viewer, "canvas") else viewer.scale_bar
    bar.visible = True
    orient_y_up(viewer)
    viewer.layers.selection.active = next(
        (lyr for lyr in reversed(viewer.layers) if lyr.visible), None
    )
    viewer.reset_view()
    return viewer


def orient_y_up(viewer: Any) -> None:
    """Show y increasing upwards, origin lower left, as in pmap's figures (:mod:`pmap._style`).

    napari draws the first row at the top by default; turning the camera's
    vertical axis up flips the display only: world coordinates (y, x in µm),
    pixel look-up and the panels are unchanged.
    """
    scene = getattr(viewer, "scene", None)
    camera = scene.camera if scene is not None and hasattr(scene, "camera") else viewer.camera
    camera.orientation2d = ("up", "right")


def view(path: str | Path | None = None) -> int:
    """Open the pmap viewer with ``path`` loaded and the panels docked; return 0 when closed.

    Used by ``plcube view PATH``. Runs the Qt event loop (``napari.run()``).
    """
    import napari

    open_viewer(path)
    napari.run()
    return 0
