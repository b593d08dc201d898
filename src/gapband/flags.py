"""Fill flags: which cells were observed, filled, filled with doubt, or left empty.

The flag is a CF status-flag variable (``flag_values`` + ``flag_meanings``,
CF Conventions 1.10, section 3.5), linked from ``value`` and ``filled`` by
``ancillary_variables``. Codes, in order of precedence:

- ``0 observed``: the cell holds an observation; ``filled`` copies it bit for bit.
- ``3 not_filled``: a missing cell of a series with fewer than
  ``min_observed`` observations, or one the model gave no usable fill for
  (a mean, median, sd or interval bound that is NaN or infinite, :func:`no_fill`);
  ``filled`` and every fill summary are NaN there.
- ``2 filled_uncertain``: a missing cell whose interval at ``level`` is wider
  than ``max_width`` (data units) or than ``max_rel_width`` times the series'
  spread, which sits in a missing run lasting longer than ``max_gap`` or
  longer than the longest run a calibration's holdout tested
  (``tested_gap``, unless ``flag_untested`` is off), or which comes from a
  fit whose chains did not converge (unless accepted).
- ``1 filled``: every other missing cell.
"""

from __future__ import annotations

import re
import warnings
from datetime import timedelta

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import UsageError
from gapband.panel import run_lengths, step_of

FLAG_MEANINGS: tuple[str, ...] = ("observed", "filled", "filled_uncertain", "not_filled")
FLAG_VALUES = np.arange(len(FLAG_MEANINGS), dtype="int8")
OBSERVED, FILLED, FILLED_UNCERTAIN, NOT_FILLED = (int(v) for v in FLAG_VALUES)

#: Fewest observations a series needs to be filled. The model standardises each
#: series by its own mean and sd and learns its loadings from its observations;
#: below about ten, both are guesses driven by the priors.
MIN_OBSERVED = 10

#: Quantiles of a series' observed values whose distance is its spread.
SPREAD_QUANTILES = (0.05, 0.95)

_LEVEL_NAME = re.compile(r"^lower_(\d+(?:\.\d+)?)$")
_SUMMARY_PREFIXES = ("fill_", "lower_", "upper_")


def interval_levels(result: xr.Dataset) -> tuple[str, ...]:
    """Return the interval levels present, named as in ``lower_<L>``, increasing.

    A level counts only when both ``lower_<L>`` and ``upper_<L>`` exist.
    """
    found = [
        m.group(1)
        for name in result.data_vars
        if (m := _LEVEL_NAME.match(str(name))) and f"upper_{m.group(1)}" in result
    ]
    return tuple(sorted(found, key=float))


def spread(result: xr.Dataset) -> xr.DataArray:
    """Return the spread of each series' observed values: the 5-95 % quantile range.

    A quantile range rather than the sd, because monitoring series are skewed
    and spiky and one spike should not make every interval look narrow. It is
    the width of the central 90 % of the observations, so a 90 % fill interval
    as wide as the spread says the fill knows no more than the series' own
    distribution does. Quantiles are numpy's default (linear) definition.

    Returns
    -------
    DataArray, dims (series,)
        In data units; NaN for a series without observations.
    """
    lo, hi = SPREAD_QUANTILES
    with warnings.catch_warnings():
        # A series without observations has no spread; its NaN is the answer.
        warnings.simplefilter("ignore", RuntimeWarning)
        q = result["value"].quantile([lo, hi], dim="time", skipna=True)
    return q.sel(quantile=hi, drop=True) - q.sel(quantile=lo, drop=True)


def assign(
    result: xr.Dataset,
    *,
    level: float = 90,
    max_width: float | None = None,
    max_rel_width: float | None = None,
    max_gap: str | pd.Timedelta | timedelta | None = None,
    min_observed: int = MIN_OBSERVED,
    accept_unconverged: bool = False,
    unconverged: bool | xr.DataArray = False,
    flag_untested: bool = True,
    tested_gap: int | None = None,
    gap_length: xr.DataArray | None = None,
) -> xr.Dataset:
    """Flag every cell and build the ``filled`` series.

    Parameters
    ----------
    result : Dataset
        A Panel with predictive summaries: ``value``, ``fill_median`` and
        ``lower_<L>``/``upper_<L>``, dims (series, time), NaN at observed cells.
    level : float
        Interval level (percent) the width rules look at; must be one of the
        levels in ``result``. Checked only when a width rule is set.
    max_width : float, optional
        A fill whose interval is wider than this (data units) is uncertain.
    max_rel_width : float, optional
        A fill whose interval is wider than this times the series'
        :func:`spread` is uncertain.
    max_gap : duration, optional
        A fill in a missing run lasting longer than this (run length × grid
        step; a month counts 30.44 days) is uncertain. A string such as
        ``"72h"`` or a Timedelta.
    min_observed : int
        Series with fewer observations are not filled.
    accept_unconverged : bool
        Keep fills of an unconverged fit as ``filled`` (the user's choice).
    unconverged : bool or DataArray of bool, dims (series, time)
        Cells filled by a fit whose chains did not converge (True: all); they
        are uncertain unless ``accept_unconverged``.
    flag_untested : bool
        Flag fills in missing runs longer than ``tested_gap`` uncertain.
    tested_gap : int, optional
        Longest missing run (steps) the calibration's holdout tested; None:
        no calibration, no such rule.
    gap_length : DataArray of int, dims (series, time), optional
        Length of the missing run each cell sits in; default: the runs of
        ``result``'s missing cells (a block fill passes the whole Panel's).

    Returns
    -------
    Dataset
        A new Dataset with ``fill_flag`` (int8) and ``filled`` (float64) added;
        fill summaries set to NaN where not filled. ``result`` is unchanged.

    Raises
    ------
    UsageError
        An option is out of range, ``level`` is not among the computed
        levels, or ``result`` lacks a variable the rules need.
    """
    _require(result, ["value", "fill_median"])
    _check_positive("max_width", max_width)
    _check_positive("max_rel_width", max_rel_width)
    gap_limit = _duration("max_gap", max_gap)
    if isinstance(min_observed, bool) or not isinstance(min_observed, int | np.integer):
        raise UsageError(f"min_observed must be a whole number, got {min_observed!r}")
    if min_observed < 1:
        raise UsageError(f"min_observed must be at least 1, got {min_observed!r}")

    value = result["value"].transpose("series", "time")
    observed = value.notnull()
    missing = ~observed
    too_few = observed.sum("time") < min_observed
    not_filled = missing & (too_few | no_fill(result))

    uncertain = xr.zeros_like(observed)
    if max_width is not None or max_rel_width is not None:
        width = _width(result, level)
        if max_width is not None:
            uncertain = uncertain | (width > max_width)
        if max_rel_width is not None:
            uncertain = uncertain | (width > max_rel_width * spread(result))
    if gap_length is None:
        runs = xr.DataArray(run_lengths(missing.values), coords=missing.coords, dims=missing.dims)
    else:
        runs = gap_length.transpose("series", "time")
    if gap_limit is not None:
        uncertain = uncertain | (runs > gap_limit / step_of(result))
    untested = flag_untested and tested_gap is not None
    if untested:
        uncertain = uncertain | (missing & (runs > tested_gap))
    unsettled = not accept_unconverged and bool(np.any(unconverged))
    if unsettled:
        uncertain = uncertain | (missing & unconverged)

    flag = xr.where(
        observed,
        OBSERVED,
        xr.where(not_filled, NOT_FILLED, xr.where(uncertain, FILLED_UNCERTAIN, FILLED)),
    ).astype("int8")

    out = result.copy()
    for name in _summary_names(out):
        out[name] = out[name].where(~not_filled)
    # xr.where copies the observed floats as stored; no arithmetic touches them.
    out["filled"] = xr.where(observed, value, out["fill_median"], keep_attrs=False)
    out["filled"].attrs = {
        "long_name": "observed value, or posterior median where missing",
        **_units(value),
        "ancillary_variables": "fill_flag",
    }
    out["value"].attrs = {**value.attrs, "ancillary_variables": "fill_flag"}
    out["fill_flag"] = flag
    out["fill_flag"].attrs = {
        "long_name": "fill flag",
        "standard_name": "status_flag",
        "flag_values": FLAG_VALUES.copy(),
        "flag_meanings": " ".join(FLAG_MEANINGS),
        "comment": _rules_text(level, max_width, max_rel_width, gap_limit, min_observed,
                               unsettled, tested_gap if untested else None),
    }
    return out


def no_fill(result: xr.Dataset) -> xr.DataArray:
    """Missing cells the model gave no usable fill for: a summary that is not finite.

    An overflow or a failed fit can leave NaN or infinite summaries; such a
    cell is flagged ``not_filled`` rather than handed on as a fill.

    Returns
    -------
    DataArray of bool, dims (series, time)
    """
    names = [name for name in ("fill_mean", "fill_median", "fill_sd") if name in result]
    names += [f"{side}_{level}" for level in interval_levels(result) for side in ("lower", "upper")]
    finite = xr.concat([np.isfinite(result[name]) for name in names], "summary").all("summary")
    return (result["value"].isnull() & ~finite).transpose("series", "time")


def flag_counts(result: xr.Dataset) -> dict:
    """Count the cells per flag, overall and per series, JSON-ready.

    Returns
    -------
    dict
        ``{"overall": {meaning: n, ...}, "series": {series id: {meaning: n, ...}}}``
        with every meaning present (zero counts included).
    """
    _require(result, ["fill_flag"])
    flag = result["fill_flag"].transpose("series", "time").values
    def count(cells: np.ndarray) -> dict[str, int]:
        return {
            m: int((cells == v).sum()) for m, v in zip(FLAG_MEANINGS, FLAG_VALUES, strict=True)
        }

    per_series = {str(name): count(flag[i]) for i, name in enumerate(result["series"].values)}
    return {"overall": count(flag), "series": per_series}


def _width(result: xr.Dataset, level: float) -> xr.DataArray:
    available = interval_levels(result)
    for name in available:
        if isinstance(level, int | float | np.number) and float(name) == level:
            return result[f"upper_{name}"] - result[f"lower_{name}"]
    raise UsageError(
        f"level {level!r} is not among the computed interval levels "
        f"({', '.join(available) or 'none'}); pick one of those for the width rules, "
        "or compute that level when filling"
    )


def _summary_names(result: xr.Dataset) -> list[str]:
    return [str(n) for n in result.data_vars if str(n).startswith(_SUMMARY_PREFIXES)]


def _require(result: xr.Dataset, names: list[str]) -> None:
    absent = [n for n in names if n not in result]
    if absent:
        raise UsageError(
            f"the result lacks {', '.join(absent)}; pass the Dataset returned by the "
            "prediction step (and, for counts, by flags.assign)"
        )


def _check_positive(option: str, number: float | None) -> None:
    if number is None:
        return
    if isinstance(number, bool) or not isinstance(number, int | float | np.number):
        raise UsageError(f"{option} must be a number, got {number!r}")
    if not np.isfinite(number) or number <= 0:
        raise UsageError(f"{option} must be a positive finite number, got {number!r}")


def _duration(option: str, given: str | pd.Timedelta | timedelta | None) -> pd.Timedelta | None:
    if given is None:
        return None
    try:
        duration = pd.Timedelta(given)
    except (TypeError, ValueError):
        duration = pd.NaT
    if pd.isna(duration) or duration <= pd.Timedelta(0):
        raise UsageError(
            f"{option} must be a positive duration such as '72h' or '3D', got {given!r}"
        )
    return duration


def _units(var: xr.DataArray) -> dict:
    return {"units": var.attrs["units"]} if "units" in var.attrs else {}


def _rules_text(
    level: float,
    max_width: float | None,
    max_rel_width: float | None,
    max_gap: pd.Timedelta | None,
    min_observed: int,
    unsettled: bool,
    tested_gap: int | None,
) -> str:
    rules = [f"not_filled: series with fewer than {min_observed} observations"]
    if max_width is not None:
        rules.append(f"filled_uncertain: {level}% interval wider than {max_width} units")
    if max_rel_width is not None:
        rules.append(
            f"filled_uncertain: {level}% interval wider than {max_rel_width} x the series' "
            "5-95% range of observed values"
        )
    if max_gap is not None:
        rules.append(f"filled_uncertain: in a missing run longer than {max_gap}")
    if tested_gap is not None:
        rules.append(f"filled_uncertain: in a missing run longer than the {tested_gap} steps "
                     "the calibration's holdout tested")
    if unsettled:
        rules.append("filled_uncertain: from a fit whose chains did not converge")
    return "; ".join(rules)
