"""Same input, spec and seed: bit-identical results, and the seed written into every output."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

from gapband.cli import cli

SPEC = 'base = "hourly"\nrank = 1\n\n[[seasonal]]\nperiod = "1D"\nharmonics = 2\n'
SEED = 11
#: Entries that record when and how fast a run went, not what it found.
RUN_RECORDS = {"timings", "history"}


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("determinism")
    rng = np.random.default_rng(2)
    times = pd.date_range("2024-05-01", periods=72, freq="h")
    hours = np.arange(72)
    frame = pd.DataFrame({"time": times.strftime("%Y-%m-%dT%H:%M")})
    for i, name in enumerate(("weir", "bridge", "mill")):
        values = 5 + (i + 1) * np.cos(2 * np.pi * hours / 24) + rng.normal(0, 0.3, 72)
        values[rng.choice(72, 10, replace=False)] = np.nan
        frame[name] = values
    csv_path = folder / "gauges.csv"
    frame.to_csv(csv_path, index=False)
    spec_path = folder / "spec.toml"
    spec_path.write_text(SPEC, encoding="utf-8")
    return folder, csv_path, spec_path


def _fill(inputs, name: str):
    folder, csv_path, spec_path = inputs
    out = folder / name
    result = CliRunner().invoke(cli, ["fill", str(csv_path), "--out", str(out), "--model",
                                      str(spec_path), "--draws", "60", "--tune", "40",
                                      "--seed", str(SEED), "--keep-draws", "30", "--quiet"])
    assert result.exit_code == 0, result.output
    return out


@pytest.fixture(scope="module")
def two_runs(inputs):
    return _fill(inputs, "first"), _fill(inputs, "second")


def test_two_runs_give_bit_identical_netcdf_values(two_runs):
    first, second = (xr.open_dataset(run / "filled.nc", engine="h5netcdf").load()
                     for run in two_runs)
    assert sorted(first.variables) == sorted(second.variables)
    for name in first.variables:
        a, b = first[name].values, second[name].values
        assert a.dtype == b.dtype and a.shape == b.shape, name
        if a.dtype.kind == "f":  # bits, so NaN positions and signed zeros count too
            assert np.array_equal(a.view(f"i{a.itemsize}"), b.view(f"i{b.itemsize}")), name
        else:
            assert np.array_equal(a, b), name
    attrs = [{k: v for k, v in ds.attrs.items() if k not in RUN_RECORDS}
             for ds in (first, second)]
    assert json.dumps(attrs[0], sort_keys=True, default=str) == json.dumps(
        attrs[1], sort_keys=True, default=str)


def test_two_runs_give_the_same_summary_and_table(two_runs):
    summaries = [json.loads((run / "summary.json").read_text(encoding="utf-8"))
                 for run in two_runs]
    for summary in summaries:
        summary.pop("timings")
    assert summaries[0] == summaries[1]
    assert (two_runs[0] / "filled.csv").read_bytes() == (two_runs[1] / "filled.csv").read_bytes()


def test_another_seed_gives_other_fills(inputs, two_runs):
    folder, csv_path, spec_path = inputs
    out = folder / "other-seed"
    result = CliRunner().invoke(cli, ["fill", str(csv_path), "--out", str(out), "--model",
                                      str(spec_path), "--draws", "60", "--tune", "40",
                                      "--seed", str(SEED + 1), "--keep-draws", "30", "--quiet"])
    assert result.exit_code == 0, result.output
    with xr.open_dataset(two_runs[0] / "filled.nc") as a, xr.open_dataset(out / "filled.nc") as b:
        missing = a["value"].isnull()
        assert not np.array_equal(a["fill_mean"].where(missing).values,
                                  b["fill_mean"].where(missing).values, equal_nan=True)


def test_seed_is_recorded_in_the_fill_outputs(two_runs):
    run = two_runs[0]
    with xr.open_dataset(run / "filled.nc") as ds:
        assert int(ds.attrs["gapband_seed"]) == SEED
    assert json.loads((run / "summary.json").read_text(encoding="utf-8"))["seed"] == SEED


def test_seed_is_recorded_in_holdout_json(inputs):
    folder, csv_path, spec_path = inputs
    out = folder / "holdout"
    result = CliRunner().invoke(cli, ["holdout", str(csv_path), "--out", str(out), "--model",
                                      str(spec_path), "--draws", "30", "--tune", "20", "--seed",
                                      str(SEED), "--baselines", "linear", "--quiet"])
    assert result.exit_code == 0, result.output
    report = json.loads((out / "holdout.json").read_text(encoding="utf-8"))
    assert report["settings"]["seed"] == SEED


def test_seed_is_recorded_in_stats_json(inputs, two_runs):
    folder = inputs[0]
    out = folder / "stats"
    result = CliRunner().invoke(cli, ["stats", str(two_runs[0]), "--period", "day", "--out",
                                      str(out)])
    assert result.exit_code == 0, result.output
    document = json.loads((out / "stats-day.json").read_text(encoding="utf-8"))
    assert document["seed"] == SEED
