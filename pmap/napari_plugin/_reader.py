"""napari reader: pmap result stores and PL cubes in every format pmap reads."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from ._model import read_path

__all__ = ["napari_get_reader", "read_pmap"]


def _handles(path: Any) -> bool:
    """True for a result store or a file whose content pmap recognises as a cube
    (:func:`pmap.io.recognises`): ordinary images or tables are left to other readers."""
    from ..io import recognises
    from ..results import is_result_store

    if not isinstance(path, (str, Path)):
        return False
    p = Path(path)
    if not p.exists():
        return False
    return is_result_store(p) or recognises(p)


def napari_get_reader(path: str | list[str]) -> Callable | None:
    """Return :func:`read_pmap` if pmap can read ``path`` (or every path of a list), else None."""
    paths = path if isinstance(path, (list, tuple)) else [path]
    if not paths or not all(_handles(p) for p in paths):
        return None
    return read_pmap


def read_pmap(path: str | list[str]) -> list[tuple]:
    """Layer data of result stores (one layer per map) and cubes (spectral axis as a slider)."""
    paths = path if isinstance(path, (list, tuple)) else [path]
    layers: list[tuple] = []
    for p in paths:
        layers.extend(read_path(p))
    return layers
