"""Version of pmap (single source: the installed distribution metadata)."""

from importlib.metadata import PackageNotFoundError, version

#: Name of the distribution on the package index and of the napari plugin (``pip install plcube``);
#: the import name stays ``pmap`` (``import pmap``, ``python -m pmap``).
DIST_NAME = "plcube"
#: Name of the console command (``pmap`` would collide with procps' memory-map tool).
COMMAND = "plcube"

try:
    __version__ = version(DIST_NAME)
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0+unknown"
