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
    out = flags.assign(make_result([values], width90=width), max_rel_width=0.5)
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
    # the same series is filled once the threshold allows it
    relaxed = flags.assign(make_result([sparse, full]), min_observed=3)
    assert (relaxed["fill_flag"].values[0, missing] == FILL).all()


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
    assert out["filled"].attrs["ancillary_variables"] == "fill_flag"
    assert out["value"].attrs["ancillary_variables"] == "fill_flag"
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
    # without a width rule the level is not used, so it is not checked
    flags.assign(result, level=99)


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
