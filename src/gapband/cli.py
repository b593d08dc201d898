"""The ``gapband`` command line: parse, call the API, print.

Exit codes: 0 ok, 1 internal error, 2 usage error, 3 input error.
"""

from __future__ import annotations

import functools
import logging
import math
import signal
import sys
from pathlib import Path
from typing import TYPE_CHECKING

import click
from rich.console import Console
from rich.markup import escape
from rich.table import Table

import gapband
from gapband.chains import DEFAULT_CHAINS, TIME_BUDGET
from gapband.errors import FitError, GapbandError, InputError, Interrupted, SpecError, UsageError
from gapband.flags import MAX_VAR_WIDTH, MIN_OBSERVED
from gapband.holdout import DEFAULT_FRACTION, DEFAULT_MAX_REPEATS, DEFAULT_SCHEME, SCHEMES
from gapband.stats import DEFAULT_LEVEL, DEFAULT_MIN_CAPTURE, OVERS, PERIODS

if TYPE_CHECKING:
    from gapband.filling import FillOptions

EXIT_INTERNAL, EXIT_USAGE, EXIT_INPUT = 1, 2, 3

console = Console(width=None if sys.stdout.isatty() else 140)
errors = Console(stderr=True, soft_wrap=True)


def read_options(command):
    """Options shared by every command that reads a station file."""
    options = [
        click.argument("input_path", metavar="INPUT", type=click.Path(path_type=Path)),
        click.option("--layout", type=click.Choice(["auto", "long", "wide"]), default="auto",
                     show_default=True,
                     help="Long: rows of (time, series, value); wide: one column per series."),
        click.option("--time-col", help="Name of the time column (default: detected)."),
        click.option("--series-col", help="Name of the series column in long layout."),
        click.option("--value-col", help="Name of the value column in long layout."),
        click.option("--variable", help="NetCDF variable to read."),
        click.option("--step", help="Grid step, e.g. 'h', '30min', 'D', 'MS' (default: inferred)."),
        click.option("--duplicates", type=click.Choice(["error", "mean"]), default="error",
                     show_default=True, help="Repeated (time, series) pairs: stop, or average."),
        click.option("--snap", metavar="DURATION",
                     help="Move timestamps within DURATION of the grid onto it, e.g. '5min'."),
        click.option("--missing-token", "missing_tokens", multiple=True, metavar="TEXT",
                     help="Extra cell text meaning missing, e.g. -9999 (repeatable)."),
        click.option("--units", help="Units of the values (NetCDF files carry their own)."),
    ]
    for option in reversed(options):
        command = option(command)
    return command


def handle_errors(command):
    """Map gapband's errors to exit codes and one clear line on stderr."""

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        try:
            return command(*args, **kwargs)
        except (InputError, SpecError) as err:
            errors.print(f"[bold red]input error:[/] {escape(str(err))}", highlight=False)
            sys.exit(EXIT_INPUT)
        except UsageError as err:
            errors.print(f"[bold red]usage error:[/] {escape(str(err))}", highlight=False)
            sys.exit(EXIT_USAGE)
        except FitError as err:  # the data as given cannot be fitted: exit as bad input
            errors.print(f"[bold red]cannot fit:[/] {escape(str(err))}", highlight=False)
            sys.exit(EXIT_INPUT)
        except GapbandError as err:
            errors.print(f"[bold red]error:[/] {escape(str(err))}", highlight=False)
            sys.exit(EXIT_INTERNAL)

    return wrapper


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(gapband.__version__, prog_name="gapband")
def cli():
    """Probabilistic gap filling of monitoring time series.

    Filled values are estimates, not measurements: whether they may count
    toward data capture is for your regulator's rules to decide.
    """
    # gapband reports its choices (model preset, method, stages) through logging.
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(message)s"))
    log = logging.getLogger("gapband")
    log.handlers[:] = [handler]
    log.setLevel(logging.INFO)


@cli.command()
@read_options
@click.option("--json", "json_path", type=click.Path(path_type=Path),
              help="Also write the figures as JSON to this file.")
@click.option("--overwrite", is_flag=True, help="Replace an existing --json file.")
@click.option("--capture-threshold", type=click.FloatRange(0, 100), default=90.0,
              show_default=True, metavar="PCT",
              help="Minimum data capture (%) a series must reach.")
@handle_errors
def inspect(input_path, json_path, capture_threshold, overwrite, **read_kw):
    """Report data capture and gaps per series of INPUT."""
    if json_path is not None and json_path.exists() and not overwrite:
        raise UsageError(f"{json_path} exists; pass --overwrite to replace it")
    panel = gapband.read(input_path, **read_kw)
    figures = gapband.inspect(panel, capture_threshold=capture_threshold)
    figures["alignment"] = panel.attrs.get("alignment", "")
    console.print(capture_table(figures))
    console.print(f"[dim]{figures['alignment']}[/]", highlight=False)
    if json_path is not None:
        from gapband.outputs import write_json

        write_json(figures, json_path)
        console.print(f"figures written to {json_path}", highlight=False)


def parse_levels(ctx, param, text: str) -> tuple[float, ...]:
    """Parse ``--levels 50,80,90,95`` into numbers."""
    try:
        return tuple(float(part) for part in text.split(",") if part.strip())
    except ValueError:
        raise click.BadParameter(f"{text!r} is not a comma-separated list of percentages") from None


def model_options(command):
    """Options shared by every command that fits the model: spec, inference, levels, seed."""
    options = [
        click.option("--model", type=click.Path(path_type=Path),
                     help="Model spec (TOML); default: the preset for the data's time step."),
        click.option("--transform", type=click.Choice(["none", "log", "log1p"]),
                     help="Override the spec's transform; 'log' keeps fills of positive, skewed "
                     "quantities positive."),
        click.option("--method", type=click.Choice(["gibbs", "advi", "nuts"]), default="gibbs",
                     show_default=True,
                     help="gibbs: exact block-Gibbs sampler; advi: fast, approximate (check "
                     "with holdout); nuts: exact, slow."),
        click.option("--draws", type=click.IntRange(10),
                     help="Kept draws per chain, fixed. Default: gibbs samples until its "
                     "chains agree (R-hat <= 1.01, ESS >= 400) or --budget is spent; nuts "
                     "and advi take 1000."),
        click.option("--tune", type=click.IntRange(0),
                     help="Burn-in sweeps (gibbs, default 500) or warm-up steps (nuts, "
                     "default 1000) per chain."),
        click.option("--budget", type=click.FloatRange(min=1), default=TIME_BUDGET,
                     show_default=True, metavar="SECONDS",
                     help="Time for gibbs sampling; a fit stopped by it before its chains "
                     "agree says so, and its cells are flagged uncertain."),
        click.option("--chains", type=click.IntRange(1), default=DEFAULT_CHAINS,
                     show_default=True, help="Chains (nuts, gibbs), each from its own start."),
        click.option("--levels", callback=parse_levels, default="50,80,90,95",
                     show_default=True, help="Central credible-interval levels in percent."),
        click.option("--seed", type=int, default=0, show_default=True, help="Random seed."),
        click.option("--min-observed", type=click.IntRange(1), default=MIN_OBSERVED,
                     show_default=True,
                     help="Series with fewer observations are not filled."),
        click.option("--quiet", is_flag=True, help="No progress bars."),
    ]
    for option in reversed(options):
        command = option(command)
    return command


#: The parameters :func:`model_options` adds, split off a command's keywords.
MODEL_OPTION_NAMES = ("model", "transform", "method", "draws", "tune", "budget", "chains",
                      "levels", "seed", "min_observed", "quiet")


def fill_settings(kw: dict, **rules) -> tuple[Path | None, str | None, FillOptions]:
    """Pop the model options from ``kw``: (model, transform, FillOptions)."""
    from gapband import filling

    given = {name: kw.pop(name) for name in MODEL_OPTION_NAMES}
    options = filling.FillOptions(
        method=given["method"], draws=given["draws"], tune=given["tune"],
        budget=given["budget"], chains=given["chains"], levels=given["levels"],
        seed=given["seed"],
        rules=filling.FlagRules(min_observed=given["min_observed"], **rules),
        progress=not given["quiet"],
    )
    return given["model"], given["transform"], options


def block_options(command):
    """Options shared by every command that can fit in blocks: how to cut them, where to run."""
    options = [
        click.option("--blocks", metavar="auto|SPEC",
                     help="Fit in blocks of correlated series × overlapping time windows: "
                     "'auto' or e.g. 'series=50,window=60D,overlap=3D' (docs/scaling.md)."),
        click.option("--workers", type=click.IntRange(1), metavar="N",
                     help="Run the blocks on a local Dask cluster of N workers, one thread each "
                     "(implies --blocks auto)."),
        click.option("--scheduler", metavar="ADDRESS",
                     help="Run the blocks on an existing Dask scheduler, e.g. tcp://host:8786 "
                     "(implies --blocks auto)."),
    ]
    for option in reversed(options):
        command = option(command)
    return command


#: The parameters :func:`block_options` adds, split off a command's keywords.
BLOCK_OPTION_NAMES = ("blocks", "workers", "scheduler")


def block_settings(kw: dict) -> dict | None:
    """Pop the block options from ``kw``: None for one fit of the whole panel.

    Raises
    ------
    UsageError
        Both --workers and --scheduler.
    """
    given = {name: kw.pop(name) for name in BLOCK_OPTION_NAMES}
    if given["workers"] is not None and given["scheduler"] is not None:
        raise UsageError("give --workers (a new local cluster) or --scheduler (an existing "
                         "one), not both")
    return None if all(value is None for value in given.values()) else given


def plan_and_runner(panel, model, given: dict) -> tuple:
    """The block plan of ``panel`` and the runner the block options ask for."""
    from gapband import parallel

    plan = parallel.plan_blocks(panel, **parallel.parse_blocks(given["blocks"] or "auto"),
                                model=model)
    if given["workers"] is None and given["scheduler"] is None:
        return plan, parallel.InProcess()
    return plan, parallel.DaskRunner(workers=given["workers"], scheduler=given["scheduler"])


@cli.command()
@read_options
@model_options
@click.option("--out", "out_dir", type=click.Path(path_type=Path), required=True,
              help="Folder for filled.nc, filled.csv and summary.json.")
@click.option("--calibration", type=click.Path(path_type=Path), metavar="HOLDOUT_JSON",
              help="Widen the intervals by the factors in this holdout.json "
              "(from gapband holdout with the same --method).")
@click.option("--flag-level", type=float, default=90, show_default=True,
              help="Interval level the width rules look at.")
@click.option("--max-width", type=click.FloatRange(0, min_open=True),
              help="Flag a fill uncertain when its interval is wider than this (data units).")
@click.option("--max-rel-width", type=click.FloatRange(0, min_open=True),
              help="... or wider than this times the series' 5-95 % observed range.")
@click.option("--max-var-width", default=f"{MAX_VAR_WIDTH:g}", show_default=True,
              metavar="R|off", callback=lambda ctx, param, text: parse_width_multiple(text),
              help="... or wider than R times the interval the series' own variability around "
              "its daily and weekly cycle gives at that level ('off': no such rule).")
@click.option("--max-gap", metavar="DURATION",
              help="Flag fills in gaps longer than DURATION (e.g. '72h') uncertain.")
@click.option("--accept-unconverged", is_flag=True,
              help="Keep the fills of a fit whose chains did not agree as 'filled' "
              "(by default they are flagged filled_uncertain).")
@click.option("--flag-untested/--no-flag-untested", default=True, show_default=True,
              help="With --calibration: flag fills in gaps longer than the holdout tested "
              "filled_uncertain.")
@click.option("--extrapolate", is_flag=True,
              help="Fill the cells before a series' first or after its last observation, "
              "flagged filled_uncertain (by default they are not filled).")
@click.option("--table", type=click.Choice(["csv", "parquet"]), default="csv",
              show_default=True, help="Format of the long table.")
@click.option("--causes", "causes_path", type=click.Path(path_type=Path), metavar="CSV",
              help="Known causes of gaps (series, start, end, cause[, planned]): carried into "
              "filled.nc, the report's substitution log and the capture figures.")
@click.option("--decimals", default="input", show_default=True, callback=lambda ctx, param,
              text: parse_decimals(text), metavar="input|full|N",
              help="Decimals of the fills in the long table: as the input's observed values, "
              "full precision, or N (filled.nc keeps full precision).")
@click.option("--keep-draws", type=click.IntRange(0), default=200, show_default=True,
              metavar="N", help="Joint predictive draws of the filled cells kept in filled.nc "
              "for gapband stats (0: none).")
@block_options
@click.option("--overwrite", is_flag=True, help="Replace existing outputs in --out.")
@handle_errors
def fill(input_path, out_dir, calibration, flag_level, max_width, max_rel_width, max_var_width,
         max_gap, accept_unconverged, flag_untested, extrapolate, table, causes_path, decimals,
         keep_draws, overwrite, **kw):
    """Fill every missing cell of INPUT with a credible interval and a flag."""
    from gapband import filling
    from gapband.outputs import prepare_dir

    model, transform, options = fill_settings(kw, level=flag_level, max_width=max_width,
                                              max_rel_width=max_rel_width,
                                              max_var_width=max_var_width, max_gap=max_gap,
                                              accept_unconverged=accept_unconverged,
                                              flag_untested=flag_untested,
                                              extrapolate=extrapolate)
    options.keep_draws = keep_draws
    # before the output folder is made
    filling.check_flag_level(options.rules, filling.check_levels(tuple(options.levels)))
    blocks = block_settings(kw)
    prepare_dir(out_dir, ["filled.nc", f"filled.{table}", "summary.json"], overwrite)
    panel = gapband.read(input_path, **kw)
    known = None
    if causes_path is not None:
        from gapband import causes

        known = causes.read(causes_path, [str(s) for s in panel["series"].values])
    if blocks is None:
        result, summary = filling.fill(panel, model=model, transform=transform,
                                       options=options, calibration=calibration)
    else:
        from gapband.parallel import fill_blocks

        plan, runner = plan_and_runner(panel, model, blocks)
        result, summary = fill_blocks(panel, plan, model=model, transform=transform,
                                      options=options, calibration=calibration, runner=runner)
    if known is not None:
        result = causes.attach(result, known)
        summary["capture"] = filling.capture_before_after(result)
        summary["causes"] = {"file": str(causes_path), "rows": len(known),
                             "planned": int(known["planned"].sum())}
    written = filling.write_fill(result, summary, out_dir, table=table, decimals=decimals,
                                 overwrite=True)
    for warning in summary["diagnostics"].get("warnings", []):
        errors.print(f"[bold yellow]warning:[/] {escape(warning)}", highlight=False)
    if summary["calibration"] is not None:
        console.print(widened_text(summary["calibration"]), highlight=False)
    counts = summary["flags"]["overall"]
    console.print(
        "cells: " + ", ".join(f"{n} {meaning}" for meaning, n in counts.items()), highlight=False
    )
    reasons = {name: n for name, n in summary["flag_reasons"]["overall"].items() if n}
    if reasons:
        console.print("flagged because: " + ", ".join(f"{n} {name}" for name, n in
                                                       reasons.items()), highlight=False)
    for path in written:
        console.print(f"wrote {path}", highlight=False)


def parse_width_multiple(text: str) -> float | None:
    """``--max-var-width``: a positive number, or 'off' for no such rule."""
    if text.strip().lower() == "off":
        return None
    try:
        number = float(text)
    except ValueError:
        number = math.nan
    if not math.isfinite(number) or number <= 0:
        raise click.BadParameter(f"use a positive number or 'off', not {text!r}")
    return number


def parse_decimals(text: str) -> int | str:
    """``--decimals``: 'input', 'full' or a whole number of decimals."""
    from gapband.outputs import MAX_DECIMALS

    if text in ("input", "full"):
        return text
    if text.isdigit() and int(text) <= MAX_DECIMALS:
        return int(text)
    raise click.BadParameter(f"use 'input', 'full' or a whole number from 0 to {MAX_DECIMALS}, "
                             f"not {text!r}")


def parse_baselines(ctx, param, text: str) -> tuple[str, ...]:
    """Parse ``--baselines linear,kalman`` (an empty text: none)."""
    from gapband.baselines import NAMES

    chosen = tuple(part.strip() for part in text.split(",") if part.strip())
    unknown = [name for name in chosen if name not in NAMES]
    if unknown:
        raise click.BadParameter(f"{unknown[0]!r} is not a baseline; choose from "
                                 f"{', '.join(NAMES)}")
    return chosen


@cli.command()
@read_options
@model_options
@click.option("--out", "out_dir", type=click.Path(path_type=Path), required=True,
              help="Folder for holdout.json.")
@click.option("--scheme", type=click.Choice(SCHEMES), default=DEFAULT_SCHEME,
              show_default=True,
              help="gaps: runs as long as the panel's real gaps, every gap-length bucket "
              "tested; random cells; blocks as long as each series' own gaps; or one series "
              "for a window.")
@click.option("--fraction", type=float, default=DEFAULT_FRACTION, show_default=True,
              help="Share of the observed cells to hide (outage: share of the record the "
              "window spans); in (0, 1).")
@click.option("--repeats", type=click.IntRange(1), default=1, show_default=True,
              help="Masks (and refits) to pool the scores over.")
@click.option("--max-repeats", type=click.IntRange(1), default=DEFAULT_MAX_REPEATS,
              show_default=True,
              help="gaps: run more repeats, up to this many in all, while a gap-length "
              "bucket with real gaps has too few hidden cells.")
@click.option("--baselines", "baseline_names", callback=parse_baselines,
              default="linear,seasonal,kalman", show_default=True,
              help="Baselines scored on the same hidden cells (comma-separated; '' for none).")
@block_options
@click.option("--overwrite", is_flag=True, help="Replace an existing holdout.json in --out.")
@handle_errors
def holdout(input_path, out_dir, scheme, fraction, repeats, max_repeats, baseline_names,
            overwrite, **kw):
    """Hide observed cells of INPUT, refit, score the fills and derive widening factors."""
    from gapband.holdout import run, write
    from gapband.outputs import prepare_dir

    model, transform, options = fill_settings(kw)
    blocks = block_settings(kw)
    prepare_dir(out_dir, ["holdout.json"], overwrite)
    panel = gapband.read(input_path, **kw)
    plan, runner = (None, None) if blocks is None else plan_and_runner(panel, model, blocks)
    report = run(panel, model=model, transform=transform, options=options, scheme=scheme,
                 fraction=fraction, repeats=repeats, max_repeats=max_repeats,
                 baseline_names=baseline_names, plan=plan, runner=runner)
    path = write(report, out_dir, overwrite=True)
    console.print(scores_table(report))
    console.print(bucket_table(report))
    for line in evidence_lines(report["evidence"]):
        errors.print(f"[bold yellow]note:[/] {escape(line)}", highlight=False)
    console.print(factors_table(report["widening"]))
    console.print(f"wrote {path}", highlight=False)


def bucket_table(report: dict) -> Table:
    """Evidence and scores per gap-length bucket: real fills, hidden cells, each predictor."""
    levels = [f"{level:g}" for level in report["settings"]["levels"]]
    buckets = report["evidence"]["buckets"]
    table = Table(title="by gap length (steps): the real gaps and the hidden cells that test "
                  "them", caption="cover: gapband's coverage; CRPS (gapband, or MAE for a point "
                  "fill) per predictor; untested: real gaps, no hidden cell of that length")
    for header in ("gap length", "real fills", "hidden (runs)", "status",
                   *(f"cover {lv} %" for lv in levels), *report["scores"]):
        table.add_column(header, justify="left" if header == "gap length" else "right",
                         no_wrap=True)
    for label, record in buckets.items():
        if not record["real_cells"] and not record["hidden_cells"]:
            continue
        scored = {name: b["gap_length"].get(label) for name, b in report["scores"].items()}
        coverage = (scored["gapband"] or {}).get("coverage") or {}
        table.add_row(
            label, str(record["real_cells"]),
            f"{record['hidden_cells']} ({record['hidden_runs']})",
            "[red]untested[/]" if record["status"] == "untested" else record["status"],
            *(_number(coverage.get(lv), ".3f") for lv in levels),
            *(_number(None if s is None else (s["crps"] if s["crps"] is not None
                                              else s["mae"]), ".4g")
              for s in scored.values()),
        )
    return table


def evidence_lines(evidence: dict) -> list[str]:
    """What the holdout could not test, and the repeats it added, in sentences."""
    lines = [evidence["note"]] if evidence["note"] else []
    for label in evidence["untested"]:
        lines.append(f"gaps of {label} steps: {evidence['buckets'][label]['real_cells']} real "
                     "fills, no hidden cell of that length (untested)")
    return lines


def factors_table(widening: dict) -> Table:
    """The widening factors per level and gap-length bucket."""
    table = Table(title="widening factors by gap length (steps)", caption=widening["narrowing"])
    table.add_column("level", justify="left")
    for label in widening["buckets"]:
        table.add_column(label, justify="right")
    for level, by_bucket in widening["factors"].items():
        table.add_row(f"{level} %", *(_number(f, ".3g") for f in by_bucket.values()))
    return table


def widened_text(record: dict) -> str:
    """One line saying how a fill's intervals were widened."""
    labels = list(next(iter(record["factors"].values())))
    return (f"intervals widened per gap length ({' | '.join(labels)} steps): " + "; ".join(
        f"{level} % x" + "/".join(_number(f, ".3g") for f in by_bucket.values())
        for level, by_bucket in record["factors"].items())
        + f"; tested up to {record['longest_tested_steps']} steps")


def scores_table(report: dict) -> Table:
    """The overall holdout scores per predictor as a terminal table."""
    settings = report["settings"]
    levels = [f"{level:g}" for level in settings["levels"]]
    hidden = sum(r["hidden_total"] for r in report["repeats"])
    # Block-wise runs only: hidden cells the blocks left unfilled.
    unscored = sum(r["not_scored"]["total"] for r in report["repeats"] if "not_scored" in r)
    table = Table(
        title=f"{escape(str(report['source']))}: {settings['scheme']} holdout, "
        f"{hidden} cells hidden over {len(report['repeats'])} repeat(s)"
        + (f", {unscored} of them not scored (left unfilled by the blocks)" if unscored else ""),
        caption="coverage: share of hidden values inside the central interval; "
        "CRPS, MAE, RMSE in data units (smaller is better)",
    )
    for header in ("fill", *(f"cover {lv} %" for lv in levels), "CRPS", "MAE", "RMSE"):
        table.add_column(header, justify="left" if header == "fill" else "right", no_wrap=True)
    for name, breakdown in report["scores"].items():
        overall = breakdown["overall"]
        coverage = overall["coverage"] or {}
        table.add_row(
            name, *(_number(coverage.get(lv), ".3f") for lv in levels),
            _number(overall["crps"], ".4g"), _number(overall["mae"], ".4g"),
            _number(overall["rmse"], ".4g"),
        )
    return table


def _number(value: float | None, spec: str) -> str:
    return "-" if value is None else format(value, spec)


@cli.command()
@click.argument("fill_dir", metavar="DIR", type=click.Path(path_type=Path))
@click.option("--period", type=click.Choice(list(PERIODS)), required=True,
              help="Calendar period of the statistics.")
@click.option("--mean", is_flag=True, help="The mean of the period's units (the default "
              "statistic).")
@click.option("--max", "maximum", is_flag=True, help="The maximum of the period's units.")
@click.option("--percentile", "percentiles", type=float, multiple=True, metavar="P",
              help="The P-th percentile of the period's units, P in (0, 100] (repeatable).")
@click.option("--exceed", "thresholds", multiple=True, metavar="VALUE",
              help="Count the period's units above VALUE (data units) (repeatable).")
@click.option("--over", "overs", type=click.Choice(OVERS), multiple=True,
              default=OVERS[:1],
              help="The units every statistic runs over: time steps, days by their mean or "
              "maximum, running means over --running, or days by their largest running mean "
              f"(repeatable; default {OVERS[0]}).")
@click.option("--running", metavar="DURATION",
              help="Window of the running means, whole grid steps, e.g. '8h' (the mean of "
              "the steps ending at each step).")
@click.option("--min-capture", "min_capture", multiple=True,
              default=(f"{DEFAULT_MIN_CAPTURE:g}",), metavar="[RULE=]PCT|A/B",
              help="Validity rules on observed values: 'period=' share of a period's units "
              "valid, 'day=' of a day's steps (or running means), 'running=' of a window's "
              "steps; a plain '75' or '18/24' sets every rule (repeatable; default "
              f"{DEFAULT_MIN_CAPTURE:g}).")
@click.option("--level", type=float, default=DEFAULT_LEVEL, show_default=True,
              help="Central credible interval level (%).")
@click.option("--out", "out_dir", type=click.Path(path_type=Path),
              help="Folder for stats-<period>.csv and .json (default: DIR).")
@click.option("--overwrite", is_flag=True, help="Replace existing stats files.")
@handle_errors
def stats(fill_dir, period, mean, maximum, percentiles, thresholds, overs, running, min_capture,
          level, out_dir, overwrite):
    """Period statistics with credible intervals from the fill in DIR."""
    from gapband import stats as period_stats
    from gapband.outputs import open_fill, prepare_dir

    out_dir = out_dir or fill_dir
    prepare_dir(out_dir, [f"stats-{period}.csv", f"stats-{period}.json"], overwrite)
    result, _ = open_fill(fill_dir)
    computed = period_stats.period_stats(
        result, period=period, mean=mean, maximum=maximum, percentiles=percentiles,
        exceed=thresholds, over=overs, running=running, min_capture=min_capture, level=level)
    console.print(stats_table(computed))
    rule = period_stats.rule_text(computed)
    console.print(f"[dim]validity: {escape(rule)}[/]", highlight=False)
    console.print(f"[dim]intervals: {escape(period_stats.calibration_text(computed))}[/]",
                  highlight=False)
    for path in period_stats.write(computed, out_dir, overwrite=True):
        console.print(f"wrote {path}", highlight=False)


def stats_table(computed) -> Table:
    """Period statistics as a terminal table (first rows when long)."""
    from gapband.stats import table

    rows = table(computed)
    level = f"{computed.attrs['level']:g}"
    shown = rows.head(STATS_ROWS_SHOWN)
    table_ = Table(
        title=f"{escape(str(computed.attrs['source']))}: statistics per {computed.attrs['period']}"
        f", {computed.attrs['draws']} joint draws",
        caption=f"estimate: median over draws with a {level} % credible interval; measured: "
        "observed values only"
        + (f"; first {STATS_ROWS_SHOWN} of {len(rows)} rows (all in the files)"
           if len(rows) > STATS_ROWS_SHOWN else ""),
    )
    for header in ("series", "period", "statistic", "measured", "valid", "valid units %",
                   "estimate", f"{level} % interval", "capture %", "filled %"):
        table_.add_column(header, justify="left" if header in ("series", "period", "statistic")
                          else "right", no_wrap=True)
    for r in shown.itertuples(index=False):
        table_.add_row(
            escape(r.series), str(r.period_start)[:10], escape(r.statistic),
            _number(_finite(r.measured), ".4g"), "yes" if r.valid else "[red]no[/]",
            f"{r.valid_pct:.1f}",
            _number(_finite(r.estimate), ".4g"),
            f"{_number(_finite(getattr(r, 'lower_' + level.replace('.', '_'))), '.4g')} – "
            f"{_number(_finite(getattr(r, 'upper_' + level.replace('.', '_'))), '.4g')}",
            f"{r.capture_pct:.1f}", _number(_finite(r.filled_pct), ".1f"),
        )
    return table_


#: Rows of period statistics printed on the terminal; the files hold them all.
STATS_ROWS_SHOWN = 40


def _finite(value: float) -> float | None:
    return None if math.isnan(value) else value


@cli.command()
@click.argument("fill_dir", metavar="DIR", type=click.Path(path_type=Path))
@click.option("--out", "out_path", type=click.Path(path_type=Path),
              help="The HTML file (default: DIR/report.html).")
@click.option("--holdout", "holdout_path", type=click.Path(path_type=Path),
              metavar="HOLDOUT_JSON", help="Holdout evidence (default: DIR/holdout.json when "
              "present).")
@click.option("--period", type=click.Choice(["day", "month", "year"]),
              help="Show every period of this length in the statistics section (default: per "
              "month, and only the days touched by substitution).")
@click.option("--capture-threshold", type=click.FloatRange(0, 100), default=90.0,
              show_default=True, metavar="PCT", help="Data capture a series should reach.")
@click.option("--title", help="The network's or dataset's name (default: the input's NetCDF "
              "title attribute, else its file name).")
@click.option("--overwrite", is_flag=True, help="Replace an existing report.")
@handle_errors
def report(fill_dir, out_path, holdout_path, period, capture_threshold, title, overwrite):
    """Write a self-contained HTML report of the fill in DIR."""
    from gapband.report import write

    path = write(fill_dir, out_path, overwrite=overwrite, holdout=holdout_path, period=period,
                 capture_threshold=capture_threshold, title=title)
    console.print(f"wrote {path}", highlight=False)


@cli.command()
@click.option("--out", "out_dir", type=click.Path(path_type=Path), default=Path("gapband-demo"),
              show_default=True, help="Folder for the demo data and results.")
@click.option("--quick", is_flag=True, help="A small slice (5 stations, 4 weeks) and fewer "
              "draws: about a minute instead of several.")
@click.option("--overwrite", is_flag=True, help="Replace results of an earlier demo run.")
@click.option("--quiet", is_flag=True, help="No progress bars.")
@handle_errors
def demo(out_dir, quick, overwrite, quiet):
    """Run the whole job on an invented network of monitoring stations.

    Writes the Tolmere Basin network (hourly no2 and temp), then for each
    quantity: inspect, holdout, fill widened by the holdout's factors,
    stats and report; ends with three headline figures.
    """
    from gapband.demo.run import LEVEL, run

    headline = run(out_dir, quick=quick, overwrite=overwrite, progress=not quiet,
                   show=show_demo_stage)
    console.print(demo_table(headline, LEVEL))
    for quantity, figures in headline["quantities"].items():
        console.print(f"report ({quantity}): {figures['report']}", highlight=False)
    console.print(f"figures: {Path(out_dir) / 'headline.json'}", highlight=False)


def show_demo_stage(stage: str, quantity: str, produced) -> None:
    """Print what one stage of the demo produced."""
    if stage == "inspect":
        console.print(capture_table(produced))
    elif stage == "holdout":
        console.print(scores_table(produced))
        console.print(bucket_table(produced))
        for line in evidence_lines(produced["evidence"]):
            errors.print(f"[bold yellow]note:[/] {escape(line)}", highlight=False)
    elif stage == "fill":
        console.print(f"{quantity}: {widened_text(produced['calibration'])}", highlight=False)
        for warning in produced["diagnostics"].get("warnings", []):
            errors.print(f"[bold yellow]warning:[/] {escape(warning)}", highlight=False)
    elif stage == "stats":
        console.print(f"{quantity}: wrote " + ", ".join(str(p) for p in produced),
                      highlight=False)


def demo_table(headline: dict, level: float) -> Table:
    """The demo's headline figures per quantity."""
    table = Table(
        title=f"{escape(headline['network'])}: headline figures"
        + (" (quick slice)" if headline["quick"] else ""),
        caption="held out: observed cells hidden and refitted (holdout.json); real gaps: the "
        "demo's true values of the cells it hid; MAE in data units (smaller is better)",
    )
    for header in ("quantity", f"held-out coverage {level:g} %", f"real gaps: coverage {level:g} %",
                   "MAE of fills", "MAE linear interp.", "cells flagged uncertain"):
        table.add_column(header, justify="left" if header == "quantity" else "right",
                         no_wrap=True)
    for quantity, figures in headline["quantities"].items():
        truth = figures["truth"]["overall"]
        table.add_row(
            f"{escape(quantity)} ({escape(figures['units'])})",
            _number(figures["holdout"]["coverage_90"], ".1%"),
            _number(truth["coverage_90"], ".1%"),
            _number(truth["mae"], ".3g"), _number(truth["mae_linear"], ".3g"),
            str(figures["filled_uncertain"]),
        )
    return table


def capture_table(figures: dict) -> Table:
    """The inspect figures as a terminal table."""
    threshold = figures["capture_threshold"]
    table = Table(
        title=f"{escape(str(figures['source']))}: {_short(figures['start'])} to "
        f"{_short(figures['end'])}, step {figures['step']}",
        caption=f"capture threshold {threshold:g} %; gaps by length in steps: "
        "1 | 2-6 | 7-24 | 25-168 | >168",
    )
    for header in ("series", "observed", "capture %", "meets", "gaps", "longest gap",
                   "gaps by length", "first obs", "last obs"):
        table.add_column(header, justify="left" if header == "series" else "right", no_wrap=True)
    for row in figures["series"]:
        table.add_row(
            escape(row["series"]), f"{row['observed']}/{row['expected']}",
            f"{row['capture_pct']:.1f}",
            "[green]yes[/]" if row["meets_threshold"] else "[red]no[/]",
            str(row["n_gaps"]), row["longest_gap_duration"],
            _bins(row["gap_histogram"]),
            _short(row["first_observation"]), _short(row["last_observation"]),
        )
    overall = figures["overall"]
    table.add_section()
    table.add_row(
        "all", f"{overall['observed']}/{overall['expected']}",
        f"{overall['capture_pct']:.1f}",
        f"{overall['series_meeting_threshold']}/{overall['series']}",
        str(overall["n_gaps"]), f"{overall['longest_gap_steps']} steps",
        _bins(overall["gap_histogram"]), "", "",
    )
    return table


def _bins(histogram: dict[str, int]) -> str:
    return " | ".join(str(v) for v in histogram.values())


def _short(iso: str | None) -> str:
    """ISO timestamp without seconds, '-' when absent."""
    return "-" if iso is None else iso.replace("T", " ")[:16]


def main(argv: list[str] | None = None) -> None:
    """Entry point of the ``gapband`` console script.

    SIGINT (Ctrl-C) and SIGTERM stop a run alike: files being written are
    removed, outputs already complete stay, one line says so, and the exit
    code is 128 + the signal number (130, 143), as shells report a stop.
    """
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, _interrupt)
    try:
        cli.main(args=argv, prog_name="gapband", standalone_mode=True)
    except SystemExit:
        raise
    except Interrupted as stop:
        errors.print(f"[bold red]interrupted:[/] {stop}; files being written were removed, "
                     "outputs already complete are kept", highlight=False)
        sys.exit(128 + stop.signum)
    except Exception as err:  # an unexpected failure: say so plainly, exit 1
        errors.print(f"[bold red]internal error:[/] {type(err).__name__}: {escape(str(err))}",
                     highlight=False)
        errors.print("please report this with the command you ran", highlight=False)
        sys.exit(EXIT_INTERNAL)


def _interrupt(signum: int, frame) -> None:
    """Signal handler of :func:`main`: unwind the run as an exception."""
    raise Interrupted(signum)


if __name__ == "__main__":  # pragma: no cover
    main(sys.argv[1:])
