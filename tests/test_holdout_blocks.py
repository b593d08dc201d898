"""Block-wise holdout: scores from the merged block fill, failed blocks, and the command line.

A small simulated panel (two groups of three hourly series over 16 days) is
cut into two groups × two windows, as in tests/test_parallel.py, and each
holdout is compared with the single-fit holdout on the same masks.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from gapband import calibration, filling, flags, holdout, outputs, parallel, spec
from gapband.cli import cli
from gapband.errors import FitError, UsageError
from gapband.panel import make_panel

TINY = spec.parse({"base": "hourly", "rank": 1, "seasonal": [{"period": "1D", "harmonics": 2}]})
TINY_TOML = 'base = "hourly"\nrank = 1\n[[seasonal]]\nperiod = "1D"\nharmonics = 2\n'
OPTIONS = filling.FillOptions(draws=40, tune=40, chains=1, seed=3, progress=False)
# Two groups of three series, two windows: cores [0, 192) and [192, 384).
BLOCKS = {"max_series": 3, "window": "14D", "overlap": "3D"}
BLOCKS_TEXT = "series=3,window=14D,overlap=3D"
LEVELS = ("50", "80", "90", "95")


@pytest.fixture(scope="module")
def panel():
    """Two unrelated groups of three hourly series (a daily cycle plus a drift), 8 % missing."""
    rng = np.random.default_rng(0)
    n_time = 24 * 16
    hour = np.arange(n_time)
    factors = np.array([np.sin(2 * np.pi * hour / 24 + 1.3 * g)
                        + np.cumsum(rng.normal(0, 0.08, n_time)) for g in range(2)])
    groups = np.repeat([0, 1], 3)
    truth = (15 + rng.uniform(1.5, 2.5, (6, 1)) * factors[groups]
             + rng.normal(0, 0.3, (6, n_time)))
    values = np.where(rng.random(truth.shape) < 0.08, np.nan, truth)
    grid = pd.date_range("2024-01-01", periods=n_time, freq="h")
    return make_panel(values, [f"s{i:02d}" for i in range(6)], grid, "h", source="simulated")


@pytest.fixture(scope="module")
def plan(panel):
    return parallel.plan_blocks(panel, model=TINY, **BLOCKS)


@pytest.fixture(scope="module")
def blocked(panel, plan):
    return holdout.run(panel, model=TINY, options=OPTIONS, scheme="random",
                       baseline_names=("linear",), plan=plan, runner=parallel.InProcess())


@pytest.fixture(scope="module")
def single(panel):
    return holdout.run(panel, model=TINY, options=OPTIONS, scheme="random",
                       baseline_names=("linear",))


def _hidden_in(panel, block, repeat: int = 0) -> int:
    """Cells the mask of ``repeat`` hides in the core of ``block``."""
    hidden = holdout.mask(panel, scheme="random", seed=OPTIONS.seed, repeat=repeat).hidden.values
    return int(hidden[list(block.rows), slice(*block.core)].sum())


def test_every_hidden_cell_is_scored_from_the_blocks(blocked, plan):
    assert len(plan.blocks) == 4
    (record,) = blocked["repeats"]
    assert record["not_scored"] == {"total": 0, "series": {}}
    for name, breakdown in blocked["scores"].items():
        assert breakdown["overall"]["n"] == record["hidden_total"], name
        assert {k: v["n"] for k, v in breakdown["series"].items()} == record["hidden"], name
    assert sum(blocked["pit_histogram"]["gapband"]) == record["hidden_total"]
    assert blocked["widening"]["n_cells"] == record["hidden_total"]
    # Scores are of draws at the right cells: the fills beat linear interpolation.
    overall = {name: s["overall"] for name, s in blocked["scores"].items()}
    assert overall["gapband"]["mae"] < overall["linear"]["mae"]


def test_block_scores_are_close_to_the_single_fit_on_the_same_masks(blocked, single):
    assert [r["hidden"] for r in blocked["repeats"]] == [r["hidden"] for r in single["repeats"]]
    ours, theirs = blocked["scores"]["gapband"]["overall"], single["scores"]["gapband"]["overall"]
    # Short single chains on each side: Monte Carlo error and what each window learns alone
    # move the scores a little, never by the amount a misplaced draw would.
    for level in LEVELS:
        assert abs(ours["coverage"][level] - theirs["coverage"][level]) < 0.08, level
        assert ours["mean_width"][level] == pytest.approx(theirs["mean_width"][level], rel=0.2)
    assert ours["crps"] == pytest.approx(theirs["crps"], rel=0.1)
    assert ours["mae"] == pytest.approx(theirs["mae"], rel=0.1)
    # Baselines run on the whole masked panel either way: the same scores.
    assert blocked["scores"]["linear"] == single["scores"]["linear"]


def test_the_report_records_the_plan_and_each_repeats_blocks(blocked, panel, plan, tmp_path):
    settings = blocked["settings"]
    assert settings["blocks"] == {**plan.describe(panel), "runner": "InProcess",
                                  "keep_draws": filling.DEFAULT_KEEP_DRAWS}
    (record,) = blocked["repeats"]
    assert "fit_seconds" not in record and "converged" not in record
    blocks = record["blocks"]
    assert [r["name"] for r in blocks["runs"]] == [b.name for b in plan.blocks]
    assert all(r["status"] == "filled" for r in blocks["runs"])
    assert blocks["failed"] == [] and blocks["skipped"] == []
    assert blocks["diagnostics"]["blocks_filled"] == 4 and blocks["seconds"] > 0
    path = holdout.write(blocked, tmp_path)
    found = calibration.read(path)
    assert found.factors == blocked["widening"]["factors"]
    found.check("gibbs", (50, 80, 90, 95), TINY)


def test_cells_of_a_failing_block_are_reported_not_scored(panel, plan, monkeypatch):
    real_fill = filling.fill

    def flaky(block_panel, **kwargs):
        if block_panel.attrs["source"].endswith("block g01-w00"):
            raise RuntimeError("worker lost")
        return real_fill(block_panel, **kwargs)

    monkeypatch.setattr(parallel, "fill", flaky)
    report = holdout.run(panel, model=TINY, options=OPTIONS, scheme="random",
                         baseline_names=("linear",), plan=plan)
    (record,) = report["repeats"]
    failed = next(b for b in plan.blocks if b.name == "g01-w00")
    lost = _hidden_in(panel, failed)
    assert lost > 0
    assert record["blocks"]["failed"] == ["g01-w00"]
    assert record["not_scored"]["total"] == lost
    assert set(record["not_scored"]["series"]) == {f"s{i:02d}" for i in failed.rows}
    for name, breakdown in report["scores"].items():  # every predictor on the same cells
        assert breakdown["overall"]["n"] == record["hidden_total"] - lost, name
    assert report["widening"]["n_cells"] == record["hidden_total"] - lost


def test_no_hidden_cell_filled_is_a_fit_error(panel, plan, monkeypatch):
    # An outage hides cells of one series only: fail every block of its group.
    outage = holdout.mask(panel, scheme="outage", fraction=0.1, seed=OPTIONS.seed)
    row = [str(s) for s in panel["series"].values].index(outage.details["series"])
    group = next(g for g, rows in enumerate(plan.groups) if row in rows)
    real_fill = filling.fill

    def other_group_only(block_panel, **kwargs):
        if f"block g{group:02d}-" in block_panel.attrs["source"]:
            raise RuntimeError("worker lost")
        return real_fill(block_panel, **kwargs)

    monkeypatch.setattr(parallel, "fill", other_group_only)
    with pytest.raises(FitError, match="no hidden cell of any repeat was filled"):
        holdout.run(panel, model=TINY, options=OPTIONS, scheme="outage", fraction=0.1,
                    baseline_names=(), plan=plan)


def test_a_runner_without_a_plan_is_refused(panel):
    with pytest.raises(UsageError, match="a runner runs blocks: give the block plan too"):
        holdout.run(panel, model=TINY, options=OPTIONS, scheme="random",
                    runner=parallel.InProcess())


def test_blocks_without_kept_draws_are_refused(panel, plan):
    options = dataclasses.replace(OPTIONS, keep_draws=0)
    with pytest.raises(UsageError, match="keep_draws = 0: a block-wise holdout scores"):
        holdout.run(panel, model=TINY, options=options, scheme="random", plan=plan)


@pytest.fixture(scope="module")
def files(panel, tmp_path_factory):
    root = tmp_path_factory.mktemp("holdout-blocks")
    csv = root / "panel.csv"
    panel["value"].to_pandas().T.rename_axis("time").to_csv(csv)
    model = root / "tiny.toml"
    model.write_text(TINY_TOML, encoding="utf-8")
    return root, csv, model


def test_holdout_command_runs_blocks_and_calibrates_a_block_fill(files, panel, plan):
    root, csv, model = files
    common = [str(csv), "--model", str(model), "--draws", "40", "--tune", "40", "--chains", "1",
              "--seed", "3", "--quiet", "--blocks", BLOCKS_TEXT]
    runner = CliRunner()
    done = runner.invoke(cli, ["holdout", *common, "--out", str(root / "check"),
                               "--baselines", "linear", "--max-repeats", "1"])
    assert done.exit_code == 0, done.output
    assert "widening factors by gap length" in done.output and "not scored" not in done.output
    report = json.loads((root / "check" / "holdout.json").read_text(encoding="utf-8"))
    assert report["settings"]["blocks"]["blocks"] == plan.describe(panel)["blocks"]
    (record,) = report["repeats"]
    assert report["scores"]["gapband"]["overall"]["n"] == record["hidden_total"]
    filled = runner.invoke(cli, ["fill", *common, "--out", str(root / "filled"),
                                 "--calibration", str(root / "check" / "holdout.json")])
    assert filled.exit_code == 0, filled.output
    summary = json.loads((root / "filled" / "summary.json").read_text(encoding="utf-8"))
    assert summary["calibration"]["factors"] == report["widening"]["factors"]
    assert len(summary["blocks"]["runs"]) == 4


def test_holdout_command_refuses_two_clusters(files, tmp_path):
    _, csv, model = files
    done = CliRunner().invoke(cli, ["holdout", str(csv), "--model", str(model), "--out",
                                    str(tmp_path / "o"), "--workers", "2", "--scheduler",
                                    "tcp://127.0.0.1:1"])
    assert done.exit_code == 2
    assert "give --workers (a new local cluster) or --scheduler" in done.output
    assert not (tmp_path / "o").exists()


def test_a_block_fill_widens_and_flags_by_the_whole_panels_gap_lengths(panel, plan, tmp_path):
    values = panel["value"].values.copy()
    values[0, 150:340] = np.nan  # 190 steps (>168); window g00-w00 ends at 264, seeing 114
    gappy = panel.copy(data={"value": values})
    wide = dict.fromkeys(calibration.BUCKETS, 1.0) | {">168": 3.0}
    path = tmp_path / "holdout.json"
    outputs.write_json({
        "format": calibration.CALIBRATION_FORMAT,
        "format_version": calibration.CALIBRATION_VERSION,
        "input_sha256": gappy.attrs.get("input_sha256"),
        "settings": {"method": "gibbs", "scheme": "gaps", "transform": TINY.transform,
                     "spec_detail": TINY.to_dict(), "spec_sha256": calibration.spec_sha256(TINY)},
        "evidence": {"longest_tested_steps": 100},
        "widening": {"factors": {level: wide for level in LEVELS}}}, path)
    options = dataclasses.replace(
        OPTIONS, rules=filling.FlagRules(accept_unconverged=True, max_var_width=None),
        keep_draws=0)
    plain, _ = parallel.fill_blocks(gappy, plan, model=TINY, options=options)
    widened, summary = parallel.fill_blocks(gappy, plan, model=TINY, options=options,
                                            calibration=path)
    assert summary["calibration"]["factors"]["90"][">168"] == 3.0
    core = slice(150, 192)  # in the core of g00-w00, whose window cuts the gap to 114 steps
    median = plain["fill_median"].values[0, core]
    np.testing.assert_allclose(widened["upper_90"].values[0, core] - median,
                               3.0 * (plain["upper_90"].values[0, core] - median), rtol=1e-9)
    flag = widened["fill_flag"].values
    assert (flag[0, 150:340] == flags.FILLED_UNCERTAIN).all()  # longer than the 100 tested
    ends = flags.extrapolated(gappy).values  # before a first, after a last observation
    short = np.isnan(values) & (filling.real_gap_length(gappy).values <= 100) & ~ends
    assert (flag[short] == flags.FILLED).all()
    assert (flag[ends] == flags.NOT_FILLED).all()
