"""Reading station files: round trips across formats, and every bad input."""

from __future__ import annotations

import csv
import math
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

import gapband
from gapband.errors import (
    DuplicateError,
    InputError,
    TimestampError,
    UsageError,
    ValueParseError,
)

# --------------------------------------------------------------------------
# Round trips: the same data in every supported layout reads to the same Panel


def _long_frame(ref: dict, drop_missing: bool) -> pd.DataFrame:
    frame = pd.DataFrame(
        {
            "time": np.tile(ref["time"], len(ref["series"])),
            "station": np.repeat(ref["series"], len(ref["time"])),
            "value": ref["values"].ravel(),
        }
    )
    return frame.dropna(subset=["value"]) if drop_missing else frame


def _wide_frame(ref: dict) -> pd.DataFrame:
    frame = pd.DataFrame(ref["values"].T, columns=ref["series"])
    frame.insert(0, "time", ref["time"])
    return frame


def _csv_text(frame: pd.DataFrame) -> pd.DataFrame:
    out = frame.copy()
    out["time"] = out["time"].dt.strftime("%Y-%m-%dT%H:%M")
    return out


def write_long_csv(ref, path):
    # Missing cells left out entirely: step 3 then has no row at all.
    _csv_text(_long_frame(ref, drop_missing=True)).to_csv(path, index=False)


def write_wide_csv(ref, path):
    _csv_text(_wide_frame(ref)).to_csv(path, index=False, na_rep="NA")


def write_long_parquet(ref, path):
    _long_frame(ref, drop_missing=False).to_parquet(path, index=False)


def write_wide_parquet(ref, path):
    _wide_frame(ref).to_parquet(path, index=False)


def write_netcdf_cf(ref, path):
    ds = xr.Dataset(
        {
            "pm10": (("station", "time"), ref["values"], {"units": "ug m-3"}),
            "station_name": (
                ("station",),
                np.array(ref["series"], dtype=object),
                {"cf_role": "timeseries_id"},
            ),
        },
        coords={"time": ref["time"]},
    )
    ds.to_netcdf(path, engine="h5netcdf")


def write_netcdf_labels(ref, path):
    ds = xr.Dataset(
        {"pm10": (("station", "time"), ref["values"], {"units": "ug m-3"})},
        coords={"time": ref["time"], "station": ref["series"]},
    )
    ds.to_netcdf(path, engine="h5netcdf")


ROUND_TRIPS = {
    "long.csv": write_long_csv,
    "wide.csv": write_wide_csv,
    "long.parquet": write_long_parquet,
    "wide.parquet": write_wide_parquet,
    "cf.nc": write_netcdf_cf,
    "labels.nc": write_netcdf_labels,
}


@pytest.mark.parametrize("name", list(ROUND_TRIPS))
def test_round_trip_every_format_gives_the_same_panel(name, reference, tmp_path):
    path = tmp_path / name
    ROUND_TRIPS[name](reference, path)
    panel = gapband.read(path)

    assert panel["value"].dims == ("series", "time")
    assert panel["value"].dtype == np.float64
    assert list(panel["series"].values) == reference["series"]
    np.testing.assert_array_equal(panel["time"].values, reference["time"].to_numpy())
    # assert_array_equal treats NaN == NaN, so this checks the NaN positions too.
    np.testing.assert_array_equal(panel["value"].values, reference["values"])
    assert np.array_equal(np.isnan(panel["value"].values), np.isnan(reference["values"]))
    assert panel.attrs["step"] == "h"
    assert panel.attrs["source"] == name
    if name.endswith(".nc"):
        assert panel["value"].attrs["units"] == "ug m-3"
        assert panel.attrs["variable"] == "pm10"
    else:
        assert "units" not in panel["value"].attrs


def test_round_trip_long_csv_records_absent_step(reference, tmp_path):
    path = tmp_path / "long.csv"
    write_long_csv(reference, path)
    panel = gapband.read(path)
    assert "1 absent time steps added as missing" in panel.attrs["alignment"]


def test_units_option_is_recorded_for_csv(reference, tmp_path):
    path = tmp_path / "wide.csv"
    write_wide_csv(reference, path)
    assert gapband.read(path, units="m3 s-1")["value"].attrs["units"] == "m3 s-1"


def test_netcdf_picks_the_named_variable(reference, tmp_path):
    path = tmp_path / "two.nc"
    ds = xr.Dataset(
        {
            "pm10": (("station", "time"), reference["values"]),
            "no2": (("station", "time"), reference["values"] * 2),
        },
        coords={"time": reference["time"], "station": reference["series"]},
    )
    ds.to_netcdf(path, engine="h5netcdf")
    with pytest.raises(InputError, match=r"two\.nc: several variables.*'pm10'.*--variable"):
        gapband.read(path)
    panel = gapband.read(path, variable="no2")
    np.testing.assert_array_equal(panel["value"].values, reference["values"] * 2)
    with pytest.raises(InputError, match=r"variable 'so2' is not a \(station, time\) variable"):
        gapband.read(path, variable="so2")


def test_netcdf_infinite_value_names_the_cell(reference, tmp_path):
    values = reference["values"].copy()
    values[1, 4] = np.inf
    path = tmp_path / "inf.nc"
    xr.Dataset(
        {"pm10": (("station", "time"), values)},
        coords={"time": reference["time"], "station": reference["series"]},
    ).to_netcdf(path, engine="h5netcdf")
    with pytest.raises(ValueParseError, match=r"inf\.nc, variable 'pm10', station 1, time index 4"):
        gapband.read(path)


def test_zone_aware_parquet_is_kept_in_utc_with_offsets(reference, tmp_path):
    frame = _long_frame(reference, drop_missing=False)
    frame["time"] = frame["time"].dt.tz_localize("Europe/Paris")  # +01:00 in March before DST
    path = tmp_path / "tz.parquet"
    frame.to_parquet(path, index=False)
    panel = gapband.read(path)
    assert panel["time"].values[0] == np.datetime64("2024-02-29T23:00")
    assert panel.attrs["timezone"] == "UTC"
    assert panel.attrs["input_utc_offsets"] == "+01:00"


# --------------------------------------------------------------------------
# Timestamps


def test_unparseable_timestamp_names_the_line(write):
    path = write(
        "bad_time.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,2\n"
        "yesterday noon,A,3\n2024-01-01T03:00,A,4\n",
    )
    with pytest.raises(
        TimestampError, match=r"bad_time\.csv, line 4: cannot read 'yesterday noon'"
    ):
        gapband.read(path)


def test_mixed_zone_aware_and_naive_timestamps(write):
    path = write(
        "mixed.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00+02:00,A,2\n",
    )
    with pytest.raises(
        TimestampError,
        match=r"mixes timestamps with a time zone \(line 3: '2024-01-01T01:00\+02:00'\) "
        r"and without \(line 2: '2024-01-01T00:00'\)",
    ):
        gapband.read(path)


def test_zone_aware_timestamps_are_converted_to_utc(write):
    # The same three hours written in three zones.
    path = write(
        "zones.csv",
        "time,series,value\n"
        "2024-01-01T01:00+01:00,A,1\n"
        "2024-01-01T01:00Z,A,2\n"
        "2024-01-01T04:00+0200,A,3\n",
    )
    panel = gapband.read(path)
    expected = pd.date_range("2024-01-01T00:00", periods=3, freq="h").to_numpy()
    np.testing.assert_array_equal(panel["time"].values, expected)
    np.testing.assert_array_equal(panel["value"].values, [[1.0, 2.0, 3.0]])
    assert panel.attrs["timezone"] == "UTC"
    assert panel.attrs["input_utc_offsets"] == "+00:00, +01:00, +02:00"


def test_naive_timestamps_carry_no_zone_attrs(write):
    path = write("naive.csv", "time,A\n2024-01-01 00:00,1\n2024-01-01 01:00,2\n")
    panel = gapband.read(path)
    assert "timezone" not in panel.attrs
    assert "input_utc_offsets" not in panel.attrs


def test_irregular_spacing_absent_steps_become_missing(write):
    # Steps 01:00, 02:00 and 05:00 are absent; the most common difference is 1 h.
    path = write(
        "gappy.csv",
        "time,A,B\n"
        "2024-01-01T00:00,1,2\n"
        "2024-01-01T03:00,3,4\n"
        "2024-01-01T04:00,5,6\n"
        "2024-01-01T06:00,7,8\n"
        "2024-01-01T07:00,9,10\n",
    )
    panel = gapband.read(path)
    assert panel.attrs["step"] == "h"
    assert panel.sizes["time"] == 8
    nan = np.nan
    np.testing.assert_array_equal(
        panel["value"].values,
        [[1, nan, nan, 3, 5, nan, 7, 9], [2, nan, nan, 4, 6, nan, 8, 10]],
    )
    assert "3 absent time steps added as missing" in panel.attrs["alignment"]


def test_off_grid_timestamp_is_an_error(write):
    path = write(
        "offgrid.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,2\n"
        "2024-01-01T02:03,A,3\n2024-01-01T03:00,A,4\n2024-01-01T04:00,A,5\n"
        "2024-01-01T05:00,A,6\n",
    )
    with pytest.raises(
        TimestampError,
        match=r"offgrid\.csv, line 4: timestamp 2024-01-01 02:03:00 is off the h grid",
    ):
        gapband.read(path)


def test_snap_moves_off_grid_timestamps_to_the_nearest_point(write):
    path = write(
        "offgrid.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,2\n"
        "2024-01-01T02:03,A,3\n2024-01-01T02:58,A,4\n2024-01-01T04:00,A,5\n"
        "2024-01-01T05:00,A,6\n2024-01-01T06:00,A,7\n",
    )
    panel = gapband.read(path, snap="5min")
    expected = pd.date_range("2024-01-01T00:00", periods=7, freq="h").to_numpy()
    np.testing.assert_array_equal(panel["time"].values, expected)
    # 02:03 lands on 02:00 and 02:58 on 03:00.
    assert panel["value"].sel(series="A", time="2024-01-01T02:00").item() == 3.0
    assert panel["value"].sel(series="A", time="2024-01-01T03:00").item() == 4.0
    assert "2 timestamps snapped to the grid" in panel.attrs["alignment"]


def test_snap_tolerance_too_small_is_still_an_error(write):
    path = write(
        "offgrid.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,2\n"
        "2024-01-01T02:03,A,3\n2024-01-01T03:00,A,4\n2024-01-01T04:00,A,5\n"
        "2024-01-01T05:00,A,6\n",
    )
    with pytest.raises(TimestampError, match=r"line 4: .*off the h grid.*widen the snapping"):
        gapband.read(path, snap="2min")


def test_off_grid_first_timestamp_does_not_shift_the_grid(write):
    path = write(
        "first_off.csv",
        "time,series,value\n2024-01-01T00:02,A,1\n2024-01-01T01:00,A,2\n"
        "2024-01-01T02:00,A,3\n2024-01-01T03:00,A,4\n",
    )
    with pytest.raises(TimestampError, match=r"line 2: timestamp 2024-01-01 00:02:00 is off"):
        gapband.read(path)
    panel = gapband.read(path, snap="5min")
    expected = pd.date_range("2024-01-01T00:00", periods=4, freq="h").to_numpy()
    np.testing.assert_array_equal(panel["time"].values, expected)
    np.testing.assert_array_equal(panel["value"].values, [[1.0, 2.0, 3.0, 4.0]])


def test_snapping_onto_an_occupied_point_is_a_duplicate(write):
    path = write(
        "snapdup.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,2\n"
        "2024-01-01T01:02,A,3\n2024-01-01T02:00,A,4\n2024-01-01T03:00,A,5\n",
    )
    with pytest.raises(DuplicateError, match=r"line 3: series 'A' at 2024-01-01 01:00:00; line 4"):
        gapband.read(path, snap="5min")


def test_monthly_data_gets_month_start_step(write):
    path = write(
        "monthly.csv",
        "date,A\n2023-11-01,1\n2023-12-01,2\n2024-01-01,3\n2024-02-01,4\n2024-04-01,6\n",
    )
    panel = gapband.read(path)
    assert panel.attrs["step"] == "MS"
    expected = pd.date_range("2023-11-01", "2024-04-01", freq="MS").to_numpy()
    np.testing.assert_array_equal(panel["time"].values, expected)
    np.testing.assert_array_equal(panel["value"].values, [[1, 2, 3, 4, np.nan, 6]])


def test_daily_step_is_inferred(write):
    path = write("daily.csv", "date,A\n2024-01-01,1\n2024-01-02,2\n2024-01-04,4\n")
    panel = gapband.read(path)
    assert panel.attrs["step"] == "D"
    np.testing.assert_array_equal(panel["value"].values, [[1, 2, np.nan, 4]])


def test_explicit_step_overrides_the_inferred_one(write):
    # Every other half hour observed: inferred "h", but the user says 30min.
    path = write("half.csv", "time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,2\n")
    panel = gapband.read(path, step="30min")
    assert panel.attrs["step"] == "30min"
    np.testing.assert_array_equal(panel["value"].values, [[1, np.nan, 2]])


@pytest.mark.parametrize(
    ("step", "message"),
    [
        ("fortnightly", r"time step 'fortnightly' is not a frequency"),
        ("W", r"unsupported time step 'W'"),
        ("ME", r"unsupported time step 'ME'"),
        ("2MS", r"unsupported time step '2MS'"),
    ],
)
def test_bad_step_is_a_usage_error(write, step, message):
    path = write("ok.csv", "time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,2\n")
    with pytest.raises(UsageError, match=message):
        gapband.read(path, step=step)


def test_bad_snap_and_layout_and_duplicates_are_usage_errors(write):
    path = write("ok.csv", "time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,2\n")
    with pytest.raises(UsageError, match=r"snapping tolerance 'soon' is not a duration"):
        gapband.read(path, snap="soon")
    with pytest.raises(UsageError, match=r"layout='tall'"):
        gapband.read(path, layout="tall")
    with pytest.raises(UsageError, match=r"duplicates='sum'"):
        gapband.read(path, duplicates="sum")


# --------------------------------------------------------------------------
# Duplicates


DUPLICATED = (
    "time,series,value\n"
    "2024-01-01T00:00,A,1\n"  # line 2
    "2024-01-01T00:00,B,5\n"  # line 3
    "2024-01-01T01:00,A,2\n"  # line 4
    "2024-01-01T00:00,A,3\n"  # line 5: repeats line 2
    "2024-01-01T01:00,B,6\n"  # line 6
    "2024-01-01T01:00,B,NA\n"  # line 7: repeats line 6 with a missing value
    "2024-01-01T02:00,A,4\n"  # line 8
)


def test_duplicate_pairs_are_an_error_listing_first_offenders(write):
    path = write("dup.csv", DUPLICATED)
    with pytest.raises(
        DuplicateError,
        match=r"dup\.csv: 4 rows repeat a \(time, series\) pair, first: "
        r"line 2: series 'A' at 2024-01-01 00:00:00; line 5: series 'A' at 2024-01-01 00:00:00; "
        r"line 6: series 'B' at 2024-01-01 01:00:00; line 7: .*--duplicates mean",
    ):
        gapband.read(path)


def test_duplicates_mean_averages_observed_values(write):
    path = write("dup.csv", DUPLICATED)
    panel = gapband.read(path, duplicates="mean")
    assert panel["value"].sel(series="A", time="2024-01-01T00:00").item() == 2.0
    # A repeat holding a missing value does not pull the mean.
    assert panel["value"].sel(series="B", time="2024-01-01T01:00").item() == 6.0
    assert panel["value"].sel(series="A", time="2024-01-01T01:00").item() == 2.0
    assert "2 duplicate rows averaged" in panel.attrs["alignment"]
    assert "7 rows" in panel.attrs["alignment"]


# --------------------------------------------------------------------------
# Cells


def test_non_numeric_cell_names_line_and_column_in_wide(write):
    path = write(
        "wide_bad.csv",
        "time,A,B\n2024-01-01T00:00,1,2\n2024-01-01T01:00,3,4\n2024-01-01T02:00,5,calibrating\n",
    )
    with pytest.raises(
        ValueParseError,
        match=r"wide_bad\.csv, line 4, column 'B': 'calibrating' is not a number.*--missing-token",
    ):
        gapband.read(path)


def test_non_numeric_cell_names_line_and_column_in_long(write):
    path = write(
        "long_bad.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,1,5\n",
    )
    # "1,5" with a comma decimal splits into an extra field: not a readable table.
    with pytest.raises(InputError, match=r"long_bad\.csv: not a readable CSV table"):
        gapband.read(path)
    path = write(
        "long_bad.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00,A,\"1,5\"\n",
    )
    with pytest.raises(ValueParseError, match=r"long_bad\.csv, line 3, column 'value': '1,5'"):
        gapband.read(path)


@pytest.mark.parametrize("token", ["", "NA", "na", "NaN", "nan", "null", "NULL", " NA "])
def test_default_missing_tokens(write, token):
    path = write("tok.csv", f"time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,{token}\n")
    panel = gapband.read(path)
    assert panel["value"].values[0, 0] == 1.0
    assert np.isnan(panel["value"].values[0, 1])


def test_user_missing_tokens(write):
    text = "time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,-9999\n2024-01-01T02:00,n/a\n"
    path = write("tok.csv", text)
    with pytest.raises(ValueParseError, match=r"line 4, column 'A': 'n/a' is not a number"):
        gapband.read(path)
    panel = gapband.read(path, missing_tokens=["-9999", "N/A"])
    np.testing.assert_array_equal(panel["value"].values, [[1.0, np.nan, np.nan]])
    # Without the token, -9999 is a number like any other.
    panel = gapband.read(path, missing_tokens=["n/a"])
    np.testing.assert_array_equal(panel["value"].values, [[1.0, -9999.0, np.nan]])


@pytest.mark.parametrize("token", ["inf", "-inf", "Infinity", "-Infinity"])
def test_infinite_values_are_an_error(write, token):
    path = write("inf.csv", f"time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,{token}\n")
    with pytest.raises(ValueParseError, match=r"inf\.csv, line 3, column 'A': infinite value"):
        gapband.read(path)


def test_infinite_values_in_parquet_name_the_row(tmp_path):
    path = tmp_path / "inf.parquet"
    pd.DataFrame(
        {"time": pd.date_range("2024-01-01", periods=3, freq="h"), "A": [1.0, 2.0, -np.inf]}
    ).to_parquet(path, index=False)
    with pytest.raises(ValueParseError, match=r"inf\.parquet, row 3, column 'A': infinite value"):
        gapband.read(path)


def test_series_without_observations_is_kept_and_reported(write):
    path = write(
        "empty_series.csv",
        "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T00:00,Z,NA\n"
        "2024-01-01T01:00,A,2\n2024-01-01T01:00,Z,\n",
    )
    panel = gapband.read(path)
    assert list(panel["series"].values) == ["A", "Z"]
    assert np.isnan(panel["value"].sel(series="Z").values).all()
    assert "series with no observation: Z" in panel.attrs["alignment"]


def test_blank_series_id_names_the_line(write):
    path = write(
        "blank.csv", "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T01:00, ,2\n"
    )
    with pytest.raises(InputError, match=r"blank\.csv, line 3: empty series id in column 'series'"):
        gapband.read(path)


def test_long_layout_without_a_value_column_asks_which(write):
    path = write(
        "two.csv", "time,series,pm10,no2\n2024-01-01T00:00,A,1,2\n2024-01-01T01:00,A,3,4\n"
    )
    with pytest.raises(InputError, match=r"which column holds the values\? .*'pm10', 'no2'"):
        gapband.read(path)
    panel = gapband.read(path, value_col="no2")
    np.testing.assert_array_equal(panel["value"].values, [[2.0, 4.0]])


def test_missing_time_column_is_named(write):
    path = write("notime.csv", "when,A\n2024-01-01T00:00,1\n")
    with pytest.raises(
        InputError, match=r"notime\.csv: no time column found among \['when', 'A'\]"
    ):
        gapband.read(path)
    with pytest.raises(InputError, match=r"the time column 'moment' is not in the file"):
        gapband.read(path, time_col="moment")


# --------------------------------------------------------------------------
# Degenerate files and paths


def test_empty_file(write):
    with pytest.raises(InputError, match=r"empty\.csv: the file is empty"):
        gapband.read(write("empty.csv", ""))


def test_header_only_file(write):
    with pytest.raises(InputError, match=r"header\.csv: no data rows"):
        gapband.read(write("header.csv", "time,series,value\n"))


def test_one_time_step(write):
    path = write("one.csv", "time,series,value\n2024-01-01T00:00,A,1\n2024-01-01T00:00,B,2\n")
    with pytest.raises(InputError, match=r"one\.csv: only one distinct time step.*at least two"):
        gapband.read(path)
    with pytest.raises(InputError, match=r"one\.csv: all rows fall on one time step"):
        gapband.read(path, step="h")


def test_one_series_works(write):
    path = write("single.csv", "time,flow\n2024-01-01,1.5\n2024-01-02,\n2024-01-03,2.5\n")
    panel = gapband.read(path)
    assert list(panel["series"].values) == ["flow"]
    np.testing.assert_array_equal(panel["value"].values, [[1.5, np.nan, 2.5]])
    assert gapband.inspect(panel)["series"][0]["capture_pct"] == 66.67


def test_unknown_extension(write):
    with pytest.raises(InputError, match=r"data\.xlsx: unknown file type '\.xlsx'"):
        gapband.read(write("data.xlsx", "time,A\n"))


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"nowhere\.csv: no such file"):
        gapband.read(tmp_path / "nowhere.csv")


def test_folder(tmp_path):
    folder = tmp_path / "stations.csv"
    folder.mkdir()
    with pytest.raises(InputError, match=r"stations\.csv: is a folder"):
        gapband.read(folder)


def test_unreadable_parquet_and_netcdf(write):
    with pytest.raises(InputError, match=r"junk\.parquet: not a readable Parquet file"):
        gapband.read(write("junk.parquet", "not parquet"))
    with pytest.raises(InputError, match=r"junk\.nc: not a readable NetCDF file"):
        gapband.read(write("junk.nc", "not netcdf"))


def test_gzipped_csv_and_bom(tmp_path):
    import gzip

    path = tmp_path / "bom.csv.gz"
    with gzip.open(path, "wt", encoding="utf-8-sig") as f:
        f.write("time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,2\n")
    panel = gapband.read(path)
    np.testing.assert_array_equal(panel["value"].values, [[1.0, 2.0]])


# --------------------------------------------------------------------------
# Nothing lost: every observed value lands unchanged at its (series, time)

_ID = st.text(
    alphabet=st.characters(exclude_categories=("Cc", "Cs", "Zl", "Zp")),
    min_size=1,
    max_size=6,
).filter(lambda s: s == s.strip())
_VALUE = st.floats(allow_nan=False, allow_infinity=False)  # subnormals to 1.8e308
_CELL = st.one_of(
    _VALUE,
    st.sampled_from(["", "NA", "nan", "NULL", "NaN"]),  # written as a missing token
    st.none(),  # no row at all
)
_START = pd.Timestamp("2023-06-01T00:00")


@st.composite
def long_tables(draw):
    ids = draw(st.lists(_ID, min_size=1, max_size=4, unique=True))
    n_time = draw(st.integers(min_value=2, max_value=24))
    rows = []
    for sid in ids:
        cells = draw(st.lists(_CELL, min_size=n_time, max_size=n_time))
        rows.extend((t, sid, cell) for t, cell in enumerate(cells) if cell is not None)
    rows = draw(st.permutations(rows))
    return rows


@settings(max_examples=80, deadline=None)
@given(rows=long_tables())
def test_nothing_lost_in_a_long_table(rows):
    times = {t for t, _, _ in rows}
    if len(times) < 2:
        return  # gapband rightly refuses one time step; covered by test_one_time_step
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "table.csv"
        with path.open("w", encoding="utf-8", newline="") as f:
            out = csv.writer(f)
            out.writerow(["time", "series", "value"])
            for t, sid, cell in rows:
                stamp = (_START + pd.Timedelta(hours=t)).strftime("%Y-%m-%dT%H:%M")
                out.writerow([stamp, sid, repr(cell) if isinstance(cell, float) else cell])
        # The step is given: with random gaps the most common difference may be 2 h.
        panel = gapband.read(path, step="h")

    expected_series = list(dict.fromkeys(sid for _, sid, _ in rows))
    assert sorted(panel["series"].values.tolist()) == sorted(expected_series)
    expected_time = pd.date_range(
        _START + pd.Timedelta(hours=min(times)), _START + pd.Timedelta(hours=max(times)), freq="h"
    )
    np.testing.assert_array_equal(panel["time"].values, expected_time.to_numpy())
    values = panel["value"]
    assert values.dtype == np.float64
    observed = [(t, sid, v) for t, sid, v in rows if isinstance(v, float)]
    for t, sid, v in observed:
        got = values.sel(series=sid, time=_START + pd.Timedelta(hours=t)).item()
        assert got == v and math.copysign(1.0, got) == math.copysign(1.0, v), (sid, t, v, got)
    # Every other cell is missing.
    assert int(values.notnull().sum()) == len(observed)
