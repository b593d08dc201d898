"""gapband demo --quick end to end: every output exists and is well formed; the generator.

The demo runs once per module (about a minute); the tests read what it wrote.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

import gapband
from gapband.cli import cli
from gapband.demo.generate import load_config, quick_slice, write_network
from gapband.demo.run import DEMO_QUANTITIES, output_names
from gapband.filling import COMPONENTS

LEVELS = ("50", "80", "90", "95")
REPORT_SECTIONS = ("provenance", "capture", "gap-map", "substitution-log", "components",
                   "filled-spans", "flag-counts", "period-statistics", "holdout", "cautions")


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("demo") / "run"
    result = CliRunner().invoke(cli, ["demo", "--quick", "--out", str(out), "--quiet"])
    assert result.exit_code == 0, result.output
    return out, result.output


def read_json(path: Path) -> dict:
    return json.loads(path.read_text(encoding="utf-8"))


def test_every_output_file_is_written(demo):
    out, _ = demo
    absent = [name for name in output_names(quick=True) if not (out / name).is_file()]
    assert absent == []
    leftovers = [p.name for p in out.rglob(".*tmp-*")]
    assert leftovers == []  # atomic writes leave no temporary files behind


def test_output_ends_with_the_reports_and_three_headline_figures(demo):
    out, printed = demo
    text = " ".join(printed.split())
    headline = read_json(out / "headline.json")
    for name, figures in headline["quantities"].items():
        assert f"report ({name}): {out / name / 'report.html'}" in text
        assert figures["report"] == str(out / name / "report.html")
        truth = figures["truth"]["overall"]
        for shown in (f"{figures['holdout']['coverage_90']:.1%}", f"{truth['mae']:.3g}",
                      f"{truth['mae_linear']:.3g}", str(figures["filled_uncertain"])):
            assert shown in text
    for header in ("held-out coverage 90 %", "MAE of fills", "MAE linear interp.",
                   "cells flagged uncertain"):
        assert header in text


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_filled_nc_has_the_documented_variables(demo, quantity):
    out, _ = demo
    with xr.open_dataset(out / quantity / "filled.nc", engine="h5netcdf") as ds:
        names = set(ds.variables)
        expected = {"value", "filled", "fill_mean", "fill_median", "fill_sd", "fill_flag",
                    "fill_draws", "missing_cell", "component_offset",
                    *(f"component_{c}" for c in COMPONENTS),
                    *(f"{side}_{lv}" for side in ("lower", "upper") for lv in LEVELS)}
        assert expected <= names
        assert ds["value"].dims == ("series", "time")
        assert ds["fill_draws"].dims == ("fill_draw", "missing_cell")
        assert ds["fill_flag"].attrs["flag_meanings"] == "observed filled filled_uncertain " \
                                                         "not_filled"
        assert list(ds["fill_flag"].attrs["flag_values"]) == [0, 1, 2, 3]
        assert ds.attrs["Conventions"] == "CF-1.10"
        for attr in ("source", "input_sha256", "step", "gapband_method", "gapband_seed",
                     "gapband_levels", "gapband_spec_source", "gapband_spec",
                     "gapband_flag_rules", "gapband_diagnostics", "gapband_versions",
                     "gapband_calibration", "history"):
            assert attr in ds.attrs, attr
        assert ds["filled"].attrs["units"] == ds["value"].attrs["units"]
        assert "widened around the median by the factor" in ds["lower_90"].attrs["comment"]
        flag = ds["fill_flag"].values
        value, filled = ds["value"].values, ds["filled"].values
        assert np.isnan(value[flag != 0]).all() and not np.isnan(value[flag == 0]).any()
        lower, upper = ds["lower_90"].values, ds["upper_90"].values
        inside = flag == 1
        assert (lower[inside] <= filled[inside]).all() and (filled[inside] <= upper[inside]).all()


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_observed_values_pass_through_bit_for_bit(demo, quantity):
    out, _ = demo
    panel = gapband.read(out / f"tolmere_{quantity}.csv")
    with xr.open_dataset(out / quantity / "filled.nc", engine="h5netcdf") as ds:
        filled = ds["filled"].transpose("series", "time").values
    seen = ~np.isnan(panel["value"].values)
    assert np.array_equal(panel["value"].values[seen].view("int64"), filled[seen].view("int64"))


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_summary_and_holdout_json_hold_the_documented_fields(demo, quantity):
    out, _ = demo
    summary = read_json(out / quantity / "summary.json")
    for key in ("source", "input_sha256", "method", "approximate", "spec", "seed", "levels",
                "flag_rules", "calibration", "joint_draws", "capture", "flags", "diagnostics",
                "timings", "versions"):
        assert key in summary, key
    assert set(summary["capture"]) == {"measured", "with_fills", "with_confident_fills"}
    assert summary["calibration"]["file"].endswith("holdout.json")
    assert summary["flag_rules"]["max_gap"] == "72h"

    holdout = read_json(out / quantity / "holdout.json")
    for key in ("format", "format_version", "source", "input_sha256", "step", "start", "end",
                "settings", "repeats", "series_not_scored", "evidence", "scores",
                "pit_histogram", "widening", "seconds", "versions"):
        assert key in holdout, key
    assert holdout["format"] == "gapband holdout" and holdout["settings"]["scheme"] == "gaps"
    assert set(holdout["scores"]) == {"gapband", "linear", "seasonal", "kalman"}
    overall = holdout["scores"]["gapband"]["overall"]
    for key in ("n", "mae", "rmse", "crps", "crps_fair", "coverage", "interval_score",
                "mean_width"):
        assert key in overall, key
    for key in ("levels", "buckets", "factors", "coverage_before", "coverage_after",
                "by_bucket", "n_cells", "rule", "pooling", "narrowing"):
        assert key in holdout["widening"], key
    assert summary["calibration"]["factors"] == holdout["widening"]["factors"]
    assert summary["input_sha256"] == holdout["input_sha256"]

    figures = read_json(out / quantity / "inspect.json")
    assert len(figures["series"]) == len(quick_slice(load_config())["stations"])


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_stats_files_are_well_formed(demo, quantity):
    out, _ = demo
    table = pd.read_csv(out / quantity / "stats-day.csv")
    document = read_json(out / quantity / "stats-day.json")
    assert document["format"] == "gapband stats" and document["period"] == "day"
    assert len(document["rows"]) == len(table) > 0
    assert {"mean", "p98"} <= set(table["statistic"])
    finite = table.dropna(subset=["estimate"])
    assert (finite["lower_90"] <= finite["estimate"]).all()
    assert (finite["estimate"] <= finite["upper_90"]).all()


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_report_contains_its_sections(demo, quantity):
    out, _ = demo
    html = (out / quantity / "report.html").read_text(encoding="utf-8")
    for section in REPORT_SECTIONS:
        assert f'<section id="{section}">' in html, section
    assert "not measurements" in html
    assert "unproven" not in html  # the holdout evidence was found and shown


@pytest.mark.parametrize("quantity", [q.name for q in DEMO_QUANTITIES])
def test_headline_mae_recomputed_from_the_files(demo, quantity):
    """The demo's figures against the truth, recomputed from filled.csv and the truth file."""
    out, _ = demo
    truth = pd.read_csv(out / "tolmere_truth.csv")
    truth = truth[truth["quantity"] == quantity]
    table = pd.read_csv(out / quantity / "filled.csv")
    table["time"] = table["time"].str.slice(0, 16)
    merged = truth.merge(table, left_on=["time", "station"], right_on=["time", "series"])
    assert len(merged) == len(truth)
    assert merged["observed"].isna().all()  # the truth file holds hidden cells only
    scored = merged[merged["flag"].isin(["filled", "filled_uncertain"])]
    figures = read_json(out / "headline.json")["quantities"][quantity]["truth"]["overall"]
    assert figures["cells"] == len(scored)
    # filled.csv rounds fills to the input's one decimal (half a unit: 0.05 at most
    # per cell); the headline is computed from filled.nc's full precision.
    resolution = 0.05 + 1e-9
    assert figures["mae"] == pytest.approx((scored["filled"] - scored["value"]).abs().mean(),
                                           abs=resolution)
    inside = (scored["value"] >= scored["lower_90"]) & (scored["value"] <= scored["upper_90"])
    near = (np.minimum(np.abs(scored["value"] - scored["lower_90"]),
                       np.abs(scored["value"] - scored["upper_90"])) <= resolution).mean()
    assert figures["coverage_90"] == pytest.approx(inside.mean(), abs=near + 1e-12)


def test_a_second_run_refuses_to_overwrite(demo):
    out, _ = demo
    before = (out / "headline.json").read_bytes()
    result = CliRunner().invoke(cli, ["demo", "--quick", "--out", str(out)])
    assert result.exit_code == 2
    assert "pass --overwrite" in " ".join(result.output.split())
    assert (out / "headline.json").read_bytes() == before


def test_quick_slice_is_cut_from_the_whole_network(tmp_path):
    """Same values and gaps as the full year; the truth file holds exactly the hidden cells."""
    whole = write_network(tmp_path / "whole")
    cut = write_network(tmp_path / "quick", **quick_slice(load_config()))
    for full_path, quick_path in zip(whole[:2], cut[:2], strict=True):
        full, quick = pd.read_csv(full_path), pd.read_csv(quick_path)
        joined = quick.merge(full, on=["time", "station"], suffixes=("", "_full"))
        assert len(joined) == len(quick) > 0
        pd.testing.assert_series_equal(joined["value"], joined["value_full"], check_names=False)
    truth = pd.read_csv(cut[2])
    for path in cut[:2]:
        quantity = path.stem.removeprefix("tolmere_")
        table = pd.read_csv(path)
        hidden = table[table["value"].isna()][["time", "station"]]
        rows = truth[truth["quantity"] == quantity][["time", "station"]]
        assert sorted(map(tuple, hidden.to_numpy())) == sorted(map(tuple, rows.to_numpy()))
    again = write_network(tmp_path / "again", **quick_slice(load_config()))
    for first, second in zip(cut, again, strict=True):  # deterministic
        assert first.read_bytes() == second.read_bytes(), first.name


def test_the_network_shows_every_kind_of_gap(tmp_path):
    """Scattered hours, short failures, the outage, the month offline, the calibration week, the
    late start, in the whole network as its config describes them."""
    config = load_config()
    gaps = config["gaps"]
    no2 = gapband.read(write_network(tmp_path)[0])
    figures = {row["series"]: row for row in gapband.inspect(no2)["series"]}
    assert figures[gaps["offline"]["station"]]["longest_gap_steps"] >= 24 * gaps["offline"]["days"]
    assert figures[gaps["outage"]["station"]]["longest_gap_steps"] >= 24 * gaps["outage"]["days"]
    calibration = figures[gaps["calibration"]["station"]]
    assert calibration["longest_gap_steps"] >= 24 * gaps["calibration"]["days"]
    late = figures[gaps["late_start"]["station"]]
    assert late["first_observation"].startswith(
        str((pd.Timestamp(config["start"]) + pd.Timedelta(days=gaps["late_start"]["first_day"]))
            .date()))
    for row in figures.values():  # single hours and multi-hour failures everywhere
        histogram = row["gap_histogram"]
        assert histogram["1"] > 0 and histogram["2-6"] + histogram["7-24"] > 0
    assert len(figures) == len(config["station"]) == 12
    assert no2.sizes["time"] == 24 * config["days"]
