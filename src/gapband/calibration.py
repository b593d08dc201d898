"""Widening factors per gap length: derived from holdout scores, read back and applied.

:func:`derive` turns the model's per-cell holdout scores into one
split-conformal widening factor per interval level and gap-length bucket
(:data:`gapband.panel.GAP_BINS`); :func:`read` loads them, with the
provenance of the holdout they came from, from ``holdout.json``;
:meth:`Calibration.check` refuses a fill they were not made for; and
:func:`widen` scales each filled cell's intervals by the factor of the
bucket of the real gap it sits in; :func:`widen_draws` scales the joint
draws kept for period statistics the same way, and :func:`draws_calibration`
reads back whether a fill's draws were.

Rules (docs/calibration.md states them for users):

- **Conformal factor** (:func:`conformal_factor`): the
  ``ceil((n + 1) × level / 100)``-th smallest conformity score of a
  bucket's n held-out cells.
- **Pooling**: a bucket with fewer than :data:`THIN_BUCKET` scored cells
  takes the cells of the buckets within distance 1, then 2, … of it, until
  the pool holds that many cells or every bucket. Its conformal factor is
  the larger of the pool's and, when its own cells suffice for the level,
  its own: pooling steadies a thin bucket's factor but never lowers it.
- **No narrowing without evidence**: a factor below 1 is kept only when the
  pool's intervals cover more than the level with one-sided binomial
  p-value below :data:`NARROW_P` (H0: coverage ≤ level); otherwise it is
  raised to 1. The test counts hidden runs, not cells (cells of one run are
  correlated): n = runs in the pool, k = floor(coverage × n).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr
from scipy import stats

from gapband.errors import InputError, UsageError
from gapband.panel import GAP_BINS
from gapband.scores import covered, level_key
from gapband.spec import ModelSpec

#: What ``gapband holdout`` writes into ``holdout.json`` and ``--calibration`` expects.
CALIBRATION_FORMAT = "gapband holdout"
#: 2: factors per gap-length bucket and the holdout's provenance (spec, transform, input).
CALIBRATION_VERSION = 2

#: Labels of the gap-length buckets, shortest first.
BUCKETS: tuple[str, ...] = tuple(label for label, _, _ in GAP_BINS)

#: Scored cells below which a bucket borrows its neighbours' cells. At 100
#: cells the 90 % conformal quantile rests on the 91st of 100 scores and
#: coverage is known to about ±3 points (binomial sd at 90 %).
THIN_BUCKET = 100
#: One-sided binomial p-value below which a bucket's over-coverage counts
#: as shown, so its intervals may be narrowed (a 95 % confidence).
NARROW_P = 0.05

#: A widening factor is stored this much (relatively) above the conformity
#: score that sets it, so that cell stays inside after floating-point rounding.
FACTOR_MARGIN = 1e-9

RULE = ("split conformal per gap-length bucket: the ceil((n+1) level/100)-th smallest "
        "distance from the median in half-widths of its side, over the bucket's n hidden cells "
        "of all repeats")
POOLING = (f"a bucket with fewer than {THIN_BUCKET} scored cells takes the cells of the buckets "
           f"within distance 1, then 2, ... of it until the pool holds {THIN_BUCKET} or every "
           "bucket; its factor is the larger of the pool's and its own (when it has enough "
           "cells for the level)")
NARROWING = (f"a factor below 1 is kept only when the pool covers more than the level with a "
             f"one-sided binomial p-value below {NARROW_P} (H0: coverage <= level), counting "
             "hidden runs, not cells (n = runs, k = floor(coverage x runs)); otherwise 1")


def bucket_of(run_length: np.ndarray) -> np.ndarray:
    """Index in :data:`BUCKETS` of each missing-run length (steps, at least 1)."""
    uppers = np.array([hi for _, _, hi in GAP_BINS])
    return np.searchsorted(uppers, run_length, side="left")


def conformity(y: np.ndarray, median: np.ndarray, lower: np.ndarray,
               upper: np.ndarray) -> np.ndarray:
    """Distance of ``y`` from the median in half-widths of its side (inf on a zero half-width)."""
    below = y < median
    half = np.where(below, median - lower, upper - median)
    distance = np.abs(y - median)
    return np.divide(distance, half, out=np.where(distance > 0, np.inf, 0.0), where=half > 0)


def conformal_factor(y: np.ndarray, median: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                     level: float) -> float | None:
    """The split-conformal factor on half-widths around the median that covers ``level`` %.

    Each cell's conformity score is how many half-widths it lies from the
    median, on its own side (:func:`conformity`). The factor is the
    ``ceil((n + 1) × level / 100)``-th smallest of the n scores: for a new
    cell exchangeable with these, coverage is at least ``level`` %.

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


def pool_of(counts: Sequence[int], bucket: int, thin: int = THIN_BUCKET) -> list[int]:
    """Buckets whose cells set ``bucket``'s factor: itself, then neighbours by distance."""
    radius = 0
    while True:
        members = [b for b in range(len(counts)) if abs(b - bucket) <= radius]
        if sum(counts[b] for b in members) >= thin or len(members) == len(counts):
            return members
        radius += 1


def derive(cells: Mapping[str, np.ndarray], bucket: np.ndarray, run: np.ndarray,
           levels: Sequence[float]) -> dict:
    """Widening factors per level and gap-length bucket, with the evidence behind each.

    Parameters
    ----------
    cells : mapping
        The model's per-cell holdout scores: ``truth``, ``point`` (the
        median) and ``lower_<L>``/``upper_<L>`` for each level.
    bucket : ndarray of int (cells,)
        Each cell's bucket index (:func:`bucket_of` of its missing run).
    run : ndarray of int (cells,)
        An id of the hidden run each cell sits in (distinct across repeats):
        the narrowing test counts runs.
    levels : sequence of float

    Returns
    -------
    dict
        The ``widening`` section of ``holdout.json`` (docs/outputs.md).
    """
    truth, median = cells["truth"], cells["point"]
    counts = np.bincount(bucket, minlength=len(BUCKETS)).tolist()
    factors: dict[str, dict[str, float | None]] = {level_key(lv): {} for lv in levels}
    by_bucket = {}
    for b, label in enumerate(BUCKETS):
        members = pool_of(counts, b)
        inside = np.isin(bucket, members)
        own = bucket == b
        n_runs = int(np.unique(run[inside]).size)
        record = {"n_cells": counts[b], "pooled_with": [BUCKETS[m] for m in members],
                  "n_pooled": int(inside.sum()), "n_runs_pooled": n_runs,
                  "coverage_before": {}, "conformal": {},
                  "p_over": {}, "narrowed": {}, "coverage_after": {}}
        for level in levels:
            key = level_key(level)
            lower_all, upper_all = cells[f"lower_{key}"], cells[f"upper_{key}"]
            lower, upper = lower_all[inside], upper_all[inside]
            raw = _larger(conformal_factor(truth[inside], median[inside], lower, upper, level),
                          conformal_factor(truth[own], median[own], lower_all[own],
                                           upper_all[own], level))
            rate = float(covered(truth[inside], lower, upper).mean()) if n_runs else None
            # P(X >= k) for X ~ Binomial(runs, level), k = floor(rate × runs): runs, not
            # cells, are the independent pieces of evidence.
            p_over = None if rate is None else float(
                stats.binom.sf(math.floor(rate * n_runs + 1e-9) - 1, n_runs, level / 100))
            narrowed = raw is not None and raw < 1 and p_over is not None and p_over < NARROW_P
            record["coverage_before"][key] = rate
            record["conformal"][key] = raw
            record["p_over"][key] = p_over
            record["narrowed"][key] = narrowed
            factor = None if raw is None else (raw if narrowed else max(raw, 1.0))
            factors[key][label] = factor
            # on the bucket's own cells; by construction at least the level when not pooled
            record["coverage_after"][key] = None if factor is None or not own.any() else \
                _coverage(truth[own], median[own], lower_all[own], upper_all[own], factor)
        by_bucket[label] = record
    before, after = {}, {}
    for level in levels:
        key = level_key(level)
        lower, upper = cells[f"lower_{key}"], cells[f"upper_{key}"]
        before[key] = float(np.mean(covered(truth, lower, upper)))
        table = np.array([np.nan if f is None else f for f in factors[key].values()])
        c = table[bucket]
        after[key] = None if np.isnan(c).any() else _coverage(truth, median, lower, upper, c)
    return {
        "levels": list(levels),
        "buckets": list(BUCKETS),
        "factors": factors,
        "coverage_before": before,
        "coverage_after": after,
        "by_bucket": by_bucket,
        "n_cells": int(truth.size),
        "rule": RULE,
        "pooling": POOLING,
        "narrowing": NARROWING,
    }


def _larger(pooled: float | None, own: float | None) -> float | None:
    """The pool's factor, raised to the bucket's own where that is larger (None: none)."""
    return pooled if own is None or (pooled is not None and pooled >= own) else own


def _coverage(y: np.ndarray, median: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              factor: float | np.ndarray) -> float:
    """Share of ``y`` inside the interval with half-widths scaled by ``factor``."""
    return float(np.mean(covered(y, median - factor * (median - lower),
                                 median + factor * (upper - median))))


def spec_content(spec: ModelSpec) -> dict:
    """The spec as JSON data, without its description (which does not change a fit)."""
    content = json.loads(json.dumps(spec.to_dict()))
    content.pop("description", None)
    return content


def spec_sha256(spec: ModelSpec) -> str:
    """SHA-256 of :func:`spec_content` as canonical JSON (sorted keys, no spaces)."""
    text = json.dumps(spec_content(spec), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class Calibration:
    """Widening factors per level and gap-length bucket, and where they came from."""

    path: str
    sha256: str
    method: str
    scheme: str
    transform: str
    spec: dict
    spec_sha256: str
    input_sha256: str | None
    #: ``{level key: {bucket label: factor or None}}``
    factors: dict[str, dict[str, float | None]]
    #: Longest missing run (steps) among the scored hidden cells.
    longest_tested: int

    def check(self, method: str, levels: tuple[float, ...], spec: ModelSpec) -> None:
        """Refuse a fill these factors were not derived for.

        Raises
        ------
        InputError
            Another method, transform or model spec.
        UsageError
            A level without a factor for every bucket.
        """
        if method != self.method:
            raise InputError(
                f"calibration file {self.path!r} was made with --method {self.method}; its "
                f"factors say nothing about {method} intervals: run gapband holdout with "
                f"--method {method}, or fill with --method {self.method}")
        if spec.transform != self.transform:
            raise InputError(
                f"calibration file {self.path!r} was made with transform {self.transform!r}, "
                f"this fill uses {spec.transform!r}: fill with --transform {self.transform}, "
                f"or rerun gapband holdout with --transform {spec.transform}")
        if spec_sha256(spec) != self.spec_sha256:
            differ = sorted(k for k, v in spec_content(spec).items() if self.spec.get(k) != v)
            raise InputError(
                f"calibration file {self.path!r} was made with another model spec (it differs "
                f"in {', '.join(differ) or 'its content'}); fill with the spec the file records "
                "under settings.spec_detail, or rerun gapband holdout with this --model")
        for level in levels:
            by_bucket = self.factors.get(level_key(level)) or {}
            if any(by_bucket.get(label) is None for label in BUCKETS):
                known = [k for k, v in self.factors.items()
                         if all(v.get(label) is not None for label in BUCKETS)]
                raise UsageError(
                    f"calibration file {self.path!r} has no widening factor for the "
                    f"{level:g} % level (it has {', '.join(known) or 'none'}); fill with "
                    "--levels among those, or rerun gapband holdout with this level (and "
                    "enough hidden cells for it)")

    def data_warning(self, input_sha256: str | None) -> str | None:
        """A warning when the fill's input is not the file the holdout hid cells of."""
        if input_sha256 == self.input_sha256:
            return None
        return (f"calibration file {self.path!r} was made on other data (input sha256 "
                f"{str(self.input_sha256)[:12]}, this input {str(input_sha256)[:12]}); its "
                "factors hold only as far as the gaps and the data are alike: rerun gapband "
                "holdout on this input")

    def record(self, levels: tuple[float, ...]) -> dict:
        """What the outputs say about the widening applied (JSON-ready)."""
        return {
            "file": self.path,
            "sha256": self.sha256,
            "method": self.method,
            "scheme": self.scheme,
            "transform": self.transform,
            "spec_sha256": self.spec_sha256,
            "input_sha256": self.input_sha256,
            "longest_tested_steps": self.longest_tested,
            "factors": {level_key(lv): self.factors[level_key(lv)] for lv in levels},
        }


def read(path: str | Path) -> Calibration:
    """Read the widening factors and provenance of a ``holdout.json``.

    Raises
    ------
    InputError
        The file cannot be read, is not JSON, is not a gapband holdout file
        of this version (an older one says to rerun ``gapband holdout``), lacks
        a field, or holds a factor that is not a positive number.
    """
    path = Path(path)
    name = str(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read calibration file {name!r}: {exc.strerror}") from exc
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"calibration file {name!r} is not JSON ({exc}); give the "
                         "holdout.json written by gapband holdout") from exc
    if not isinstance(data, dict) or data.get("format") != CALIBRATION_FORMAT:
        raise InputError(f"calibration file {name!r} is not a gapband holdout file "
                         f"(no \"format\": \"{CALIBRATION_FORMAT}\"); give the holdout.json "
                         "written by gapband holdout")
    version = data.get("format_version")
    if version != CALIBRATION_VERSION:
        older = isinstance(version, int) and version < CALIBRATION_VERSION
        raise InputError(
            f"calibration file {name!r} has format_version {version!r}; this gapband reads "
            f"version {CALIBRATION_VERSION}"
            + (" (factors per gap length, and the spec, transform and input they came from)"
               if older else "") + ": rerun gapband holdout")
    try:
        settings, widening = data["settings"], data["widening"]
        found = Calibration(
            name, hashlib.sha256(raw).hexdigest(), settings["method"], settings["scheme"],
            settings["transform"], dict(settings["spec_detail"]), settings["spec_sha256"],
            data["input_sha256"], {k: dict(v) for k, v in widening["factors"].items()},
            int(data["evidence"]["longest_tested_steps"]))
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise InputError(f"calibration file {name!r} lacks {exc} or holds it in another "
                         "form; rerun gapband holdout") from exc
    for key, by_bucket in found.factors.items():
        for label, factor in by_bucket.items():
            ok = factor is None or (isinstance(factor, int | float)
                                    and not isinstance(factor, bool)
                                    and np.isfinite(factor) and factor > 0)
            if not ok:
                raise InputError(f"calibration file {name!r}: the factor of level {key}, gap "
                                 f"length {label}, is {factor!r}, not a positive number; rerun "
                                 "gapband holdout")
    return found


def widen(summaries: xr.Dataset, calibration: Calibration, levels: tuple[float, ...],
          gap_length: xr.DataArray) -> xr.Dataset:
    """Scale each interval's half-widths around the median by its level's and bucket's factor.

    ``lower = median - c (median - lower)``, ``upper = median + c (upper -
    median)``, with c the factor of the cell's gap-length bucket. Intervals
    are then nested again where different factors crossed them: each level's
    bounds are taken at least as wide as those of the levels below it.
    Observed cells (NaN bounds) stay NaN; ``fill_mean``, ``fill_median`` and
    ``fill_sd`` are unchanged.

    Parameters
    ----------
    gap_length : DataArray of int, dims (series, time)
        Length in steps of the real missing run each cell sits in (0 where
        observed).
    """
    out = summaries.copy()
    median = summaries["fill_median"]
    code = xr.DataArray(bucket_of(np.maximum(gap_length.values, 1)), coords=gap_length.coords,
                        dims=gap_length.dims)
    inner: tuple[xr.DataArray, xr.DataArray] | None = None
    for level in sorted(levels):
        key = level_key(level)
        by_bucket = calibration.factors[key]
        table = np.array([by_bucket[label] for label in BUCKETS], dtype="float64")
        factor = xr.DataArray(table[code.values], coords=code.coords, dims=code.dims)
        names = [f"{side}_{key.replace('.', '_')}" for side in ("lower", "upper")]
        lower = median - factor * (median - summaries[names[0]])
        upper = median + factor * (summaries[names[1]] - median)
        if inner is not None:
            lower, upper = np.fmin(lower, inner[0]), np.fmax(upper, inner[1])
        note = ("widened around the median by the factor of the cell's gap length (steps) "
                + ", ".join(f"{label}: {f:.4g}" for label, f in zip(BUCKETS, table,
                                                                     strict=True))
                + f" ({calibration.path})")
        for name, bound in zip(names, (lower, upper), strict=True):
            out[name] = bound.where(summaries[name].notnull())
            out[name].attrs = {**summaries[name].attrs, "comment": note}
        inner = (lower, upper)
    return out


#: Missing cells whose joint draws are widened at a time (bounds working memory).
WIDEN_CHUNK_CELLS = 4096


def widen_draws(draws: xr.Dataset, median: xr.DataArray, calibration: Calibration,
                levels: tuple[float, ...], gap_length: xr.DataArray) -> xr.Dataset:
    """Widen a fill's joint draws as :func:`widen` widens its intervals; mark them calibrated.

    In each cell, every draw's deviation from the cell's median is scaled by
    the factor, for the cell's gap-length bucket, of the central level its
    rank stands for (:func:`scale_draws`). The widened draws' central
    intervals at each level then match the cells' widened bounds, and each
    cell's draws keep their order, so how draws move together across cells
    and time is the model's, unchanged.

    The draws are widened in place, a chunk of cells at a time: they can be
    the largest array a fill holds, and a second copy would double it.

    Parameters
    ----------
    draws : Dataset
        ``fill_draws`` dims (fill_draw, missing_cell) with coordinate
        ``missing_cell``, the flat index series × time steps + time index
        into ``median`` (:func:`gapband.filling.joint_draws`).
    median : DataArray, dims (series, time)
        The cells' predictive medians (``fill_median``), the centre of the widening.
    gap_length : DataArray of int, dims (series, time)
        Length in steps of the real missing run each cell sits in.

    Returns
    -------
    Dataset
        ``draws``, with ``fill_draws`` widened and its attributes ``calibrated
        = "yes"``, ``calibration_file`` and ``comment`` saying so.
    """
    grid = median.transpose("series", "time")
    cells = draws["missing_cell"].values
    centre = grid.values.ravel()[cells]
    lengths = gap_length.transpose("series", "time").sel(series=grid["series"]).values.ravel()
    code = bucket_of(np.maximum(lengths[cells], 1))
    ordered = sorted(levels)
    table = np.array([[calibration.factors[level_key(lv)][label] for label in BUCKETS]
                      for lv in ordered], dtype="float64")
    values = draws["fill_draws"].values
    for begin in range(0, cells.size, WIDEN_CHUNK_CELLS):
        chunk = slice(begin, begin + WIDEN_CHUNK_CELLS)
        values[:, chunk] = scale_draws(values[:, chunk], centre[chunk], table[:, code[chunk]],
                                       ordered)
    draws["fill_draws"].attrs.update({
        "calibrated": "yes",
        "calibration_file": calibration.path,
        "comment": f"{draws['fill_draws'].attrs.get('comment', '')}; each draw's deviation "
                   "from its cell's median widened by the factor of its gap length and of the "
                   f"central level its rank stands for ({calibration.path})".lstrip("; "),
    })
    return draws


def scale_draws(values: np.ndarray, median: np.ndarray, factors: np.ndarray,
                levels: Sequence[float]) -> np.ndarray:
    """Scale each draw's deviation from its cell's median by the factor its rank stands for.

    A cell's K draws are ranked; the draw of rank r (0 to K - 1) sits at
    quantile u = r / (K - 1) of the cell's draws, the position numpy's
    default quantile (linear interpolation between order statistics) gives
    it, and so at the edge of the central interval of level |2u - 1|. Its
    factor is that level's, interpolated linearly between the calibrated
    levels and held at the nearest one outside them; its deviation from the
    median is multiplied by it. Going outward from the median on each side,
    the scaled deviations are then kept at least as large as those nearer
    the median, as :func:`widen` keeps a level's bounds at least as wide as
    the levels below it, so the draws never change order.

    Parameters
    ----------
    values : ndarray (draws, cells)
        The draws; non-finite draws are left as they are.
    median : ndarray (cells,)
        Each cell's median.
    factors : ndarray (levels, cells)
        Each cell's factor at each level, levels ascending.
    levels : sequence of float
        The levels in %, ascending.

    Returns
    -------
    ndarray (draws, cells), of ``values``' dtype
        Cells whose factors are all 1 are returned unchanged, bit for bit.
    """
    out = values.copy()
    moved = np.flatnonzero((factors != 1).any(axis=0))
    n_draws = values.shape[0]
    if moved.size == 0 or n_draws == 0:
        return out
    order = np.argsort(values[:, moved], axis=0, kind="stable")
    ranked = np.take_along_axis(values[:, moved], order, axis=0).astype("float64")
    rank_level = np.abs(2 * np.arange(n_draws) / max(n_draws - 1, 1) - 1)
    if n_draws == 1:
        rank_level[:] = 0.0  # one draw stands for the median
    # Linear interpolation between the levels, constant beyond them, as a (draws, levels)
    # matrix of weights: np.interp is linear in the values it interpolates.
    fractions = np.asarray(levels, dtype="float64") / 100
    weights = np.stack([np.interp(rank_level, fractions, column)
                        for column in np.eye(fractions.size)], axis=1)
    factor = weights @ factors[:, moved]
    finite = np.isfinite(ranked)
    deviation = np.where(finite, factor * (ranked - median[moved]), 0.0)
    above = np.maximum.accumulate(np.maximum(deviation, 0.0), axis=0)
    below = np.maximum.accumulate(np.maximum(-deviation, 0.0)[::-1], axis=0)[::-1]
    widened = np.where(finite, median[moved] + above - below, ranked)
    block = np.empty_like(ranked)
    np.put_along_axis(block, order, widened, axis=0)
    out[:, moved] = block.astype(values.dtype)
    return out


def draws_calibration(result: xr.Dataset) -> str | None:
    """The calibration file a fill's joint draws were widened by, or None when they were not.

    A fill made before the draws were widened has no ``calibrated``
    attribute on ``fill_draws``: its draws were not widened.
    """
    if "fill_draws" not in result or result["fill_draws"].attrs.get("calibrated") != "yes":
        return None
    return str(result["fill_draws"].attrs.get("calibration_file", ""))
