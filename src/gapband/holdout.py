"""Proof of calibration: hide observed cells, refit, score, and derive widening factors.

:func:`mask` hides observed cells in a pattern like real gaps; :func:`run`
refits the model on each masked Panel (K repeats), in one fit or block by
block (:mod:`gapband.parallel`), scores the hidden cells with the model's
predictive draws and with the baselines (:mod:`gapband.baselines`), and
derives per-level widening factors (:func:`widening_factor`) that
``gapband fill --calibration`` applies. :func:`write` saves the report as
``holdout.json``.

Masking schemes (only observed cells are hidden; series with fewer than
``min_observed`` observations are never filled, so never scored):

- ``random``: ``round(fraction × observed)`` cells of each series, uniformly.
- ``blocks``: contiguous runs with lengths drawn from the series' own
  interior gaps (gaps touching the record's ends are left out: they are
  usually a station's start or end, not an outage), separated from other
  missing cells by at least one observation so every hidden run keeps its
  drawn length, until the series' target count is reached. A series without
  usable gaps borrows the gap lengths of the whole Panel; without any, lengths
  follow a geometric distribution with mean :data:`DEFAULT_MEAN_BLOCK` steps.
- ``outage``: one series loses every observation in a window of
  ``round(fraction × time steps)`` steps; repeats visit the series in a
  seeded random order.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import baselines, outputs, scores
from gapband.errors import FitError, InputError, UsageError
from gapband.filling import (
    CALIBRATION_FORMAT,
    CALIBRATION_VERSION,
    DEFAULT_KEEP_DRAWS,
    FillOptions,
    Fitted,
    check_levels,
    fit_panel,
    fittable,
    resolve_spec,
    versions,
)
from gapband.flags import MIN_OBSERVED
from gapband.panel import GAP_BINS, gap_runs, run_lengths
from gapband.spec import ModelSpec

if TYPE_CHECKING:
    from gapband.parallel import BlockPlan, Runner

log = logging.getLogger(__name__)

Scheme = Literal["random", "blocks", "outage"]
SCHEMES: tuple[str, ...] = ("random", "blocks", "outage")
DEFAULT_FRACTION = 0.2

#: Mean length in steps of the fallback block distribution (geometric), used
#: when no series of the Panel has an interior gap to learn lengths from.
DEFAULT_MEAN_BLOCK = 6
#: Longest fallback block, in steps.
DEFAULT_MAX_BLOCK = 60

#: Hidden cells whose predictive draws are held in memory at a time.
CHUNK_CELLS = 4096

#: A widening factor is stored this much (relatively) above the conformity
#: score that sets it, so that cell stays inside after floating-point rounding.
FACTOR_MARGIN = 1e-9

PREDICTOR = "gapband"


@dataclasses.dataclass(frozen=True)
class Mask:
    """The observed cells hidden in one repeat, and how they were chosen."""

    hidden: xr.DataArray
    details: dict


def mask(
    panel: xr.Dataset,
    *,
    scheme: Scheme = "random",
    fraction: float = DEFAULT_FRACTION,
    seed: int = 0,
    repeat: int = 0,
    min_observed: int = MIN_OBSERVED,
) -> Mask:
    """Choose observed cells to hide (see the module notes for each scheme).

    Parameters
    ----------
    panel : Dataset
        A Panel.
    scheme : {"random", "blocks", "outage"}
    fraction : float
        Share of each series' observed cells to hide (random, blocks), or
        share of the record the outage window spans; in (0, 1).
    seed, repeat : int
        The mask is a function of both: the same pair gives the same mask.
    min_observed : int
        Series with fewer observations are left alone; every masked series
        keeps at least this many.

    Returns
    -------
    Mask
        ``hidden``: bool, dims ("series", "time"), True only at observed
        cells; ``details``: JSON-ready notes (the block-length source per
        series, the outage window).

    Raises
    ------
    UsageError
        Unknown scheme or fraction outside (0, 1).
    InputError
        Nothing observed, no series with ``min_observed`` observations, or a
        series (an outage window) that cannot lose cells and keep enough.
    """
    _check_scheme(scheme, fraction)
    fittable(panel, min_observed)  # refuses a Panel with nothing (enough) observed
    values = panel["value"].transpose("series", "time")
    observed = values.notnull().values
    rng = np.random.default_rng([seed, repeat])
    n_observed = observed.sum(axis=1)
    scored = np.flatnonzero(n_observed >= min_observed)
    if scheme == "outage":
        hidden, details = _outage(panel, observed, scored, fraction, seed, repeat,
                                  min_observed, rng)
    else:
        targets = _targets(panel, n_observed, scored, fraction, min_observed)
        if scheme == "random":
            hidden, details = _random(observed, targets, rng), {}
        else:
            hidden, details = _blocks(panel, observed, targets, min_observed, rng)
    return Mask(xr.DataArray(hidden, coords=values.coords, dims=values.dims, name="hidden"),
                details)


def widening_factor(y: np.ndarray, median: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                    level: float) -> float | None:
    """The split-conformal factor on half-widths around the median that covers ``level`` %.

    Each cell's conformity score is how many half-widths it lies from the
    median, on its own side: ``(median - y) / (median - lower)`` below,
    ``(y - median) / (upper - median)`` above. The factor is the
    ``ceil((n + 1) × level / 100)``-th smallest of the n scores — the
    smallest factor that covers at least ``level`` % of these cells, raised
    to the finite-sample conformal quantile so that, for a new cell
    exchangeable with them, coverage is at least ``level`` %.

    Returns
    -------
    float or None
        None when n is too small for the level (fewer than about
        ``level / (100 - level)`` cells).
    """
    ratio = conformity(y, median, lower, upper)
    n = ratio.size
    rank = math.ceil((n + 1) * level / 100 - 1e-9)
    if rank > n or n == 0:
        return None
    return float(np.partition(ratio, rank - 1)[rank - 1]) * (1 + FACTOR_MARGIN)


def conformity(y: np.ndarray, median: np.ndarray, lower: np.ndarray,
               upper: np.ndarray) -> np.ndarray:
    """Distance of ``y`` from the median in half-widths of its side (inf on a zero half-width)."""
    below = y < median
    half = np.where(below, median - lower, upper - median)
    distance = np.abs(y - median)
    return np.divide(distance, half, out=np.where(distance > 0, np.inf, 0.0), where=half > 0)


def run(
    panel: xr.Dataset,
    *,
    model: str | Path | ModelSpec | None = None,
    transform: str | None = None,
    options: FillOptions | None = None,
    scheme: Scheme = "random",
    fraction: float = DEFAULT_FRACTION,
    repeats: int = 1,
    baseline_names: Sequence[str] = baselines.DEFAULT_NAMES,
    plan: BlockPlan | None = None,
    runner: Runner | None = None,
) -> dict:
    """Hide, refit, score and derive widening factors; return the ``holdout.json`` content.

    Parameters
    ----------
    panel : Dataset
        A Panel; it is not changed.
    model, transform, options
        As for :func:`gapband.fill`; ``options.seed`` seeds the masks and,
        plus the repeat number, each refit.
    scheme, fraction
        See :func:`mask`.
    repeats : int
        Masks (and refits) to pool the scores over.
    baseline_names : sequence of str
        Baselines to score on the same cells: any of "linear", "seasonal",
        "kalman", "dfm" (default: all but "dfm").
    plan : BlockPlan, optional
        Refit each masked Panel block by block, as ``gapband fill --blocks``
        does (:func:`gapband.parallel.fill_blocks`; the plan from
        :func:`gapband.parallel.plan_blocks` on ``panel``; block i of repeat
        k with seed ``options.seed + k × blocks + i``), and score the hidden
        cells with the merged result's ``options.keep_draws`` joint draws.
        Hidden cells the blocks leave unfilled (a failed or skipped block, a
        series with fewer than ``min_observed`` observations in a window) are
        scored by no predictor, counted per repeat under ``not_scored`` and
        logged.
    runner : InProcess or DaskRunner, optional
        Where the blocks run (default :class:`gapband.parallel.InProcess`);
        only with ``plan``.

    Returns
    -------
    dict
        JSON-ready; every field is described in docs/outputs.md.

    Raises
    ------
    UsageError, InputError, SpecError
        Bad settings, a Panel that cannot be masked, or a bad spec.
    FitError
        With ``plan``: no hidden cell of any repeat was filled.
    """
    started = time.perf_counter()
    options = options or FillOptions()
    levels = check_levels(tuple(options.levels))
    _check_scheme(scheme, fraction)
    if isinstance(repeats, bool) or not isinstance(repeats, int) or repeats < 1:
        raise UsageError(f"repeats = {repeats!r} must be a whole number of at least 1 "
                         "(--repeats)")
    unknown = [name for name in baseline_names if name not in baselines.NAMES]
    if unknown:
        raise UsageError(f"unknown baseline {unknown[0]!r}; choose from "
                         f"{', '.join(baselines.NAMES)} (--baselines)")
    baselines.check(baseline_names, panel)
    if plan is None and runner is not None:
        raise UsageError("a runner runs blocks: give the block plan too "
                         "(gapband.parallel.plan_blocks)")
    if plan is not None:
        from gapband.parallel import InProcess  # imported (with scipy clustering) for blocks only

        _check_kept_draws(options.keep_draws)
        runner = runner or InProcess()
    spec, spec_label = resolve_spec(panel, model, transform)
    log.info("holdout: %s masks, fraction %g, %d repeat(s)%s; model: %s", scheme, fraction,
             repeats, "" if plan is None else f", {len(plan.blocks)} blocks each", spec_label)
    truth = panel["value"].transpose("series", "time").values
    n_time = panel.sizes["time"]
    predictors = (PREDICTOR, *baseline_names)
    pooled: dict[str, list[dict]] = {name: [] for name in predictors}
    positions: list[tuple[np.ndarray, np.ndarray]] = []
    repeat_records = []
    for repeat in range(repeats):
        hidden = mask(panel, scheme=scheme, fraction=fraction, seed=options.seed, repeat=repeat,
                      min_observed=options.rules.min_observed)
        masked = panel.copy()
        masked["value"] = panel["value"].where(~hidden.hidden)
        series, steps = np.nonzero(hidden.hidden.values)
        if plan is None:
            fitted = fit_panel(masked, model=spec,
                               options=dataclasses.replace(options, seed=options.seed + repeat))
            to_fit, refit = fitted.panel, _fit_record(fitted)
        else:
            seeded = dataclasses.replace(options, seed=options.seed + repeat * len(plan.blocks))
            result, refit = _refit_in_blocks(masked, plan, spec, seeded, runner)
            filled = np.isin(series * n_time + steps, result["missing_cell"].values)
            refit["not_scored"] = _not_scored(panel, series[~filled])
            series, steps = series[filled], steps[filled]
            to_fit = fittable(masked, options.rules.min_observed)
        y = truth[series, steps]
        rows = pd.Index(to_fit["series"].values).get_indexer(panel["series"].values)
        cells = rows[series] * n_time + steps
        repeat_records.append(_repeat_record(panel, repeat, hidden, refit))
        if y.size:
            pooled[PREDICTOR].append(
                _model_scores(fitted, y, cells, levels, options.seed + repeat) if plan is None
                else _kept_scores(result, y, series * n_time + steps, levels))
            for name in baseline_names:
                pooled[name].append(_baseline_scores(name, to_fit, spec, y, cells, levels))
            runs = run_lengths(np.isnan(masked["value"].transpose("series", "time").values))
            positions.append((series, runs[series, steps]))
        log.info("repeat %d of %d: %d cells hidden, %d scored", repeat + 1, repeats,
                 repeat_records[-1]["hidden_total"], y.size)
    if not positions:
        raise FitError("no hidden cell of any repeat was filled: the blocks that hold them "
                       "failed or were skipped (their errors are in the log); fix the cause, "
                       "use larger blocks, or run the holdout without blocks")

    series = np.concatenate([s for s, _ in positions])
    runs = np.concatenate([r for _, r in positions])
    groups = {
        "series": (series, [str(s) for s in panel["series"].values]),
        "gap_length": (_bucket(runs), [label for label, _, _ in GAP_BINS]),
    }
    cells_of = {name: {k: np.concatenate([part[k] for part in parts]) for k in parts[0]}
                for name, parts in pooled.items()}
    observed = ~np.isnan(truth)
    not_scored = observed.sum(axis=1) < options.rules.min_observed
    settings = {
        "scheme": scheme, "fraction": fraction, "repeats": repeats, "seed": options.seed,
        "method": options.method, "draws": options.draws, "tune": options.tune,
        "chains": options.chains, "levels": list(levels),
        "min_observed": options.rules.min_observed, "spec": spec_label,
        "spec_detail": spec.to_dict(), "baselines": list(baseline_names),
    }
    if plan is not None:
        settings["blocks"] = {**plan.describe(panel), "runner": type(runner).__name__,
                              "keep_draws": options.keep_draws}
    return {
        "format": CALIBRATION_FORMAT,
        "format_version": CALIBRATION_VERSION,
        "source": panel.attrs.get("source"),
        "input_sha256": panel.attrs.get("input_sha256"),
        "step": panel.attrs.get("step"),
        "start": pd.Timestamp(panel["time"].values[0]).isoformat(),
        "end": pd.Timestamp(panel["time"].values[-1]).isoformat(),
        "settings": settings,
        "repeats": repeat_records,
        "series_not_scored": [str(s) for s in panel["series"].values[not_scored]],
        "scores": {name: scores.breakdown(cells_of[name], levels, groups)
                   for name in predictors},
        "pit_histogram": {
            "bins": scores.PIT_BINS,
            **{name: scores.pit_histogram(cells["pit"]) for name, cells in cells_of.items()
               if "pit" in cells},
        },
        "widening": widening(cells_of[PREDICTOR], levels),
        "seconds": round(time.perf_counter() - started, 2),
        "versions": versions(),
    }


def widening(cells: dict, levels: Sequence[float]) -> dict:
    """Widening factors per level from the model's per-cell scores, with coverage before and after.

    ``coverage_after`` is measured on the same cells the factors come from,
    so it meets the level by construction; the guarantee for real gaps rests
    on their exchangeability with the hidden cells.
    """
    truth, median = cells["truth"], cells["point"]
    factors, before, after = {}, {}, {}
    for level in levels:
        key = scores.level_key(level)
        lower, upper = cells[f"lower_{key}"], cells[f"upper_{key}"]
        factor = widening_factor(truth, median, lower, upper, level)
        factors[key] = factor
        before[key] = float(np.mean(cells[f"covered_{key}"]))
        after[key] = None if factor is None else float(np.mean(scores.covered(
            truth, median - factor * (median - lower), median + factor * (upper - median))))
    return {
        "levels": list(levels),
        "factors": factors,
        "coverage_before": before,
        "coverage_after": after,
        "n_cells": int(truth.size),
        "rule": "split conformal: the ceil((n+1) level/100)-th smallest distance from the "
                "median in half-widths of its side, over all hidden cells of all repeats",
    }


def write(report: dict, out_dir: str | Path, *, overwrite: bool = False) -> Path:
    """Write ``report`` as ``holdout.json`` in ``out_dir`` (atomically)."""
    folder = outputs.prepare_dir(out_dir, ["holdout.json"], overwrite)
    return outputs.write_json(report, folder / "holdout.json")


def _check_scheme(scheme: str, fraction: float) -> None:
    if scheme not in SCHEMES:
        raise UsageError(f"scheme {scheme!r} is not known; choose one of {', '.join(SCHEMES)} "
                         "(--scheme)")
    if (isinstance(fraction, bool) or not isinstance(fraction, int | float)
            or not 0 < fraction < 1):
        raise UsageError(f"fraction {fraction!r} must lie strictly between 0 and 1, e.g. 0.2 "
                         "to hide a fifth of the observed cells (--fraction)")


def _targets(panel: xr.Dataset, n_observed: np.ndarray, scored: np.ndarray, fraction: float,
             min_observed: int) -> dict[int, int]:
    """Cells to hide per scored series; refuses a series that cannot spare them."""
    targets = {}
    for n in scored:
        count = int(np.floor(fraction * n_observed[n] + 0.5))
        if count < 1 or n_observed[n] - count < min_observed:
            raise InputError(
                f"{panel.attrs.get('source', 'input')}: series "
                f"{str(panel['series'].values[n])!r} has {n_observed[n]} observed cells, too "
                f"few to hide {fraction:.0%} of them (hiding {count}) and keep the "
                f"{min_observed} a fit needs; remove the series, lower --min-observed or "
                "change --fraction"
            )
        targets[int(n)] = count
    return targets


def _random(observed: np.ndarray, targets: dict[int, int],
            rng: np.random.Generator) -> np.ndarray:
    hidden = np.zeros_like(observed)
    for n, count in targets.items():
        hidden[n, rng.choice(np.flatnonzero(observed[n]), count, replace=False)] = True
    return hidden


def _blocks(panel: xr.Dataset, observed: np.ndarray, targets: dict[int, int],
            min_observed: int, rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    n_time = observed.shape[1]
    interior: list[list[int]] = [[] for _ in range(observed.shape[0])]
    for n, start, length in gap_runs(~observed):
        if start > 0 and start + length < n_time:
            interior[n].append(length)
    network = np.concatenate([np.asarray(x, dtype="int64") for x in interior])
    hidden = np.zeros_like(observed)
    sources, shortfall = {}, {}
    names = [str(s) for s in panel["series"].values]
    for n, count in targets.items():
        lengths, weights, source = _length_pool(np.asarray(interior[n], dtype="int64"),
                                                network, count)
        budget = int(observed[n].sum()) - min_observed
        hidden[n] = _place_blocks(observed[n], count, budget, lengths, weights, rng)
        sources[names[n]] = source
        placed = int(hidden[n].sum())
        if placed == 0:
            raise InputError(
                f"{panel.attrs.get('source', 'input')}: series {names[n]!r} has no run of "
                "observations long enough to hide a block in; use --scheme random"
            )
        if placed < count:
            shortfall[names[n]] = count - placed
    return hidden, {"lengths_from": sources, "shortfall": shortfall}


def _length_pool(own: np.ndarray, network: np.ndarray,
                 count: int) -> tuple[np.ndarray, np.ndarray, str]:
    """Block lengths up to ``count`` and their weights: own gaps, the Panel's, or the default."""
    for source, pool in (("own", own), ("network", network)):
        usable = pool[pool <= count]
        if usable.size:
            lengths, tally = np.unique(usable, return_counts=True)
            return lengths, tally / tally.sum(), source
    lengths = np.arange(1, min(count, DEFAULT_MAX_BLOCK) + 1)
    p = 1 / DEFAULT_MEAN_BLOCK
    weights = p * (1 - p) ** (lengths - 1)
    return lengths, weights / weights.sum(), "default"


def _place_blocks(observed: np.ndarray, count: int, budget: int, lengths: np.ndarray,
                  weights: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Hide blocks in one series until ``count`` cells are hidden (or no length fits).

    A block goes where it and a neighbour on each side (or the record's end)
    are observed and not hidden, so it never merges with another gap. At most
    ``budget`` cells are hidden in all.
    """
    hidden = np.zeros_like(observed)
    fits = np.ones(lengths.size, dtype=bool)
    placed = 0
    while placed < count:
        allowed = fits & (lengths <= budget - placed)
        if not allowed.any():
            break
        chance = weights * allowed
        k = rng.choice(lengths.size, p=chance / chance.sum())
        starts = _block_starts(observed & ~hidden, int(lengths[k]))
        if starts.size == 0:
            fits[k] = False  # only more cells get hidden, so it will not fit later either
            continue
        start = rng.choice(starts)
        hidden[start : start + lengths[k]] = True
        placed += int(lengths[k])
    return hidden


def _block_starts(open_cells: np.ndarray, length: int) -> np.ndarray:
    """Starts of blocks of ``length`` open cells with an open cell (or an end) on each side."""
    padded = np.concatenate(([1], open_cells.astype("int64"), [1]))
    total = np.concatenate(([0], np.cumsum(padded)))
    window = length + 2
    return np.flatnonzero(total[window:] - total[:-window] == window)


def _outage(panel: xr.Dataset, observed: np.ndarray, scored: np.ndarray, fraction: float,
            seed: int, repeat: int, min_observed: int,
            rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    n_time = observed.shape[1]
    window = max(1, int(np.floor(fraction * n_time + 0.5)))
    order = np.random.default_rng(seed).permutation(scored)
    hidden = np.zeros_like(observed)
    for j in range(order.size):
        n = order[(repeat + j) % order.size]
        total = np.concatenate(([0], np.cumsum(observed[n])))
        inside = total[window:] - total[:-window]
        starts = np.flatnonzero((inside >= 1) & (total[-1] - inside >= min_observed))
        if starts.size:
            start = int(rng.choice(starts))
            hidden[n, start : start + window] = observed[n, start : start + window]
            times = panel["time"].values
            return hidden, {
                "series": str(panel["series"].values[n]),
                "start": pd.Timestamp(times[start]).isoformat(),
                "end": pd.Timestamp(times[start + window - 1]).isoformat(),
                "steps": window,
            }
    raise InputError(
        f"{panel.attrs.get('source', 'input')}: no series can lose a window of {window} steps "
        f"({fraction:.0%} of the record) and keep {min_observed} observations; use a smaller "
        "--fraction"
    )


def _model_scores(fitted: Fitted, y: np.ndarray, cells: np.ndarray,
                  levels: Sequence[float], seed: int) -> dict:
    """Per-cell scores of the model's predictive draws at flat ``cells`` of the fitted Panel."""
    from gapband.predict import Predictive  # PyMC is imported only when a fit runs

    predictive = Predictive.of(fitted.fit, fitted.panel, seed=seed)
    return _score_chunks(y, lambda part: predictive.draws(cells[part]), levels)


def _kept_scores(result: xr.Dataset, y: np.ndarray, cells: np.ndarray,
                 levels: Sequence[float]) -> dict:
    """Per-cell scores of a block fill's kept joint draws at flat ``cells`` of the Panel."""
    draws = result["fill_draws"]
    return _score_chunks(
        y, lambda part: draws.sel(missing_cell=cells[part]).values.astype("float64"), levels)


def _score_chunks(y: np.ndarray, draws_of: Callable[[slice], np.ndarray],
                  levels: Sequence[float]) -> dict:
    """Per-cell scores, :data:`CHUNK_CELLS` cells at a time; ``draws_of(part)``: (draws, cells)."""
    parts = [scores.score_draws(y[part], draws_of(part), levels)
             for part in (slice(i, i + CHUNK_CELLS) for i in range(0, y.size, CHUNK_CELLS))]
    return {"truth": y, **{k: np.concatenate([p[k] for p in parts]) for k in parts[0]}}


def _check_kept_draws(keep: object) -> None:
    if isinstance(keep, bool) or not isinstance(keep, int | np.integer) or keep < 1:
        raise UsageError(f"keep_draws = {keep!r}: a block-wise holdout scores the hidden cells "
                         "with the joint draws the blocks keep, so it needs a whole number of at "
                         f"least 1 (default {DEFAULT_KEEP_DRAWS})")


def _refit_in_blocks(masked: xr.Dataset, plan: BlockPlan, spec: ModelSpec,
                     options: FillOptions, runner: Runner) -> tuple[xr.Dataset, dict]:
    """Fill the masked Panel block by block; the merged result and the repeat's block record."""
    from gapband.parallel import fill_blocks

    started = time.perf_counter()
    result, summary = fill_blocks(masked, plan, model=spec, options=options, runner=runner)
    runs = summary["blocks"]["runs"]
    return result, {"blocks": {
        "seconds": round(time.perf_counter() - started, 2),
        "failed": summary["failed_blocks"],
        "skipped": [r["name"] for r in runs if r["status"] == "skipped"],
        "diagnostics": summary["diagnostics"],
        "runs": runs,
    }}


def _not_scored(panel: xr.Dataset, series: np.ndarray) -> dict:
    """Hidden cells left unfilled by the blocks, per series (row positions ``series``)."""
    counts = np.bincount(series, minlength=panel.sizes["series"])
    names = [str(s) for s in panel["series"].values]
    if series.size:
        log.warning("%d hidden cells are not scored: the blocks left them unfilled (failed or "
                    "skipped blocks, or too few observations in a window)", series.size)
    return {"total": int(series.size),
            "series": {name: int(c) for name, c in zip(names, counts, strict=True) if c}}


def _baseline_scores(name: str, panel: xr.Dataset, spec: ModelSpec, y: np.ndarray,
                     cells: np.ndarray, levels: Sequence[float]) -> dict:
    fill = baselines.fill(name, panel, spec)
    point = fill["point"].transpose("series", "time").values.ravel()[cells]
    if "sd" in fill:
        sd = fill["sd"].transpose("series", "time").values.ravel()[cells]
        return {"truth": y, **scores.score_normal(y, point, sd, levels)}
    return {"truth": y, **scores.score_point(y, point)}


def _repeat_record(panel: xr.Dataset, repeat: int, hidden: Mask, refit: dict) -> dict:
    counts = hidden.hidden.sum("time").values
    observed = panel["value"].notnull().sum("time").values
    in_scope = counts > 0
    return {
        "repeat": repeat,
        "hidden": {str(s): int(c) for s, c in zip(panel["series"].values, counts, strict=True)
                   if c},
        "hidden_total": int(counts.sum()),
        "hidden_fraction": round(float(counts.sum() / observed[in_scope].sum()), 4),
        **hidden.details,
        **refit,
    }


def _fit_record(fitted: Fitted) -> dict:
    diagnostics = fitted.fit.diagnostics
    return {
        "fit_seconds": round(fitted.seconds, 2),
        "converged": diagnostics.get("converged"),
        "warnings": diagnostics.get("warnings", []),
    }


def _bucket(run_length: np.ndarray) -> np.ndarray:
    """Index of each run length's bin in :data:`gapband.panel.GAP_BINS`."""
    uppers = np.array([hi for _, _, hi in GAP_BINS])
    return np.searchsorted(uppers, run_length, side="left")
