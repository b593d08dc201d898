"""Period statistics with credible intervals: means, maxima, percentiles, exceedance counts.

Each joint draw kept by ``fill`` (``fill_draws``) completes every series:
observed cells keep their values, filled cells take the draw's values, cells
not filled stay empty. A statistic is computed from every completed draw,
and its median and central credible interval over the draws are reported, so
the interval carries the uncertainty of the filled cells and nothing else:
with no missing cells every draw is the same and the interval has zero width.

A statistic runs over the period's time steps, its days (by their mean or
maximum), its running means over a window, or its days by their maximum
running mean (:mod:`gapband.windows`). Beside each estimate: the figure from
observed values alone on the same basis, the data capture of the period,
whether the period is valid by the validity rules (judged on observed values
only) and the share of the statistic that comes from filled cells (see
docs/stats.md for each statistic's definition).
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import flags, outputs, windows
from gapband.calibration import draws_calibration
from gapband.errors import InputError, UsageError
from gapband.panel import fixed_duration, step_of

Period = Literal["day", "month", "year"]
Over = Literal["step", "day-mean", "day-max", "running", "day-max-running"]
PERIODS: dict[str, str] = {"day": "D", "month": "M", "year": "Y"}
#: What a statistic runs over: time steps, days by their mean or maximum, running
#: means over ``--running``, or days by the maximum of their running means.
OVERS: tuple[str, ...] = ("step", "day-mean", "day-max", "running", "day-max-running")
_DAY_OVERS = ("day-mean", "day-max", "day-max-running")
_RUNNING_OVERS = ("running", "day-max-running")
#: What a validity rule applies to: the units of a period, the sub-units of a day,
#: the steps of a running window (``--min-capture day=18/24``).
RULE_LEVELS: tuple[str, ...] = ("period", "day", "running")
#: Shortest calendar length of each period: a record shorter than this holds none.
_SHORTEST = {"day": pd.Timedelta(days=1), "month": pd.Timedelta(days=28),
             "year": pd.Timedelta(days=365)}
#: Longest calendar length of each period: a grid step longer than this is refused.
_LONGEST = {"day": pd.Timedelta(days=1), "month": pd.Timedelta(days=31),
            "year": pd.Timedelta(days=366)}
_DAY = pd.Timedelta(days=1)
_HOUR = pd.Timedelta(hours=1)

#: Default validity rule, percent of a unit's sub-units valid: 75 % is 18 of 24
#: hourly values, the rule for 24-hour averages in US 40 CFR Part 50, Appendix N,
#: section 3.0(c).
DEFAULT_MIN_CAPTURE = 75.0
DEFAULT_LEVEL = 90.0


@dataclass(frozen=True)
class Validity:
    """Validity rules in percent.

    ``period``: of a period's units (steps, days or running means) valid;
    ``day``: of a day's steps observed (or running means valid); ``running``:
    of a running window's steps observed.
    """

    period: float = DEFAULT_MIN_CAPTURE
    day: float = DEFAULT_MIN_CAPTURE
    running: float = DEFAULT_MIN_CAPTURE


@dataclass(frozen=True)
class Statistic:
    """One statistic asked for: a mean, a maximum, a percentile or a count of exceedances.

    It runs over the units ``over``; ``window`` is the running window (``8h``) or empty.
    """

    kind: Literal["mean", "max", "percentile", "exceedances"]
    over: Over = "step"
    window: str = ""
    percentile: float | None = None
    threshold: float | None = None

    @property
    def basis(self) -> str:
        """The units' name: ``step``, ``day-mean``, ``running-8h``, ``day-max-running-8h``."""
        return f"{self.over}-{self.window}" if self.window else self.over

    @property
    def label(self) -> str:
        """A short unique name: ``mean``, ``p98``, ``step > 200``, ``p90.4 of day-mean``."""
        if self.kind == "exceedances":
            return f"{self.basis} > {self.threshold:g}"
        name = f"p{self.percentile:g}" if self.kind == "percentile" else self.kind
        return name if self.over == "step" else f"{name} of {self.basis}"


def period_stats(
    result: xr.Dataset,
    *,
    period: Period = "month",
    mean: bool = False,
    maximum: bool = False,
    percentiles: Sequence[float] = (),
    exceed: Sequence[float | str] = (),
    over: Over | Sequence[Over] = "step",
    running: str | None = None,
    min_capture: float | str | Sequence[float | str] = DEFAULT_MIN_CAPTURE,
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
    mean, maximum : bool
        The mean and the maximum of the period's units. The mean is the
        default when nothing else is asked for.
    percentiles : sequence of float
        Percentiles in (0, 100] of the period's units (linear interpolation
        between order statistics, numpy's and pandas' default).
    exceed : sequence of float
        Limit values: count the period's units greater than each.
    over : str or sequence of str
        The units every statistic runs over, each of ``OVERS``: "step" (the
        time steps), "day-mean", "day-max" (days by their mean or maximum),
        "running" (the running mean over ``running`` ending at each step),
        "day-max-running" (days by their largest running mean).
    running : str, optional
        The running window as a duration, a whole number of grid steps
        (e.g. "8h"); needed by, and only by, the running units.
    min_capture : float, str or sequence of them
        Validity rules, judged on observed values only: "75" or "18/24" sets
        every rule; "period=90", "day=18/24", "running=6/8" set one (see
        :func:`parse_min_capture`).
    level : float
        Central credible interval level in percent.

    Returns
    -------
    Dataset
        Dims ("statistic", "series", "period"): ``estimate`` (median over
        draws), ``lower``, ``upper``, ``measured`` (from observed values
        alone, over the same valid units), ``valid``, ``valid_pct`` (valid
        units over the period's expected units, %), ``filled_pct``; dims
        ("series", "period"): ``n_expected``, ``n_observed``, ``n_filled``,
        ``capture_pct``, ``with_fills_pct``, ``in_record_pct``. Coordinates
        ``period`` (start) and ``period_end`` (exclusive). The settings are
        attributes, among them ``calibrated`` (the joint draws were widened
        by a holdout calibration; False for a fill made before draws were
        widened) and ``calibration`` (its file, or empty).

    Raises
    ------
    UsageError
        Unknown period or units, a threshold that is not a number, a
        percentile, rule, window or level out of range, a record shorter
        than one period, a period shorter than the grid step.
    InputError
        ``result`` is not a fill, or holds filled cells without joint draws.
    """
    overs = _overs(over)
    rules = parse_min_capture(min_capture)
    if not (isinstance(level, int | float) and 0 < level < 100):
        raise UsageError(f"--level {level!r} must be a percentage strictly between 0 and 100")
    _check_result(result)
    width, window = _window(running, overs, result)
    statistics = _statistics(mean, maximum, percentiles, exceed, overs, window)
    times = pd.DatetimeIndex(result["time"].values)
    grid = Grid(times, result.attrs.get("step", ""), period, result)
    by_day = [o for o in overs if o in _DAY_OVERS]
    if by_day and step_of(result) > _DAY:
        raise UsageError(f"--over {by_day[0]} needs steps of a day or less; the grid step is "
                         f"{result.attrs['step']!r}: use --over step")
    days = Grid(times, result.attrs["step"], "day", result) if by_day else None
    by_days = grid.days_of(days) if days is not None else None
    to_period = {o: by_days if o in _DAY_OVERS else (grid.first, grid.expected) for o in overs}

    value = result["value"].transpose("series", "time").values
    flag = result["fill_flag"].transpose("series", "time").values
    complete = _completed(result, value, flag)
    filled = (flag == flags.FILLED) | (flag == flags.FILLED_UNCERTAIN)
    observed = ~np.isnan(value)
    n_series, n_periods = value.shape[0], grid.starts.size
    shape = (len(statistics), n_series, n_periods)
    out = {name: np.full(shape, np.nan) for name in ("estimate", "lower", "upper", "measured",
                                                       "filled_pct", "valid_pct")}
    valid = np.zeros(shape, dtype=bool)
    n_observed = grid.count(observed)
    n_filled = grid.count(filled)
    probs = (0.5, 0.5 - level / 200, 0.5 + level / 200)
    for n in range(n_series):
        draws = complete(n)
        units = _units(overs, draws, value[n], filled[n], days, width, rules)
        for i, stat in enumerate(statistics):
            first, expected = to_period[stat.over]
            per_draw, share, measured = _compute(stat, units[stat.over], first)
            with np.errstate(all="ignore"):
                q = np.quantile(per_draw, probs, axis=0)
            out["estimate"][i, n], out["lower"][i, n], out["upper"][i, n] = q
            out["filled_pct"][i, n] = 100.0 * share
            out["measured"][i, n] = measured
            n_valid = np.add.reduceat(units[stat.over].valid.astype("int64"), first)
            out["valid_pct"][i, n] = 100.0 * n_valid / expected
            valid[i, n] = n_valid >= windows.needed(rules.period, expected)
    expected = np.broadcast_to(grid.expected, (n_series, n_periods))
    units_attr = result["value"].attrs.get("units")
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
               "calibrated": draws_calibration(result) is not None,
               "calibration": draws_calibration(result) or "",
               "period": period, "level": float(level),
               "min_capture_pct": rules.period, "day_capture_pct": rules.day,
               "running_capture_pct": rules.running, "running": window,
               "running_steps": width, "step": result.attrs.get("step", ""),
               "draws": int(result.sizes.get("fill_draw", 0)), "units": units_attr or "",
               "kinds": [s.kind for s in statistics],
               "percentiles": [s.percentile for s in statistics],
               "thresholds": [s.threshold for s in statistics],
               "overs": [s.over for s in statistics],
               "windows": [s.window for s in statistics]},
    )


def table(stats: xr.Dataset) -> pd.DataFrame:
    """The statistics as a long table, one row per series, period and statistic.

    Columns: ``series, period_start, period_end, statistic, kind, percentile,
    threshold, over, window, estimate, lower_<L>, upper_<L>, measured, valid,
    valid_pct, capture_pct, with_fills_pct, in_record_pct, filled_pct,
    n_expected, n_observed, n_filled, units, calibrated``; ``calibrated`` says
    whether the interval comes from joint draws widened by a holdout
    calibration (:func:`calibration_text`).
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
            "window": stats.attrs["windows"][i],
            "estimate": one["estimate"].values.ravel(),
            f"lower_{level}": one["lower"].values.ravel(),
            f"upper_{level}": one["upper"].values.ravel(),
            "measured": one["measured"].values.ravel(),
            "valid": one["valid"].values.ravel(),
            "valid_pct": one["valid_pct"].values.ravel(),
            **{name: one[name].values.ravel() for name in (
                "capture_pct", "with_fills_pct", "in_record_pct", "filled_pct",
                "n_expected", "n_observed", "n_filled")},
            "units": stats.attrs["units"],
            "calibrated": stats.attrs["calibrated"],
        })
        frames.append(frame)
    rows = pd.concat(frames, ignore_index=True)
    # Series keep the Panel's order; within a series, periods in time order.
    order = pd.Categorical(rows["series"], categories=stats["series"].values.astype(str))
    return (rows.assign(_order=order).sort_values(["_order", "period_start"], kind="stable")
            .drop(columns="_order").reset_index(drop=True))


def write(stats: xr.Dataset, out_dir: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write ``stats-<period>.csv`` and ``stats-<period>.json`` into ``out_dir`` atomically.

    The CSV is :func:`table`; the JSON holds the settings, the rules in words,
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
    """The JSON form of the statistics: settings, rules, cautions and rows."""
    attrs = stats.attrs
    return {
        "format": "gapband stats",
        "format_version": 2,
        "source": attrs["source"],
        "input_sha256": attrs["input_sha256"],
        "method": attrs["method"],
        "seed": attrs["seed"],
        "period": attrs["period"],
        "level": attrs["level"],
        "draws": attrs["draws"],
        "units": attrs["units"],
        "running": attrs["running"],
        "calibrated": attrs["calibrated"],
        "calibration": attrs["calibration"] if attrs["calibrated"] else None,
        "validity_rule": rule_text(stats),
        "min_capture_pct": {"period": attrs["min_capture_pct"],
                            "day": attrs["day_capture_pct"],
                            "running": attrs["running_capture_pct"]},
        "notes": [
            "estimate, lower and upper are the median and central credible interval over "
            "the joint draws kept by gapband fill; observed cells are fixed in every draw",
            "measured is the same statistic from observed values alone, over the same "
            "valid days and running means as the estimate",
            "filled_pct is the share of the statistic that comes from filled cells, in %",
            calibration_text(stats),
            "filled values are estimates, not measurements: whether they may count toward "
            "data capture or a reported statistic is for the local regulator's rules to decide",
        ],
        "rows": rows.to_dict(orient="records"),
    }


def calibration_text(stats: xr.Dataset) -> str:
    """Whether the intervals are calibrated, in words, and by which file."""
    attrs = stats.attrs
    if attrs["calibrated"]:
        return (f"calibrated: the joint draws were widened by the holdout factors of "
                f"{attrs['calibration']}, as the fill's cell intervals were; how the filled "
                "cells move together is the model's own, which the holdout does not test")
    if attrs["calibrated_cells"]:
        return ("not calibrated: the fill's cell intervals were widened by --calibration but "
                "its joint draws, and so these intervals, were not (a fill by an older "
                "gapband); rerun gapband fill with --calibration to calibrate them")
    return ("not calibrated: the fill was made without --calibration, so these intervals are "
            "the model's own; gapband holdout tests them and gapband fill --calibration "
            "widens them")


def rule_text(stats: xr.Dataset) -> str:
    """The validity rules the statistics used, in words, citing the 18-of-24 rule's source."""
    attrs = stats.attrs
    period, overs = attrs["period"], set(attrs["overs"])
    whole, day = attrs["min_capture_pct"], attrs["day_capture_pct"]
    parts = []
    if "step" in overs:
        parts.append(f"for statistics of time steps a {period} is valid when at least "
                     f"{whole:g} % of its expected time steps are observed")
    if overs & {"day-mean", "day-max"}:
        parts.append(f"a day is valid when at least {day:g} % of its expected time steps are "
                     "observed")
    if overs & set(_RUNNING_OVERS):
        parts.append(f"a running mean over {attrs['running']} is valid when at least "
                     f"{attrs['running_capture_pct']:g} % of its {attrs['running_steps']} "
                     "time steps are observed")
    if "running" in overs:
        parts.append(f"for statistics of running means a {period} is valid when at least "
                     f"{whole:g} % of its running means are valid")
    if "day-max-running" in overs:
        parts.append(f"for the daily maximum running mean a day is valid when at least "
                     f"{day:g} % of its running means are valid")
    if overs & set(_DAY_OVERS) and period != "day":
        parts.append(f"for statistics of days a {period} is valid when at least {whole:g} % "
                     "of its days are valid")
    text = "; ".join(parts) + "; filled cells never make anything valid"
    if overs - {"step"}:
        text += ("; invalid days and running means are left out of the estimate and the "
                 "measured figure alike")
    day_of_steps = (overs & {"day-mean", "day-max"} and math.isclose(day, 75.0)) or (
        "step" in overs and period == "day" and math.isclose(whole, 75.0))
    hourly = fixed_duration(pd.tseries.frequencies.to_offset(attrs["step"])) == _HOUR
    if day_of_steps and hourly:
        text += ("; 75 % of an hourly day is 18 of 24 values, the rule for 24-hour averages "
                 "in US 40 CFR Part 50, Appendix N, section 3.0(c)")
    return text


def parse_min_capture(given: float | str | Sequence[float | str]) -> Validity:
    """Validity rules from ``--min-capture`` values, alone or in a sequence.

    ``75`` or ``"18/24"`` sets every rule; ``"day=18/24"``, ``"running=6/8"``,
    ``"period=90"`` set one. A rule not named takes the plain value, or 75 %
    when there is none.

    Raises
    ------
    UsageError
        Not a number or fraction in [0, 100] %, an unknown rule name, a rule given twice.
    """
    items = [given] if isinstance(given, str | int | float) else list(given)
    found: dict[str, float] = {}
    for item in items:
        name, sep, amount = str(item).strip().rpartition("=")
        name = name.strip() if sep else "every"
        if sep and name not in RULE_LEVELS:
            raise UsageError(f"--min-capture {item!r}: {name!r} is not one of "
                             f"{', '.join(RULE_LEVELS)}; write e.g. day=18/24")
        if name in found:
            raise UsageError(f"--min-capture gives the {name} rule twice; give it once")
        found[name] = _percent(item, amount)
    base = found.get("every", DEFAULT_MIN_CAPTURE)
    return Validity(**{name: found.get(name, base) for name in RULE_LEVELS})


def _percent(item: object, text: str) -> float:
    """A percentage from ``"75"`` or a fraction such as ``"18/24"``."""
    try:
        if "/" in text:
            part, whole = (float(x) for x in text.split("/"))
            pct = 100.0 * part / whole
        else:
            pct = float(text)
    except (ValueError, ZeroDivisionError):
        pct = math.nan
    if isinstance(item, bool) or not (0 <= pct <= 100):
        raise UsageError(f"--min-capture {item!r} must be a percentage in 0-100 (e.g. 75) "
                         "or a fraction of steps such as 18/24, optionally after period=, "
                         "day= or running=")
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

    def days_of(self, days: Grid) -> tuple[np.ndarray, np.ndarray]:
        """Each period's first day in ``days`` and the days of the whole calendar period."""
        whole = (self.ends - self.starts) // np.timedelta64(1, "D")
        return np.searchsorted(days.starts, self.starts), whole.astype("int64")


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


def _overs(over: str | Sequence[str]) -> list[str]:
    overs = [over] if isinstance(over, str) else list(over) or ["step"]
    for name in overs:
        if name not in OVERS:
            raise UsageError(f"--over {name!r} is not one of {', '.join(OVERS)}")
    if len(set(overs)) != len(overs):
        raise UsageError(f"--over is given twice with the same value ({', '.join(overs)}); "
                         "give each once")
    return overs


def _window(running: str | None, overs: list[str], result: xr.Dataset) -> tuple[int, str]:
    """The running window in grid steps and as text (``8h``); (0, "") when there is none."""
    users = [o for o in overs if o in _RUNNING_OVERS]
    if running is None:
        if users:
            raise UsageError(f"--over {users[0]} needs a window: add --running, e.g. 8h")
        return 0, ""
    if not users:
        raise UsageError(f"--running {running!r} is used only by --over running or "
                         "day-max-running; add one of them or drop --running")
    step = fixed_duration(pd.tseries.frequencies.to_offset(result.attrs["step"]))
    if step is None:
        raise UsageError(f"--running needs a grid of fixed steps; the grid step "
                         f"{result.attrs['step']!r} is a calendar one: use --over step")
    try:
        width = pd.Timedelta(str(running).strip())
    except ValueError:
        width = pd.NaT
    if pd.isna(width) or width < step or width % step != pd.Timedelta(0):
        raise UsageError(f"--running {running!r} must be a duration of whole grid steps "
                         f"({_duration_text(step)} each), e.g. --running 8h")
    return int(width // step), _duration_text(width)


def _duration_text(duration: pd.Timedelta) -> str:
    """A duration in the largest whole unit among h, min and s: ``8h``, ``90min``."""
    for unit, size in (("h", pd.Timedelta(hours=1)), ("min", pd.Timedelta(minutes=1))):
        if duration % size == pd.Timedelta(0):
            return f"{duration // size}{unit}"
    return f"{duration.total_seconds():g}s"


def _statistics(mean: bool, maximum: bool, percentiles: Sequence[float],
                exceed: Sequence[float | str], overs: list[str],
                window: str) -> list[Statistic]:
    levels = []
    for given in percentiles:
        try:
            p = math.nan if isinstance(given, bool) else float(given)
        except (TypeError, ValueError):
            p = math.nan
        if not 0 < p <= 100:
            raise UsageError(f"--percentile {given!r} must be a number in (0, 100]")
        levels.append(p)
    limits = [parse_threshold(v) for v in exceed]
    kinds = [k for k, asked in (("mean", mean or not (maximum or levels or limits)),
                                ("max", maximum)) if asked]
    chosen = []
    for over in overs:
        win = window if over in _RUNNING_OVERS else ""
        chosen += [Statistic(kind, over, win) for kind in kinds]
        chosen += [Statistic("percentile", over, win, percentile=p) for p in levels]
        chosen += [Statistic("exceedances", over, win, threshold=t) for t in limits]
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


def _units(overs: list[str], draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
           days: Grid | None, width: int, rules: Validity) -> dict[str, windows.Units]:
    """One series' units of each kind asked for (steps, days, running means), with validity."""
    units = {}
    if "step" in overs:
        units["step"] = windows.steps(draws, value, filled)
    for over in ("day-mean", "day-max"):
        if over in overs:
            units[over] = windows.days(over.removeprefix("day-"), draws, value, filled,
                                       days.first, days.expected, rules.day)
    if set(overs) & set(_RUNNING_OVERS):
        means = windows.running(draws, value, filled, width, rules.running)
        units["running"] = means
        if "day-max-running" in overs:
            units["day-max-running"] = windows.day_max(means, days.first, days.expected,
                                                       rules.day)
    return units


def _compute(stat: Statistic, units: windows.Units,
             first: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One statistic of one series: per draw (draws, period), filled share and measured."""
    if stat.kind == "mean":
        present = ~np.isnan(units.values[0])
        share = windows.segment_mean(np.where(present, units.filled, np.nan)[None, :], first)
        return (windows.segment_mean(units.values, first), share[0],
                windows.segment_mean(units.measured[None, :], first)[0])
    if stat.kind == "exceedances":
        return _exceedances(stat.threshold, units, first)
    return _percentile(100.0 if stat.kind == "max" else stat.percentile, units, first)


def _percentile(p: float, units: windows.Units,
                first: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Linear-interpolation percentile per draw and period, and the filled units' weight in it."""
    n_periods = first.size
    per_draw = np.full((units.values.shape[0], n_periods), np.nan)
    share, measured = np.full(n_periods, np.nan), np.full(n_periods, np.nan)
    for periods, idx in _same_size(~np.isnan(units.values[0]), first):
        block, n = units.values[:, idx], idx.shape[1]
        position = (n - 1) * p / 100
        lo = int(np.floor(position))
        hi, frac = min(lo + 1, n - 1), position - lo
        # Only the two order statistics are needed: the largest, or a partition, never a sort.
        if lo == n - 1:
            order = np.repeat(np.argmax(block, axis=-1)[..., None], 2, axis=-1)
        else:
            order = np.argpartition(block, sorted({lo, hi}), axis=-1)[..., [lo, hi]]
        low, high = np.moveaxis(np.take_along_axis(block, order, axis=-1), -1, 0)
        per_draw[:, periods] = low + frac * (high - low)
        from_fill = np.take_along_axis(np.broadcast_to(units.filled[idx], block.shape), order,
                                       axis=-1)
        share[periods] = ((1 - frac) * from_fill[..., 0] + frac * from_fill[..., 1]).mean(axis=0)
    for periods, idx in _same_size(~np.isnan(units.measured), first):
        measured[periods] = np.quantile(units.measured[idx], p / 100, axis=-1)
    return per_draw, share, measured


def _same_size(present: np.ndarray,
               first: np.ndarray) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Periods grouped by their count of present units: (periods, unit indices (period, n))."""
    counts = np.add.reduceat(present.astype("int64"), first)
    where = np.flatnonzero(present)
    owner = np.repeat(np.arange(first.size), counts)
    for n in np.unique(counts[counts > 0]):
        periods = np.flatnonzero(counts == n)
        yield periods, where[np.isin(owner, periods)].reshape(periods.size, n)


def _exceedances(threshold: float, units: windows.Units,
                 first: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts per draw and period of units above the limit, and the filled share of them."""
    with np.errstate(invalid="ignore"):
        above = units.values > threshold
        seen_above = units.measured > threshold
    counts = np.add.reduceat(above.astype("int64"), first, axis=-1).astype(float)
    weighted = np.add.reduceat(above * np.nan_to_num(units.filled), first, axis=-1)
    with np.errstate(all="ignore"):
        # Mean over the draws with at least one exceedance; NaN when no draw has one.
        ratio = np.where(counts > 0, weighted / counts, 0.0)
        share = ratio.sum(axis=0) / np.where((counts > 0).any(axis=0), (counts > 0).sum(axis=0),
                                             np.nan)
    measured = np.add.reduceat(seen_above.astype("int64"), first).astype(float)
    return counts, share, measured
