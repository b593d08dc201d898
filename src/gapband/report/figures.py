"""The report's figures, drawn with matplotlib and embedded as base64 PNG data URIs.

Long records are down-sampled to at most :data:`MAX_COLUMNS` time bins so
a year of hourly data draws quickly and stays readable; each figure says so
in its caption when it happens.
"""

from __future__ import annotations

import base64
import io
from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")  # no display: figures are only written to memory

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import ListedColormap  # noqa: E402
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from gapband.flags import FLAG_MEANINGS  # noqa: E402
from gapband.report.palette import (  # noqa: E402
    BAND_SHADES,
    FLAG_COLOURS,
    GRID,
    LINES,
    MEDIAN_LINE,
    OBSERVED_POINT,
)

#: Most time bins a chart draws; longer records are binned.
MAX_COLUMNS = 1200
#: Steps of context shown either side of a zoomed gap, at least.
ZOOM_CONTEXT = 24
DPI = 96
#: Series ids are user text: never read "$...$" in them as mathematics.
STYLE = {"text.parse_math": False, "font.size": 9, "axes.grid": True, "grid.color": GRID,
         "grid.linewidth": 0.5, "axes.spines.top": False, "axes.spines.right": False}


def bins_of(n_time: int) -> int:
    """Steps per time bin so that at most :data:`MAX_COLUMNS` bins are drawn."""
    return max(1, -(-n_time // MAX_COLUMNS))


def png(fig: plt.Figure) -> str:
    """The figure as a ``data:image/png;base64`` URI (the figure is closed)."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def gap_map(flag: np.ndarray, series: Sequence[str], times: np.ndarray) -> str:
    """Series × time coloured by flag; a bin shows its most severe flag, so no gap vanishes."""
    width = bins_of(flag.shape[1])
    binned = _bin_reduce(flag.astype(float), width, np.maximum.reduceat)
    edges = times[::width]
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(9.5, 0.9 + 0.28 * len(series)))
        cmap = ListedColormap([FLAG_COLOURS[m] for m in FLAG_MEANINGS])
        ax.imshow(binned, aspect="auto", interpolation="nearest", cmap=cmap, vmin=-0.5,
                  vmax=len(FLAG_MEANINGS) - 0.5,
                  extent=(0, binned.shape[1], len(series) - 0.5, -0.5))
        ax.set_yticks(range(len(series)), [str(s) for s in series])
        _time_ticks(ax, edges, binned.shape[1])
        ax.grid(False)
        handles = [Patch(facecolor=FLAG_COLOURS[m], edgecolor="#555555",
                         label=m.replace("_", " ")) for m in FLAG_MEANINGS]
        ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=4,
                  frameon=False)
        return png(fig)


def filled_spans(series: str, values: dict[str, np.ndarray], times: np.ndarray,
                 levels: Sequence[str], zoom: slice | None, units: str) -> str:
    """The whole record (binned when long) and, when given, a zoom on the longest filled run.

    ``values`` holds 1-D arrays over time: ``value``, ``fill_median``,
    ``lower_<L>``/``upper_<L>`` (NaN where observed).
    """
    with plt.rc_context(STYLE):
        rows = 2 if zoom is not None else 1
        fig, axes = plt.subplots(rows, 1, figsize=(9.5, 2.4 * rows), squeeze=False)
        width = bins_of(times.size)
        _span_axes(axes[0, 0], values, times, levels, width)
        axes[0, 0].set_title(f"{series}: whole record" + (f" (bins of {width} steps)"
                                                           if width > 1 else ""), loc="left")
        if zoom is not None:
            part = {k: v[zoom] for k, v in values.items()}
            _span_axes(axes[1, 0], part, times[zoom], levels, 1)
            axes[1, 0].set_title(f"{series}: longest filled run with context", loc="left")
        for ax in axes[:, 0]:
            ax.set_ylabel(units)
        axes[0, 0].legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), frameon=False)
        fig.tight_layout()
        return png(fig)


def decomposition(series: str, parts: dict[str, np.ndarray], times: np.ndarray,
                  filled: np.ndarray, unit_label: str) -> str:
    """One panel per component (posterior means), with the filled stretches shaded."""
    width = bins_of(times.size)
    with plt.rc_context(STYLE):
        fig, axes = plt.subplots(len(parts), 1, figsize=(9.5, 1.2 * len(parts) + 0.6),
                                 sharex=True)
        x = times[::width]
        shade = _bin_reduce(filled[None, :].astype(float), width, np.maximum.reduceat)[0] > 0
        for ax, (name, path), (colour, dash, _) in zip(axes, parts.items(), LINES, strict=False):
            binned = _bin_mean(path, width)
            ax.fill_between(x, 0, 1, where=shade, step="post", color=FLAG_COLOURS["filled"],
                            alpha=0.45, linewidth=0, transform=ax.get_xaxis_transform())
            ax.plot(x, binned, color=colour, linestyle=dash, linewidth=1.0)
            ax.set_ylabel(name.replace("_", "-"), rotation=0, ha="right", va="center")
        _date_axis(axes[-1])
        axes[0].set_title(f"{series}: posterior-mean components ({unit_label}); shaded: filled"
                          + (f"; bins of {width} steps" if width > 1 else ""), loc="left")
        fig.tight_layout()
        return png(fig)


def reliability(coverage: dict[str, dict[str, float | None]]) -> str:
    """Nominal against empirical interval coverage per predictor, with the diagonal."""
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(4.2, 4.0))
        ax.plot([0, 100], [0, 100], color="#888888", linewidth=0.8, label="perfect calibration")
        for (name, by_level), (colour, dash, marker) in zip(coverage.items(), LINES, strict=False):
            pairs = [(float(k), 100 * v) for k, v in by_level.items() if v is not None]
            if pairs:
                x, y = zip(*pairs, strict=True)
                ax.plot(x, y, color=colour, linestyle=dash, marker=marker, label=name)
        ax.set(xlim=(0, 100), ylim=(0, 100), xlabel="nominal coverage (%)",
               ylabel="share of hidden values inside (%)")
        ax.legend(frameon=False, loc="upper left")
        return png(fig)


def pit(histograms: dict[str, list[int]]) -> str:
    """PIT histograms as densities (flat at 1 when calibrated)."""
    with plt.rc_context(STYLE):
        fig, ax = plt.subplots(figsize=(4.6, 3.4))
        n = len(histograms)
        for i, ((name, counts), (colour, _, _)) in enumerate(zip(histograms.items(), LINES,
                                                                strict=False)):
            counts = np.asarray(counts, dtype=float)
            bins = counts.size
            density = counts * bins / max(counts.sum(), 1)
            left = np.arange(bins) / bins + i / (bins * n)
            ax.bar(left, density, width=1 / (bins * n), align="edge", color=colour,
                   edgecolor="#222222", linewidth=0.4, hatch=["", "//", "..", "xx"][i % 4],
                   label=name)
        ax.axhline(1.0, color="#888888", linewidth=0.8)
        ax.set(xlim=(0, 1), xlabel="PIT value", ylabel="density")
        ax.legend(frameon=False)
        return png(fig)


def score_bars(scores: dict[str, dict[str, float | None]], units: str = "") -> str:
    """CRPS and MAE per predictor, side by side (smaller is better), in ``units``."""
    names = list(scores)
    with plt.rc_context(STYLE):
        fig, axes = plt.subplots(1, 2, figsize=(7.5, 2.8))
        for ax, metric in zip(axes, ("crps", "mae"), strict=True):
            heights = [scores[n][metric] for n in names]
            shown = [(n, h) for n, h in zip(names, heights, strict=True) if h is not None]
            if shown:
                labels, values = zip(*shown, strict=True)
                ax.barh(labels, values, color=[LINES[names.index(n) % 4][0] for n in labels],
                        edgecolor="#222222", linewidth=0.4)
            ax.invert_yaxis()
            ax.set_title(f"{metric.upper()} ({units or 'data units'})", loc="left")
        fig.tight_layout()
        return png(fig)


def _span_axes(ax: plt.Axes, values: dict[str, np.ndarray], times: np.ndarray,
               levels: Sequence[str], width: int) -> None:
    x = times[::width]
    shades = BAND_SHADES[-len(levels):] if len(levels) <= len(BAND_SHADES) else BAND_SHADES
    for level, shade in zip(sorted(levels, key=float, reverse=True), shades, strict=False):
        lower = _bin_reduce(values[f"lower_{level}"][None, :], width, _nan_min)[0]
        upper = _bin_reduce(values[f"upper_{level}"][None, :], width, _nan_max)[0]
        ax.fill_between(x, lower, upper, color=shade, linewidth=0,
                        label=f"{level.replace('_', '.')} % interval")
    ax.plot(x, _bin_mean(values["fill_median"], width), color=MEDIAN_LINE, linewidth=1.1,
            label="filled (median)")
    ax.plot(x, _bin_mean(values["value"], width), linestyle="none", marker=".",
            markersize=2.5, color=OBSERVED_POINT, label="observed")
    _date_axis(ax)


def _date_axis(ax: plt.Axes) -> None:
    locator = AutoDateLocator(maxticks=8)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))


def _time_ticks(ax: plt.Axes, edges: np.ndarray, n_bins: int) -> None:
    where = np.linspace(0, n_bins - 1, min(6, n_bins)).round().astype(int)
    ax.set_xticks(where + 0.5, [np.datetime_as_string(edges[i], unit="D") for i in where])


def _bin_mean(x: np.ndarray, width: int) -> np.ndarray:
    total = _bin_reduce(np.where(np.isnan(x), 0.0, x)[None, :], width, np.add.reduceat)[0]
    count = _bin_reduce((~np.isnan(x))[None, :].astype(float), width, np.add.reduceat)[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / count, np.nan)


def _bin_reduce(x: np.ndarray, width: int, reduce) -> np.ndarray:
    return x if width == 1 else reduce(x, np.arange(0, x.shape[1], width), axis=1)


def _nan_min(x: np.ndarray, starts: np.ndarray, axis: int) -> np.ndarray:
    top = np.minimum.reduceat(np.where(np.isnan(x), np.inf, x), starts, axis=axis)
    return np.where(np.isinf(top), np.nan, top)


def _nan_max(x: np.ndarray, starts: np.ndarray, axis: int) -> np.ndarray:
    top = np.maximum.reduceat(np.where(np.isnan(x), -np.inf, x), starts, axis=axis)
    return np.where(np.isinf(top), np.nan, top)
