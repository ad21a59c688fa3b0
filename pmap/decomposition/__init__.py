"""Decomposition and segmentation: component spectra, abundance maps, regions, per-region numbers.

- :func:`decompose` — PCA or NMF of a cube (fit on a seeded pixel sample or
  incrementally, abundances of every pixel computed lazily per chunk);
  :func:`component_count_curve` helps choose the number of components.
- :func:`segment` — regions by k-means or Gaussian mixtures on spectral shape,
  shape + intensity, NMF abundances or fitted parameter maps; −1 = no signal.
- :func:`region_statistics`, :func:`region_table`, :func:`write_region_csv` —
  pixel counts, areas in µm², property mean ± std and mean spectra per region.

Importing this package does not import scikit-learn (only calling the functions does).
Steps registered for pipelines: ``decompose``, ``segment``.
"""

from __future__ import annotations

from ._decompose import component_count_curve, decompose
from ._segment import relabel_islands, segment, signal_mask
from ._stats import region_statistics, region_table, write_region_csv

__all__ = [
    "decompose",
    "component_count_curve",
    "segment",
    "relabel_islands",
    "signal_mask",
    "region_statistics",
    "region_table",
    "write_region_csv",
]
