"""Proof of calibration: hide observed cells, refit, score, and derive widening factors.

:func:`mask` hides observed cells in a pattern like real gaps; :func:`run`
refits the model on each masked Panel (K repeats), in one fit or block by
block (:mod:`gapband.parallel`), scores the hidden cells with the model's
predictive draws and with the baselines (:mod:`gapband.baselines`), states
per gap-length bucket how much evidence there is, and derives widening
factors per level and bucket (:func:`gapband.calibration.derive`) that
``gapband fill --calibration`` applies. :func:`write` saves the report as
``holdout.json``.

Masking schemes (only observed cells are hidden; series with fewer than
``min_observed`` observations are never filled, so never scored):

- ``gaps``: contiguous runs whose lengths are drawn from the Panel's own
  interior gaps, bucket by bucket (:data:`gapband.panel.GAP_BINS`), longest
  bucket first and each bucket's longest gap first. Of ``fraction ×
  observed`` hidden cells, each bucket that holds real gaps gets its share
  of the real missing cells, but at least an equal part. A run goes into a
  series with one observation (or the record's end) free on each side, so
  it keeps its drawn length, and no series loses more than
  :data:`SERIES_SHARE` of its observations. While a bucket holds fewer than
  :data:`gapband.calibration.THIN_BUCKET` scored cells, :func:`run` adds
  repeats (up to ``max_repeats``) and says so.
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
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Literal

import numpy as np
import pandas as pd
import xarray as xr

from gapband import baselines, outputs, scores
from gapband.calibration import (
    BUCKETS,
    CALIBRATION_FORMAT,
    CALIBRATION_VERSION,
    THIN_BUCKET,
    bucket_of,
    derive,
    spec_sha256,
)
from gapband.errors import FitError, InputError, UsageError
from gapband.filling import (
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
from gapband.panel import gap_runs, run_lengths
from gapband.spec import ModelSpec

if TYPE_CHECKING:
    from gapband.parallel import BlockPlan, Runner

log = logging.getLogger(__name__)

Scheme = Literal["gaps", "random", "blocks", "outage"]
SCHEMES: tuple[str, ...] = ("gaps", "random", "blocks", "outage")
DEFAULT_SCHEME: Scheme = "gaps"
DEFAULT_FRACTION = 0.2
#: Repeats (fits) the ``gaps`` scheme may run in all to fill its buckets.
DEFAULT_MAX_REPEATS = 3
#: Largest share of a series' observations the ``gaps`` scheme hides: the
#: series keeps most of its own record to be fitted from.
SERIES_SHARE = 0.5

#: Mean length in steps of the fallback block distribution (geometric), used
#: when no series of the Panel has an interior gap to learn lengths from.
DEFAULT_MEAN_BLOCK = 6
#: Longest fallback block, in steps.
DEFAULT_MAX_BLOCK = 60

#: Hidden cells whose predictive draws are held in memory at a time.
CHUNK_CELLS = 4096

PREDICTOR = "gapband"


@dataclasses.dataclass(frozen=True)
class Mask:
    """The observed cells hidden in one repeat, and how they were chosen."""

    hidden: xr.DataArray
    details: dict


def mask(
    panel: xr.Dataset,
    *,
    scheme: Scheme = DEFAULT_SCHEME,
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
    scheme : {"gaps", "random", "blocks", "outage"}
    fraction : float
        Share of each series' observed cells to hide (gaps: of all scored
        series' together; random, blocks: of each), or share of the record
        the outage window spans; in (0, 1).
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
    elif scheme == "gaps":
        hidden, details = _gaps(panel, observed, scored, fraction, min_observed, rng)
    else:
        targets = _targets(panel, n_observed, scored, fraction, min_observed)
        if scheme == "random":
            hidden, details = _random(observed, targets, rng), {}
        else:
            hidden, details = _blocks(panel, observed, targets, min_observed, rng)
    return Mask(xr.DataArray(hidden, coords=values.coords, dims=values.dims, name="hidden"),
                details)


def run(
    panel: xr.Dataset,
    *,
    model: str | Path | ModelSpec | None = None,
    transform: str | None = None,
    options: FillOptions | None = None,
    scheme: Scheme = DEFAULT_SCHEME,
    fraction: float = DEFAULT_FRACTION,
    repeats: int = 1,
    max_repeats: int = DEFAULT_MAX_REPEATS,
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
    max_repeats : int
        ``gaps`` only: while a gap-length bucket with real gaps holds fewer
        than :data:`gapband.calibration.THIN_BUCKET` scored cells and the
        last repeat added some, further repeats run, up to this many in all
        (recorded under ``evidence``).
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
    for name, number in (("repeats", repeats), ("max_repeats", max_repeats)):
        if isinstance(number, bool) or not isinstance(number, int) or number < 1:
            raise UsageError(f"{name} = {number!r} must be a whole number of at least 1 "
                             f"(--{name.replace('_', '-')})")
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
    real = _real_gaps(panel, options.rules.min_observed, options.rules.extrapolate)
    predictors = (PREDICTOR, *baseline_names)
    pooled: dict[str, list[dict]] = {name: [] for name in predictors}
    # per repeat: scored cells' series, missing-run length and run id
    positions: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    repeat_records = []
    for repeat in range(max(repeats, max_repeats) if scheme == "gaps" else repeats):
        have = np.bincount(bucket_of(np.concatenate([r for _, r, _ in positions])),
                           minlength=len(BUCKETS)) if positions else np.zeros(len(BUCKETS), int)
        short = [label for b, label in enumerate(BUCKETS)
                 if real[label]["cells"] and have[b] < THIN_BUCKET]
        # More repeats only while a short bucket still gains cells from them.
        if repeat >= repeats and not any(
                repeat_records[-1]["scored_by_gap_length"].get(label) for label in short):
            break
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
        missing_after = np.isnan(masked["value"].transpose("series", "time").values)
        runs = run_lengths(missing_after)
        scored_cells = np.bincount(bucket_of(runs[series, steps]), minlength=len(BUCKETS))
        repeat_records.append({
            **_repeat_record(panel, repeat, hidden, refit),
            "scored_by_gap_length": {label: int(n) for label, n in zip(
                BUCKETS, scored_cells, strict=True) if n},
            "short_before": short})
        if y.size:
            pooled[PREDICTOR].append(
                _model_scores(fitted, y, cells, levels, options.seed + repeat) if plan is None
                else _kept_scores(result, y, series * n_time + steps, levels))
            for name in baseline_names:
                pooled[name].append(_baseline_scores(name, to_fit, spec, y, cells, levels))
            positions.append((series, runs[series, steps],
                              _run_ids(missing_after)[series, steps] + repeat * truth.size))
        log.info("repeat %d: %d cells hidden, %d scored", repeat + 1,
                 repeat_records[-1]["hidden_total"], y.size)
    if not positions:
        raise FitError("no hidden cell of any repeat was filled: the blocks that hold them "
                       "failed or were skipped (their errors are in the log); fix the cause, "
                       "use larger blocks, or run the holdout without blocks")

    series = np.concatenate([s for s, _, _ in positions])
    runs = np.concatenate([r for _, r, _ in positions])
    run_ids = np.concatenate([i for _, _, i in positions])
    groups = {
        "series": (series, [str(s) for s in panel["series"].values]),
        "gap_length": (bucket_of(runs), list(BUCKETS)),
    }
    cells_of = {name: {k: np.concatenate([part[k] for part in parts]) for k in parts[0]}
                for name, parts in pooled.items()}
    observed = ~np.isnan(truth)
    not_scored = observed.sum(axis=1) < options.rules.min_observed
    settings = {
        "scheme": scheme, "fraction": fraction, "repeats": repeats,
        "max_repeats": max_repeats, "seed": options.seed,
        "method": options.method, "draws": options.draws, "tune": options.tune,
        "chains": options.chains, "levels": list(levels),
        "min_observed": options.rules.min_observed, "spec": spec_label,
        "transform": spec.transform, "spec_sha256": spec_sha256(spec),
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
        "evidence": evidence(real, bucket_of(runs), run_ids, int(runs.max()), repeats,
                             repeat_records),
        "scores": {name: scores.breakdown(cells_of[name], levels, groups)
                   for name in predictors},
        "pit_histogram": {
            "bins": scores.PIT_BINS,
            **{name: scores.pit_histogram(cells["pit"]) for name, cells in cells_of.items()
               if "pit" in cells},
        },
        "widening": derive(cells_of[PREDICTOR], bucket_of(runs), run_ids, levels),
        "seconds": round(time.perf_counter() - started, 2),
        "versions": versions(),
    }


def evidence(real: dict, bucket: np.ndarray, run_id: np.ndarray, longest_tested: int,
             repeats: int, records: Sequence[dict]) -> dict:
    """How much holdout evidence each gap-length bucket has, against the real gaps it stands for.

    ``real``: the Panel's gaps per bucket (runs, cells, longest); ``bucket``
    and ``run_id``: each scored hidden cell's bucket index and hidden run;
    ``records``: the repeats run, of which the first ``repeats`` were asked for.

    A bucket's status: ``tested`` (at least :data:`THIN_BUCKET` scored
    cells), ``thin`` (fewer; its factor pools neighbours' cells), ``untested``
    (real gaps but no scored cell: its fills rest on other buckets' evidence),
    or ``no gaps`` (neither).
    """
    scored = np.bincount(bucket, minlength=len(BUCKETS))
    buckets = {}
    for b, label in enumerate(BUCKETS):
        n = int(scored[b])
        status = ("tested" if n >= THIN_BUCKET else "thin" if n else
                  "untested" if real[label]["cells"] else "no gaps")
        buckets[label] = {"real_gaps": real[label]["runs"], "real_cells": real[label]["cells"],
                          "hidden_runs": int(np.unique(run_id[bucket == b]).size),
                          "hidden_cells": n,
                          "status": status}
    extra = len(records) - repeats
    return {
        "target_cells": THIN_BUCKET,
        "buckets": buckets,
        "untested": [label for label, rec in buckets.items() if rec["status"] == "untested"],
        "longest_real_steps": max((rec["longest"] for rec in real.values()), default=0),
        "longest_tested_steps": longest_tested,
        "repeats_run": len(records),
        "extra_repeats": extra,
        "note": (f"{extra} repeat(s) added: after {repeats}, gaps of "
                 f"{', '.join(records[repeats]['short_before'])} steps had fewer than "
                 f"{THIN_BUCKET} scored hidden cells" if extra > 0 else None),
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


def _gaps(panel: xr.Dataset, observed: np.ndarray, scored: np.ndarray, fraction: float,
          min_observed: int, rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    """Hide runs drawn from the Panel's interior gap lengths, bucket by bucket, longest first."""
    n_time = observed.shape[1]
    lengths = np.array([length for _, start, length in gap_runs(~observed[scored])
                        if start > 0 and start + length < n_time], dtype="int64")
    if lengths.size:
        values, weights = np.unique(lengths, return_counts=True)
        source = "panel"
    else:
        values = np.arange(1, DEFAULT_MAX_BLOCK + 1)
        p = 1 / DEFAULT_MEAN_BLOCK
        weights = p * (1 - p) ** (values - 1)
        source = "default"
    code = bucket_of(values)
    n_observed = observed.sum(axis=1)
    total = int(np.floor(fraction * n_observed[scored].sum() + 0.5))
    share = np.bincount(code, weights=weights * values, minlength=len(BUCKETS))
    share = share / share.sum()
    # Each bucket with gaps gets at least an equal part of the pass, so a rare
    # bucket (a few long outages among many short gaps) is tested too.
    share = np.where(share > 0, np.maximum(share, 1 / np.count_nonzero(share)), 0.0)
    share = share / share.sum()
    room = np.zeros(observed.shape[0], dtype="int64")
    room[scored] = np.minimum(n_observed[scored] - min_observed,
                              np.floor(SERIES_SHARE * n_observed[scored]).astype("int64"))
    hidden = np.zeros_like(observed)
    targets, placed = {}, {}
    for b in sorted(set(code.tolist()), reverse=True):
        label = BUCKETS[b]
        target = max(int(np.floor(share[b] * total + 0.5)), 1)
        targets[label] = target
        placed[label] = _place_bucket(observed, hidden, room, values[code == b],
                                      weights[code == b], target, rng)
    shortfall = {label: targets[label] - n for label, n in placed.items() if n < targets[label]}
    if not hidden.any():
        raise InputError(
            f"{panel.attrs.get('source', 'input')}: no series has a run of observations long "
            "enough to hide a gap like its real ones in; use --scheme random")
    return hidden, {"lengths_from": source, "targets": targets, "hidden_by_gap_length": placed,
                    "shortfall": shortfall}


def _place_bucket(observed: np.ndarray, hidden: np.ndarray, room: np.ndarray,
                  lengths: np.ndarray, weights: np.ndarray, target: int,
                  rng: np.random.Generator) -> int:
    """Hide runs of one bucket's lengths (its longest first) until ``target`` cells; in place.

    A run goes into a random series with ``room`` for it and a free stretch
    (:func:`_block_starts`); ``hidden`` and ``room`` are updated.
    """
    fits = np.ones(lengths.size, dtype=bool)
    unfit: set[tuple[int, int]] = set()
    count = 0
    first = True
    while count < target and fits.any():
        if first:  # the bucket's longest real gap is tried first, so it is always tested
            k, first = int(lengths.argmax()), False
        else:
            chance = weights * fits
            k = int(rng.choice(lengths.size, p=chance / chance.sum()))
        length = int(lengths[k])
        hosts = [n for n in rng.permutation(np.flatnonzero(room >= length)).tolist()
                 if (n, length) not in unfit]
        for n in hosts:
            starts = _block_starts(observed[n] & ~hidden[n], length)
            if starts.size:
                start = int(rng.choice(starts))
                hidden[n, start : start + length] = True
                room[n] -= length
                count += length
                break
            unfit.add((n, length))  # only more cells get hidden: it will not fit later either
        else:
            fits[k] = False
    return count


def _real_gaps(panel: xr.Dataset, min_observed: int, extrapolate: bool = False) -> dict:
    """Per gap-length bucket, the real missing runs a fill fills: runs, cells.

    Runs before a series' first or after its last observation count only
    with ``extrapolate`` (by default a fill leaves them empty).
    """
    missing = panel["value"].transpose("series", "time").isnull().values
    n_time = missing.shape[1]
    filled = (~missing).sum(axis=1) >= min_observed
    found = {label: {"runs": 0, "cells": 0, "longest": 0} for label in BUCKETS}
    for n, start, length in gap_runs(missing):
        at_an_end = start == 0 or start + length == n_time
        if filled[n] and (extrapolate or not at_an_end):
            record = found[BUCKETS[int(bucket_of(np.array([length]))[0])]]
            record["runs"] += 1
            record["cells"] += length
            record["longest"] = max(record["longest"], length)
    return found


def _run_ids(missing: np.ndarray) -> np.ndarray:
    """An id per missing run (a flat index of its first cell), at each of its cells."""
    ids = np.full(missing.shape, -1, dtype="int64")
    for n, start, length in gap_runs(missing):
        ids[n, start : start + length] = n * missing.shape[1] + start
    return ids


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
    # Every hidden cell is scored, at the record's ends too; flags play no part here.
    scoring = dataclasses.replace(options, rules=dataclasses.replace(
        options.rules, extrapolate=True, max_width=None, max_rel_width=None,
        max_var_width=None))
    result, summary = fill_blocks(masked, plan, model=spec, options=scoring, runner=runner)
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
