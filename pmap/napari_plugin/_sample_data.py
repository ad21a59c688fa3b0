"""napari sample data: the synthetic demo PL map of :mod:`pmap.synthetic` (small size)."""

from __future__ import annotations

from ._model import cube_layer

__all__ = ["demo_map"]

#: Size of the sample: (ny, nx) pixels and channels; small, so it opens in about a second.
SAMPLE_SHAPE = (48, 64)
SAMPLE_CHANNELS = 256


def demo_map() -> list[tuple]:
    """The demo cube (48 × 64 pixels of 0.5 µm, 256 channels, seed 0) as a lazy image layer.

    The cube is kept in the layer's metadata, so the processing panel can run
    on it without a file.
    """
    from ..synthetic import make_demo_cube

    cube, _ = make_demo_cube(shape=SAMPLE_SHAPE, n_channels=SAMPLE_CHANNELS, seed=0)
    data, kw, kind = cube_layer(cube, keep=True)
    kw["name"] = "demo map: " + kw["name"]
    return [(data, kw, kind)]
