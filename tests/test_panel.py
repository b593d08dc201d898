"""The Panel helpers: gap runs, capture and the inspect figures, on hand-made panels."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import gapband
from gapband.errors import InputError, UsageError
from gapband.panel import (
    capture,
    check_step,
    from_long,
    gap_runs,
    infer_step,
    make_panel,
    nominal_step,
    run_lengths,
)


def test_gap_runs_and_run_lengths_on_a_small_mask():
    missing = np.array(
        [
            [False, True, True, False, True],
            [True, True, True, True, True],
            [False, False, False, False, False],
        ]
    )
    assert gap_runs(missing) == [(0, 1, 2), (0, 4, 1), (1, 0, 5)]
    np.testing.assert_array_equal(
        run_lengths(missing), [[0, 2, 2, 0, 1], [5, 5, 5, 5, 5], [0, 0, 0, 0, 0]]
    )
    # One series given as a 1-D mask.
    assert gap_runs(np.array([True, False, True, True])) == [(0, 0, 1), (0, 2, 2)]


def test_gap_runs_of_nothing_missing():
    assert gap_runs(np.zeros((2, 4), dtype=bool)) == []
    assert run_lengths(np.zeros((2, 4), dtype=bool)).sum() == 0


# Gap lengths on both sides of every histogram edge: 1 | 2-6 | 7-24 | 25-168 | >168.
EDGE_GAPS = (1, 2, 6, 7, 24, 25, 168, 169)


def _edge_panel():
    """Series "edges": one observed step, then each gap of EDGE_GAPS followed by one observed.

    Series "full" is complete, "ends" misses its first 3 and last 2 steps,
    "none" has no observation.
    """
    row = [1.0]
    for n in EDGE_GAPS:
        row += [np.nan] * n + [1.0]
    n_time = len(row)  # 9 observed + 402 missing = 411
    ends = np.ones(n_time)
    ends[:3] = np.nan
    ends[-2:] = np.nan
    values = np.vstack([row, np.ones(n_time), ends, np.full(n_time, np.nan)])
    time = pd.date_range("2024-01-01", periods=n_time, freq="h")
    return make_panel(values, ["edges", "full", "ends", "none"], time, "h", source="hand")


def test_make_panel_shape_and_attrs():
    panel = _edge_panel()
    assert panel["value"].dims == ("series", "time")
    assert panel["value"].dtype == np.float64
    assert panel.sizes == {"series": 4, "time": 411}
    assert panel.attrs["step"] == "h"
    assert panel.attrs["source"] == "hand"


def test_capture_per_series():
    np.testing.assert_allclose(
        capture(_edge_panel()).values, [100 * 9 / 411, 100.0, 100 * 406 / 411, 0.0]
    )


def test_inspect_edge_series_figures():
    figures = gapband.inspect(_edge_panel(), capture_threshold=90)
    edges = figures["series"][0]
    assert edges["series"] == "edges"
    assert edges["expected"] == 411
    assert edges["observed"] == 9
    assert edges["capture_pct"] == 2.19  # 9 / 411 = 2.1898 %
    assert edges["meets_threshold"] is False
    assert edges["n_gaps"] == 8
    assert edges["gap_histogram"] == {"1": 1, "2-6": 2, "7-24": 2, "25-168": 2, ">168": 1}
    assert edges["longest_gap_steps"] == 169
    assert edges["longest_gap_duration"] == "7d 1h"
    assert edges["first_observation"] == "2024-01-01T00:00:00"
    assert edges["last_observation"] == "2024-01-18T02:00:00"  # step 410


def test_inspect_full_ends_and_empty_series():
    figures = gapband.inspect(_edge_panel(), capture_threshold=90)
    _, full, ends, none = figures["series"]
    assert full["capture_pct"] == 100.0
    assert full["meets_threshold"] is True
    assert full["n_gaps"] == 0
    assert full["longest_gap_steps"] == 0
    assert full["longest_gap_duration"] == "0"
    assert full["gap_histogram"] == {"1": 0, "2-6": 0, "7-24": 0, "25-168": 0, ">168": 0}

    assert ends["observed"] == 406
    assert ends["capture_pct"] == 98.78  # 406 / 411 = 98.7835 %
    assert ends["n_gaps"] == 2
    assert ends["gap_histogram"]["2-6"] == 2
    assert ends["longest_gap_duration"] == "3h"
    assert ends["first_observation"] == "2024-01-01T03:00:00"
    assert ends["last_observation"] == "2024-01-18T00:00:00"  # step 408

    assert none["observed"] == 0
    assert none["capture_pct"] == 0.0
    assert none["meets_threshold"] is False
    assert none["n_gaps"] == 1
    assert none["longest_gap_steps"] == 411
    assert none["longest_gap_duration"] == "17d 3h"
    assert none["gap_histogram"][">168"] == 1
    assert none["first_observation"] is None
    assert none["last_observation"] is None


def test_inspect_overall_figures():
    figures = gapband.inspect(_edge_panel(), capture_threshold=90)
    assert figures["source"] == "hand"
    assert figures["step"] == "h"
    assert figures["start"] == "2024-01-01T00:00:00"
    assert figures["end"] == "2024-01-18T02:00:00"
    assert figures["capture_threshold"] == 90
    overall = figures["overall"]
    assert overall["series"] == 4
    assert overall["expected"] == 4 * 411
    assert overall["observed"] == 9 + 411 + 406
    assert overall["capture_pct"] == 50.24  # 826 / 1644 = 50.243 %
    assert overall["series_meeting_threshold"] == 2
    assert overall["n_gaps"] == 8 + 0 + 2 + 1
    assert overall["longest_gap_steps"] == 411
    assert overall["gap_histogram"] == {"1": 1, "2-6": 4, "7-24": 2, "25-168": 2, ">168": 2}


@pytest.mark.parametrize(
    ("step", "gap", "text"),
    [("30min", 5, "2h 30min"), ("D", 3, "3d"), ("10min", 6, "1h"), ("h", 25, "1d 1h")],
)
def test_longest_gap_duration_follows_the_step(step, gap, text):
    values = np.array([[1.0] + [np.nan] * gap + [1.0]])
    time = pd.date_range("2024-01-01", periods=gap + 2, freq=step)
    figures = gapband.inspect(make_panel(values, ["s"], time, step))
    assert figures["series"][0]["longest_gap_duration"] == text


def test_worked_capture_figure_8000_of_8760_hours():
    # Source: 90 % minimum data capture, EU ambient air quality directive 2008/50/EC,
    # Annex I (data quality objectives)
    values = np.ones((1, 8760))
    values[0, 1000:1760] = np.nan  # 760 missing hours, 8,000 observed
    time = pd.date_range("2023-01-01", periods=8760, freq="h")
    panel = make_panel(values, ["station"], time, "h")
    row = gapband.inspect(panel, capture_threshold=90)["series"][0]
    assert row["observed"] == 8000
    assert row["expected"] == 8760
    assert row["capture_pct"] == 91.32  # 8000 / 8760 = 91.324 %
    assert row["meets_threshold"] is True
    assert row["longest_gap_duration"] == "31d 16h"  # 760 h
    # The unrounded figure decides: 91.324 % meets 91.32 but not 91.33.
    assert gapband.inspect(panel, capture_threshold=91.32)["series"][0]["meets_threshold"]
    assert not gapband.inspect(panel, capture_threshold=91.33)["series"][0]["meets_threshold"]


@pytest.mark.parametrize("threshold", [-1, 100.5])
def test_inspect_rejects_a_threshold_outside_0_100(threshold):
    with pytest.raises(UsageError, match=r"capture threshold .* is not a percentage"):
        gapband.inspect(_edge_panel(), capture_threshold=threshold)


# --------------------------------------------------------------------------
# Steps and alignment straight from a long table


@pytest.mark.parametrize(
    ("times", "step"),
    [
        (pd.date_range("2024-01-01", periods=5, freq="h"), "h"),
        (pd.date_range("2024-01-01", periods=5, freq="30min"), "30min"),
        (pd.date_range("2024-01-01", periods=5, freq="D"), "D"),
        (pd.date_range("2024-01-01", periods=5, freq="7D"), "7D"),
        (pd.date_range("2023-01-01", periods=14, freq="MS"), "MS"),
        # Gaps do not change the most common difference.
        (pd.DatetimeIndex(["2024-01-01 00:00", "2024-01-01 01:00", "2024-01-01 02:00",
                           "2024-01-01 05:00", "2024-01-01 09:00"]), "h"),
    ],
)
def test_infer_step(times, step):
    assert infer_step(times) == step


def test_infer_step_needs_two_times():
    with pytest.raises(InputError, match=r"here: only one distinct time step"):
        infer_step(pd.DatetimeIndex(["2024-01-01"] * 3), source="here")


@pytest.mark.parametrize(
    ("step", "duration"),
    [("h", "1h"), ("30min", "30min"), ("D", "1D"), ("2D", "2D"), ("MS", "30.436875D")],
)
def test_nominal_step(step, duration):
    assert nominal_step(step) == pd.Timedelta(duration)
    assert check_step(step) == step


def test_check_step_rejects_calendar_steps():
    with pytest.raises(UsageError, match=r"unsupported time step 'W'"):
        check_step("W")


def _table(times, series, values):
    return pd.DataFrame(
        {
            "time": pd.DatetimeIndex(times),
            "series": series,
            "value": np.asarray(values, dtype="float64"),
            "where": [f"row {i + 1}" for i in range(len(values))],
        }
    )


def test_from_long_reports_its_alignment():
    table = _table(
        ["2024-01-01 00:00", "2024-01-01 01:00", "2024-01-01 03:00", "2024-01-01 00:00",
         "2024-01-01 01:00"],
        ["a", "a", "a", "b", "b"],
        [1, 2, 3, np.nan, np.nan],
    )
    panel, report = from_long(table, source="mem")
    assert report.step == "h"
    assert report.n_rows == 5
    assert report.n_grid_added == 1
    assert report.n_duplicates_merged == 0
    assert report.n_snapped == 0
    assert report.empty_series == ("b",)
    assert panel.attrs["alignment"] == (
        "step h; 5 rows; 1 absent time steps added as missing; series with no observation: b"
    )
    np.testing.assert_array_equal(
        panel["value"].values, [[1, 2, np.nan, 3], [np.nan] * 4]
    )


def test_from_long_keeps_first_appearance_order_of_series():
    table = _table(
        ["2024-01-01 00:00", "2024-01-01 00:00", "2024-01-01 01:00", "2024-01-01 01:00"],
        ["z", "a", "a", "z"],
        [1, 2, 3, 4],
    )
    panel, _ = from_long(table, source="mem")
    assert list(panel["series"].values) == ["z", "a"]
    np.testing.assert_array_equal(panel["value"].values, [[1, 4], [2, 3]])


def test_from_long_rejects_an_empty_table():
    with pytest.raises(InputError, match=r"mem: no data rows"):
        from_long(_table([], [], []), source="mem")
