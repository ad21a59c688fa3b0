"""Decomposition and segmentation: component spectra, abundance maps, regions, per-region numbers.

- :func:`decompose` — PCA or NMF of a cube (fit on a seeded pixel sample or
  incrementally, abundances of every pixel computed lazily per chunk); NMF
  components are checked for edges sharper than the instrument and for one line
  shifting across the map (a notice points to the peak-energy map);
  ``align="peak"`` decomposes spectra aligned on their own peak and maps the shift
  (:mod:`._components`). :func:`component_count_curve` helps choose the number of
  components.
- :func:`segment` — regions by emission type: shape (unit-area, noise-whitened)
  and intensity features (:mod:`._emission`), k-means over-clustering merged while
  one population (:mod:`._merge`), no-signal pixels from
  :func:`pmap.spectral.detect_signal`, islands cleaned, names from the regions' mean
  spectra ("1.63 eV band, 62 %"); also k-means or Gaussian mixtures on shape,
  shape + intensity, NMF abundances or fitted parameter maps; −1 = no signal.
- :func:`region_statistics`, :func:`region_table`, :func:`write_region_csv` —
  pixel counts, areas in µm², property mean ± std, mean spectra and names per region.

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
