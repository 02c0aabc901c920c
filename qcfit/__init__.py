"""qcfit: shift-by-shift monitor of defect-category mix and defect rate per production line.

The public Python API is re-exported here; ``__all__`` is pinned by a test.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("qcfit")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

__all__ = ["__version__"]
