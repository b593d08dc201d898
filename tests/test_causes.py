"""Known causes of gaps: the causes file, capture with planned maintenance apart, the outputs."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

from gapband import causes, filling, flags
from gapband.cli import cli
from gapband.errors import InputError
from gapband.panel import make_panel

SERIES = ["north", "east"]


def _write(tmp_path, text: str):
    path = tmp_path / "causes.csv"
    path.write_text(text, encoding="utf-8")
    return path


def _result(tmp_path, text: str) -> xr.Dataset:
    """Two series × 10 hours, flagged; north misses hours 2-5, east hour 7."""
    values = np.arange(20, dtype=float).reshape(2, 10)
    values[0, 2:6] = np.nan
    values[1, 7] = np.nan
    time = pd.date_range("2024-05-01", periods=10, freq="h")
    panel = make_panel(values, SERIES, time, "h")
    panel["fill_median"] = panel["value"].fillna(1.0)
    panel["fill_sd"] = panel["value"] * 0 + 0.1
    result = flags.assign(panel, min_observed=1, max_var_width=None)  # no intervals here
    return causes.attach(result, causes.read(_write(tmp_path, text), SERIES))


def test_a_causes_file_is_read_and_checked(tmp_path):
    table = causes.read(_write(tmp_path, (
        "series,start,end,cause,planned\n"
        "north,2024-05-01T02:00Z,2024-05-01T03:00Z,planned calibration,yes\n"
        "east, 2024-05-01T07:00+02:00,2024-05-01T07:00+02:00,power failure,\n")), SERIES)
    assert list(table["cause"]) == ["planned calibration", "power failure"]
    assert list(table["planned"]) == [True, False]
    # A zone-aware stamp is converted to UTC, as the data's are.
    assert table["start"].iloc[1] == pd.Timestamp("2024-05-01 05:00")


@pytest.mark.parametrize(("text", "message"), [
    ("series,start,cause\nnorth,2024-05-01,x\n", r"lacks the column\(s\) end"),
    ("series,start,end,cause\nwest,2024-05-01,2024-05-02,x\n",
     r"row 2: series 'west' is not in the data \(series: north, east\)"),
    ("series,start,end,cause,planned\nnorth,2024-05-01,2024-05-02,x,maybe\n",
     r"row 2: planned = 'maybe'; use yes or no"),
    ("series,start,end,cause\nnorth,2024-05-02,2024-05-01,x\n",
     r"row 2: end '2024-05-01' is before start '2024-05-02'"),
    ("series,start,end,cause\nnorth,soon,2024-05-01,x\n", r"row 2: cannot read 'soon'"),
])
def test_a_bad_causes_file_names_the_file_row_and_remedy(tmp_path, text, message):
    with pytest.raises(InputError, match=r"causes\.csv.*" + message):
        causes.read(_write(tmp_path, text), SERIES)


def test_capture_leaves_out_missing_steps_of_planned_maintenance(tmp_path):
    # Hand-computed (common practice: planned maintenance is taken out of the
    # expected steps). north: 6 of 10 measured; the planned cause covers hours
    # 2-4 and 9, of which 2-4 are missing (9 was measured, so it stays
    # expected): 6 / (10 - 3) = 85.71 %. east's cause is not planned: 9 / 10.
    result = _result(tmp_path, (
        "series,start,end,cause,planned\n"
        "north,2024-05-01T02:00,2024-05-01T04:00,planned calibration,yes\n"
        "north,2024-05-01T09:00,2024-05-01T09:00,planned calibration,yes\n"
        "east,2024-05-01T07:00,2024-05-01T07:00,power failure,no\n"))
    capture = filling.capture_before_after(result)
    assert capture["measured"] == {"north": 60.0, "east": 90.0}
    assert capture["measured_excluding_planned"] == {"north": 85.71, "east": 90.0}


def test_a_run_names_every_cause_that_overlaps_it(tmp_path):
    result = _result(tmp_path, (
        "series,start,end,cause,planned\n"
        "north,2024-05-01T00:00,2024-05-01T02:00,planned calibration,yes\n"
        "north,2024-05-01T05:00,2024-05-01T06:00,power failure,no\n"
        "east,2024-05-01T03:00,2024-05-01T04:00,vandalism,no\n"))
    times = result["time"].values
    assert causes.of_run(result, "north", times[2], times[5]) == (
        "planned calibration (planned); power failure")
    assert causes.of_run(result, "east", times[7], times[7]) == causes.NOT_GIVEN
    assert causes.of_run(result.drop_dims("cause"), "north", times[2], times[5]) == "not given"


def test_fill_carries_causes_into_its_outputs_and_report(tmp_path):
    values = np.vstack([20 + np.sin(np.arange(96) / 4), 10 + np.cos(np.arange(96) / 4)])
    values[0, 30:40] = np.nan
    time = pd.date_range("2024-03-01", periods=96, freq="h")
    data = pd.DataFrame([(t.isoformat(), name, v) for name, row in zip(SERIES, values,
                                                                        strict=True)
                         for t, v in zip(time, row, strict=True)],
                        columns=["time", "station", "value"])
    data.to_csv(tmp_path / "data.csv", index=False)
    known = _write(tmp_path, "series,start,end,cause,planned\n"
                   "north,2024-03-02T06:00,2024-03-02T12:00,planned calibration,yes\n")
    (tmp_path / "tiny.toml").write_text('base = "hourly"\nrank = 1\nar_factors = 0\n\n'
                                        '[[seasonal]]\nperiod = "1D"\nharmonics = 1\n',
                                        encoding="utf-8")
    out = tmp_path / "out"
    run = CliRunner().invoke(cli, ["fill", str(tmp_path / "data.csv"), "--out", str(out),
                                   "--model", str(tmp_path / "tiny.toml"), "--causes",
                                   str(known), "--draws", "40", "--tune", "40", "--quiet"])
    assert run.exit_code == 0, run.output
    with xr.open_dataset(out / "filled.nc") as ds:
        assert list(ds["cause_text"].values) == ["planned calibration"]
        assert int(ds["cause_planned"].values[0]) == 1
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    # 86 of 96 measured; hours 06:00-12:00 of 2 March (7 steps) are planned and missing.
    assert summary["capture"]["measured_excluding_planned"]["north"] == round(
        100 * 86 / (96 - 7), 2)
    assert summary["causes"] == {"file": str(known), "rows": 1, "planned": 1}
    report = CliRunner().invoke(cli, ["report", str(out)])
    assert report.exit_code == 0, report.output
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "planned calibration (planned)" in html
    assert "planned maintenance left out" in html
