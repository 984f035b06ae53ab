"""The single place the package version is read from."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("flowpipe")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"
