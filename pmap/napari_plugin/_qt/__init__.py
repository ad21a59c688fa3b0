"""Qt dock panels of the pmap viewer (imported by napari through the manifest)."""

from ._process import ProcessPanel
from ._regions import RegionPanel
from ._spectrum import SpectrumPanel

__all__ = ["SpectrumPanel", "RegionPanel", "ProcessPanel"]
