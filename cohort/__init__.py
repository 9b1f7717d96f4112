"""Dromos: population evidence on cardiac conduction disease from ECG registries."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("dromos")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0.1.0"

__all__ = ["__version__"]
