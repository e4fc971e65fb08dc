"""The installed package's version, from its metadata."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("stablefilt")
except PackageNotFoundError:  # a source tree that was never installed
    __version__ = "0+unknown"
