"""meteorspec: automatic reduction of meteor spectra from grating-equipped video cameras."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("meteorspec")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.1.0+source"

__all__ = ["__version__"]
