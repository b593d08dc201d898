"""Fill flags: which cells were observed, filled, filled with doubt, or left empty, and why.

The flag is a CF status-flag variable (``flag_values`` + ``flag_meanings``,
CF Conventions 1.10, section 3.5), linked from ``value`` and ``filled`` by
``ancillary_variables``. Codes, in order of precedence:

- ``0 observed``: the cell holds an observation; ``filled`` copies it bit for bit.
- ``3 not_filled``: a missing cell of a series with fewer than
  ``min_observed`` observations, one the model gave no usable fill for
  (a mean, median, sd or interval bound that is NaN or infinite, :func:`no_fill`),
  or one before the series' first or after its last observation (unless
  ``extrapolate``); ``filled`` and every fill summary are NaN there.
- ``2 filled_uncertain``: a missing cell whose interval at ``level`` is wider
  than ``max_width`` (data units), than ``max_rel_width`` times the series'
  spread, or than ``max_var_width`` times the interval the series' variability
  around its daily and weekly cycle gives (:func:`variability`; on by
  default); which sits in a missing run lasting longer than ``max_gap`` or
  longer than the longest run a calibration's holdout tested (``tested_gap``,
  unless ``flag_untested`` is off); which comes from a fit whose chains did
  not converge (unless accepted); or an extrapolated cell filled on request.
- ``1 filled``: every other missing cell.

Every rule that fired for a cell is recorded in a second variable,
``fill_reason``: a CF bit field (``flag_masks`` + ``flag_meanings``, for
independent conditions), one bit per reason in :data:`REASONS`, 0 for
observed cells and plain fills. A ``not_filled`` cell carries the reasons it
was not filled; a ``filled_uncertain`` cell every rule that caught it.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Iterable
from datetime import timedelta
from statistics import NormalDist

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import UsageError
from gapband.panel import run_lengths, step_of

_DAY = pd.Timedelta("1D")

FLAG_MEANINGS: tuple[str, ...] = ("observed", "filled", "filled_uncertain", "not_filled")
FLAG_VALUES = np.arange(len(FLAG_MEANINGS), dtype="int8")
OBSERVED, FILLED, FILLED_UNCERTAIN, NOT_FILLED = (int(v) for v in FLAG_VALUES)

#: Fewest observations a series needs to be filled. The model standardises each
#: series by its own mean and sd and learns its loadings from its observations;
#: below about ten, both are guesses driven by the priors.
MIN_OBSERVED = 10

#: Quantiles of a series' observed values whose distance is its spread.
SPREAD_QUANTILES = (0.05, 0.95)

#: Default of ``max_var_width``: a fill is uncertain when its interval is wider
#: than this many times the interval of the same level that the series' own
#: variability around its daily and weekly cycle gives (:func:`variability_width`).
#: At 1.0 the rule says "this fill knows no more than the cycle alone does".
MAX_VAR_WIDTH = 1.0

#: Whole cycles a series' observations must span for the cycle to be removed
#: before its variability is measured; over fewer, the means per hour of day
#: (or day of week) hold too few values to tell the cycle from the noise.
MIN_CYCLES = 3

#: Name of the variable holding the model's own interval width at the flag
#: level before a calibration widened (or narrowed) it; width rules read the
#: larger of it and the calibrated width.
OWN_WIDTH = "fill_width_uncalibrated"

#: Why a cell was flagged: one bit each, in this order (``fill_reason``).
REASONS: tuple[tuple[str, str], ...] = (
    ("extrapolated", "before the series' first or after its last observation"),
    ("few_observations", "the series has fewer observations than min_observed"),
    ("no_fill", "the model gave no usable fill (a summary not finite, or its block "
                "failed, was skipped or had too few observations in its window)"),
    ("not_converged", "from a fit whose chains did not converge"),
    ("untested_gap", "in a missing run longer than the calibration's holdout tested"),
    ("long_gap", "in a missing run longer than max_gap"),
    ("wide_interval", "interval wider than max_width (data units)"),
    ("wide_vs_range", "interval wider than max_rel_width x the series' 5-95 % range of "
                      "observed values"),
    ("wide_vs_variability", "interval wider than max_var_width x the interval the series' "
                            "variability around its daily and weekly cycle gives"),
)
REASON_NAMES: tuple[str, ...] = tuple(name for name, _ in REASONS)
REASON_MASKS = (2 ** np.arange(len(REASONS))).astype("int16")
#: Separator of the reasons in the long table's ``reason`` column.
REASON_SEPARATOR = ";"
#: What ``value`` and ``filled`` name as their ancillary variables.
ANCILLARY = "fill_flag fill_reason"

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


def deseasonalised(result: xr.Dataset) -> pd.DataFrame:
    """Each series' observed values with its daily and weekly cycle removed.

    For steps shorter than a day, the mean of each time of day is subtracted,
    then the mean of each day of the week of what remains; for daily steps
    only the day-of-week means; for longer steps nothing. A cycle is removed
    from a series only when its observations span at least
    :data:`MIN_CYCLES` whole cycles. Each departure from a group's mean is
    scaled by sqrt(n / (n - 1)), n the group's observations, so that short
    records do not look less variable than they are; a group of one
    observation tells nothing about the spread and is left out (NaN). Times
    are the grid's (UTC for zoned input): a cycle shifted by a time zone is
    still a cycle.

    Returns
    -------
    DataFrame
        Index time, one column per series; NaN where not observed.
    """
    value = result["value"].transpose("series", "time")
    frame = pd.DataFrame(value.values.T, index=pd.DatetimeIndex(value["time"].values),
                         columns=[str(s) for s in value["series"].values])
    step = step_of(result)
    times = frame.index
    cycles = []
    if step < _DAY:
        cycles.append((times - times.normalize(), _DAY))
    if step <= _DAY:
        cycles.append((times.day_of_week, 7 * _DAY))
    seen = frame.notna()
    first = seen.idxmax().where(seen.any())
    last = seen[::-1].idxmax().where(seen.any())
    span = (last - first) + step
    for key, period in cycles:
        enough = pd.Series((span >= MIN_CYCLES * period).to_numpy(), index=frame.columns)
        if not enough.any():
            continue
        groups = frame.groupby(key)
        means, counts = groups.transform("mean"), groups.transform("count")
        # A group's mean is fitted to its own values, which leaves them (n - 1) / n of
        # their variance (Bessel's correction): scale the departures back.
        bessel = np.sqrt(counts / (counts - 1)).where(counts > 1)
        departures = (frame - means) * bessel
        frame = departures.where(enough, frame, axis=1)
    return frame


def variability(result: xr.Dataset) -> xr.DataArray:
    """A robust sd of each series' observed values around its daily and weekly cycle.

    The 5-95 % quantile range of :func:`deseasonalised` values divided by
    that range of a standard Normal (2 × 1.645): the sd for Normal
    departures, but not inflated by the spikes and skew of monitoring data.

    Returns
    -------
    DataArray, dims (series,)
        In data units; NaN for a series without observations.
    """
    lo, hi = SPREAD_QUANTILES
    frame = deseasonalised(result)
    q = frame.quantile([lo, hi])
    normal = NormalDist().inv_cdf(hi) - NormalDist().inv_cdf(lo)
    sd = (q.loc[hi] - q.loc[lo]) / normal
    return xr.DataArray(sd.to_numpy(dtype="float64"), coords={"series": result["series"]},
                        dims="series")


def variability_width(result: xr.Dataset, level: float) -> xr.DataArray:
    """Width of the central ``level`` % interval of a Normal with the series' :func:`variability`.

    At 90 % this is exactly the 5-95 % range of the series' departures from
    its cycle.
    """
    z = NormalDist().inv_cdf(0.5 + float(level) / 200)
    return 2 * z * variability(result)


def extrapolated(result: xr.Dataset) -> xr.DataArray:
    """Missing cells before a series' first or after its last observation.

    A series without observations has none (its cells are ``few_observations``).

    Returns
    -------
    DataArray of bool, dims (series, time)
    """
    observed = result["value"].transpose("series", "time").notnull()
    seen = observed.values
    before = np.cumsum(seen, axis=1) == 0
    after = np.cumsum(seen[:, ::-1], axis=1)[:, ::-1] == 0
    some = seen.any(axis=1)[:, None]
    return xr.DataArray((before | after) & some & ~seen, coords=observed.coords,
                        dims=observed.dims)


def assign(
    result: xr.Dataset,
    *,
    level: float = 90,
    max_width: float | None = None,
    max_rel_width: float | None = None,
    max_var_width: float | None = MAX_VAR_WIDTH,
    max_gap: str | pd.Timedelta | timedelta | None = None,
    min_observed: int = MIN_OBSERVED,
    accept_unconverged: bool = False,
    unconverged: bool | xr.DataArray = False,
    flag_untested: bool = True,
    tested_gap: int | None = None,
    gap_length: xr.DataArray | None = None,
    extrapolate: bool = False,
    outside: xr.DataArray | None = None,
) -> xr.Dataset:
    """Flag every cell and build the ``filled`` series.

    Parameters
    ----------
    result : Dataset
        A Panel with predictive summaries: ``value``, ``fill_median`` and
        ``lower_<L>``/``upper_<L>``, dims (series, time), NaN at observed cells;
        optionally :data:`OWN_WIDTH`, the model's own width at ``level``
        before a calibration changed the intervals: the width rules then read
        the larger of it and the interval's width, so a narrowing never
        hides a wide fill.
    level : float
        Interval level (percent) the width rules look at; must be one of the
        levels in ``result``. Checked only when a width rule is set.
    max_width : float, optional
        A fill whose interval is wider than this (data units) is uncertain.
    max_rel_width : float, optional
        A fill whose interval is wider than this times the series'
        :func:`spread` is uncertain.
    max_var_width : float, optional
        A fill whose interval is wider than this times
        :func:`variability_width` (the interval the series' variability
        around its daily and weekly cycle gives at ``level``) is uncertain;
        default :data:`MAX_VAR_WIDTH`, None turns the rule off.
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
    extrapolate : bool
        Fill the cells before a series' first or after its last observation
        (flagged uncertain); by default they are not filled.
    outside : DataArray of bool, dims (series, time), optional
        Those cells; default :func:`extrapolated` of ``result`` (a block fill
        passes the whole Panel's).

    Returns
    -------
    Dataset
        A new Dataset with ``fill_flag`` (int8), ``fill_reason`` (int16 bit
        field, :data:`REASONS`) and ``filled`` (float64) added; fill summaries
        set to NaN where not filled. ``result`` is unchanged.

    Raises
    ------
    UsageError
        An option is out of range, ``level`` is not among the computed
        levels, or ``result`` lacks a variable the rules need.
    """
    _require(result, ["value", "fill_median"])
    _check_positive("max_width", max_width)
    _check_positive("max_rel_width", max_rel_width)
    _check_positive("max_var_width", max_var_width)
    gap_limit = _duration("max_gap", max_gap)
    if isinstance(min_observed, bool) or not isinstance(min_observed, int | np.integer):
        raise UsageError(f"min_observed must be a whole number, got {min_observed!r}")
    if min_observed < 1:
        raise UsageError(f"min_observed must be at least 1, got {min_observed!r}")

    value = result["value"].transpose("series", "time")
    observed = value.notnull()
    missing = ~observed
    fired: dict[str, xr.DataArray] = {}

    too_few = missing & (observed.sum("time") < min_observed)
    beyond = missing & (extrapolated(result) if outside is None
                        else outside.transpose("series", "time").astype(bool))
    fired["few_observations"] = too_few
    fired["extrapolated"] = beyond
    explained = too_few | beyond if not extrapolate else too_few
    # no_fill: only where the reasons above do not already explain an empty cell.
    fired["no_fill"] = missing & no_fill(result) & ~explained
    not_filled = explained | fired["no_fill"]

    if max_width is not None or max_rel_width is not None or max_var_width is not None:
        width = _width(result, level)
        own = result.get(OWN_WIDTH)
        if own is not None and float(own.attrs.get("level", np.nan)) == float(level):
            width = np.fmax(width, own.transpose(*width.dims))
        if max_width is not None:
            fired["wide_interval"] = width > max_width
        if max_rel_width is not None:
            fired["wide_vs_range"] = width > max_rel_width * spread(result)
        if max_var_width is not None:
            fired["wide_vs_variability"] = width > max_var_width * variability_width(
                result, level)
    if gap_length is None:
        runs = xr.DataArray(run_lengths(missing.values), coords=missing.coords, dims=missing.dims)
    else:
        runs = gap_length.transpose("series", "time")
    if gap_limit is not None:
        fired["long_gap"] = missing & (runs > gap_limit / step_of(result))
    untested = flag_untested and tested_gap is not None
    if untested:
        fired["untested_gap"] = missing & (runs > tested_gap)
    unsettled = not accept_unconverged and bool(np.any(unconverged))
    if unsettled:
        fired["not_converged"] = missing & unconverged

    uncertain = xr.zeros_like(observed)
    for name in ("untested_gap", "long_gap", "wide_interval", "wide_vs_range",
                 "wide_vs_variability", "not_converged"):
        if name in fired:
            uncertain = uncertain | fired[name]
    if extrapolate:
        uncertain = uncertain | beyond

    flag = xr.where(
        observed,
        OBSERVED,
        xr.where(not_filled, NOT_FILLED, xr.where(uncertain, FILLED_UNCERTAIN, FILLED)),
    ).astype("int8")
    reason = _reason_bits(fired, flag)

    out = result.copy()
    for name in _summary_names(out):
        out[name] = out[name].where(~not_filled)
    # xr.where copies the observed floats as stored; no arithmetic touches them.
    out["filled"] = xr.where(observed, value, out["fill_median"], keep_attrs=False)
    out["filled"].attrs = {
        "long_name": "observed value, or posterior median where missing",
        **_units(value),
        "ancillary_variables": ANCILLARY,
    }
    out["value"].attrs = {**value.attrs, "ancillary_variables": ANCILLARY}
    out["fill_flag"] = flag
    out["fill_flag"].attrs = {
        "long_name": "fill flag",
        "standard_name": "status_flag",
        "flag_values": FLAG_VALUES.copy(),
        "flag_meanings": " ".join(FLAG_MEANINGS),
        "ancillary_variables": "fill_reason",
        "comment": _rules_text(level, max_width, max_rel_width, max_var_width, gap_limit,
                               min_observed, unsettled, tested_gap if untested else None,
                               extrapolate),
    }
    out["fill_reason"] = reason
    out["fill_reason"].attrs = {
        "long_name": "reasons a cell was flagged filled_uncertain or not_filled",
        "flag_masks": REASON_MASKS.copy(),
        "flag_meanings": " ".join(REASON_NAMES),
        "comment": "a bit field: each set bit is a rule that fired for the cell; 0 for "
                   "observed cells and plain fills. A not_filled cell carries the reasons "
                   "it was not filled, a filled_uncertain cell every rule that caught it. "
                   + "; ".join(f"{name}: {text}" for name, text in REASONS),
    }
    return out


def _reason_bits(fired: dict[str, xr.DataArray], flag: xr.DataArray) -> xr.DataArray:
    """The ``fill_reason`` bit field: for each cell the rules that explain its flag.

    A not_filled cell gets the reasons it is empty; a filled_uncertain cell
    every rule that caught it (extrapolated among them when filled on request).
    """
    not_filled = (flag == NOT_FILLED).values
    uncertain = (flag == FILLED_UNCERTAIN).values
    where = {"few_observations": not_filled, "no_fill": not_filled,
             "extrapolated": not_filled | uncertain}
    bits = np.zeros(flag.shape, dtype="int16")
    for name, mask in zip(REASON_NAMES, REASON_MASKS, strict=True):
        if name in fired:
            cells = fired[name].transpose("series", "time").values
            bits[cells & where.get(name, uncertain)] |= mask
    return xr.DataArray(bits, coords=flag.coords, dims=flag.dims)


def reason_names(codes: np.ndarray | int) -> list[str] | np.ndarray:
    """Decode ``fill_reason`` codes into reason names.

    A single code gives the list of its names; an array gives an array (same
    shape) of the names joined by :data:`REASON_SEPARATOR`, empty where 0.
    """
    if np.ndim(codes) == 0:
        code = int(codes)
        return [name for name, mask in zip(REASON_NAMES, REASON_MASKS, strict=True)
                if code & int(mask)]
    codes = np.asarray(codes)
    unique, inverse = np.unique(codes, return_inverse=True)
    texts = np.array([REASON_SEPARATOR.join(reason_names(int(c))) for c in unique], dtype=object)
    return texts[inverse].reshape(codes.shape)


def reason_codes(texts: Iterable[str]) -> np.ndarray:
    """Encode reason texts (as :func:`reason_names` writes them) back into codes.

    Raises
    ------
    UsageError
        A word that is not a reason.
    """
    lookup = {name: int(mask) for name, mask in zip(REASON_NAMES, REASON_MASKS, strict=True)}
    out = []
    for text in texts:
        code = 0
        words = [] if text is None or (isinstance(text, float) and np.isnan(text)) \
            else [w for w in str(text).split(REASON_SEPARATOR) if w]
        for word in words:
            if word not in lookup:
                raise UsageError(f"{word!r} is not a flag reason; reasons are "
                                 f"{', '.join(REASON_NAMES)}")
            code |= lookup[word]
        out.append(code)
    return np.asarray(out, dtype="int16")


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

    return _overall_and_per_series(result, flag, count)


def reason_counts(result: xr.Dataset) -> dict:
    """Count the cells per flag reason, overall and per series, JSON-ready.

    A cell with several reasons counts once under each.

    Returns
    -------
    dict
        ``{"overall": {reason: n, ...}, "series": {series id: {reason: n, ...}}}``
        with every reason present (zero counts included).
    """
    _require(result, ["fill_reason"])
    bits = result["fill_reason"].transpose("series", "time").values
    return _overall_and_per_series(result, bits, cells_per_reason)


def cells_per_reason(codes: np.ndarray) -> dict[str, int]:
    """How many of the ``fill_reason`` codes carry each reason (every reason, zeros included)."""
    codes = np.asarray(codes).astype("int64")
    return {name: int(((codes & int(mask)) != 0).sum())
            for name, mask in zip(REASON_NAMES, REASON_MASKS, strict=True)}


def _overall_and_per_series(result: xr.Dataset, cells: np.ndarray, count) -> dict:
    """``count`` of all cells (series, time) and of each series' row, keyed by series id."""
    per_series = {str(name): count(cells[i]) for i, name in enumerate(result["series"].values)}
    return {"overall": count(cells), "series": per_series}


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
    max_var_width: float | None,
    max_gap: pd.Timedelta | None,
    min_observed: int,
    unsettled: bool,
    tested_gap: int | None,
    extrapolate: bool,
) -> str:
    rules = [f"not_filled: series with fewer than {min_observed} observations"]
    if extrapolate:
        rules.append("filled_uncertain: before a series' first or after its last observation")
    else:
        rules.append("not_filled: before a series' first or after its last observation")
    if max_width is not None:
        rules.append(f"filled_uncertain: {level}% interval wider than {max_width} units")
    if max_rel_width is not None:
        rules.append(
            f"filled_uncertain: {level}% interval wider than {max_rel_width} x the series' "
            "5-95% range of observed values"
        )
    if max_var_width is not None:
        rules.append(
            f"filled_uncertain: {level}% interval wider than {max_var_width} x the {level}% "
            "interval of a Normal with the series' variability around its daily and weekly "
            "cycle"
        )
    if max_gap is not None:
        rules.append(f"filled_uncertain: in a missing run longer than {max_gap}")
    if tested_gap is not None:
        rules.append(f"filled_uncertain: in a missing run longer than the {tested_gap} steps "
                     "the calibration's holdout tested")
    if unsettled:
        rules.append("filled_uncertain: from a fit whose chains did not converge")
    return "; ".join(rules)
