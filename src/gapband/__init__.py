"""gapband: probabilistic gap filling of multivariate monitoring time series.

The public API follows the data flow: :func:`read` a station file into a
Panel, :func:`inspect` its data capture and gaps, :func:`fill` its missing
cells with credible intervals and flags.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version

from gapband.filling import fill
from gapband.io import read
from gapband.panel import inspect

try:
    __version__ = version("gapband")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0+unknown"

__all__ = ["__version__", "fill", "inspect", "read"]
