"""The command line: gapband --help / --version / inspect, exit codes and messages."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

import gapband
from gapband.cli import cli

GOOD = (
    "time,series,value\n"
    "2024-01-01T00:00,north,1.0\n"
    "2024-01-01T00:00,south,2.0\n"
    "2024-01-01T01:00,north,1.5\n"
    "2024-01-01T02:00,north,\n"
    "2024-01-01T02:00,south,2.5\n"
    "2024-01-01T03:00,north,1.2\n"
    "2024-01-01T03:00,south,2.2\n"
)  # north 3/4 = 75 %, south 3/4 = 75 % (01:00 absent)


def flat(text: str) -> str:
    """Whitespace collapsed, so that rich's line wrapping cannot split a phrase."""
    return " ".join(text.split())


@pytest.fixture
def good(write) -> Path:
    return write("stations.csv", GOOD)


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


def test_help(runner):
    result = runner.invoke(cli, ["--help"])
    assert result.exit_code == 0
    assert "Probabilistic gap filling" in result.output
    assert "inspect" in result.output
    result = runner.invoke(cli, ["inspect", "--help"])
    assert result.exit_code == 0
    for option in ("--json", "--capture-threshold", "--duplicates", "--snap", "--missing-token"):
        assert option in result.output


def test_version(runner):
    result = runner.invoke(cli, ["--version"])
    assert result.exit_code == 0
    assert result.output.strip() == f"gapband, version {gapband.__version__}"


def test_inspect_good_file(runner, good):
    result = runner.invoke(cli, ["inspect", str(good)])
    assert result.exit_code == 0, result.output
    out = flat(result.stdout)
    assert "north" in out and "south" in out
    assert "3/4" in out and "75.0" in out  # observed/expected and capture %
    assert "6/8" in out  # the overall row
    assert "stations.csv" in out
    assert "step h; 7 rows" in out  # the alignment line


def test_inspect_threshold_changes_meets(runner, good):
    result = runner.invoke(cli, ["inspect", str(good), "--capture-threshold", "70"])
    assert result.exit_code == 0
    assert "2/2" in flat(result.stdout)  # both series meet 70 %
    result = runner.invoke(cli, ["inspect", str(good), "--capture-threshold", "80"])
    assert "0/2" in flat(result.stdout)


def test_inspect_json_writes_the_same_figures(runner, good, tmp_path):
    out = tmp_path / "figures.json"
    result = runner.invoke(cli, ["inspect", str(good), "--json", str(out)])
    assert result.exit_code == 0, result.output
    figures = json.loads(out.read_text(encoding="utf-8"))
    expected = gapband.inspect(gapband.read(good))
    for key in ("source", "step", "start", "end", "capture_threshold", "overall", "series"):
        assert figures[key] == expected[key], key
    assert figures["series"][0]["series"] == "north"
    assert figures["series"][0]["capture_pct"] == 75.0
    assert figures["alignment"].startswith("step h; 7 rows")


def test_inspect_json_refuses_to_overwrite(runner, good, tmp_path):
    out = tmp_path / "figures.json"
    out.write_text("keep me", encoding="utf-8")
    result = runner.invoke(cli, ["inspect", str(good), "--json", str(out)])
    assert result.exit_code == 2
    assert "--overwrite" in result.output
    assert out.read_text(encoding="utf-8") == "keep me"
    result = runner.invoke(cli, ["inspect", str(good), "--json", str(out), "--overwrite"])
    assert result.exit_code == 0, result.output
    assert json.loads(out.read_text(encoding="utf-8"))["step"] == "h"


def test_inspect_bad_input_exits_3_and_names_the_line(runner, write):
    path = write("bad.csv", GOOD.replace("2024-01-01T02:00,south,2.5", "2024-01-01T02:00,south,x"))
    result = runner.invoke(cli, ["inspect", str(path)])
    assert result.exit_code == 3
    err = flat(result.stderr)
    assert "input error:" in err
    assert "bad.csv, line 6, column 'value': 'x' is not a number" in err
    assert result.stdout == ""


def test_inspect_bad_timestamp_exits_3(runner, write):
    path = write("badtime.csv", GOOD.replace("2024-01-01T03:00,north", "03/31/2024 25:00,north"))
    result = runner.invoke(cli, ["inspect", str(path)])
    assert result.exit_code == 3
    assert "badtime.csv, line 7: cannot read '03/31/2024 25:00'" in flat(result.stderr)


def test_inspect_missing_file_exits_3(runner, tmp_path):
    result = runner.invoke(cli, ["inspect", str(tmp_path / "none.csv")])
    assert result.exit_code == 3
    assert "none.csv: no such file" in flat(result.stderr)


def test_inspect_options_reach_the_reader(runner, write):
    path = write("tok.csv", "time,A\n2024-01-01T00:00,1\n2024-01-01T01:00,-9999\n")
    result = runner.invoke(cli, ["inspect", str(path), "--missing-token", "-9999"])
    assert result.exit_code == 0, result.output
    assert "1/2" in flat(result.stdout)
    dup = write("dup.csv", "time,A\n2024-01-01T00:00,1\n2024-01-01T00:00,3\n2024-01-01T01:00,2\n")
    assert runner.invoke(cli, ["inspect", str(dup)]).exit_code == 3
    result = runner.invoke(cli, ["inspect", str(dup), "--duplicates", "mean"])
    assert result.exit_code == 0
    assert "1 duplicate rows averaged" in flat(result.stdout)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--capture-threshold", "150"], "--capture-threshold"),
        (["--layout", "tall"], "--layout"),
        (["--duplicates", "sum"], "--duplicates"),
        (["--step", "fortnightly"], "time step 'fortnightly' is not a frequency"),
        (["--snap", "soon"], "snapping tolerance 'soon' is not a duration"),
        (["--bogus"], "No such option"),
    ],
)
def test_bad_option_value_exits_2(runner, good, args, message):
    result = runner.invoke(cli, ["inspect", str(good), *args])
    assert result.exit_code == 2, result.output
    assert message in flat(result.stderr)


def test_console_script_runs(good, write):
    script = Path(sys.executable).with_name("gapband")
    done = subprocess.run(
        [str(script), "inspect", str(good)], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert "north" in done.stdout and "75.0" in done.stdout
    bad = write("bad.csv", "time,A\n2024-01-01T00:00,1\nnever,2\n")
    done = subprocess.run(
        [str(script), "inspect", str(bad)], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 3
    assert "bad.csv, line 3: cannot read 'never'" in flat(done.stderr)
