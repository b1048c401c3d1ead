"""agegrid: seafloor-age and derived grids from magnetic-anomaly isochron picks."""
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("agegrid")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.0.0"

__all__ = ["__version__"]
