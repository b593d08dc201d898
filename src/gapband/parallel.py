"""Fill a large Panel block by block: plan the blocks, run them, merge the results.

A block is a group of series over a time window. :func:`plan_blocks` groups
the series by the correlation of their observed values, so series that
inform each other are fitted together, and cuts the record into overlapping
windows, each owning a non-overlapping core: every cell of the Panel lies in
exactly one block's core. :func:`fill_blocks` fills every block
independently with :func:`gapband.filling.fill`, keeps each block's core and
merges them; observed cells come from the Panel untouched and the flags are
recomputed on the merged result. Blocks run one after another in this
process (:class:`InProcess`) or on Dask (:class:`DaskRunner`); a block that
raises is run once more, then reported by name while the others are merged.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import logging
import os
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd
import xarray as xr
from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    TextColumn,
    TimeRemainingColumn,
)
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform

from gapband import flags
from gapband.calibration import Calibration
from gapband.errors import FitError, GapbandError, InputError, UsageError
from gapband.filling import (
    FillOptions,
    check_flag_level,
    check_levels,
    checked_calibration,
    fill,
    fittable,
    observed_unchanged,
    real_gap_length,
    record_run,
    resolve_spec,
)
from gapband.panel import step_of
from gapband.spec import ModelSpec

log = logging.getLogger(__name__)

Duration = str | pd.Timedelta | timedelta
Auto = Literal["auto"]

#: The overlap must span this many periods of the spec's shortest seasonal
#: cycle: a core cell then sees whole cycles of data on both sides, so the
#: paths near a window's edge are pinned down as well as in a whole-record fit.
OVERLAP_PERIODS = 3
#: Smallest overlap in steps for a spec without seasonal cycles: an AR(1)
#: with coefficient 0.95, about the most persistent seen in hourly monitoring
#: data, keeps 0.95**48 < 9 % of its state after 48 steps.
OVERLAP_STEPS_WITHOUT_CYCLES = 48
#: ``auto``: a Panel of at most this many cells is one block.
AUTO_SINGLE_BLOCK_CELLS = 250_000
#: ``auto``: most series in one group.
AUTO_MAX_SERIES = 100
#: ``auto``: cells (series × steps) a block aims at; with 2,000 draws and four
#: factors its posterior paths take about 0.3 GB (docs/scaling.md).
AUTO_BLOCK_CELLS = 500_000
#: ``auto``: a window's core is at least this many overlaps long, so refitting
#: the overlaps costs at most half again the work of the cores.
AUTO_CORE_OVERLAPS = 4
#: Fewest common observations for the correlation of two series to count;
#: with fewer, the pair is taken as unrelated (distance 1).
MIN_COMMON = 10
#: Time steps of the correlation sums computed at a time (bounds memory).
CORRELATION_CHUNK = 4096
#: Runs of a block before it is reported as failed: the first and one retry.
ATTEMPTS = 2


@dataclass(frozen=True)
class Block:
    """One group of series over one time window, and the core it answers for.

    ``rows`` are series positions in the Panel (increasing); ``window`` and
    ``core`` are time-step ranges ``[start, stop)``, the core inside the window.
    """

    name: str
    rows: tuple[int, ...]
    window: tuple[int, int]
    core: tuple[int, int]


@dataclass(frozen=True)
class BlockPlan:
    """Groups of series × overlapping time windows; build with :func:`plan_blocks`."""

    series: tuple[str, ...]
    n_time: int
    groups: tuple[tuple[int, ...], ...]
    windows: tuple[tuple[tuple[int, int], tuple[int, int]], ...]
    max_series: int
    window_steps: int
    overlap_steps: int

    @property
    def blocks(self) -> list[Block]:
        """Every (group, window) pair, group by group, windows in time order."""
        return [
            Block(f"g{g:02d}-w{w:02d}", rows, window, core)
            for g, rows in enumerate(self.groups)
            for w, (window, core) in enumerate(self.windows)
        ]

    def check(self, panel: xr.Dataset, spec: ModelSpec) -> None:
        """Refuse a Panel the plan was not made for, or a spec its windows do not suit.

        Raises
        ------
        UsageError
        """
        if tuple(str(s) for s in panel["series"].values) != self.series or (
            panel.sizes["time"] != self.n_time
        ):
            raise UsageError("this block plan was made for another Panel (series or time "
                             "steps differ); plan the blocks of the Panel being filled")
        step = step_of(panel)
        _check_overlap(self.overlap_steps, spec, step)
        _check_windows(self.windows, spec, step)

    def describe(self, panel: xr.Dataset) -> dict:
        """The plan, JSON-ready: settings as durations, groups by series id, blocks in time."""
        step = step_of(panel)
        times = pd.DatetimeIndex(panel["time"].values)

        def span(steps: tuple[int, int]) -> list[str]:
            return [times[steps[0]].isoformat(), times[steps[1] - 1].isoformat()]

        return {
            "max_series": self.max_series,
            "window": _duration_text(self.window_steps * step),
            "overlap": _duration_text(self.overlap_steps * step),
            "groups": [[self.series[i] for i in rows] for rows in self.groups],
            "blocks": [{"name": b.name, "group": g, "window": span(b.window),
                        "core": span(b.core)}
                       for b, g in zip(self.blocks, _group_of_blocks(self), strict=True)],
        }


def parse_blocks(text: str) -> dict:
    """Read a block setting such as ``auto`` or ``series=50,window=60D,overlap=3D``.

    Keys left out are chosen automatically.

    Returns
    -------
    dict
        Keyword arguments of :func:`plan_blocks` (``max_series``, ``window``,
        ``overlap``).

    Raises
    ------
    UsageError
        An unknown key, a repeated key, or a part that is not ``key=value``.
    """
    keys = {"series": "max_series", "window": "window", "overlap": "overlap"}
    chosen: dict = {}
    if text.strip() == "auto":
        return chosen
    for part in text.split(","):
        key, sep, value = (s.strip() for s in part.partition("="))
        if not sep or key not in keys or not value or keys[key] in chosen:
            raise UsageError(
                f"block setting {part.strip()!r} in {text!r} is not understood; give 'auto' "
                "or key=value pairs, each key once, from series (most series per group), "
                "window and overlap (durations), e.g. 'series=50,window=60D,overlap=3D'"
            )
        chosen[keys[key]] = value
    if "max_series" in chosen:
        try:
            chosen["max_series"] = int(chosen["max_series"])
        except ValueError:
            raise UsageError(f"series={chosen['max_series']!r} in {text!r} is not a whole "
                             "number; give the most series per group, e.g. series=50") from None
    return chosen


def plan_blocks(
    panel: xr.Dataset,
    *,
    max_series: int | Auto = "auto",
    window: Duration | Auto = "auto",
    overlap: Duration | Auto = "auto",
    model: str | Path | ModelSpec | None = None,
) -> BlockPlan:
    """Split a Panel into groups of correlated series × overlapping time windows.

    Series are clustered by average linkage (UPGMA) on the distance
    ``1 - |corr|`` of their observed values (:func:`correlation`); the tree
    is cut top-down into subtrees of at most ``max_series`` series, and
    neighbouring subtrees (in the tree's leaf order) are joined while they
    fit. Time is cut into windows of about ``window``, each overlapping its
    neighbours by ``overlap``; the cores between the overlaps partition the
    record.

    Parameters
    ----------
    panel : Dataset
        A Panel.
    max_series : int or "auto"
        Most series in one group; auto: all of them up to
        :data:`AUTO_MAX_SERIES`.
    window, overlap : duration or "auto"
        Window length and the overlap on each side, e.g. ``"60D"`` and
        ``"3D"``. The overlap must span :data:`OVERLAP_PERIODS` periods of the
        spec's shortest seasonal cycle; every window must hold the longest
        cycle. Auto: the smallest allowed overlap, and windows of about
        :data:`AUTO_BLOCK_CELLS` cells per block (one block for a Panel of at
        most :data:`AUTO_SINGLE_BLOCK_CELLS` cells).
    model : spec, path or None
        The spec the blocks will be filled with (as for
        :func:`gapband.filling.fill`); its seasonal cycles bound the overlap
        and the window.

    Returns
    -------
    BlockPlan

    Raises
    ------
    UsageError
        A setting is not a positive whole number or duration, the overlap is
        too short for the spec, or a window too short for its cycles or its
        overlaps.
    SpecError
        A bad spec.
    """
    spec, _ = resolve_spec(panel, model)
    n_series, n_time = panel.sizes["series"], panel.sizes["time"]
    step = step_of(panel)
    small = n_series * n_time <= AUTO_SINGLE_BLOCK_CELLS
    if max_series == "auto":
        size = n_series if small else min(n_series, AUTO_MAX_SERIES)
    else:
        size = _whole("max_series", max_series)
    floor = _overlap_floor(spec, step)[0]
    overlap_steps = floor if overlap == "auto" else _steps("overlap", overlap, step)
    _check_overlap(overlap_steps, spec, step)
    if window == "auto":
        shortest = max(_longest_cycle(spec, step), (AUTO_CORE_OVERLAPS + 2) * overlap_steps)
        window_steps = n_time if small else max(AUTO_BLOCK_CELLS // min(size, n_series), shortest)
    else:
        window_steps = _steps("window", window, step)
    if window_steps <= 2 * overlap_steps:
        raise UsageError(
            f"window {_duration_text(window_steps * step)} must be longer than twice the "
            f"overlap ({_duration_text(overlap_steps * step)} on each side), so that each "
            "window keeps a core of its own; lengthen the window or shorten the overlap"
        )
    windows = _windows(n_time, window_steps, overlap_steps)
    _check_windows(windows, spec, step)
    groups = _groups(correlation(panel), size)
    return BlockPlan(tuple(str(s) for s in panel["series"].values), n_time, groups, windows,
                     size, min(window_steps, n_time), overlap_steps)


def correlation(panel: xr.Dataset) -> xr.DataArray:
    """Pearson correlation of every pair of series over their common observations.

    Pairwise-complete, as :meth:`pandas.DataFrame.corr`, from sums over time
    accumulated :data:`CORRELATION_CHUNK` steps at a time. A pair with fewer
    than :data:`MIN_COMMON` common observations, or constant over them, is NaN.

    Returns
    -------
    DataArray
        Dims ("series", "other"), both with the Panel's series ids; 1 on the diagonal.
    """
    values = panel["value"].transpose("series", "time").values
    seen = ~np.isnan(values)
    counts = seen.sum(axis=1)
    # Centre first (any per-series shift leaves a correlation unchanged) so the
    # sums below do not cancel catastrophically.
    centre = np.where(counts > 0, np.where(seen, values, 0.0).sum(axis=1) / np.maximum(counts, 1),
                      0.0)
    n_series = values.shape[0]
    common, sum_x, sum_xx, sum_xy = (np.zeros((n_series, n_series)) for _ in range(4))
    for start in range(0, values.shape[1], CORRELATION_CHUNK):
        part = slice(start, start + CORRELATION_CHUNK)
        mask = seen[:, part].astype("float64")
        x = np.where(seen[:, part], values[:, part] - centre[:, None], 0.0)
        common += mask @ mask.T
        sum_x += x @ mask.T  # [i, j]: sum of x_i where both i and j are observed
        sum_xx += (x * x) @ mask.T
        sum_xy += x @ x.T
    with np.errstate(divide="ignore", invalid="ignore"):
        cov = sum_xy - sum_x * sum_x.T / common
        var_i = sum_xx - sum_x**2 / common
        corr = cov / np.sqrt(var_i * var_i.T)
    corr[(common < MIN_COMMON) | ~np.isfinite(corr)] = np.nan
    corr = np.clip((corr + corr.T) / 2, -1.0, 1.0)
    np.fill_diagonal(corr, 1.0)
    ids = panel["series"].values
    return xr.DataArray(corr, dims=("series", "other"), coords={"series": ids, "other": ids})


def _groups(corr: xr.DataArray, max_series: int) -> tuple[tuple[int, ...], ...]:
    """Cut the average-linkage tree on 1 - |corr| into groups of at most ``max_series``."""
    n_series = corr.sizes["series"]
    if n_series <= max_series:
        return (tuple(range(n_series)),)
    distance = 1.0 - np.abs(np.nan_to_num(corr.values, nan=0.0))
    np.fill_diagonal(distance, 0.0)
    tree = hierarchy.to_tree(hierarchy.linkage(squareform(distance, checks=False), "average"))
    subtrees, stack = [], [tree]
    while stack:  # depth first, left before right: subtrees come in leaf order
        node = stack.pop()
        if node.get_count() <= max_series:
            subtrees.append(node.pre_order())
        else:
            stack += [node.get_right(), node.get_left()]
    joined = [subtrees[0]]
    for rows in subtrees[1:]:
        if len(joined[-1]) + len(rows) <= max_series:
            joined[-1] = joined[-1] + rows
        else:
            joined.append(rows)
    # Panel order inside and between groups: a one-block plan then fits exactly the Panel.
    return tuple(sorted(tuple(sorted(int(r) for r in rows)) for rows in joined))


def _windows(n_time: int, window: int,
             overlap: int) -> tuple[tuple[tuple[int, int], tuple[int, int]], ...]:
    """Windows of at most ``window`` steps, overlapping by ``overlap``; cores partition time."""
    if n_time <= window:
        return (((0, n_time), (0, n_time)),)
    n_windows = -(-n_time // (window - 2 * overlap))
    edges = np.round(np.linspace(0, n_time, n_windows + 1)).astype("int64")
    return tuple(((max(0, int(a) - overlap), min(n_time, int(b) + overlap)), (int(a), int(b)))
                 for a, b in zip(edges[:-1], edges[1:], strict=True))


def _overlap_floor(spec: ModelSpec, step: pd.Timedelta) -> tuple[int, str]:
    """Smallest allowed overlap in steps, and the reason in words."""
    if not spec.seasonal:
        return OVERLAP_STEPS_WITHOUT_CYCLES, (
            f"{OVERLAP_STEPS_WITHOUT_CYCLES} steps for a spec without seasonal cycles")
    shortest = min(spec.seasonal, key=lambda s: s.steps(step))
    steps = int(np.ceil(OVERLAP_PERIODS * shortest.steps(step)))
    return steps, (f"{OVERLAP_PERIODS} periods of the shortest seasonal cycle "
                   f"({shortest.period!r}), {steps} steps")


def _longest_cycle(spec: ModelSpec, step: pd.Timedelta) -> int:
    return int(np.ceil(max((s.steps(step) for s in spec.seasonal), default=0)))


def _check_overlap(overlap: int, spec: ModelSpec, step: pd.Timedelta) -> None:
    floor, reason = _overlap_floor(spec, step)
    if overlap < floor:
        raise UsageError(
            f"block overlap {_duration_text(overlap * step)} is too short: it must span at "
            f"least {reason} = {_duration_text(floor * step)}, so that cells near a "
            "window's edge are fitted with data on both sides; give overlap="
            f"{_duration_text(floor * step)} or more, or 'auto'"
        )


def _check_windows(windows, spec: ModelSpec, step: pd.Timedelta) -> None:
    longest = _longest_cycle(spec, step)
    short = min(stop - start for (start, stop), _ in windows)
    if short < longest:
        raise UsageError(
            f"a block window of {_duration_text(short * step)} is shorter than the longest "
            f"seasonal cycle of the spec ({_duration_text(longest * step)}), which each "
            "window must hold to fit it; lengthen the window, or use 'auto'"
        )


def _steps(option: str, given: Duration, step: pd.Timedelta) -> int:
    try:
        duration = pd.Timedelta(given)
    except (TypeError, ValueError):
        duration = pd.NaT
    if pd.isna(duration) or duration <= pd.Timedelta(0):
        raise UsageError(f"block {option} {given!r} is not a positive duration; give one such "
                         "as '60D' or '720h', or 'auto'")
    steps = int(round(duration / step))
    if steps < 1:
        raise UsageError(f"block {option} {given!r} is shorter than one time step "
                         f"({_duration_text(step)}); give a longer duration or 'auto'")
    return steps


def _whole(option: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
        raise UsageError(f"block {option} {value!r} must be a whole number of at least 1, "
                         "or 'auto'")
    return int(value)


def _duration_text(duration: pd.Timedelta) -> str:
    """A duration in the largest whole unit: '3D', '36h', '90min', '45s'."""
    for unit, name in (("1D", "D"), ("1h", "h"), ("1min", "min"), ("1s", "s")):
        count, rest = divmod(duration, pd.Timedelta(unit))
        if not rest:
            return f"{count}{name}"
    return str(duration)


def _group_of_blocks(plan: BlockPlan) -> list[int]:
    return [g for g in range(len(plan.groups)) for _ in plan.windows]


@dataclass
class BlockOutcome:
    """What one block returned: its core's fill (or the error), attempts and seconds."""

    name: str
    status: Literal["filled", "failed", "skipped"]
    attempts: int
    seconds: float
    core: xr.Dataset | None = None
    draws: xr.DataArray | None = None
    summary: dict | None = None
    error: str | None = None
    error_type: type[BaseException] | None = None
    detail: str | None = None


@dataclass
class BlockJob:
    """Everything one block's fill needs; picklable, so it can run on a Dask worker."""

    block: Block
    panel: xr.Dataset
    n_time: int
    spec: ModelSpec
    options: FillOptions
    calibration: Calibration | None
    #: Length of the whole Panel's missing run each cell of the block sits in.
    gap_length: xr.DataArray
    #: Cells before the first or after the last observation of the whole Panel's series.
    outside: xr.DataArray | None = None

    def __call__(self, attempt: int = 1) -> BlockOutcome:
        """Fill the block and keep its core; an exception is returned, not raised."""
        started = time.perf_counter()
        try:
            result, summary = fill(self.panel, model=self.spec, options=self.options,
                                   calibration=self.calibration, gap_length=self.gap_length,
                                   outside=self.outside)
            core, draws = self._core(result)
        except Exception as exc:  # reported by name; the other blocks go on
            return self.failed(attempt, exc, time.perf_counter() - started)
        return BlockOutcome(self.block.name, "filled", attempt, time.perf_counter() - started,
                            core=core, draws=draws, summary=summary)

    def failed(self, attempt: int, exc: BaseException, seconds: float = 0.0) -> BlockOutcome:
        """The outcome of a run that raised ``exc``."""
        detail = "".join(traceback.format_exception(exc))
        return BlockOutcome(self.block.name, "failed", attempt, seconds,
                            error=f"{type(exc).__name__}: {exc}", error_type=type(exc),
                            detail=detail)

    def _core(self, result: xr.Dataset) -> tuple[xr.Dataset, xr.DataArray | None]:
        """The block's core; its joint draws re-indexed to flat cells of the whole Panel."""
        start = self.block.window[0]
        core = slice(self.block.core[0] - start, self.block.core[1] - start)
        kept = result.drop_vars(["fill_draws", "missing_cell"], errors="ignore").isel(time=core)
        if "fill_draws" not in result:
            return kept, None
        series, steps = np.divmod(result["missing_cell"].values, self.panel.sizes["time"])
        inside = (steps >= core.start) & (steps < core.stop)
        cells = np.asarray(self.block.rows)[series[inside]] * self.n_time + start + steps[inside]
        draws = result["fill_draws"].isel(missing_cell=inside).assign_coords(
            missing_cell=("missing_cell", cells, result["missing_cell"].attrs))
        return kept, draws


Done = Callable[[BlockOutcome], None]


@dataclass
class InProcess:
    """Run the blocks one after another in this process (each fit's chains still in parallel)."""

    def run(self, jobs: Sequence[BlockJob], done: Done) -> list[BlockOutcome]:
        """Run every job, a failed one :data:`ATTEMPTS` times in all; outcomes in job order."""
        outcomes = []
        for job in jobs:
            outcome = job(1)
            while outcome.status == "failed" and outcome.attempts < ATTEMPTS:
                log.warning("block %s failed (%s); running it again", job.block.name,
                            outcome.error)
                outcome = job(outcome.attempts + 1)
            done(outcome)
            outcomes.append(outcome)
        return outcomes


@dataclass
class DaskRunner:
    """Run the blocks on Dask: a new local cluster, or an existing scheduler.

    Parameters
    ----------
    workers : int, optional
        Worker processes of the local cluster, one thread each (so BLAS and
        the sampler do not oversubscribe the cores); default: one per CPU.
        Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``); its
        workers need this gapband installed.

    Inside a Dask worker (a daemonic process) each fit runs its chains one
    after another in the worker, as :func:`gapband.inference.fit` decides.
    """

    workers: int | None = None
    scheduler: str | None = None

    def __post_init__(self) -> None:
        if self.workers is not None:
            self.workers = _whole("workers", self.workers)

    def run(self, jobs: Sequence[BlockJob], done: Done) -> list[BlockOutcome]:
        """Run every job, a failed one :data:`ATTEMPTS` times in all; outcomes in job order."""
        from distributed import as_completed  # Dask is imported only when blocks run on it

        outcomes: list[BlockOutcome | None] = [None] * len(jobs)
        with self._client() as client:
            running = {client.submit(job, 1, pure=False): (i, 1) for i, job in enumerate(jobs)}
            pending = as_completed(list(running))
            for future in pending:
                i, attempt = running.pop(future)
                try:
                    outcome = future.result()
                except Exception as exc:  # the worker died, or the result did not come back
                    outcome = jobs[i].failed(attempt, exc)
                if outcome.status == "failed" and attempt < ATTEMPTS:
                    log.warning("block %s failed (%s); running it again", jobs[i].block.name,
                                outcome.error)
                    retry = client.submit(jobs[i], attempt + 1, pure=False)
                    running[retry] = (i, attempt + 1)
                    pending.add(retry)
                    continue
                outcomes[i] = outcome
                done(outcome)
        return outcomes

    @contextlib.contextmanager
    def _client(self):
        import dask
        from distributed import Client, LocalCluster

        with contextlib.ExitStack() as stack:
            if self.scheduler is not None:
                try:
                    client = stack.enter_context(Client(self.scheduler, timeout="20s"))
                except (OSError, TimeoutError) as exc:
                    raise UsageError(
                        f"cannot reach the Dask scheduler at {self.scheduler!r} ({exc}); check "
                        "the address, or leave --scheduler out to start a local cluster"
                    ) from exc
            else:
                # Dask starts its workers with MALLOC_TRIM_THRESHOLD_ set, which
                # turns off glibc's adaptive mmap threshold: every large
                # temporary array is then mapped and unmapped afresh, and the
                # sampler's sweeps ran 1.5 times slower. Leave glibc's default.
                stack.enter_context(dask.config.set(
                    {"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}))
                cluster = stack.enter_context(LocalCluster(
                    n_workers=self.workers or os.cpu_count() or 1, threads_per_worker=1,
                    processes=True, dashboard_address=None, silence_logs=logging.ERROR))
                client = stack.enter_context(Client(cluster))
            yield client


Runner = InProcess | DaskRunner


def fill_blocks(
    panel: xr.Dataset,
    plan: BlockPlan,
    *,
    model: str | Path | ModelSpec | None = None,
    transform: str | None = None,
    options: FillOptions | None = None,
    calibration: str | Path | None = None,
    runner: Runner | None = None,
) -> tuple[xr.Dataset, dict]:
    """Fill a Panel block by block and merge the blocks' cores.

    Each block is filled by :func:`gapband.filling.fill` with the spec and
    the number of shared factors (:func:`whole_panel_rank`, unless
    ``options.rank`` is given) resolved once for the whole Panel, the
    options given (no progress bars inside blocks) and seed
    ``options.seed + i`` for the i-th block. Block i answers for its core
    only. A block whose window gives no series ``min_observed`` observations
    is skipped; one that raises is run again once, then reported. The cells
    of a skipped or failed block stay missing and are flagged ``not_filled``.

    Parameters
    ----------
    panel : Dataset
        A Panel.
    plan : BlockPlan
        From :func:`plan_blocks` on this Panel.
    model, transform, options, calibration
        As for :func:`gapband.filling.fill`.
    runner : InProcess or DaskRunner, optional
        Where blocks run; default :class:`InProcess`.

    Returns
    -------
    result : Dataset
        As from :func:`gapband.filling.fill`. ``component_offset`` is each
        series' offset in its first fitted window; the other windows'
        differences from it are carried by ``component_trend``.
        ``fill_draws`` rows are joint within a block and independent between
        blocks. Attribute ``gapband_blocks`` holds the plan.
    summary : dict
        As from :func:`gapband.filling.fill`, diagnostics pooled over blocks
        (worst R-hat and ESS, every warning named by block), plus ``blocks``
        (the plan and each block's status, attempts, seconds, diagnostics
        and error) and ``failed_blocks`` (names).

    Raises
    ------
    UsageError, SpecError, InputError
        Bad options, spec, calibration or plan, found before any block runs;
        or the error every block failed with (its type kept).
    FitError
        Every block failed, not all with the same gapband error.
    """
    started = time.perf_counter()
    options = options or FillOptions()
    runner = runner or InProcess()
    levels = check_levels(tuple(options.levels))
    check_flag_level(options.rules, levels)
    spec, spec_label = resolve_spec(panel, model, transform)
    plan.check(panel, spec)
    widening, calibration_warning = (None, None) if calibration is None else \
        checked_calibration(calibration, panel, spec, options.method, levels)
    gap_length = real_gap_length(panel)
    outside = flags.extrapolated(panel)
    if options.rank is None:
        options = dataclasses.replace(
            options, rank=whole_panel_rank(panel, spec, options.rules.min_observed))
    blocks = plan.blocks
    jobs, positions, outcomes = [], [], {}
    counts = panel["value"].notnull().transpose("series", "time").values
    for i, block in enumerate(blocks):
        rows, (start, stop) = list(block.rows), block.window
        if not (counts[rows, start:stop].sum(axis=1) >= options.rules.min_observed).any():
            outcomes[i] = BlockOutcome(block.name, "skipped", 0, 0.0, error=(
                f"no series has {options.rules.min_observed} observations in this window"))
            continue
        sub = panel.isel(series=rows, time=slice(start, stop))
        sub.attrs = {**panel.attrs, "source": f"{panel.attrs.get('source', 'input')}, "
                                              f"block {block.name}"}
        block_options = dataclasses.replace(options, seed=options.seed + i, progress=False)
        jobs.append(BlockJob(block, sub, panel.sizes["time"], spec, block_options, widening,
                             gap_length.isel(series=rows, time=slice(start, stop)),
                             outside.isel(series=rows, time=slice(start, stop))))
        positions.append(i)
    ran = _run(runner, jobs, options.progress) if jobs else []
    outcomes |= dict(zip(positions, ran, strict=True))
    ordered = [outcomes[i] for i in range(len(blocks))]
    _raise_if_none_filled(ordered, options.rules.min_observed)
    merge_started = time.perf_counter()
    result = _merge(panel, blocks, ordered, options,
                    None if widening is None else widening.longest_tested)
    filled = [o for o in ordered if o.status == "filled"]
    diagnostics = _pooled_diagnostics(ordered)
    if calibration_warning is not None:
        diagnostics["warnings"] = [*diagnostics["warnings"], calibration_warning]
    summary = record_run(result, panel, spec, spec_label, options, levels, options.method,
                         diagnostics, widening, timings={
        "blocks_wall_s": round(merge_started - started, 2),
        "fit_total_s": round(sum(o.summary["timings"]["fit_total_s"] for o in filled), 2),
        "predict_s": round(sum(o.summary["timings"]["predict_s"] for o in filled), 2),
        "merge_s": round(time.perf_counter() - merge_started, 2),
    })
    result.attrs["gapband_blocks"] = json.dumps(plan.describe(panel))
    summary["blocks"] = {**plan.describe(panel), "runner": type(runner).__name__,
                         "rank": options.rank, "runs": [_run_record(o) for o in ordered]}
    summary["failed_blocks"] = [o.name for o in ordered if o.status == "failed"]
    return result, summary


def whole_panel_rank(panel: xr.Dataset, spec: ModelSpec, min_observed: int) -> int:
    """Shared factors the whole Panel supports (:func:`gapband.model.choose_rank`).

    Every block uses this many: a window sees only a stretch of the slow
    factors, and chosen from it alone the rank can fall short of what the
    whole record supports (on a simulated 30 × 43,800 panel with two factors,
    windows of half a year and of a year chose one, and the fills' MAE was
    11 % higher than with the two the whole panel chose).
    """
    from gapband.model import choose_rank, standardised  # PyMC is imported when fits run

    z, _, _ = standardised(fittable(panel, min_observed), spec)
    return choose_rank(z, spec)


def _run(runner: Runner, jobs: list[BlockJob], progress: bool) -> list[BlockOutcome]:
    """Run the jobs with a progress bar on stderr: blocks done / total, time remaining."""
    bar = Progress(TextColumn("blocks"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                   console=Console(stderr=True), disable=not progress, transient=True)

    def done(outcome: BlockOutcome) -> None:
        bar.advance(task)
        if outcome.status == "failed":
            log.warning("block %s failed after %d attempts: %s", outcome.name, outcome.attempts,
                        outcome.error)
        else:
            log.info("block %s filled in %.1f s", outcome.name, outcome.seconds)

    with bar:
        task = bar.add_task("blocks", total=len(jobs))
        return runner.run(jobs, done)


def _raise_if_none_filled(outcomes: list[BlockOutcome], min_observed: int) -> None:
    """Raise when no block was filled: the error all failures share, else FitError."""
    if any(o.status == "filled" for o in outcomes):
        return
    failed = [o for o in outcomes if o.status == "failed"]
    if not failed:
        raise InputError(
            f"no block window gives any series {min_observed} observations; use longer "
            "windows, lower --min-observed, or fill without blocks"
        )
    first = failed[0]
    message = (f"all {len(failed)} blocks that ran failed; the first, {first.name}, with "
               f"{first.error}")
    kinds = {o.error_type for o in failed}
    kind = kinds.pop() if len(kinds) == 1 else None
    if kind is not None and issubclass(kind, GapbandError):
        raise kind(message)
    raise FitError(f"{message}\n{first.detail}")


def _merge(panel: xr.Dataset, blocks: list[Block], outcomes: list[BlockOutcome],
           options: FillOptions, tested_gap: int | None) -> xr.Dataset:
    """The blocks' cores put together on the Panel, flags recomputed, observed cells kept."""
    filled = [(b, o) for b, o in zip(blocks, outcomes, strict=True) if o.status == "filled"]
    template = filled[0][1].core
    names = [str(n) for n, v in template.data_vars.items()
             if v.dims == ("series", "time")
             and n not in ("value", "filled", "fill_flag", "fill_reason")]
    shape = (panel.sizes["series"], panel.sizes["time"])
    merged = {name: np.full(shape, np.nan) for name in names}
    offset = np.full(shape[0], np.nan)
    unconverged = np.zeros(shape, dtype=bool)
    for block, outcome in filled:
        rows, core = np.asarray(block.rows), slice(*block.core)
        unconverged[rows, core] = not outcome.summary["diagnostics"]["converged"]
        for name in names:
            merged[name][rows, core] = outcome.core[name].transpose(
                "series", "time").values
        if "component_offset" in outcome.core and "component_trend" in merged:
            own = outcome.core["component_offset"].values
            first = np.isnan(offset[rows]) & ~np.isnan(own)
            offset[rows[first]] = own[first]
            # Keep offset + contributions = posterior mean: the trend takes the difference.
            shift = np.nan_to_num(own - offset[rows])
            merged["component_trend"][rows, core] += shift[:, None]
    result = panel.copy()
    for name in names:
        result[name] = (("series", "time"), merged[name], template[name].attrs)
    if "component_offset" in template:
        result["component_offset"] = ("series", offset, template["component_offset"].attrs)
    result = flags.assign(result, **dataclasses.asdict(options.rules),
                          unconverged=xr.DataArray(unconverged, dims=("series", "time")),
                          tested_gap=tested_gap)
    if not observed_unchanged(panel, result):  # a guard on our own code, never expected
        raise GapbandError("internal error: an observed value changed while merging blocks")
    parts = [o.draws for _, o in filled if o.draws is not None]
    if parts:
        draws = xr.concat(parts, dim="missing_cell").sortby("missing_cell")
        flag = result["fill_flag"].transpose("series", "time").values.ravel()
        expected = np.flatnonzero(np.isin(flag, (flags.FILLED, flags.FILLED_UNCERTAIN)))
        if not np.array_equal(draws["missing_cell"].values, expected):
            raise GapbandError("internal error: the merged joint draws do not match the "
                               "filled cells")
        result["fill_draws"] = draws
    return result


def _pooled_diagnostics(outcomes: list[BlockOutcome]) -> dict:
    """Worst R-hat and ESS over blocks, their warnings by block, and every failure."""
    filled = [o for o in outcomes if o.status == "filled"]
    each = [o.summary["diagnostics"] for o in filled]
    r_hats = [d["r_hat_max"] for d in each if d.get("r_hat_max") is not None]
    ess = [d["ess_bulk_min"] for d in each if d.get("ess_bulk_min") is not None]
    warnings = [f"block {o.name}: {w}" for o in filled for w in o.summary["diagnostics"].get(
        "warnings", [])]
    warnings += [f"block {o.name} failed after {o.attempts} attempts ({o.error}); its cells "
                 "are left missing and flagged not_filled" for o in outcomes
                 if o.status == "failed"]
    return {
        "n_draws": each[0].get("n_draws"),
        "r_hat_max": max(r_hats) if r_hats else None,
        "ess_bulk_min": min(ess) if ess else None,
        "blocks_filled": len(filled),
        "blocks_failed": sum(o.status == "failed" for o in outcomes),
        "blocks_skipped": sum(o.status == "skipped" for o in outcomes),
        "warnings": warnings,
        "converged": not warnings,
    }


def _run_record(outcome: BlockOutcome) -> dict:
    record = {"name": outcome.name, "status": outcome.status, "attempts": outcome.attempts,
              "seconds": round(outcome.seconds, 2)}
    if outcome.summary is not None:
        record["diagnostics"] = outcome.summary["diagnostics"]
        record["timings"] = outcome.summary["timings"]
    if outcome.error is not None:
        record["error"] = outcome.error
    return record
