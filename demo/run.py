"""The whole job on the invented Tolmere Basin network: what ``gapband demo`` runs.

For each quantity (no2, temp): write the network's files, inspect them,
hold observed cells out to test the intervals and derive widening factors,
fill with those factors (``--calibration``), compute period statistics and
write the report. The demo knows the true value of every cell it hid
(``tolmere_truth.csv``), so it also scores the fills of the real gaps
against the truth and against linear interpolation; the three headline
figures go to ``headline.json``.

Everything runs in this process through the library functions the commands
call; the sampler's chains run in parallel processes as in ``gapband fill``.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

import gapband
from gapband import baselines, filling, flags, holdout, outputs, stats
from gapband.panel import GAP_BINS, run_lengths
from gapband.report import write as write_report

from .generate import QUANTITIES, load_config, quick_slice, write_network

log = logging.getLogger(__name__)

#: The interval level of the headline coverage figures and of the flag rule.
LEVEL = 90.0

#: The demo's uncertainty rules (set your own with fill --max-rel-width and
#: --max-gap): a 90 % interval wider than the series' 5-95 % range of
#: observations says the fill knows no more than the series' own
#: distribution; gaps over three days are flagged whatever their interval.
#: The defaults stay on: the width rule against the series' variability
#: around its daily and weekly cycle, and no fills before a station's first
#: or after its last observation (PELLB's late start stays empty).
FLAG_RULES = filling.FlagRules(level=LEVEL, max_rel_width=1.0, max_gap="72h")


@dataclass(frozen=True)
class Quantity:
    """How the demo treats one measured quantity."""

    name: str
    units: str
    transform: str | None
    percentiles: tuple[float, ...] = ()
    exceed: tuple[float, ...] = ()


#: no2 is positive and right-skewed: filled on the log scale so fills stay
#: positive. The exceedance threshold (hours above 50) is illustrative, not a limit
#: value.
DEMO_QUANTITIES = (
    Quantity("no2", QUANTITIES["no2"], "log", percentiles=(98,), exceed=(50,)),
    Quantity("temp", QUANTITIES["temp"], None, percentiles=(98,)),
)


@dataclass(frozen=True)
class Settings:
    """Size of a demo run: the slice of the network and the sampler's effort."""

    slice: dict = field(default_factory=dict)
    draws: int = 250
    tune: int = 250
    chains: int = 2
    keep_draws: int = 200
    period: str = "month"
    holdout_scheme: str = holdout.DEFAULT_SCHEME
    holdout_fraction: float = 0.1
    #: Repeats the holdout may run to give every gap length enough hidden cells.
    holdout_max_repeats: int = holdout.DEFAULT_MAX_REPEATS
    holdout_baselines: tuple[str, ...] = ("linear", "seasonal", "kalman")


def settings(quick: bool) -> Settings:
    """The full run (a year, twelve stations) or the quick slice of ``network.toml``."""
    if quick:
        # One holdout fit per quantity: thin gap-length buckets pool their neighbours.
        return Settings(slice=quick_slice(load_config()), draws=200, tune=200, keep_draws=100,
                        period="day", holdout_max_repeats=1)
    return Settings()


DATA_FILES = ("tolmere_no2.csv", "tolmere_temp.csv", "tolmere_truth.csv")


def output_names(quick: bool) -> list[str]:
    """Every file a demo run writes, relative to its folder."""
    period = settings(quick).period
    per_quantity = ["inspect.json", "holdout.json", "filled.nc", "filled.csv", "summary.json",
                    f"stats-{period}.csv", f"stats-{period}.json", "report.html"]
    return [*DATA_FILES, "headline.json",
            *(f"{q.name}/{name}" for q in DEMO_QUANTITIES for name in per_quantity)]


#: Called after each stage with (stage, quantity, what it produced), so a
#: caller can show it; stages: inspect, holdout, fill, stats, report.
Show = Callable[[str, str, object], None]


def run(out_dir: str | Path, *, quick: bool = False, overwrite: bool = False,
        progress: bool = True, show: Show | None = None) -> dict:
    """Run the whole job on the demo network and return the headline figures.

    Parameters
    ----------
    out_dir : path
        Folder for the network's files and one subfolder of results per quantity.
    quick : bool
        The small slice with fewer draws (about a minute) instead of the full year.
    overwrite : bool
        Replace the files of an earlier run; without it, existing files stop the run
        before anything is written.
    progress : bool
        Show the sampler's progress bars.
    show : callable, optional
        Called after each stage (see :data:`Show`).

    Returns
    -------
    dict
        The content of ``headline.json``: per quantity, held-out coverage at
        90 %, the fills' MAE against the truth beside linear interpolation's,
        the count of ``filled_uncertain`` cells and the report's path.

    Raises
    ------
    UsageError
        Outputs exist and ``overwrite`` is False.
    """
    out = outputs.prepare_dir(out_dir, output_names(quick), overwrite)
    chosen = settings(quick)
    show = show or (lambda stage, quantity, produced: None)
    log.info("demo: writing the %s network into %s", "quick slice of the" if quick else "whole",
             out)
    write_network(out, **chosen.slice)
    truth = pd.read_csv(out / "tolmere_truth.csv", parse_dates=["time"])
    headline = {
        "network": load_config()["name"],
        "quick": quick,
        "settings": {"draws": chosen.draws, "tune": chosen.tune, "chains": chosen.chains,
                     "holdout_scheme": chosen.holdout_scheme,
                     "holdout_fraction": chosen.holdout_fraction,
                     "holdout_max_repeats": chosen.holdout_max_repeats,
                     "flag_rules": {"level": FLAG_RULES.level,
                                    "max_rel_width": FLAG_RULES.max_rel_width,
                                    "max_var_width": FLAG_RULES.max_var_width,
                                    "max_gap": FLAG_RULES.max_gap,
                                    "extrapolate": FLAG_RULES.extrapolate}},
        "quantities": {},
    }
    for quantity in DEMO_QUANTITIES:
        rows = truth[truth["quantity"] == quantity.name]
        headline["quantities"][quantity.name] = run_quantity(
            out, quantity, chosen, rows, progress=progress, show=show)
    outputs.write_json(headline, out / "headline.json")
    return headline


def run_quantity(out: Path, quantity: Quantity, chosen: Settings, truth: pd.DataFrame, *,
                 progress: bool, show: Show) -> dict:
    """inspect → holdout → calibrated fill → stats → report for one quantity."""
    folder = out / quantity.name
    folder.mkdir(exist_ok=True)
    name = quantity.name
    panel = gapband.read(out / f"tolmere_{name}.csv", units=quantity.units)

    log.info("[%s 1/5] inspect: data capture and gaps", name)
    figures = gapband.inspect(panel)
    figures["alignment"] = panel.attrs.get("alignment", "")
    outputs.write_json(figures, folder / "inspect.json")
    show("inspect", name, figures)

    options = filling.FillOptions(draws=chosen.draws, tune=chosen.tune, chains=chosen.chains,
                                  rules=FLAG_RULES, progress=progress,
                                  keep_draws=chosen.keep_draws)
    log.info("[%s 2/5] holdout: hide %g %% of the observations in %s, refit, score",
             name, 100 * chosen.holdout_fraction, chosen.holdout_scheme)
    evidence = holdout.run(panel, transform=quantity.transform, options=options,
                           scheme=chosen.holdout_scheme, fraction=chosen.holdout_fraction,
                           max_repeats=chosen.holdout_max_repeats,
                           baseline_names=chosen.holdout_baselines)
    holdout_path = holdout.write(evidence, folder, overwrite=True)
    show("holdout", name, evidence)

    log.info("[%s 3/5] fill, intervals widened by the holdout's factors", name)
    result, summary = filling.fill(panel, transform=quantity.transform, options=options,
                                   calibration=holdout_path)
    filling.write_fill(result, summary, folder, overwrite=True)
    show("fill", name, summary)

    log.info("[%s 4/5] stats: per %s, with credible intervals", name, chosen.period)
    computed = stats.period_stats(result, period=chosen.period, mean=True,
                                  percentiles=quantity.percentiles, exceed=quantity.exceed,
                                  level=LEVEL)
    show("stats", name, stats.write(computed, folder, overwrite=True))

    log.info("[%s 5/5] report", name)
    report = write_report(folder, overwrite=True, period=chosen.period)
    show("report", name, report)

    level = f"{LEVEL:g}"
    return {
        "units": quantity.units,
        "report": str(report),
        "holdout": {
            "scheme": chosen.holdout_scheme,
            "cells": evidence["widening"]["n_cells"],
            "coverage_90": evidence["scores"][holdout.PREDICTOR]["overall"]["coverage"][level],
            "widening_factors_90": evidence["widening"]["factors"][level],
            "untested": {label: evidence["evidence"]["buckets"][label]["real_cells"]
                         for label in evidence["evidence"]["untested"]},
        },
        "truth": against_truth(panel, result, truth),
        "filled_uncertain": summary["flags"]["overall"]["filled_uncertain"],
        "converged": summary["diagnostics"].get("converged"),
    }


def against_truth(panel: xr.Dataset, result: xr.Dataset, truth: pd.DataFrame) -> dict:
    """Score the filled cells against their true values, beside linear interpolation.

    ``truth`` holds (time, station, value) for the hidden cells of this
    quantity. Scored: every hidden cell that was filled (flags 1 and 2).
    Returned overall and by the length (grid steps) of the gap a cell sits in.

    Returns
    -------
    dict
        ``overall`` and ``gap_length`` (bucket → record); a record holds
        ``cells``, ``mae``, ``mae_linear`` (data units) and ``coverage_90``,
        the share of true values inside the calibrated 90 % interval.
    """
    series = pd.Index(result["series"].values).get_indexer(truth["station"])
    steps = pd.Index(result["time"].values).get_indexer(truth["time"])
    if (series < 0).any() or (steps < 0).any():
        raise ValueError("the truth file names cells outside the demo network's grid")
    grid = result.transpose("series", "time", ...)
    flag = grid["fill_flag"].values[series, steps]
    scored = np.isin(flag, (flags.FILLED, flags.FILLED_UNCERTAIN))
    series, steps = series[scored], steps[scored]
    y = truth["value"].to_numpy()[scored]
    filled = grid["filled"].values[series, steps]
    linear = baselines.linear(panel)["point"].transpose("series", "time").values[series, steps]
    name = f"{LEVEL:g}".replace(".", "_")
    lower = grid[f"lower_{name}"].values[series, steps]
    upper = grid[f"upper_{name}"].values[series, steps]
    gap = run_lengths(panel["value"].transpose("series", "time").isnull().values)[series, steps]

    def record(cells: np.ndarray) -> dict:
        return {
            "cells": int(cells.sum()),
            "mae": float(np.mean(np.abs(filled[cells] - y[cells]))),
            "mae_linear": float(np.mean(np.abs(linear[cells] - y[cells]))),
            "coverage_90": float(np.mean((y[cells] >= lower[cells]) & (y[cells] <= upper[cells]))),
        }

    buckets = {label: (gap >= lo) & (gap <= hi) for label, lo, hi in GAP_BINS}
    return {"overall": record(np.ones(y.size, dtype=bool)),
            "gap_length": {label: record(cells) for label, cells in buckets.items()
                           if cells.any()}}
