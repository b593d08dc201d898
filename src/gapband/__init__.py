"""gapband: probabilistic gap filling of multivariate monitoring time series.

The public API follows the data flow: :func:`read` a station file into a
Panel, :func:`inspect` its data capture and gaps, :func:`fill` its missing
cells with credible intervals and flags, :func:`run_holdout` to prove the
intervals' coverage on hidden observations, :func:`period_stats` for period
means, percentiles and exceedance counts with intervals, and
:func:`write_report` for the self-contained HTML report of a fill.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

from gapband.filling import fill
from gapband.holdout import run as run_holdout
from gapband.io import read
from gapband.panel import inspect
from gapband.stats import period_stats

try:
    __version__ = version("gapband")
except PackageNotFoundError:  # running from a source tree without install
    __version__ = "0+unknown"


def write_report(folder: str | Path, out: str | Path | None = None, **options) -> Path:
    """Write the HTML report of the fill in ``folder``; see :func:`gapband.report.write`.

    matplotlib and jinja2 are imported only when a report is made.
    """
    from gapband.report import write

    return write(folder, out, **options)


__all__ = ["__version__", "fill", "inspect", "period_stats", "read", "run_holdout",
           "write_report"]
