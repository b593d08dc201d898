"""Generated good and bad station files through the readers and ``gapband inspect``.

Every generated file ends in one of two ways: a Panel whose observed cells
are exactly the values written (same series, same times, same bits), or one
of gapband's own errors naming the file. Any other exception, a clean file
refused, or a bad file read without complaint fails the test.
``tests/benchmarks/fuzz_readers.py`` runs the same cases in bulk and counts.
"""

from __future__ import annotations

import csv
import io
import math
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import gapband
from gapband.cli import cli
from gapband.errors import GapbandError, InputError

# Column names the readers recognise (gapband.io); generated ids avoid them so
# that a wide file cannot pass for a long one.
_RESERVED = {
    "time", "timestamp", "datetime", "date_time", "time_hour", "date", "series", "station",
    "station_id", "site", "site_id", "sensor", "id", "value", "val", "measurement", "reading",
    "obs", "observation",
}
_STEPS = {"h": "%Y-%m-%dT%H:%M", "30min": "%Y-%m-%d %H:%M:%S", "D": "%Y-%m-%d", "MS": "%Y-%m-%d"}
_ZONES = ("", "Z", "+00:00")
_MISSING = ("", "NA", "na", "NaN", "nan", "null", "NULL", " NA ")
_JUNK = ("calibrating", "n/a", "--", "#N/A", "?", "12abc", "TRUE", "∞", "−5", "1,5", "0x1A")
_TIME_JUNK = ("yesterday", "n/a", "--", "?", "TRUE", "calibrating")

_SHORT_ID = st.text(
    alphabet=st.one_of(
        st.characters(codec="latin-1", exclude_categories=("Cc", "Zs")),
        st.characters(exclude_categories=("Cc", "Cs", "Zl", "Zp", "Zs", "Co", "Cn")),
        st.sampled_from(",\"'; "),  # CSV quoting
    ),
    min_size=1,
    max_size=12,
)
_LONG_ID = st.text(alphabet="abcdé字-_ 0123456789", min_size=300, max_size=3000)
_ID = st.one_of(_SHORT_ID, _SHORT_ID, _SHORT_ID, _LONG_ID).map(str.strip).filter(
    lambda s: s != "" and s.lower() not in _RESERVED
)
_VALUE = st.floats(allow_nan=False, allow_infinity=False)


@dataclass
class Case:
    """A generated file, how to read it, and what reading it must give."""

    name: str
    data: bytes
    read_kw: dict
    # (series id, time) -> value of every observed cell; None when an error is required.
    expected: dict | None
    series: list[str] = field(default_factory=list)
    step: str = "h"
    faults: tuple[str, ...] = ()


def _render(value: float, style: str) -> str:
    if style == "int" and value.is_integer() and abs(value) < 1e15 and (
        value != 0 or math.copysign(1, value) > 0
    ):
        return str(int(value))
    if style == "g17":
        return f"{value:.17g}"
    if style == "padded":
        return f"  {value!r} "
    if style == "plus" and value >= 0 and math.copysign(1, value) > 0:
        return "+" + repr(value)
    return repr(value)


@st.composite
def cases(draw, faulty: float = 0.5) -> Case:
    """A station file with random gaps in a random layout, format and dialect.

    With probability ``faulty`` it also carries faults; those that make the
    file unreadable require an error, the others (shuffled rows, blank lines,
    blank columns, copies of rows read with ``duplicates="mean"``) a Panel.
    """
    ids = draw(st.lists(_ID, min_size=1, max_size=4, unique=True))
    step = draw(st.sampled_from(sorted(_STEPS)))
    n_time = draw(st.integers(2, 20))
    times = pd.date_range("2023-01-01", periods=n_time, freq=step)
    fmt = draw(st.sampled_from(["csv", "csv", "csv", "csv", "parquet", "nc"]))
    layout = "wide" if fmt == "nc" else draw(st.sampled_from(["long", "wide"]))
    # One cell per (series, time): a value, a missing token, or no row at all (long).
    cells = {}
    for sid in ids:
        for t in range(n_time):
            kind = draw(st.sampled_from(["value", "value", "value", "missing", "absent"]))
            if kind == "absent" and layout == "wide":
                kind = "missing"
            cells[sid, t] = (kind, draw(_VALUE) if kind == "value" else None)
    style = draw(st.sampled_from(["repr", "g17", "int", "padded", "plus"]))
    token = draw(st.sampled_from(_MISSING))
    possible = ["shuffle", "blank_line", "duplicate_row", "junk_value", "junk_time",
                "empty_column", "blank_id", "repeated_column", "mixed_zone", "extra_field",
                "utf16"]
    faults = draw(st.lists(st.sampled_from(possible), min_size=1, max_size=3, unique=True)) \
        if draw(st.floats(0, 1)) < faulty else []
    if fmt != "csv":  # faults of the text form only; NetCDF is written from the cells
        faults = [f for f in faults
                  if fmt == "parquet" and f in ("shuffle", "duplicate_row", "junk_value")]
    read_kw = {"step": step}
    if layout == "wide" or draw(st.booleans()):
        read_kw["layout"] = layout
    must_fail = False

    header = ["time", "series", "value"] if layout == "long" else ["time", *ids]
    rows: list[list] = []
    if layout == "long":
        for (sid, t), (kind, v) in cells.items():
            if kind != "absent":
                rows.append([t, sid, v])
    else:
        rows = [[t, *(cells[sid, t][1] for sid in ids)] for t in range(n_time)]
    if "shuffle" in faults:
        rows = draw(st.permutations(rows))
    if "duplicate_row" in faults and rows:
        copy = list(rows[draw(st.integers(0, len(rows) - 1))])
        rows.insert(draw(st.integers(0, len(rows))), copy)
        if layout == "long" and draw(st.booleans()):
            read_kw["duplicates"] = "mean"
        else:
            must_fail = True
    if "junk_value" in faults and rows:
        row = draw(st.integers(0, len(rows) - 1))
        col = 2 if layout == "long" else draw(st.integers(1, len(ids)))
        rows[row] = list(rows[row])
        rows[row][col] = draw(st.sampled_from(_JUNK))
        if draw(st.booleans()):  # declared as a missing token, the junk is just missing
            read_kw["missing_tokens"] = [rows[row][col]]
        else:
            must_fail = True
    zone = draw(st.sampled_from(_ZONES)) if step in ("h", "30min") else ""

    def stamp(t: int, row: int) -> str:
        text = times[t].strftime(_STEPS[step])
        return text + ("" if "mixed_zone" in faults and row == 0 else zone)

    if "mixed_zone" in faults:
        must_fail = must_fail or zone != ""

    # Observed cells as the rows finally say (a junk token read as missing counts as missing).
    expected: dict = {}
    row_times: set[int] = set()
    for row in rows:
        t = row[0]
        row_times.add(t)
        pairs = [(row[1], row[2])] if layout == "long" else list(zip(ids, row[1:], strict=True))
        for sid, v in pairs:
            if isinstance(v, float):
                expected[sid, times[t]] = v
    if len(row_times) < 2:
        must_fail = True
    series = sorted({r[1] for r in rows}) if layout == "long" else list(ids)
    name = draw(st.sampled_from(["stations", "réseau", "data set"])) + f".{fmt}"

    if fmt == "parquet":
        data = _parquet(header, rows, times, layout, style, token)
    elif fmt == "nc":
        data = _netcdf(ids, times, cells)
    else:
        text_rows = [
            [stamp(r[0], i), *(_cell(v, style, token) for v in r[1:])] if layout == "wide"
            else [stamp(r[0], i), r[1], _cell(r[2], style, token)]
            for i, r in enumerate(rows)
        ]
        if "junk_time" in faults and text_rows:
            text_rows[draw(st.integers(0, len(text_rows) - 1))][0] = draw(
                st.sampled_from(_TIME_JUNK))
            must_fail = True
        if "blank_id" in faults and layout == "long" and text_rows:
            text_rows[draw(st.integers(0, len(text_rows) - 1))][1] = draw(
                st.sampled_from(["", "  "]))
            must_fail = True
        if "empty_column" in faults:  # a trailing separator: a blank column without a name
            header = [*header, ""]
            text_rows = [[*r, ""] for r in text_rows]
        if "repeated_column" in faults:
            header = [*header, header[1]]
            text_rows = [[*r, r[1]] for r in text_rows]
            must_fail = True
        if "extra_field" in faults and text_rows:
            text_rows[draw(st.integers(0, len(text_rows) - 1))].append("7")
            must_fail = True
        if "blank_line" in faults:
            text_rows.insert(draw(st.integers(0, len(text_rows))), [])
        newline = draw(st.sampled_from(["\n", "\r\n"]))
        buffer = io.StringIO()
        csv.writer(buffer, lineterminator=newline).writerows([header, *text_rows])
        text = buffer.getvalue()
        encoding = "utf-16" if "utf16" in faults else draw(
            st.sampled_from(["utf-8", "utf-8-sig", "latin-1"]))
        must_fail = must_fail or encoding == "utf-16"
        try:
            data = text.encode(encoding)
        except UnicodeEncodeError:
            data = text.encode("utf-8")
        # Bytes that happen to be valid UTF-8 are read as UTF-8 (documented order).
        if encoding == "latin-1" and data != text.encode("utf-8"):
            try:
                data.decode("utf-8")
            except UnicodeDecodeError:
                pass
            else:
                expected = {(_redecode(s), t): v for (s, t), v in expected.items()}
                series = [_redecode(s) for s in series]
    return Case(name, data, read_kw, None if must_fail else expected, series, step,
                tuple(faults))


def _redecode(text: str) -> str:
    return text.encode("latin-1").decode("utf-8")


def _cell(v, style: str, token: str) -> str:
    if isinstance(v, float):
        return _render(v, style)
    return token if v is None else v


def _parquet(header, rows, times, layout, style, token) -> bytes:
    columns = list(zip(*rows, strict=True)) if rows else [[] for _ in header]
    frame = pd.DataFrame({name: list(col) for name, col in zip(header, columns, strict=True)})
    frame["time"] = times[frame["time"].to_numpy(dtype=int)] if len(frame) else []
    for name in header[1:]:
        if layout == "long" and name == "series":
            continue
        values = frame[name].tolist()
        if all(v is None or isinstance(v, float) for v in values):
            frame[name] = pd.array([np.nan if v is None else v for v in values], dtype="float64")
        else:  # text cells: junk or numbers as text, as spreadsheets export them
            frame[name] = [_cell(v, style, token) for v in values]
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    return buffer.getvalue()


def _netcdf(ids, times, cells) -> bytes:
    values = np.array([[np.nan if cells[s, t][1] is None else cells[s, t][1]
                        for t in range(len(times))] for s in ids])
    ds = xr.Dataset({"level": (("station", "time"), values)},
                    coords={"station": np.array(ids, dtype=object), "time": times})
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "x.nc"
        ds.to_netcdf(path, engine="h5netcdf")
        return path.read_bytes()


def read_case(case: Case, folder: Path) -> str:
    """Read a case and check the outcome; return "panel" or "error" (assertions otherwise)."""
    path = folder / case.name
    path.write_bytes(case.data)
    try:
        panel = gapband.read(path, **case.read_kw)
    except GapbandError as err:
        assert case.name in str(err), f"the message does not name the file: {err}"
        assert case.expected is None, f"a readable file was refused ({case.faults}): {err}"
        return "error"
    assert case.expected is not None, f"a bad file was read ({case.faults})"
    check_panel(panel, case)
    return "panel"


def check_panel(panel: xr.Dataset, case: Case) -> None:
    """Observed cells of the Panel are exactly the expected ones, on a regular grid."""
    assert sorted(panel["series"].values.tolist()) == sorted(case.series)
    times = pd.DatetimeIndex(panel["time"].values)
    assert times.equals(pd.date_range(times[0], times[-1], freq=case.step))
    values = panel["value"].transpose("series", "time")
    assert values.dtype == np.float64
    rows = {s: i for i, s in enumerate(panel["series"].values.tolist())}
    grid = values.values
    for (sid, t), v in case.expected.items():
        got = grid[rows[sid], times.get_loc(t)]
        assert np.float64(got).view("int64") == np.float64(v).view("int64"), (sid, t, v, got)
    assert int(np.isfinite(grid).sum()) == len(case.expected)


def inspect_case(case: Case, folder: Path) -> int:
    """Run ``gapband inspect`` on the case; it must exit 0 or with an input error (3)."""
    path = folder / case.name
    path.write_bytes(case.data)
    args = ["inspect", str(path)]
    for key, value in case.read_kw.items():
        values = value if isinstance(value, list) else [value]
        option = "--missing-token" if key == "missing_tokens" else "--" + key
        for v in values:
            args += [option, str(v)]
    result = CliRunner().invoke(cli, args)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    expected_code = 3 if case.expected is None else 0
    assert result.exit_code == expected_code, result.output
    return result.exit_code


@settings(max_examples=120, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=cases())
def test_every_generated_file_reads_exactly_or_fails_clearly(case):
    with tempfile.TemporaryDirectory() as tmp:
        read_case(case, Path(tmp))


@settings(max_examples=30, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=cases(faulty=0.7))
def test_inspect_exits_cleanly_on_every_generated_file(case):
    with tempfile.TemporaryDirectory() as tmp:
        inspect_case(case, Path(tmp))


# --------------------------------------------------------------------------
# Cases the generator found, kept as plain examples


def _read_text(text: str, name: str = "found.csv", **kw):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / name
        path.write_bytes(text.encode("utf-8"))
        return gapband.read(path, **kw)


def test_a_leading_plus_sign_keeps_every_bit():
    # pandas.to_numeric reads "+1.2467561080046997e+229" one unit in the last place low.
    panel = _read_text("time,A\n2024-01-01T00:00,+1.2467561080046997e+229\n2024-01-01T01:00,1\n")
    assert panel["value"].values[0, 0] == 1.2467561080046997e+229


@pytest.mark.parametrize("value", [-0.0, 1.7e308, 5e-324])
def test_averaging_copies_of_one_value_keeps_it_bit_for_bit(value):
    text = (f"time,series,value\n2024-01-01T00:00,A,{value!r}\n2024-01-01T00:00,A,{value!r}\n"
            "2024-01-01T01:00,A,1\n")
    got = _read_text(text, duplicates="mean")["value"].values[0, 0]
    assert np.float64(got).view("int64") == np.float64(value).view("int64")


def test_averaging_near_the_float64_limit_does_not_overflow():
    text = ("time,series,value\n2024-01-01T00:00,A,1.6e308\n2024-01-01T00:00,A,1.4e308\n"
            "2024-01-01T01:00,A,1\n")
    assert _read_text(text, duplicates="mean")["value"].values[0, 0] == 1.5e308


def test_a_trailing_separator_adds_no_series():
    panel = _read_text("time,A,\n2024-01-01T00:00,1,\n2024-01-01T01:00,2,\n")
    assert panel["series"].values.tolist() == ["A"]


def test_a_column_without_a_name_but_with_values_is_refused():
    with pytest.raises(InputError, match=r"found\.csv, line 3: column 3 has values but no name"):
        _read_text("time,A,\n2024-01-01T00:00,1,\n2024-01-01T01:00,2,9\n")


def test_a_repeated_column_name_is_refused_not_renamed():
    with pytest.raises(InputError, match=r"found\.csv: the column name 'A' appears 2 times on "
                       r"line 1 \(columns 2, 3\)"):
        _read_text("time,A,A\n2024-01-01T00:00,1,2\n2024-01-01T01:00,2,3\n")


def test_rows_longer_than_the_header_are_refused_not_shifted():
    # pandas would otherwise take the first column as the index and shift every value.
    with pytest.raises(InputError, match=r"found\.csv: not a readable CSV table .*line 2"):
        _read_text("time,A\n2024-01-01T00:00,1,2\n2024-01-01T01:00,3,4\n")


def test_blank_lines_keep_the_line_numbers_true():
    with pytest.raises(InputError, match=r"found\.csv, line 5, column 'A': 'oops'"):
        _read_text("time,A\n2024-01-01T00:00,1\n\n,\n2024-01-01T01:00,oops\n")


def test_a_blank_first_line_is_named():
    with pytest.raises(InputError, match=r"found\.csv, line 1: the first line is blank"):
        _read_text("\ntime,A\n2024-01-01T00:00,1\n")
