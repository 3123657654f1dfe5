"""simfield: truth-tagged mock deep fields for measuring the completeness and purity of
source catalogues."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("simfield")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
