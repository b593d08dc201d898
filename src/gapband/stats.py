"""Period statistics with credible intervals: means, percentiles, exceedance counts.

Each joint draw kept by ``fill`` (``fill_draws``) completes every series:
observed cells keep their values, filled cells take the draw's values, cells
not filled stay empty. A statistic (a period mean, a percentile, a count of
exceedances) is computed from every completed draw, and its median and
central credible interval over the draws are reported, so the interval
carries the uncertainty of the filled cells and nothing else: with no
missing cells every draw is the same and the interval has zero width.

Beside each estimate: the figure from observed values alone, the data
capture of the period, whether the period is valid by a capture rule
evaluated on observed values only, and the share of the statistic that comes
from filled cells (see docs/stats.md for each statistic's definition).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import flags, outputs
from gapband.errors import InputError, UsageError
from gapband.panel import fixed_duration, step_of

Period = Literal["day", "month", "year"]
Over = Literal["step", "day-mean", "day-max"]
PERIODS: dict[str, str] = {"day": "D", "month": "M", "year": "Y"}
OVERS: tuple[str, ...] = ("step", "day-mean", "day-max")
#: Shortest calendar length of each period: a record shorter than this holds none.
_SHORTEST = {"day": pd.Timedelta(days=1), "month": pd.Timedelta(days=28),
             "year": pd.Timedelta(days=365)}
#: Longest calendar length of each period: a grid step longer than this is refused.
_LONGEST = {"day": pd.Timedelta(days=1), "month": pd.Timedelta(days=31),
            "year": pd.Timedelta(days=366)}
_DAY = pd.Timedelta(days=1)

#: Default validity rule, percent of a period's expected steps observed: 75 %
#: is 18 of 24 hourly values, the rule for 24-hour averages in US 40 CFR
#: Part 50, Appendix N, section 3.0(c).
DEFAULT_MIN_CAPTURE = 75.0
DEFAULT_LEVEL = 90.0


@dataclass(frozen=True)
class Statistic:
    """One statistic asked for: a mean, a percentile, or a count of exceedances."""

    kind: Literal["mean", "percentile", "exceedances"]
    percentile: float | None = None
    threshold: float | None = None
    over: Over | None = None

    @property
    def label(self) -> str:
        """A short unique name, e.g. ``mean``, ``p98``, ``day-mean > 50``."""
        if self.kind == "mean":
            return "mean"
        if self.kind == "percentile":
            return f"p{self.percentile:g}"
        return f"{self.over} > {self.threshold:g}"


def period_stats(
    result: xr.Dataset,
    *,
    period: Period = "month",
    mean: bool = False,
    percentiles: Sequence[float] = (),
    exceed: Sequence[float | str] = (),
    over: Over = "day-mean",
    min_capture: float | str = DEFAULT_MIN_CAPTURE,
    level: float = DEFAULT_LEVEL,
) -> xr.Dataset:
    """Statistics per series and calendar period, from every joint draw of a fill.

    Parameters
    ----------
    result : Dataset
        A fill result (:func:`gapband.fill`, or ``filled.nc`` read back):
        ``value`` and ``fill_flag`` dims (series, time), and ``fill_draws``
        dims (fill_draw, missing_cell) whenever a cell was filled.
    period : {"day", "month", "year"}
        Calendar periods (UTC when the input carried zones).
    mean : bool
        The period mean. The default when nothing else is asked for.
    percentiles : sequence of float
        Percentiles in (0, 100] of the period's values (linear interpolation
        between order statistics, numpy's and pandas' default).
    exceed : sequence of float
        Limit values: count the ``over`` values in the period greater than each.
    over : {"step", "day-mean", "day-max"}
        What an exceedance counts: single time steps, or days by their mean
        or maximum (days of the completed series; a day whose values are all
        missing and unfilled does not count).
    min_capture : float or "a/b"
        Validity rule: a period (and, for day aggregates, a day) is valid
        when at least this percentage of its expected time steps is
        observed; "18/24" means 18 of 24. Evaluated on observed values only.
    level : float
        Central credible interval level in percent.

    Returns
    -------
    Dataset
        Dims ("statistic", "series", "period"): ``estimate`` (median over
        draws), ``lower``, ``upper``, ``measured`` (from observed values
        alone; exceedances count valid days only), ``valid``, ``filled_share``;
        dims ("series", "period"): ``n_expected``, ``n_observed``,
        ``n_filled``, ``capture_pct``, ``with_fills_pct``, ``in_record_pct``.
        Coordinates ``period`` (start) and ``period_end`` (exclusive).

    Raises
    ------
    UsageError
        Unknown period or ``over``, a threshold that is not a number, a
        percentile or level out of range, a record shorter than one period,
        a period shorter than the grid step.
    InputError
        ``result`` is not a fill, or holds filled cells without joint draws.
    """
    statistics = _statistics(mean, percentiles, exceed, over)
    rule = parse_min_capture(min_capture)
    if not (isinstance(level, int | float) and 0 < level < 100):
        raise UsageError(f"--level {level!r} must be a percentage strictly between 0 and 100")
    _check_result(result)
    times = pd.DatetimeIndex(result["time"].values)
    grid = Grid(times, result.attrs.get("step", ""), period, result)
    any_day = any(s.over in ("day-mean", "day-max") for s in statistics)
    if any_day and step_of(result) > _DAY:
        raise UsageError(f"--over day-mean and day-max need steps of a day or less; the grid "
                         f"step is {result.attrs['step']!r}: use --over step")
    days = Grid(times, result.attrs["step"], "day", result) if any_day else None

    value = result["value"].transpose("series", "time").values
    flag = result["fill_flag"].transpose("series", "time").values
    complete = _completed(result, value, flag)
    filled = (flag == flags.FILLED) | (flag == flags.FILLED_UNCERTAIN)
    observed = ~np.isnan(value)
    n_series, n_periods = value.shape[0], grid.starts.size
    shape = (len(statistics), n_series, n_periods)
    out = {name: np.full(shape, np.nan) for name in ("estimate", "lower", "upper", "measured",
                                                       "filled_share")}
    valid = np.zeros(shape, dtype=bool)
    n_observed = grid.count(observed)
    n_filled = grid.count(filled)
    period_valid = grid.valid(n_observed, rule)
    probs = (0.5, 0.5 - level / 200, 0.5 + level / 200)
    for n in range(n_series):
        draws = complete(n)
        for i, stat in enumerate(statistics):
            per_draw, share, measured = _compute(stat, draws, value[n], filled[n], grid, days,
                                                 rule)
            with np.errstate(all="ignore"):
                q = np.quantile(per_draw, probs, axis=0)
            out["estimate"][i, n], out["lower"][i, n], out["upper"][i, n] = q
            out["filled_share"][i, n] = share
            out["measured"][i, n] = measured
            valid[i, n] = period_valid[n]
    expected = np.broadcast_to(grid.expected, (n_series, n_periods))
    units = result["value"].attrs.get("units")
    dims3, dims2 = ("statistic", "series", "period"), ("series", "period")
    data = {name: (dims3, array) for name, array in out.items()} | {
        "valid": (dims3, valid),
        "n_expected": (dims2, expected.astype("int64")),
        "n_observed": (dims2, n_observed),
        "n_filled": (dims2, n_filled),
        "capture_pct": (dims2, 100.0 * n_observed / expected),
        "with_fills_pct": (dims2, 100.0 * (n_observed + n_filled) / expected),
        "in_record_pct": (dims2, np.broadcast_to(100.0 * grid.in_record / grid.expected,
                                                 (n_series, n_periods))),
    }
    return xr.Dataset(
        data,
        coords={"statistic": [s.label for s in statistics], "series": result["series"].values,
                "period": grid.starts, "period_end": ("period", grid.ends)},
        attrs={"source": result.attrs.get("source", ""),
               "input_sha256": result.attrs.get("input_sha256", ""),
               "method": result.attrs.get("gapband_method", ""),
               "seed": int(result.attrs.get("gapband_seed", -1)),
               "calibrated_cells": "gapband_calibration" in result.attrs,
               "period": period, "level": float(level), "min_capture_pct": rule,
               "draws": int(result.sizes.get("fill_draw", 0)), "units": units or "",
               "kinds": [s.kind for s in statistics],
               "percentiles": [s.percentile for s in statistics],
               "thresholds": [s.threshold for s in statistics],
               "overs": [s.over for s in statistics]},
    )


def table(stats: xr.Dataset) -> pd.DataFrame:
    """The statistics as a long table, one row per series, period and statistic.

    Columns: ``series, period_start, period_end, statistic, kind, percentile,
    threshold, over, estimate, lower_<L>, upper_<L>, measured, valid,
    capture_pct, with_fills_pct, in_record_pct, filled_share, n_expected,
    n_observed, n_filled, units``.
    """
    level = f"{stats.attrs['level']:g}".replace(".", "_")
    frames = []
    for i, label in enumerate(stats["statistic"].values):
        one = stats.isel(statistic=i)
        frame = pd.DataFrame({
            "series": np.repeat(stats["series"].values.astype(str), stats.sizes["period"]),
            "period_start": np.tile(stats["period"].values, stats.sizes["series"]),
            "period_end": np.tile(stats["period_end"].values, stats.sizes["series"]),
            "statistic": label,
            "kind": stats.attrs["kinds"][i],
            "percentile": stats.attrs["percentiles"][i],
            "threshold": stats.attrs["thresholds"][i],
            "over": stats.attrs["overs"][i],
            "estimate": one["estimate"].values.ravel(),
            f"lower_{level}": one["lower"].values.ravel(),
            f"upper_{level}": one["upper"].values.ravel(),
            "measured": one["measured"].values.ravel(),
            "valid": one["valid"].values.ravel(),
            **{name: one[name].values.ravel() for name in (
                "capture_pct", "with_fills_pct", "in_record_pct", "filled_share",
                "n_expected", "n_observed", "n_filled")},
            "units": stats.attrs["units"],
        })
        frames.append(frame)
    rows = pd.concat(frames, ignore_index=True)
    # Series keep the Panel's order; within a series, periods in time order.
    order = pd.Categorical(rows["series"], categories=stats["series"].values.astype(str))
    return (rows.assign(_order=order).sort_values(["_order", "period_start"], kind="stable")
            .drop(columns="_order").reset_index(drop=True))


def write(stats: xr.Dataset, out_dir: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write ``stats-<period>.csv`` and ``stats-<period>.json`` into ``out_dir`` atomically.

    The CSV is :func:`table`; the JSON holds the settings, the rule in words,
    the cautions and the same rows.

    Raises
    ------
    UsageError
        The files exist and ``overwrite`` is False.
    """
    names = [f"stats-{stats.attrs['period']}.csv", f"stats-{stats.attrs['period']}.json"]
    folder = outputs.prepare_dir(out_dir, names, overwrite)
    rows = table(stats)
    with outputs.atomic_path(folder / names[0]) as tmp:
        rows.to_csv(tmp, index=False, na_rep="", lineterminator="\n",
                    date_format="%Y-%m-%dT%H:%M:%S")
    outputs.write_json(document(stats, rows), folder / names[1])
    return [folder / name for name in names]


def document(stats: xr.Dataset, rows: pd.DataFrame) -> dict:
    """The JSON form of the statistics: settings, rule, cautions and rows."""
    attrs = stats.attrs
    return {
        "format": "gapband stats",
        "format_version": 1,
        "source": attrs["source"],
        "input_sha256": attrs["input_sha256"],
        "method": attrs["method"],
        "seed": attrs["seed"],
        "period": attrs["period"],
        "level": attrs["level"],
        "draws": attrs["draws"],
        "units": attrs["units"],
        "validity_rule": rule_text(attrs["min_capture_pct"], attrs["period"]),
        "min_capture_pct": attrs["min_capture_pct"],
        "notes": [
            "estimate, lower and upper are the median and central credible interval over "
            "the joint draws kept by gapband fill; observed cells are fixed in every draw",
            "measured is the same statistic from observed values alone",
            *(["the fill's cell intervals were widened by --calibration; the joint draws and "
               "so these intervals are not"] if attrs["calibrated_cells"] else []),
            "filled values are estimates, not measurements: whether they may count toward "
            "data capture or a reported statistic is for the local regulator's rules to decide",
        ],
        "rows": rows.to_dict(orient="records"),
    }


def rule_text(min_capture_pct: float, period: str) -> str:
    """The validity rule in words, citing its source when it is the 18-of-24 rule."""
    text = (f"a {period} (and, for day aggregates, a day) is valid when at least "
            f"{min_capture_pct:g} % of its expected time steps are observed; filled cells "
            "do not count toward validity")
    if math.isclose(min_capture_pct, 75.0):
        text += ("; 75 % of an hourly day is 18 of 24 values, the rule for 24-hour averages "
                 "in US 40 CFR Part 50, Appendix N, section 3.0(c)")
    return text


def parse_min_capture(given: float | str) -> float:
    """A validity rule as a percentage: ``75``, ``"75"`` or ``"18/24"``.

    Raises
    ------
    UsageError
        Not a number or fraction in [0, 100] %.
    """
    text = str(given).strip()
    try:
        if "/" in text:
            part, whole = (float(x) for x in text.split("/"))
            pct = 100.0 * part / whole
        else:
            pct = float(text)
    except (ValueError, ZeroDivisionError):
        pct = math.nan
    if isinstance(given, bool) or not (0 <= pct <= 100):
        raise UsageError(f"--min-capture {given!r} must be a percentage in 0-100 (e.g. 75) "
                         "or a fraction of steps such as 18/24")
    return pct


def parse_threshold(given: float | str) -> float:
    """An exceedance threshold as a finite number.

    Raises
    ------
    UsageError
        Not a finite number.
    """
    try:
        number = float(given) if not isinstance(given, bool) else math.nan
    except (TypeError, ValueError):
        number = math.nan
    if not math.isfinite(number):
        raise UsageError(f"--exceed {given!r} is not a number; give the limit value in the "
                         "data's units, e.g. --exceed 50")
    return number


class Grid:
    """The calendar periods a regular time grid falls into.

    ``starts``/``ends``: each period's bounds (end exclusive); ``first``: the
    index of its first time step in the record; ``in_record``: its steps in
    the record; ``expected``: its steps in a whole calendar period.
    """

    def __init__(self, times: pd.DatetimeIndex, step: str, period: str,
                 result: xr.Dataset) -> None:
        if period not in PERIODS:
            raise UsageError(f"--period {period!r} is not one of {', '.join(PERIODS)}")
        span = times[-1] - times[0] + step_of(result)
        if span < _SHORTEST[period]:
            raise UsageError(
                f"--period {period} is longer than the data ({times[0]:%Y-%m-%d %H:%M} to "
                f"{times[-1]:%Y-%m-%d %H:%M}, {span / _DAY:.1f} days); choose a shorter period"
            )
        if step_of(result) > _LONGEST[period]:
            raise UsageError(f"--period {period} is shorter than the grid step {step!r}; "
                             "choose a longer period")
        labels = times.to_period(PERIODS[period])
        codes, first = np.unique(labels.asi8, return_index=True)
        periods = pd.PeriodIndex.from_ordinals(codes, freq=labels.freq)
        self.starts = periods.start_time.values
        self.ends = (periods + 1).start_time.values
        self.first = first
        self.in_record = np.diff(np.append(first, times.size))
        self.expected = _expected_steps(times, step, self.starts, self.ends)

    def count(self, mask: np.ndarray) -> np.ndarray:
        """Cells of ``mask`` (series, time) in each period: (series, period)."""
        return np.add.reduceat(mask.astype("int64"), self.first, axis=-1)

    def valid(self, n_observed: np.ndarray, rule_pct: float) -> np.ndarray:
        """Periods observed at least ``rule_pct`` % of their expected steps."""
        needed = np.ceil(rule_pct / 100 * self.expected - 1e-9)
        return n_observed >= needed

    def sums(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """NaN-skipping sums and counts of ``x`` (..., time) per period: (..., period)."""
        present = ~np.isnan(x)
        total = np.add.reduceat(np.where(present, x, 0.0), self.first, axis=-1)
        return total, np.add.reduceat(present.astype("int64"), self.first, axis=-1)

    def segments(self) -> list[slice]:
        """The time slice of each period."""
        bounds = np.append(self.first, self.first[-1] + self.in_record[-1])
        return [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:], strict=True)]


def _expected_steps(times: pd.DatetimeIndex, step: str, starts: np.ndarray,
                    ends: np.ndarray) -> np.ndarray:
    """Grid steps each whole calendar period holds (on the record's grid phase)."""
    fixed = fixed_duration(pd.tseries.frequencies.to_offset(step))
    if fixed is not None:
        origin = times[0].value
        width = fixed.value

        def index(t: np.ndarray) -> np.ndarray:
            return -((origin - t.astype("datetime64[ns]").astype("int64")) // width)

        return index(ends) - index(starts)
    return np.array([len(pd.date_range(a, b, freq=step, inclusive="left"))
                     for a, b in zip(starts, ends, strict=True)], dtype="int64")


def _statistics(mean: bool, percentiles: Sequence[float], exceed: Sequence[float | str],
                over: str) -> list[Statistic]:
    if over not in OVERS:
        raise UsageError(f"--over {over!r} is not one of {', '.join(OVERS)}")
    chosen = [Statistic("mean")] if mean or not (percentiles or exceed) else []
    for given in percentiles:
        try:
            p = math.nan if isinstance(given, bool) else float(given)
        except (TypeError, ValueError):
            p = math.nan
        if not 0 < p <= 100:
            raise UsageError(f"--percentile {given!r} must be a number in (0, 100]")
        chosen.append(Statistic("percentile", percentile=p))
    chosen += [Statistic("exceedances", threshold=parse_threshold(v), over=over)
               for v in exceed]
    labels = [s.label for s in chosen]
    if len(set(labels)) != len(labels):
        raise UsageError(f"a statistic is asked for twice ({', '.join(labels)}); give each once")
    return chosen


def _check_result(result: xr.Dataset) -> None:
    absent = [n for n in ("value", "fill_flag") if n not in result]
    if absent:
        raise InputError(f"{result.attrs.get('source', 'the result')}: not a gapband fill (no "
                         f"{', '.join(absent)}); give the filled.nc written by gapband fill")
    filled = np.isin(result["fill_flag"].values, (flags.FILLED, flags.FILLED_UNCERTAIN))
    if filled.any() and ("fill_draws" not in result or result.sizes["fill_draw"] == 0):
        raise InputError("the fill holds no joint draws (filled with --keep-draws 0, or by an "
                         "older gapband); rerun gapband fill with --keep-draws 200")


def _completed(result: xr.Dataset, value: np.ndarray, flag: np.ndarray):
    """A function of the series index giving its completed draws, shape (draws, time)."""
    n_time = value.shape[1]
    if "fill_draws" in result and result.sizes["missing_cell"]:
        draws = result["fill_draws"].transpose("fill_draw", "missing_cell").values
        series, steps = np.divmod(result["missing_cell"].values, n_time)
    else:
        draws, series, steps = np.empty((1, 0)), np.empty(0, int), np.empty(0, int)
    if np.any(~np.isnan(value[series, steps])):
        raise InputError("the fill's joint draws sit on observed cells; the file is damaged "
                         "or edited: rerun gapband fill")
    n_draws = max(draws.shape[0], 1)

    def complete(n: int) -> np.ndarray:
        out = np.repeat(value[n][None, :], n_draws, axis=0)
        mine = series == n
        out[:, steps[mine]] = draws[:, mine]
        return out

    return complete


def _compute(stat: Statistic, draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
             grid: Grid, days: Grid | None,
             rule: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One statistic of one series: per draw (draws, period), filled share and measured."""
    if stat.kind == "mean":
        total, count = grid.sums(draws)
        obs_total, obs_count = grid.sums(value)
        n_filled = np.add.reduceat(filled.astype("int64"), grid.first)
        with np.errstate(all="ignore"):
            return (total / np.where(count, count, np.nan), n_filled / (n_filled + obs_count),
                    obs_total / np.where(obs_count, obs_count, np.nan))
    if stat.kind == "percentile":
        return _percentile(stat.percentile, draws, value, filled, grid)
    return _exceedances(stat, draws, value, filled, grid, days, rule)


def _percentile(p: float, draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
                grid: Grid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Linear-interpolation percentile per draw and period, and the filled cells' weight in it."""
    per_draw = np.full((draws.shape[0], grid.starts.size), np.nan)
    share = np.full(grid.starts.size, np.nan)
    measured = np.full(grid.starts.size, np.nan)
    for j, seg in enumerate(grid.segments()):
        present = ~np.isnan(draws[0, seg])
        if not present.any():
            continue
        block, from_fill = draws[:, seg][:, present], filled[seg][present]
        order = np.argsort(block, axis=1, kind="stable")
        ranked = np.take_along_axis(block, order, axis=1)
        position = (block.shape[1] - 1) * p / 100
        lo = int(np.floor(position))
        hi, frac = min(lo + 1, block.shape[1] - 1), position - lo
        per_draw[:, j] = ranked[:, lo] + frac * (ranked[:, hi] - ranked[:, lo])
        weight = (1 - frac) * from_fill[order[:, lo]] + frac * from_fill[order[:, hi]]
        share[j] = weight.mean()
        seen = value[seg][~np.isnan(value[seg])]
        if seen.size:
            measured[j] = np.quantile(seen, p / 100)
    return per_draw, share, measured


def _exceedances(stat: Statistic, draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
                 grid: Grid, days: Grid | None,
                 rule: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts per draw and period of values (steps, or days by mean or max) above the limit."""
    if stat.over == "step":
        units, unit_filled = draws, filled.astype(float)[None, :]
        measured_units = value
        to_period = grid.first
    else:
        units, unit_filled, measured_units = _day_values(stat.over, draws, value, filled,
                                                         days, rule)
        to_period = np.searchsorted(days.starts, grid.starts)
    with np.errstate(invalid="ignore"):
        above = units > stat.threshold
        seen_above = measured_units > stat.threshold
    counts = np.add.reduceat(above.astype("int64"), to_period, axis=-1).astype(float)
    weighted = np.add.reduceat(above * unit_filled, to_period, axis=-1)
    with np.errstate(all="ignore"):
        # Mean over the draws with at least one exceedance; NaN when no draw has one.
        ratio = np.where(counts > 0, weighted / counts, 0.0)
        share = ratio.sum(axis=0) / np.where((counts > 0).any(axis=0), (counts > 0).sum(axis=0),
                                             np.nan)
    measured = np.add.reduceat(seen_above.astype("int64"), to_period).astype(float)
    return counts, share, measured


def _day_values(over: str, draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
                days: Grid, rule: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Day means or maxima per draw, each day's filled share, and the valid days' measured ones."""
    observed = ~np.isnan(value)
    valid = days.valid(days.count(observed[None, :])[0], rule)
    if over == "day-mean":
        total, count = days.sums(draws)
        obs_total, obs_count = days.sums(value)
        with np.errstate(all="ignore"):
            per_day = total / np.where(count, count, np.nan)
            seen = obs_total / np.where(obs_count, obs_count, np.nan)
    else:
        per_day = _segment_max(draws, days)
        seen = _segment_max(value[None, :], days)[0]
    present = days.count(~np.isnan(draws[:1]))[0]
    with np.errstate(all="ignore"):
        share = days.count(filled[None, :])[0] / present
    return per_day, np.nan_to_num(share)[None, :], np.where(valid, seen, np.nan)


def _segment_max(x: np.ndarray, grid: Grid) -> np.ndarray:
    filled_in = np.where(np.isnan(x), -np.inf, x)
    top = np.maximum.reduceat(filled_in, grid.first, axis=-1)
    return np.where(np.isinf(top), np.nan, top)
