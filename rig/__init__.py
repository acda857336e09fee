"""discharge-rig: controller and analysis for a meter input-discharge test bench."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("discharge-rig")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+source"

__all__ = ["__version__"]
