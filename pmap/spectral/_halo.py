"""Block-wise work that needs a 1-pixel spatial halo from the neighbouring chunks.

:func:`dask.array.map_overlap` hands each block its neighbours' edges as *views* of
the neighbours' chunks, so a whole neighbour chunk stays in memory until the last
block that needs one of its edges has run; on a large map streamed to disk that keeps
rows of chunks alive. Here the four edges of every chunk are *copied* out by small
tasks (a row or column of spectra each), so a chunk can be freed as soon as its own
block and its edge copies are done, and each chunk is still read only once.
"""

from __future__ import annotations

from collections.abc import Callable

import dask.array as da
import numpy as np
from dask.base import tokenize
from dask.highlevelgraph import HighLevelGraph

__all__ = ["map_with_halo"]


def _copy_edge(block: np.ndarray, axis: int, first: bool) -> np.ndarray:
    """A copy of the first or last slice of ``block`` along ``axis`` (kept as length 1)."""
    sel = [slice(None)] * block.ndim
    sel[axis] = slice(0, 1) if first else slice(-1, None)
    return block[tuple(sel)].copy()


def _padded_call(func, center, above, below, left, right, tl, tr, bl, br):
    """Assemble the NaN-padded block (…, Y + 2, X + 2, n) from a chunk and its halo; call func."""
    shape = center.shape[:-3] + (center.shape[-3] + 2, center.shape[-2] + 2, center.shape[-1])
    pad = np.empty(shape, dtype=center.dtype)
    pad[..., 1:-1, 1:-1, :] = center
    for border in ((0, slice(None)), (-1, slice(None)), (slice(None), 0), (slice(None), -1)):
        pad[(..., *border, slice(None))] = np.nan  # outside the map unless a neighbour fills it
    if above is not None:
        pad[..., 0, 1:-1, :] = above[..., 0, :, :]
    if below is not None:
        pad[..., -1, 1:-1, :] = below[..., 0, :, :]
    if left is not None:
        pad[..., 1:-1, 0, :] = left[..., :, 0, :]
    if right is not None:
        pad[..., 1:-1, -1, :] = right[..., :, 0, :]
    for corner, (py, px, sx) in (
        (tl, (0, 0, -1)),
        (tr, (0, -1, 0)),
        (bl, (-1, 0, -1)),
        (br, (-1, -1, 0)),
    ):
        if corner is not None:  # a row copy of the diagonal neighbour: its end or start
            pad[..., py, px, :] = corner[..., 0, sx, :]
    return func(pad)


def map_with_halo(func: Callable[[np.ndarray], np.ndarray], data: da.Array, *, dtype) -> da.Array:
    """Apply ``func`` to every chunk of ``data`` (…, y, x, n) padded by 1 pixel in y and x.

    ``func`` gets the padded block (…, Y + 2, X + 2, n), NaN outside the map, and
    returns the inner block (…, Y, X, n). The spectral axis must be one chunk. Same
    result as ``dask.array.map_overlap(func, data, depth=1, boundary=nan, trim=False)``
    without keeping neighbour chunks alive for their edges.
    """
    if data.ndim < 3 or data.numblocks[-1] != 1:
        raise ValueError("map_with_halo needs (…, y, x, n) data with the last axis in one chunk")
    ay, ax = data.ndim - 3, data.ndim - 2
    edges = {}
    for label, axis, first in (
        ("first_row", ay, True),
        ("last_row", ay, False),
        ("first_col", ax, True),
        ("last_col", ax, False),
    ):
        chunks = list(data.chunks)
        chunks[axis] = (1,) * len(chunks[axis])
        edges[label] = data.map_blocks(
            _copy_edge,
            axis=axis,
            first=first,
            chunks=tuple(chunks),
            dtype=data.dtype,
            name=f"halo-{label}-" + tokenize(data, label),
        )
    name = "halo-" + tokenize(func, data)
    nby, nbx = data.numblocks[ay], data.numblocks[ax]
    dsk = {}
    for idx in np.ndindex(*data.numblocks):
        lead, i, j = idx[:ay], idx[ay], idx[ax]

        def key(label, ii, jj, lead=lead):
            if 0 <= ii < nby and 0 <= jj < nbx:
                return (edges[label].name, *lead, ii, jj, 0)
            return None

        dsk[(name, *idx)] = (
            _padded_call,
            func,
            (data.name, *idx),
            key("last_row", i - 1, j),
            key("first_row", i + 1, j),
            key("last_col", i, j - 1),
            key("first_col", i, j + 1),
            key("last_row", i - 1, j - 1),
            key("last_row", i - 1, j + 1),
            key("first_row", i + 1, j - 1),
            key("first_row", i + 1, j + 1),
        )
    graph = HighLevelGraph.from_collections(name, dsk, dependencies=[data, *edges.values()])
    return da.Array(graph, name, chunks=data.chunks, dtype=dtype)
