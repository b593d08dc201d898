"""The Panel: validation, the regular time grid, data capture and gap runs.

A Panel is an :class:`xarray.Dataset` with dims ``("series", "time")``, one
variable ``value`` (float64, NaN = missing), string ``series`` ids, a regular
``time`` grid (datetime64, UTC when the input carried a zone) and attrs
``step`` (a pandas frequency string such as ``"h"``, ``"30min"``, ``"D"`` or
``"MS"``) and ``source`` (where it was read from).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import DuplicateError, InputError, TimestampError, UsageError

#: Upper edges (inclusive, in grid steps) of the gap-length histogram bins.
GAP_BINS: tuple[tuple[str, int, float], ...] = (
    ("1", 1, 1),
    ("2-6", 2, 6),
    ("7-24", 7, 24),
    ("25-168", 25, 168),
    (">168", 169, np.inf),
)

_DAY = pd.Timedelta("1D")
_MEAN_MONTH = pd.Timedelta(days=365.2425 / 12)


@dataclass(frozen=True)
class Alignment:
    """What the alignment did to the input, reported to the user."""

    step: str
    n_rows: int
    n_grid_added: int
    n_duplicates_merged: int
    n_snapped: int
    empty_series: tuple[str, ...]


def step_of(panel: xr.Dataset) -> pd.Timedelta:
    """Return the nominal duration of one grid step (a month counts 30.44 days)."""
    return nominal_step(panel.attrs["step"])


def fixed_duration(offset: pd.DateOffset) -> pd.Timedelta | None:
    """The duration of a fixed-length offset (hours, days...), None for calendar ones."""
    # pandas 3 no longer counts Day as a Tick, but a grid day is 24 hours here.
    if isinstance(offset, pd.offsets.Day):
        return pd.Timedelta(days=offset.n)
    if isinstance(offset, pd.offsets.Tick):
        return pd.Timedelta(offset.nanos)
    return None


def nominal_step(step: str) -> pd.Timedelta:
    """Nominal duration of a pandas frequency string."""
    offset = pd.tseries.frequencies.to_offset(step)
    fixed = fixed_duration(offset)
    if fixed is not None:
        return fixed
    if isinstance(offset, pd.offsets.MonthBegin | pd.offsets.MonthEnd):
        return _MEAN_MONTH * offset.n
    raise InputError(f"unsupported time step {step!r}: use a fixed step or month starts")


def check_step(step: str) -> str:
    """Return ``step`` if the grid can use it: a fixed step or month starts.

    Raises
    ------
    UsageError
        ``step`` is not a pandas frequency, or one the grid cannot follow
        (weeks, month ends, every second month...).
    """
    try:
        offset = pd.tseries.frequencies.to_offset(step)
    except (TypeError, ValueError):
        raise UsageError(
            f"time step {step!r} is not a frequency; use e.g. 'h', '30min', 'D' or 'MS'"
        ) from None
    duration = fixed_duration(offset)
    fixed = duration is not None and duration > pd.Timedelta(0)
    if not (fixed or (isinstance(offset, pd.offsets.MonthBegin) and offset.n == 1)):
        raise UsageError(
            f"unsupported time step {step!r}: use a fixed step ('h', '30min', 'D') or "
            "month starts ('MS')"
        )
    return step


def check_snap(snap: str) -> pd.Timedelta:
    """Parse a snapping tolerance such as ``"5min"``.

    Raises
    ------
    UsageError
        ``snap`` is not a non-negative duration.
    """
    try:
        tolerance = pd.Timedelta(snap)
    except (TypeError, ValueError):
        tolerance = pd.NaT
    if pd.isna(tolerance) or tolerance < pd.Timedelta(0):
        raise UsageError(f"snapping tolerance {snap!r} is not a duration; use e.g. '5min'")
    return tolerance


def make_panel(
    values: np.ndarray,
    series: Iterable[str],
    time: pd.DatetimeIndex,
    step: str,
    *,
    source: str = "<memory>",
    units: str | None = None,
    attrs: dict | None = None,
) -> xr.Dataset:
    """Build a Panel from a ``(series, time)`` array on a regular grid.

    Parameters
    ----------
    values : ndarray, shape (series, time)
        Observations; NaN marks a missing cell.
    series : iterable of str
        Series ids, unique.
    time : DatetimeIndex
        The regular grid, one entry per column of ``values``.
    step : str
        Pandas frequency string of the grid.
    source, units, attrs
        Provenance and CF attributes kept on the Panel.
    """
    values = np.asarray(values, dtype="float64")
    ds = xr.Dataset(
        {"value": (("series", "time"), values)},
        coords={"series": np.asarray(list(series), dtype=object).astype(str), "time": time},
        attrs={"step": step, "source": source, **(attrs or {})},
    )
    ds["value"].attrs["long_name"] = "observed value"
    if units:
        ds["value"].attrs["units"] = units
    return ds


def infer_step(times: pd.DatetimeIndex, source: str = "input") -> str:
    """Infer the grid step: the most common difference between sorted unique times."""
    # asi8 counts in the index's own unit (pandas 3 often parses to us or s).
    uniq = pd.DatetimeIndex(times).unique().sort_values().as_unit("ns")
    if len(uniq) < 2:
        raise InputError(
            f"{source}: only one distinct time step ({uniq[0] if len(uniq) else 'none'}); "
            "gap filling needs a time series with at least two time steps"
        )
    diffs = pd.Series(np.diff(uniq.asi8))
    common = pd.Timedelta(int(diffs.mode().min()))
    if pd.Timedelta(days=28) <= common <= pd.Timedelta(days=31):
        on_month_start = (uniq.day == 1) & (uniq.normalize() == uniq)
        if on_month_start.all():
            return "MS"
    if common % _DAY == pd.Timedelta(0):
        # pandas 3 spells a Timedelta of one day "24h"; users (and DESIGN) say "D".
        days = common // _DAY
        return "D" if days == 1 else f"{days}D"
    return pd.tseries.frequencies.to_offset(common).freqstr


def from_long(
    table: pd.DataFrame,
    *,
    source: str,
    step: str | None = None,
    duplicates: Literal["error", "mean"] = "error",
    snap: str | None = None,
    units: str | None = None,
    attrs: dict | None = None,
) -> tuple[xr.Dataset, Alignment]:
    """Align a long table onto a regular grid and return the Panel.

    Parameters
    ----------
    table : DataFrame
        Columns ``time`` (datetime64, naive), ``series`` (str), ``value``
        (float64, NaN = missing) and ``where`` (text locating each row in
        the source, such as ``"line 12"``, used in messages).
    source : str
        File name used in messages.
    step : str, optional
        Grid step as a pandas frequency; inferred (most common difference)
        when not given.
    duplicates : {"error", "mean"}
        What to do with repeated (time, series) pairs.
    snap : str, optional
        Tolerance (a duration such as ``"5min"``) within which off-grid
        timestamps are moved to the nearest grid point; off-grid timestamps
        are an error without it.

    Raises
    ------
    DuplicateError, TimestampError, InputError
    UsageError
        ``step``, ``snap`` or ``duplicates`` has an invalid value.
    """
    if duplicates not in ("error", "mean"):
        raise UsageError(f"duplicates={duplicates!r}: use 'error' or 'mean'")
    if snap is not None:
        check_snap(snap)
    if table.empty:
        raise InputError(f"{source}: no data rows; the file holds only a header or nothing")
    n_rows = len(table)
    # One time unit throughout: the grid arithmetic below counts nanoseconds.
    table = table.assign(time=pd.DatetimeIndex(table["time"]).as_unit("ns"))
    step = check_step(step) if step else infer_step(pd.DatetimeIndex(table["time"]), source)
    table, n_snapped = _snap_to_grid(table, step, snap, source)
    table, n_merged = _resolve_duplicates(table, duplicates, source)

    series = pd.Index(pd.unique(table["series"]))
    start, end = table["time"].min(), table["time"].max()
    grid = pd.date_range(start, end, freq=step)
    wide = table.pivot(index="series", columns="time", values="value")
    wide = wide.reindex(index=series, columns=grid)
    n_added = len(grid) - table["time"].nunique()

    if len(grid) < 2:
        raise InputError(
            f"{source}: all rows fall on one time step ({start}); "
            "gap filling needs at least two time steps"
        )
    panel = make_panel(
        wide.to_numpy(dtype="float64"), series, grid, step,
        source=source, units=units, attrs=attrs,
    )
    observed = panel["value"].notnull().sum("time")
    empty = tuple(str(s) for s in panel["series"].values[observed.values == 0])
    report = Alignment(
        step=step,
        n_rows=n_rows,
        n_grid_added=int(n_added),
        n_duplicates_merged=n_merged,
        n_snapped=n_snapped,
        empty_series=empty,
    )
    panel.attrs["alignment"] = _alignment_text(report)
    return panel, report


def _alignment_text(report: Alignment) -> str:
    parts = [f"step {report.step}", f"{report.n_rows} rows"]
    if report.n_grid_added:
        parts.append(f"{report.n_grid_added} absent time steps added as missing")
    if report.n_duplicates_merged:
        parts.append(f"{report.n_duplicates_merged} duplicate rows averaged")
    if report.n_snapped:
        parts.append(f"{report.n_snapped} timestamps snapped to the grid")
    if report.empty_series:
        parts.append(f"series with no observation: {', '.join(report.empty_series)}")
    return "; ".join(parts)


def _snap_to_grid(
    table: pd.DataFrame, step: str, snap: str | None, source: str
) -> tuple[pd.DataFrame, int]:
    times = pd.DatetimeIndex(table["time"])
    fixed = fixed_duration(pd.tseries.frequencies.to_offset(step))
    if fixed is not None:
        width = fixed.value
        # Anchor the grid on the most common phase, so that an off-grid first
        # timestamp cannot shift the whole grid.
        phase = (times.asi8 - times.min().value) % width
        origin = times.min().value + int(pd.Series(phase).mode().min())
        rel = times.asi8 - origin
        nearest = origin + np.round(rel / width).astype("int64") * width
        on_grid = pd.DatetimeIndex(nearest)
    else:  # month starts: the nearest month start
        floor = times.to_period("M").to_timestamp()
        ceil = (times.to_period("M") + 1).to_timestamp()
        on_grid = pd.DatetimeIndex(
            np.where((times - floor) <= (ceil - times), floor, ceil)
        )
    off = np.asarray(on_grid != times)
    if not off.any():
        return table, 0
    distance = np.abs(np.asarray(on_grid - times))
    tolerance = pd.Timedelta(snap) if snap else None
    too_far = off if tolerance is None else distance > tolerance.to_timedelta64()
    if too_far.any():
        i = int(np.flatnonzero(too_far)[0])
        row = table.iloc[i]
        hint = (
            f"widen the snapping tolerance (now {snap})"
            if snap
            else "pass a snapping tolerance (--snap, e.g. '5min') to move such timestamps "
            "to the nearest grid point, or give --step"
        )
        raise TimestampError(
            f"{source}, {row['where']}: timestamp {row['time']} is off the {step} grid "
            f"({int(too_far.sum())} such rows); {hint}"
        )
    table = table.copy()
    table["time"] = np.asarray(on_grid)
    return table, int(off.sum())


def _resolve_duplicates(
    table: pd.DataFrame, duplicates: str, source: str
) -> tuple[pd.DataFrame, int]:
    dup = table.duplicated(["time", "series"], keep=False)
    if not dup.any():
        return table, 0
    if duplicates == "error":
        first = table[dup].sort_values(["series", "time"], kind="stable").head(6)
        listed = "; ".join(
            f"{r.where}: series {r.series!r} at {r.time}" for r in first.itertuples()
        )
        raise DuplicateError(
            f"{source}: {int(dup.sum())} rows repeat a (time, series) pair, first: {listed}. "
            "Remove the repeats, or pass --duplicates mean to average them"
        )
    # Average the observed values of a repeated pair; a pair with only missing
    # values stays missing, and copies of one value keep it bit for bit.
    with np.errstate(over="ignore"):  # an overflowing sum is replaced just below
        merged = table.assign(half=table["value"] * 0.5).groupby(
            ["time", "series"], sort=False, as_index=False
        ).agg(value=("value", "mean"), half=("half", "mean"), low=("value", "min"),
              high=("value", "max"), where=("where", "first"))
    # Near the float64 limit the sum overflows; the mean of halves does not.
    mean = merged["value"].where(np.isfinite(merged["value"]), 2.0 * merged["half"])
    merged["value"] = mean.where(merged["low"] != merged["high"], merged["low"])
    merged = merged.drop(columns=["half", "low", "high"])
    return merged, int(dup.sum() - table[dup].drop_duplicates(["time", "series"]).shape[0])


def run_lengths(missing: np.ndarray) -> np.ndarray:
    """Length of the missing run each cell sits in (0 for observed cells).

    Parameters
    ----------
    missing : ndarray of bool, shape (series, time)

    Returns
    -------
    ndarray of int, shape (series, time)
    """
    missing = np.asarray(missing, dtype=bool)
    out = np.zeros(missing.shape, dtype="int64")
    for s, start, length in gap_runs(missing):
        out[s, start : start + length] = length
    return out


def gap_runs(missing: np.ndarray) -> list[tuple[int, int, int]]:
    """All runs of missing cells as ``(series index, start index, length)``."""
    missing = np.atleast_2d(np.asarray(missing, dtype=bool))
    padded = np.pad(missing.astype("int8"), ((0, 0), (1, 1)))
    edges = np.diff(padded, axis=1)
    runs = []
    for s in range(missing.shape[0]):
        starts = np.flatnonzero(edges[s] == 1)
        ends = np.flatnonzero(edges[s] == -1)
        runs.extend((s, int(a), int(b - a)) for a, b in zip(starts, ends, strict=True))
    return runs


def capture(panel: xr.Dataset) -> xr.DataArray:
    """Data capture per series in percent: observed steps / expected steps × 100."""
    return 100.0 * panel["value"].notnull().mean("time")


def inspect(panel: xr.Dataset, capture_threshold: float = 90.0) -> dict:
    """Data capture and gap statistics per series and overall.

    Parameters
    ----------
    panel : Dataset
        A Panel.
    capture_threshold : float
        Minimum data capture in percent a series must reach to be marked as
        meeting it.

    Returns
    -------
    dict
        ``{"source", "step", "start", "end", "capture_threshold", "overall",
        "series": [...]}``, JSON-ready. Per series: expected, observed,
        capture_pct, meets_threshold, n_gaps, longest_gap_steps,
        longest_gap_duration, gap_histogram, first_observation,
        last_observation.
    """
    if not 0 <= capture_threshold <= 100:
        raise UsageError(f"capture threshold {capture_threshold!r} is not a percentage (0-100)")
    missing = panel["value"].isnull().values
    times = pd.DatetimeIndex(panel["time"].values)
    step = step_of(panel)
    runs = gap_runs(missing)
    # One pass over the runs, not one per series: networks have many of both.
    lengths_of: list[list[int]] = [[] for _ in range(missing.shape[0])]
    for s, _, length in runs:
        lengths_of[s].append(length)
    rows = [
        _series_stats(str(name), ~missing[i], np.array(lengths_of[i], dtype="int64"), times,
                      step, capture_threshold)
        for i, name in enumerate(panel["series"].values)
    ]
    all_lengths = np.array([n for _, _, n in runs], dtype="int64")
    expected = int(missing.size)
    observed = int((~missing).sum())
    overall = {
        "series": len(rows),
        "expected": expected,
        "observed": observed,
        "capture_pct": round(100.0 * observed / expected, 2),
        "series_meeting_threshold": sum(r["meets_threshold"] for r in rows),
        "n_gaps": int(all_lengths.size),
        "longest_gap_steps": int(all_lengths.max(initial=0)),
        "gap_histogram": _histogram(all_lengths),
    }
    return {
        "source": panel.attrs.get("source"),
        "step": panel.attrs["step"],
        "start": times[0].isoformat(),
        "end": times[-1].isoformat(),
        "capture_threshold": capture_threshold,
        "overall": overall,
        "series": rows,
    }


def _series_stats(
    name: str,
    observed: np.ndarray,
    gap_lengths: np.ndarray,
    times: pd.DatetimeIndex,
    step: pd.Timedelta,
    threshold: float,
) -> dict:
    n_obs = int(observed.sum())
    capture_pct = 100.0 * n_obs / observed.size
    longest = int(gap_lengths.max(initial=0))
    where = np.flatnonzero(observed)
    return {
        "series": name,
        "expected": int(observed.size),
        "observed": n_obs,
        "capture_pct": round(capture_pct, 2),
        "meets_threshold": bool(capture_pct >= threshold),
        "n_gaps": int(gap_lengths.size),
        "longest_gap_steps": longest,
        "longest_gap_duration": _duration_text(longest * step),
        "gap_histogram": _histogram(gap_lengths),
        "first_observation": times[where[0]].isoformat() if where.size else None,
        "last_observation": times[where[-1]].isoformat() if where.size else None,
    }


def _histogram(lengths: np.ndarray) -> dict[str, int]:
    return {
        label: int(((lengths >= lo) & (lengths <= hi)).sum()) for label, lo, hi in GAP_BINS
    }


def _duration_text(duration: pd.Timedelta) -> str:
    """A readable duration: '0', '3h', '2d 4h', '45min'."""
    if duration == pd.Timedelta(0):
        return "0"
    days, rest = divmod(duration, _DAY)
    hours, rest = divmod(rest, pd.Timedelta("1h"))
    minutes = rest // pd.Timedelta("1min")
    parts = [f"{days}d" if days else "", f"{hours}h" if hours else "",
             f"{minutes}min" if minutes else ""]
    return " ".join(p for p in parts if p)
