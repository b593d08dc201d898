"""The values a period statistic is computed over, for one series, with their validity.

A statistic runs over *units*: the time steps themselves, days (by their mean
or maximum), running means over a window of steps (one ending at each step),
or days by the maximum of their running means. Each unit is valid when at
least a stated share of its sub-units is valid, judged on observed values
only (a step is valid when observed); an invalid unit is left out of the
estimate and of the measured figure alike, so the two stand on the same
basis. Inside a valid unit the estimate uses the completed draws (observed
cells plus the draw's fills), the measured figure the observed cells alone.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Units:
    """One series' units of one kind.

    ``values`` (draws, unit) from the completed draws and ``measured`` (unit,)
    from observed values, both NaN where a unit is left out; ``filled``
    (unit,) the fraction of each unit's value coming from filled cells;
    ``valid`` (unit,) whether the unit meets its rule.
    """

    values: np.ndarray
    measured: np.ndarray
    filled: np.ndarray
    valid: np.ndarray


def needed(rule_pct: float, expected: np.ndarray | int) -> np.ndarray:
    """Sub-units a unit needs to be valid: ``rule_pct`` % of ``expected``, rounded up."""
    # The small tolerance keeps 75 % of 24 at 18, not 19, despite rounding in 0.75 * 24.
    return np.ceil(rule_pct / 100 * np.asarray(expected) - 1e-9)


def steps(draws: np.ndarray, value: np.ndarray, filled: np.ndarray) -> Units:
    """The time steps: every completed step in the estimate, observed ones in the measured."""
    return Units(draws, value, filled.astype(float), ~np.isnan(value))


def days(kind: str, draws: np.ndarray, value: np.ndarray, filled: np.ndarray,
         first: np.ndarray, expected: np.ndarray, rule_pct: float) -> Units:
    """Day means (``kind="mean"``) or maxima (``"max"``) of the steps.

    ``first``/``expected``: each day's first step and the steps of a whole day.
    """
    observed = ~np.isnan(value)
    valid = np.add.reduceat(observed.astype("int64"), first) >= needed(rule_pct, expected)
    if kind == "mean":
        per_draw, seen = segment_mean(draws, first), segment_mean(value[None, :], first)[0]
    else:
        per_draw, seen = _max(draws, first), _max(value[None, :], first)[0]
    present = np.add.reduceat((~np.isnan(draws[0])).astype("int64"), first)
    with np.errstate(all="ignore"):
        share = np.add.reduceat(filled.astype("int64"), first) / present
    return Units(np.where(valid, per_draw, np.nan), np.where(valid, seen, np.nan),
                 np.where(valid, share, np.nan), valid)


def running(draws: np.ndarray, value: np.ndarray, filled: np.ndarray, width: int,
            rule_pct: float) -> Units:
    """Running means over the ``width`` steps ending at each step.

    Steps before the record count as missing, so the first windows are valid
    only when the rule allows that many missing steps.
    """
    observed = ~np.isnan(value)
    valid = _window_sum(observed[None, :].astype(float), width)[0] >= needed(rule_pct, width)
    total = _window_sum(np.nan_to_num(draws), width)
    count = _window_sum((~np.isnan(draws[:1])).astype(float), width)
    seen_total = _window_sum(np.nan_to_num(value)[None, :], width)[0]
    with np.errstate(all="ignore"):
        per_draw = total / count
        seen = seen_total / _window_sum(observed[None, :].astype(float), width)[0]
        share = _window_sum(filled[None, :].astype(float), width)[0] / count[0]
    return Units(np.where(valid, per_draw, np.nan), np.where(valid, seen, np.nan),
                 np.where(valid, share, np.nan), valid)


def day_max(means: Units, first: np.ndarray, expected: np.ndarray, rule_pct: float) -> Units:
    """Each day's maximum of its valid running means (those ending in the day).

    A day is valid when at least ``rule_pct`` % of its expected running means
    are valid; its filled fraction is the mean over its valid running means.
    """
    valid = np.add.reduceat(means.valid.astype("int64"), first) >= needed(rule_pct, expected)
    per_draw = _max(means.values, first)
    seen = _max(means.measured[None, :], first)[0]
    share = segment_mean(means.filled[None, :], first)[0]
    return Units(np.where(valid, per_draw, np.nan), np.where(valid, seen, np.nan),
                 np.where(valid, share, np.nan), valid)


def _window_sum(x: np.ndarray, width: int) -> np.ndarray:
    """Sums over the ``width`` entries ending at each entry of ``x`` (..., time), zeros before."""
    # One cumulative sum, not a loop over the window: the rounding error stays near
    # the float64 epsilon times the record's total, far below any data resolution.
    total = np.cumsum(x, axis=-1)
    out = total.copy()
    out[..., width:] -= total[..., :-width]
    return out


def segment_mean(x: np.ndarray, first: np.ndarray) -> np.ndarray:
    """NaN-skipping means of ``x`` (..., time) over the segments starting at ``first``."""
    present = ~np.isnan(x)
    total = np.add.reduceat(np.where(present, x, 0.0), first, axis=-1)
    count = np.add.reduceat(present.astype("int64"), first, axis=-1)
    with np.errstate(all="ignore"):
        return total / np.where(count, count, np.nan)


def _max(x: np.ndarray, first: np.ndarray) -> np.ndarray:
    """NaN-skipping maxima of ``x`` (..., time) over the segments starting at ``first``."""
    top = np.maximum.reduceat(np.where(np.isnan(x), -np.inf, x), first, axis=-1)
    return np.where(np.isinf(top), np.nan, top)
