"""topoclass: sort micrographs of self-organised hexagonal patterns by kind and amount of disorder.

Pipeline (one module per stage, data flows one way)::

    images -> sites -> persistence / order -> vectorize -> features -> model -> scoring -> report
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("topoclass")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0.0.0+unknown"

from topoclass.errors import TopoclassError

__all__ = ["TopoclassError", "__version__"]
