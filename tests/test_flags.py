from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from gapband import flags
from gapband.errors import UsageError
from gapband.panel import make_panel

LEVELS = ("50", "80", "90", "97.5")
DIMS = ("series", "time")
OBS, FILL, UNCERTAIN, NOT_FILLED = 0, 1, 2, 3


def make_result(values, width90=1.0, step="h", median=5.0):
    """A hand-made predictive result: interval at level L is median ± (L/90)·width90/2."""
    values = np.asarray(values, dtype="float64")
    time = pd.date_range("2024-01-01", periods=values.shape[1], freq=step)
    result = make_panel(
        values, [f"s{i}" for i in range(values.shape[0])], time, step, units="m3/s"
    )
    missing = np.isnan(values)
    width = np.broadcast_to(np.asarray(width90, dtype="float64"), values.shape)
    med = np.where(missing, median, np.nan)
    result["fill_median"] = (DIMS, med)
    result["fill_mean"] = (DIMS, med + 0.25)
    result["fill_sd"] = (DIMS, np.where(missing, width / 3.29, np.nan))
    for level in LEVELS:
        half = float(level) / 90 * width / 2
        result[f"lower_{level}"] = (DIMS, med - half)
        result[f"upper_{level}"] = (DIMS, med + half)
    return result


def values_da(values):
    """``values`` (one series) as a (series, time) DataArray, for masks shaped like it."""
    return xr.DataArray(np.atleast_2d(values), dims=DIMS)


def row(observed, gaps):
    """One series: ``observed`` values then NaN cells at the positions in ``gaps``."""
    out = np.asarray(observed, dtype="float64").copy()
    out[list(gaps)] = np.nan
    return out


def test_observed_cells_flag_0_and_missing_cells_flag_1():
    values = row(np.arange(14.0), [3, 9])
    out = flags.assign(make_result([values]))
    np.testing.assert_array_equal(
        out["fill_flag"].values[0], np.where(np.isnan(values), FILL, OBS)
    )
    assert out["fill_flag"].dtype == np.int8
    assert out["fill_flag"].dims == DIMS
    np.testing.assert_array_equal(out["filled"].values[0, [3, 9]], [5.0, 5.0])


def test_observed_values_pass_through_bit_for_bit():
    awkward = [-0.0, 5e-324, 0.1 + 0.2, 1e308, np.nextafter(1.0, 2.0), -1 / 3, 2.0**-1074]
    values = np.tile(np.array(awkward * 2, dtype="float64"), (2, 1))
    values[:, [1, 8]] = np.nan
    out = flags.assign(make_result(values))
    observed = ~np.isnan(values)
    assert np.array_equal(
        out["filled"].values[observed].view("uint64"), values[observed].view("uint64")
    )
    assert np.array_equal(out["value"].values.view("uint64"), values.view("uint64"))


@pytest.mark.parametrize(
    ("level", "max_width", "expected"),
    [
        # widths at 90 %: 0.5, 1.0, 1.5; "wider than" is strict
        (90, 1.0, [FILL, FILL, UNCERTAIN]),
        (90, 0.4, [UNCERTAIN, UNCERTAIN, UNCERTAIN]),
        # at 50 % the same intervals are 50/90 as wide: 0.28, 0.56, 0.83
        (50, 0.6, [FILL, FILL, UNCERTAIN]),
        (97.5, 1.0, [FILL, UNCERTAIN, UNCERTAIN]),
    ],
)
def test_interval_wider_than_max_width_is_uncertain(level, max_width, expected):
    values = row(np.arange(15.0), [4, 7, 11])
    width = np.zeros(15)
    width[[4, 7, 11]] = [0.5, 1.0, 1.5]
    out = flags.assign(make_result([values], width90=width), level=level, max_width=max_width)
    np.testing.assert_array_equal(out["fill_flag"].values[0, [4, 7, 11]], expected)
    assert (out["fill_flag"].values[0, ~np.isnan(values)] == OBS).all()


def test_spread_is_the_5_to_95_percent_range_of_observed_values():
    values = row(np.arange(24.0) * 5, [21, 22, 23])  # observed 0, 5, ..., 100
    result = make_result([values, values[::-1] * 2])
    # Source: numpy.quantile, default method "linear" (reference computation).
    expected = [np.subtract(*np.quantile(v[~np.isnan(v)], [0.95, 0.05])) for v in
                (values, values[::-1] * 2)]
    np.testing.assert_allclose(flags.spread(result).values, expected, rtol=1e-12)
    assert flags.spread(result).values[0] == pytest.approx(90.0)


def test_interval_wider_than_max_rel_width_times_spread_is_uncertain():
    values = row(np.arange(24.0) * 5, [21, 22, 23])  # spread 90, so the limit is 45
    width = np.zeros(24)
    width[[21, 22, 23]] = [44.0, 45.0, 46.0]
    # the gap ends the record; counted as inside it here, so only the rule under test fires
    out = flags.assign(make_result([values], width90=width), max_rel_width=0.5,
                       max_var_width=None, outside=xr.zeros_like(values_da(values), dtype=bool))
    np.testing.assert_array_equal(out["fill_flag"].values[0, 21:], [FILL, FILL, UNCERTAIN])


def test_series_without_spread_flags_every_fill_uncertain_under_a_relative_rule():
    out = flags.assign(make_result([row(np.full(12, 7.0), [5])]), max_rel_width=10.0)
    assert out["fill_flag"].values[0, 5] == UNCERTAIN


@pytest.mark.parametrize(
    "max_gap", ["3h", pd.Timedelta(hours=3), pd.Timedelta("3h").to_pytimedelta()]
)
def test_cells_in_runs_longer_than_max_gap_are_uncertain(max_gap):
    # runs of 2, 3 and 4 hourly steps
    values = row(np.arange(24.0), [2, 3, 7, 8, 9, 13, 14, 15, 16])
    out = flags.assign(make_result([values]), max_gap=max_gap)
    got = out["fill_flag"].values[0]
    assert (got[[2, 3, 7, 8, 9]] == FILL).all()
    assert (got[[13, 14, 15, 16]] == UNCERTAIN).all()


@pytest.mark.parametrize(
    ("step", "max_gap", "run", "expected"),
    [
        ("D", "72h", 3, FILL),
        ("D", "72h", 4, UNCERTAIN),
        # a month counts 30.44 days: 2 months = 60.9 days > 60 days
        ("MS", "60D", 1, FILL),
        ("MS", "60D", 2, UNCERTAIN),
    ],
)
def test_max_gap_compares_run_length_times_step(step, max_gap, run, expected):
    values = row(np.arange(20.0), range(5, 5 + run))
    out = flags.assign(make_result([values], step=step), max_gap=max_gap)
    assert (out["fill_flag"].values[0, 5 : 5 + run] == expected).all()


def test_series_with_too_few_observations_are_not_filled():
    sparse = np.full(20, np.nan)
    sparse[[0, 5, 10]] = [1.0, 2.0, 3.0]
    full = row(np.arange(20.0), [6])
    out = flags.assign(make_result([sparse, full], width90=100.0), max_width=1.0)
    flag = out["fill_flag"].values
    np.testing.assert_array_equal(flag[0], np.where(np.isnan(sparse), NOT_FILLED, OBS))
    assert flag[1, 6] == UNCERTAIN
    # not filled: no fill value and no interval, observations kept
    missing = np.isnan(sparse)
    for name in ["filled", "fill_mean", "fill_median", "fill_sd", "lower_90", "upper_97.5"]:
        assert np.isnan(out[name].values[0, missing]).all(), name
    np.testing.assert_array_equal(out["filled"].values[0, ~missing], [1.0, 2.0, 3.0])
    # the same series is filled once the threshold allows it, between its first and last
    # observations; after its last it is not filled (extrapolated)
    relaxed = flags.assign(make_result([sparse, full]), min_observed=3)
    inside = missing & (np.arange(20) < 10)
    assert (relaxed["fill_flag"].values[0, inside] == FILL).all()
    assert (relaxed["fill_flag"].values[0, 11:] == NOT_FILLED).all()


def test_missing_cell_without_a_model_fill_is_not_filled():
    result = make_result([row(np.arange(15.0), [2, 3])])
    result["fill_median"][0, 3] = np.nan
    out = flags.assign(result)
    np.testing.assert_array_equal(out["fill_flag"].values[0, [2, 3]], [FILL, NOT_FILLED])
    assert np.isnan(out["lower_90"].values[0, 3])


def test_flag_variable_follows_cf_flag_conventions():
    out = flags.assign(make_result([row(np.arange(15.0), [2])]))
    attrs = out["fill_flag"].attrs
    meanings = attrs["flag_meanings"].split(" ")
    # Source: CF Conventions 1.10, section 3.5 Flags: flag_meanings is a blank
    # separated list, one word or phrase per flag value, from alphanumerics and
    # '_', '-', '.', '+', '@'; flag_values has the type of the flag variable.
    assert len(attrs["flag_values"]) == len(meanings)
    assert all(re.fullmatch(r"[A-Za-z0-9_.+@-]+", m) for m in meanings)
    assert attrs["flag_values"].dtype == out["fill_flag"].dtype
    assert meanings == ["observed", "filled", "filled_uncertain", "not_filled"]
    np.testing.assert_array_equal(attrs["flag_values"], [0, 1, 2, 3])
    # Source: CF Conventions 1.10, section 3.4 Ancillary Data.
    assert out["filled"].attrs["ancillary_variables"] == "fill_flag fill_reason"
    assert out["value"].attrs["ancillary_variables"] == "fill_flag fill_reason"
    assert out["filled"].attrs["units"] == "m3/s"


def test_assign_returns_a_new_dataset_and_leaves_the_input_alone():
    result = make_result([row(np.arange(15.0), [2, 3]), row(np.arange(15.0), [9])])
    before = result.copy(deep=True)
    out = flags.assign(result, max_width=0.5, max_gap="1h")
    xr.testing.assert_identical(result, before)
    assert "fill_flag" not in result and "ancillary_variables" not in result["value"].attrs
    assert out is not result


def test_flag_counts_per_series_and_overall():
    sparse = np.full(15, np.nan)
    sparse[[1, 2]] = 1.0
    out = flags.assign(
        make_result([row(np.arange(15.0), [2, 3, 4, 8]), sparse]), max_gap="2h"
    )
    counts = flags.flag_counts(out)
    assert counts == {
        "overall": {"observed": 13, "filled": 1, "filled_uncertain": 3, "not_filled": 13},
        "series": {
            "s0": {"observed": 11, "filled": 1, "filled_uncertain": 3, "not_filled": 0},
            "s1": {"observed": 2, "filled": 0, "filled_uncertain": 0, "not_filled": 13},
        },
    }
    json.dumps(counts)


def test_interval_levels_sort_by_number_not_text():
    ds = xr.Dataset(
        {f"{side}_{lv}": ((), 0.0) for lv in ["97.5", "100", "5", "50"] for side in
         ("lower", "upper")} | {"lower_80": ((), 0.0)}
    )
    assert flags.interval_levels(ds) == ("5", "50", "97.5", "100")


def test_level_not_computed_is_refused_naming_the_available_levels():
    result = make_result([row(np.arange(15.0), [2])])
    with pytest.raises(UsageError, match=r"level 99 .*\(50, 80, 90, 97\.5\)"):
        flags.assign(result, level=99, max_width=1.0)
    with pytest.raises(UsageError, match=r"level 'high' is not among"):
        flags.assign(result, level="high", max_rel_width=1.0)
    # the default width rule reads the level too
    with pytest.raises(UsageError, match=r"level 99 is not among"):
        flags.assign(result, level=99)
    # without a width rule the level is not used, so it is not checked
    flags.assign(result, level=99, max_var_width=None)


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"max_width": -1.0}, r"max_width must be a positive finite number, got -1\.0"),
        ({"max_width": 0}, r"max_width must be a positive"),
        ({"max_rel_width": float("nan")}, r"max_rel_width must be a positive"),
        ({"max_rel_width": "wide"}, r"max_rel_width must be a number, got 'wide'"),
        ({"max_gap": "-2h"}, r"max_gap must be a positive duration .* got '-2h'"),
        ({"max_gap": "soon"}, r"max_gap must be a positive duration .* got 'soon'"),
        ({"min_observed": 0}, r"min_observed must be at least 1, got 0"),
        ({"min_observed": 2.5}, r"min_observed must be a whole number, got 2\.5"),
    ],
)
def test_invalid_options_are_refused_by_name(options, message):
    with pytest.raises(UsageError, match=message):
        flags.assign(make_result([row(np.arange(15.0), [2])]), **options)


def test_result_without_summaries_is_refused():
    panel = make_result([row(np.arange(15.0), [2])]).drop_vars("fill_median")
    with pytest.raises(UsageError, match=r"lacks fill_median"):
        flags.assign(panel)
    with pytest.raises(UsageError, match=r"lacks fill_flag"):
        flags.flag_counts(panel)


# --- reasons: the fill_reason bit field ------------------------------------------------


def bits_of(*names):
    return sum(int(m) for n, m in zip(flags.REASON_NAMES, flags.REASON_MASKS, strict=True)
               if n in names)


def test_reason_bits_record_every_rule_that_fired_and_decode_back():
    # s0: a 6-hour gap (cells 4-9) with wide intervals; s1 one short gap; s2 three
    # observations only; s3 starts late and ends early
    s0 = row(np.arange(30.0), range(4, 10))
    s1 = row(np.arange(30.0), [20])
    s2 = np.full(30, np.nan)
    s2[[3, 9, 15]] = 1.0
    s3 = row(np.arange(30.0), [*range(0, 5), *range(27, 30)])
    width = np.full((4, 30), 0.5)
    width[0, 4:10] = 50.0
    unconverged = np.zeros((4, 30), dtype=bool)
    unconverged[0, 4:6] = True
    out = flags.assign(make_result([s0, s1, s2, s3], width90=width), max_width=10.0,
                       max_rel_width=0.5, max_gap="4h", tested_gap=5,
                       unconverged=xr.DataArray(unconverged, dims=DIMS))
    reason, flag = out["fill_reason"].values, out["fill_flag"].values
    assert reason.dtype == np.int16 and out["fill_reason"].dims == DIMS
    everything = ("not_converged", "untested_gap", "long_gap", "wide_interval",
                  "wide_vs_range", "wide_vs_variability")
    assert (flag[0, 4:6] == UNCERTAIN).all()
    assert (reason[0, 4:6] == bits_of(*everything)).all()
    assert flags.reason_names(int(reason[0, 4])) == [
        "not_converged", "untested_gap", "long_gap", "wide_interval", "wide_vs_range",
        "wide_vs_variability"]
    assert (reason[0, 6:10] == bits_of(*everything[1:])).all()
    # a plain fill and every observed cell: no reason
    assert flag[1, 20] == FILL and reason[1, 20] == 0
    assert (reason[np.isfinite(np.vstack([s0, s1, s2, s3]))] == 0).all()
    # not filled: why it is empty, not what would have caught a fill
    missing2 = np.isnan(s2)
    assert (flag[2, missing2] == NOT_FILLED).all()
    inner = missing2 & (np.arange(30) > 3) & (np.arange(30) < 15)
    assert (reason[2, inner] == bits_of("few_observations")).all()
    assert (reason[2, 0:3] == bits_of("few_observations", "extrapolated")).all()
    assert (flag[3, [0, 4, 27, 29]] == NOT_FILLED).all()
    assert (reason[3, [0, 4, 27, 29]] == bits_of("extrapolated")).all()
    # reason 0 exactly where the flag is observed or filled
    np.testing.assert_array_equal(reason == 0, np.isin(flag, (OBS, FILL)))
    # text and back
    text = flags.reason_names(reason)
    assert text[0, 4] == ";".join(everything)
    assert text[1, 20] == "" and text[3, 0] == "extrapolated"
    np.testing.assert_array_equal(flags.reason_codes(text.ravel()), reason.ravel())


def test_reason_variable_follows_cf_flag_mask_conventions():
    out = flags.assign(make_result([row(np.arange(15.0), [2])]))
    attrs = out["fill_reason"].attrs
    meanings = attrs["flag_meanings"].split(" ")
    # Source: CF Conventions 1.10, section 3.5 Flags: flag_masks (with flag_meanings)
    # describe independent Boolean conditions as bit fields; flag_masks has the type of
    # the flag variable, one mask per meaning, and meanings are single words.
    assert "flag_values" not in attrs
    assert attrs["flag_masks"].dtype == out["fill_reason"].dtype
    assert len(attrs["flag_masks"]) == len(meanings) == len(set(meanings))
    assert all(re.fullmatch(r"[A-Za-z0-9_.+@-]+", m) for m in meanings)
    masks = attrs["flag_masks"].astype(int)
    assert all(m > 0 and m & (m - 1) == 0 for m in masks)  # one bit each
    assert meanings == list(flags.REASON_NAMES)
    assert out["fill_flag"].attrs["ancillary_variables"] == "fill_reason"


def test_reason_counts_per_series_and_overall():
    late = row(np.arange(20.0), [0, 1, 2, 10])
    out = flags.assign(make_result([late, row(np.arange(20.0), [5, 6, 7])]), max_gap="2h")
    counts = flags.reason_counts(out)
    assert counts["series"]["s0"]["extrapolated"] == 3
    assert counts["series"]["s0"]["long_gap"] == 0
    assert counts["series"]["s1"]["long_gap"] == 3
    assert counts["overall"] == {**{name: 0 for name in flags.REASON_NAMES},
                                 "extrapolated": 3, "long_gap": 3}
    json.dumps(counts)


def test_unknown_reason_text_is_refused():
    with pytest.raises(UsageError, match=r"'wide' is not a flag reason"):
        flags.reason_codes(["long_gap;wide"])


# --- extrapolation ------------------------------------------------------------------------


def test_an_extrapolated_cell_is_not_filled_by_default():
    values = row(np.arange(20.0), [0, 1, 9, 18, 19])
    out = flags.assign(make_result([values]))
    flag = out["fill_flag"].values[0]
    np.testing.assert_array_equal(flag[[0, 1, 18, 19]], NOT_FILLED)
    assert flag[9] == FILL  # an inner gap is filled
    for name in ("filled", "fill_median", "fill_mean", "fill_sd", "lower_90", "upper_97.5"):
        assert np.isnan(out[name].values[0, [0, 1, 18, 19]]).all(), name
    assert "not_filled: before a series' first" in out["fill_flag"].attrs["comment"]


def test_extrapolated_cells_are_filled_and_flagged_on_request():
    values = row(np.arange(20.0), [0, 1, 9, 18, 19])
    out = flags.assign(make_result([values]), extrapolate=True)
    flag, reason = out["fill_flag"].values[0], out["fill_reason"].values[0]
    np.testing.assert_array_equal(flag[[0, 1, 18, 19]], UNCERTAIN)
    np.testing.assert_array_equal(reason[[0, 1, 18, 19]], bits_of("extrapolated"))
    np.testing.assert_array_equal(out["filled"].values[0, [0, 1, 18, 19]], 5.0)
    assert flag[9] == FILL and reason[9] == 0


def test_extrapolation_follows_the_mask_given_for_a_block():
    # a block sees its series start late, but the whole Panel observed it before
    values = row(np.arange(20.0), [0, 1, 2])
    outside = xr.DataArray(np.zeros((1, 20), dtype=bool), dims=DIMS)
    out = flags.assign(make_result([values]), outside=outside)
    np.testing.assert_array_equal(out["fill_flag"].values[0, :3], FILL)


def test_a_cell_without_a_fill_is_not_filled_even_when_extrapolation_is_asked_for():
    result = make_result([row(np.arange(15.0), [0, 7])])
    result["fill_median"][0, 0] = np.nan
    out = flags.assign(result, extrapolate=True)
    assert out["fill_flag"].values[0, 0] == NOT_FILLED
    assert out["fill_reason"].values[0, 0] == bits_of("no_fill", "extrapolated")


# --- the default width rule: variability around the daily and weekly cycle ---------------


def cycle_series(step, periods, noise, seed=1):
    """A daily sine (amplitude 6) plus a weekend offset (3) plus Normal noise."""
    rng = np.random.default_rng(seed)
    time = pd.date_range("2024-01-01", periods=periods, freq=step)  # a Monday
    hours = (time - time.normalize()) / pd.Timedelta("1h")
    cycle = 6 * np.sin(2 * np.pi * np.asarray(hours) / 24) + 3 * (
        np.asarray(time.day_of_week) >= 5)
    return time, 40 + cycle + rng.normal(0, noise, periods)


def numpy_variability(values, per_day, n_days):
    """Reference: mean per time of day removed, then mean per day of week, 5-95 % range / 3.29.

    Each step scales the departures by sqrt(n / (n - 1)), n the values per group.
    """
    # Source: reference computation with numpy on whole days starting on a Monday (no
    # pandas groupby); the Normal's 5-95 % range is 2 x 1.6448536 (scipy.stats.norm.ppf(0.95),
    # value from memory); the n / (n - 1) variance correction is Bessel's.
    days = values.reshape(n_days, per_day)
    if per_day > 1:
        days = (days - days.mean(axis=0)) * np.sqrt(n_days / (n_days - 1))
    dow = np.arange(n_days) % 7
    means = np.array([days[dow == d].mean() for d in range(7)])
    m = (dow == 0).sum() * per_day
    rest = (days - means[dow][:, None]) * np.sqrt(m / (m - 1))
    lo, hi = np.quantile(rest, [0.05, 0.95])
    return (hi - lo) / (2 * 1.6448536269514722)


def test_variability_removes_the_daily_and_weekly_cycle_hourly():
    time, values = cycle_series("h", 24 * 7 * 8, noise=1.5)
    result = make_panel(values[None, :], ["a"], time, "h")
    got = float(flags.variability(result).values[0])
    assert got == pytest.approx(numpy_variability(values, 24, 56), rel=1e-9)
    assert got == pytest.approx(1.5, rel=0.1)  # the noise sd, the cycles gone
    raw = np.subtract(*np.quantile(values, [0.95, 0.05])) / 3.29
    assert raw > 2.5 * got
    # the reference width at 90 %: exactly the 5-95 % range of the departures
    rest = flags.deseasonalised(result)["a"].to_numpy()
    assert float(flags.variability_width(result, 90).values[0]) == pytest.approx(
        np.subtract(*np.quantile(rest, [0.95, 0.05])), rel=1e-12)


def test_variability_of_daily_steps_removes_the_weekly_cycle_only():
    time = pd.date_range("2024-01-01", periods=7 * 20, freq="D")
    rng = np.random.default_rng(4)
    weekly = np.where(np.asarray(time.day_of_week) >= 5, 10.0, 0.0)
    values = 50 + weekly + rng.normal(0, 2.0, time.size)
    result = make_panel(values[None, :], ["a"], time, "D")
    assert float(flags.variability(result).values[0]) == pytest.approx(
        numpy_variability(values, 1, time.size), rel=1e-9)


def test_variability_of_monthly_steps_or_short_records_keeps_every_cycle():
    time = pd.date_range("2020-01-01", periods=36, freq="MS")
    values = np.arange(36.0)
    result = make_panel(values[None, :], ["a"], time, "MS")
    expected = np.subtract(*np.quantile(values, [0.95, 0.05])) / (2 * 1.6448536269514722)
    assert float(flags.variability(result).values[0]) == pytest.approx(expected, rel=1e-9)
    # two days of hourly data: too short to tell a daily cycle from noise
    time, values = cycle_series("h", 48, noise=0.5)
    short = make_panel(values[None, :], ["a"], time, "h")
    expected = np.subtract(*np.quantile(values, [0.95, 0.05])) / (2 * 1.6448536269514722)
    assert float(flags.variability(short).values[0]) == pytest.approx(expected, rel=1e-9)


def test_fills_wider_than_the_series_variability_are_uncertain_by_default():
    time, values = cycle_series("h", 24 * 7 * 4, noise=1.0)
    values[[100, 200, 300]] = np.nan
    result = make_panel(values[None, :], ["a"], time, "h")
    limit = float(flags.variability_width(result, 90).values[0])
    width = np.zeros(values.size)
    width[[100, 200, 300]] = [0.5 * limit, 0.99 * limit, 1.01 * limit]
    summaries = make_result([values], width90=width)
    out = flags.assign(summaries)
    np.testing.assert_array_equal(out["fill_flag"].values[0, [100, 200, 300]],
                                  [FILL, FILL, UNCERTAIN])
    assert out["fill_reason"].values[0, 300] == bits_of("wide_vs_variability")
    # a multiple moves the limit, None turns the rule off
    out = flags.assign(summaries, max_var_width=0.9)
    np.testing.assert_array_equal(out["fill_flag"].values[0, [100, 200, 300]],
                                  [FILL, UNCERTAIN, UNCERTAIN])
    out = flags.assign(summaries, max_var_width=None)
    assert (out["fill_flag"].values[0, [100, 200, 300]] == FILL).all()
    # at another level the limit is that level's Normal interval (1.96 / 1.645 as wide at 97.5 %)
    # the hand-made 97.5 % interval is 97.5/90 as wide as the 90 % one
    out = flags.assign(summaries, level=97.5)
    assert out["fill_flag"].values[0, 300] == FILL


def test_width_rules_read_the_model_own_width_where_a_calibration_narrowed():
    values = row(np.arange(20.0), [5, 12])
    result = make_result([values], width90=1.0)  # calibrated widths: 1.0
    own = np.full((1, 20), np.nan)
    own[0, [5, 12]] = [4.0, 0.5]  # the model's own: wider at 5, narrower at 12 (widened)
    result[flags.OWN_WIDTH] = xr.DataArray(own, dims=DIMS, attrs={"level": 90.0})
    out = flags.assign(result, max_width=2.0, max_var_width=None)
    np.testing.assert_array_equal(out["fill_flag"].values[0, [5, 12]], [UNCERTAIN, FILL])
    assert out["fill_reason"].values[0, 5] == bits_of("wide_interval")
    # without the model's own width the narrowed interval would pass
    plain = flags.assign(result.drop_vars(flags.OWN_WIDTH), max_width=2.0, max_var_width=None)
    assert plain["fill_flag"].values[0, 5] == FILL
    # the own width of another level is not read at this one
    result[flags.OWN_WIDTH].attrs["level"] = 50.0
    assert flags.assign(result, max_width=2.0, max_var_width=None)["fill_flag"].values[0, 5] \
        == FILL
