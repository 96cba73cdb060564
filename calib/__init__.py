"""calib: calibration of the two-factor spot/convenience-yield model for commodity options desks."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("calib")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.1.0"

__all__ = ["__version__"]
