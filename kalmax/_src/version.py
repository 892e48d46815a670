"""The package's version, read from its installed metadata (pyproject.toml is the one place it is written)."""

from importlib import metadata

try:
    __version__ = metadata.version("kalmax")
except metadata.PackageNotFoundError:  # run from a source tree that was never installed
    __version__ = "0+unknown"
