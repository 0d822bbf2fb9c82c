"""raytrace: weak-lensing maps, statistics and forecasts from N-body snapshot suites."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("raytrace")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

from .errors import RaytraceError

__all__ = ["RaytraceError", "__version__"]
