"""Blocks and their runners: plans, merges, failures and the Dask path, on small panels."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from scipy.cluster import hierarchy
from scipy.spatial.distance import squareform

from gapband import calibration, filling, flags, parallel, spec
from gapband.errors import FitError, UsageError
from gapband.panel import make_panel

# A small model so each block fits in seconds: one factor, a daily cycle.
TINY = spec.parse({"base": "hourly", "rank": 1, "seasonal": [{"period": "1D", "harmonics": 2}]})
OPTIONS = filling.FillOptions(draws=150, tune=150, seed=3, progress=False, keep_draws=50)
DAYS = 16
# Two groups of three series, two windows: cores [0, 192) and [192, 384).
BLOCKS = {"max_series": 3, "window": "14D", "overlap": "3D"}


def _grouped(n_groups: int, per_group: int, n_time: int, seed: int,
             interleave: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Series that follow one of ``n_groups`` unrelated factors; truth and group labels."""
    rng = np.random.default_rng(seed)
    hour = np.arange(n_time)
    factors = np.array([np.sin(2 * np.pi * hour / 24 + 1.3 * g)
                        + np.cumsum(rng.normal(0, 0.08, n_time)) for g in range(n_groups)])
    labels = np.repeat(np.arange(n_groups), per_group)
    if interleave:
        labels = np.tile(np.arange(n_groups), per_group)
    weights = rng.uniform(1.5, 2.5, labels.size)[:, None]
    truth = 15 + weights * factors[labels] + rng.normal(0, 0.3, (labels.size, n_time))
    return truth, labels


def _panel(values: np.ndarray, source: str = "simulated") -> object:
    grid = pd.date_range("2024-01-01", periods=values.shape[1], freq="h")
    return make_panel(values, [f"s{i:02d}" for i in range(values.shape[0])], grid, "h",
                      source=source)


@pytest.fixture(scope="module")
def gappy():
    """Two groups of three hourly series over 16 days, 8 % random and one 10-h gap each."""
    truth, _ = _grouped(2, 3, 24 * DAYS, seed=0)
    rng = np.random.default_rng(1)
    hide = rng.random(truth.shape) < 0.08
    for row in hide:
        start = rng.integers(0, truth.shape[1] - 12)
        row[start : start + 10] = True
    return _panel(np.where(hide, np.nan, truth)), truth


@pytest.fixture(scope="module")
def plan(gappy):
    return parallel.plan_blocks(gappy[0], model=TINY, **BLOCKS)


@pytest.fixture(scope="module")
def in_process(gappy, plan):
    return parallel.fill_blocks(gappy[0], plan, model=TINY, options=OPTIONS)


@pytest.fixture(scope="module")
def single(gappy):
    return filling.fill(gappy[0], model=TINY, options=OPTIONS)


# --- the plan -------------------------------------------------------------------------------


def test_correlation_matches_pandas_pairwise_complete():
    truth, _ = _grouped(3, 3, 300, seed=5)
    values = truth.copy()
    rng = np.random.default_rng(2)
    values[rng.random(values.shape) < 0.3] = np.nan
    values[0, :295] = np.nan  # five observations: too few in common with anyone
    panel = _panel(values)
    ours = parallel.correlation(panel).values
    # Source: pandas.DataFrame.corr (Pearson over pairwise-complete observations).
    reference = pd.DataFrame(values.T).corr(min_periods=parallel.MIN_COMMON).to_numpy().copy()
    np.fill_diagonal(reference, 1.0)
    np.testing.assert_allclose(ours, reference, rtol=1e-10, atol=1e-12)
    assert np.isnan(ours[0, 1:]).all()


@pytest.mark.parametrize("max_series", [4, 5])
def test_clusters_are_the_known_groups_and_scipys(max_series):
    truth, labels = _grouped(3, 4, 400, seed=7, interleave=True)
    panel = _panel(truth)
    plan = parallel.plan_blocks(panel, max_series=max_series, model=TINY)
    known = {tuple(np.flatnonzero(labels == g)) for g in range(3)}
    assert set(plan.groups) == known
    # Source: scipy.cluster.hierarchy.linkage (average) and fcluster (maxclust) on 1 - |corr|
    # from pandas.DataFrame.corr, cut into the three clusters the data were drawn with.
    corr = pd.DataFrame(truth.T).corr().to_numpy()
    distance = squareform(1 - np.abs(corr), checks=False)
    cut = hierarchy.fcluster(hierarchy.linkage(distance, "average"), 3, criterion="maxclust")
    assert {tuple(np.flatnonzero(cut == c)) for c in np.unique(cut)} == known


def test_groups_join_whole_clusters_up_to_the_size_limit():
    truth, labels = _grouped(3, 4, 400, seed=7, interleave=True)
    plan = parallel.plan_blocks(_panel(truth), max_series=8, model=TINY)
    assert max(len(g) for g in plan.groups) <= 8
    for g in range(3):  # no cluster of correlated series is split
        members = set(np.flatnonzero(labels == g))
        assert sum(bool(members & set(group)) for group in plan.groups) == 1


@pytest.mark.parametrize(
    ("n_series", "n_time", "settings"),
    [
        (7, 24 * 30, {"max_series": 3, "window": "7D", "overlap": "3D"}),
        (5, 24 * 30 + 5, {"max_series": 2, "window": "200h", "overlap": "72h"}),
        (4, 24 * 9, {"max_series": 4, "window": "20D", "overlap": "3D"}),
        (9, 24 * 31, {"max_series": 1, "window": "10D", "overlap": "4D"}),
    ],
)
def test_plan_cores_cover_every_cell_exactly_once(n_series, n_time, settings):
    truth, _ = _grouped(3, 3, n_time, seed=11)
    plan = parallel.plan_blocks(_panel(truth[:n_series]), model=TINY, **settings)
    times = np.zeros((n_series, n_time), dtype=int)
    for block in plan.blocks:
        times[list(block.rows), slice(*block.core)] += 1
        start, stop = block.window
        assert start <= block.core[0] < block.core[1] <= stop
        assert stop - start <= plan.window_steps
        assert start == max(0, block.core[0] - plan.overlap_steps)
        assert stop == min(n_time, block.core[1] + plan.overlap_steps)
    assert (times == 1).all()
    assert max(len(g) for g in plan.groups) <= settings["max_series"]


def test_auto_keeps_a_small_panel_whole_and_splits_a_long_one():
    truth, _ = _grouped(2, 3, 400, seed=3)
    small = parallel.plan_blocks(_panel(truth), model=TINY)
    assert len(small.blocks) == 1 and small.blocks[0].window == (0, 400)
    truth, _ = _grouped(4, 30, 8760, seed=3)
    big = parallel.plan_blocks(_panel(truth))  # the hourly preset: 1D and 7D cycles
    assert big.overlap_steps == 3 * 24
    assert max(len(g) for g in big.groups) <= parallel.AUTO_MAX_SERIES
    assert len(big.windows) > 1 and big.window_steps <= parallel.AUTO_BLOCK_CELLS // 100
    assert all(stop - start >= 7 * 24 for (start, stop), _ in big.windows)


def test_parse_blocks_reads_auto_and_key_value_pairs():
    assert parallel.parse_blocks("auto") == {}
    assert parallel.parse_blocks("series=50, window=60D,overlap=3D") == {
        "max_series": 50, "window": "60D", "overlap": "3D"}
    with pytest.raises(UsageError, match=r"'speed=3' .* is not understood"):
        parallel.parse_blocks("series=5,speed=3")
    with pytest.raises(UsageError, match=r"series='many' .* is not a whole number"):
        parallel.parse_blocks("series=many")
    with pytest.raises(UsageError, match="each key once"):
        parallel.parse_blocks("window=5D,window=6D")


@pytest.mark.parametrize(
    ("settings", "message"),
    [
        ({"overlap": "1D"}, r"overlap 1D is too short: .* 3 periods of the shortest seasonal "
                            r"cycle \('1D'\)"),
        ({"window": "5D", "overlap": "3D"}, r"window 5D must be longer than twice the overlap"),
        ({"window": "soon"}, r"block window 'soon' is not a positive duration"),
        ({"overlap": "-3D"}, r"block overlap '-3D' is not a positive duration"),
        ({"window": "10min"}, r"block window '10min' is shorter than one time step"),
        ({"max_series": 0}, r"block max_series 0 must be a whole number of at least 1"),
        ({"max_series": 2.5}, r"block max_series 2.5 must be a whole number"),
    ],
)
def test_bad_block_settings_are_clear_errors(gappy, settings, message):
    with pytest.raises(UsageError, match=message):
        parallel.plan_blocks(gappy[0], model=TINY, **settings)


def test_a_window_must_hold_the_longest_cycle(gappy):
    weekly = spec.parse({"base": "hourly", "rank": 1})  # 1D and 7D cycles
    with pytest.raises(UsageError, match=r"window of .* is shorter than the longest seasonal "
                                         r"cycle of the spec \(7D\)"):
        parallel.plan_blocks(gappy[0], model=weekly, window="7D", overlap="3D")


def test_a_plan_for_another_panel_is_refused(gappy, plan):
    other = gappy[0].isel(time=slice(0, 300))
    with pytest.raises(UsageError, match="made for another Panel"):
        parallel.fill_blocks(other, plan, model=TINY, options=OPTIONS)


def test_dask_runner_checks_its_worker_count():
    with pytest.raises(UsageError, match=r"block workers 0 must be a whole number"):
        parallel.DaskRunner(workers=0)


# --- filling by blocks ----------------------------------------------------------------------


def test_one_block_reproduces_fill_exactly(gappy, single):
    panel = gappy[0]
    whole = parallel.plan_blocks(panel, max_series=6, window="20D", overlap="3D", model=TINY)
    assert len(whole.blocks) == 1
    result, summary = parallel.fill_blocks(panel, whole, model=TINY, options=OPTIONS)
    reference = single[0]
    for name in reference.data_vars:
        np.testing.assert_array_equal(result[name].values, reference[name].values, err_msg=name)
    np.testing.assert_array_equal(result["missing_cell"].values, reference["missing_cell"].values)
    assert summary["flags"] == single[1]["flags"]
    assert summary["failed_blocks"] == []


def test_blocks_agree_with_one_fit_away_from_block_edges(gappy, plan, in_process, single):
    panel, truth = gappy
    assert len(plan.blocks) == 4
    blocked, alone = in_process[0], single[0]
    seen = panel["value"].notnull().values
    for result in (blocked, alone):  # observed cells pass through bit for bit
        assert filling.observed_unchanged(panel, result)
    np.testing.assert_array_equal(blocked["filled"].values[seen], alone["filled"].values[seen])
    # Missing cells at least a day from the boundary between the two windows' cores.
    boundary = plan.windows[1][1][0]
    away = np.abs(np.arange(panel.sizes["time"]) - boundary) >= 24
    cells = ~seen & away[None, :]
    gap = np.abs(blocked["fill_mean"].values - alone["fill_mean"].values)[cells]
    sd = np.hypot(blocked["fill_sd"].values, alone["fill_sd"].values)[cells] / np.sqrt(2)
    # Two short, independently seeded chains per fit: their means differ by Monte Carlo
    # error and by what each window learns, a small share of the predictive sd.
    assert np.median(gap / sd) < 0.3
    assert np.max(gap / sd) < 1.5
    mae = [np.mean(np.abs(r["fill_median"].values - truth)[~seen]) for r in (blocked, alone)]
    assert mae[0] <= 1.15 * mae[1]


def test_merged_result_is_complete_and_consistent(gappy, plan, in_process):
    panel, _ = gappy
    result, summary = in_process
    flag = result["fill_flag"].values
    missing = panel["value"].isnull().values
    assert ((flag == flags.OBSERVED) == ~missing).all()
    assert np.isin(flag[missing], (flags.FILLED, flags.FILLED_UNCERTAIN)).all()
    assert result["fill_median"].notnull().values[missing].all()
    filled_cells = np.flatnonzero(missing.ravel())
    np.testing.assert_array_equal(result["missing_cell"].values, filled_cells)
    # Offset plus contributions is each block's posterior mean, so it is smooth across cores:
    # the offset taken from the first window and the trend carrying the difference.
    total = result["component_offset"].values[:, None] + sum(
        result[f"component_{name}"].values for name in filling.COMPONENTS)
    assert np.isfinite(total).all()
    runs = summary["blocks"]["runs"]
    assert [r["name"] for r in runs] == [b.name for b in plan.blocks]
    assert all(r["status"] == "filled" and r["attempts"] == 1 for r in runs)
    assert summary["flags"] == flags.flag_counts(result)
    assert summary["diagnostics"]["blocks_filled"] == 4



def test_blocks_widen_their_joint_draws_as_one_fill_would(gappy, plan, in_process, tmp_path):
    panel = gappy[0]
    levels = filling.DEFAULT_LEVELS
    factors = {f"{lv:g}": {label: 1.0 + 0.1 * i + 0.2 * b
                           for b, label in enumerate(calibration.BUCKETS)}
               for i, lv in enumerate(levels)}
    path = tmp_path / "holdout.json"  # what calibration.read needs of a holdout.json
    path.write_text(json.dumps({
        "format": calibration.CALIBRATION_FORMAT, "format_version": calibration.CALIBRATION_VERSION,
        "input_sha256": None, "evidence": {"longest_tested_steps": panel.sizes["time"]},
        "settings": {"method": "gibbs", "scheme": "gaps", "transform": TINY.transform,
                     "spec_detail": calibration.spec_content(TINY),
                     "spec_sha256": calibration.spec_sha256(TINY)},
        "widening": {"factors": factors}}), encoding="utf-8")
    result, _ = parallel.fill_blocks(panel, plan, model=TINY, options=OPTIONS, calibration=path)
    draws = result["fill_draws"]
    assert draws.attrs["calibrated"] == "yes" and draws.attrs["calibration_file"] == str(path)
    raw = in_process[0]
    assert raw["fill_draws"].attrs["calibrated"] == "no"
    # Same seeds, same fits: each block widened its draws with the whole panel's gap lengths.
    expected = calibration.widen_draws(raw[["fill_draws"]].copy(deep=True), raw["fill_median"],
                                       calibration.read(path), levels,
                                       filling.real_gap_length(panel))
    np.testing.assert_array_equal(draws["missing_cell"].values, raw["missing_cell"].values)
    np.testing.assert_array_equal(draws.values, expected["fill_draws"].values)

def test_a_failing_block_is_retried_then_reported(gappy, plan, monkeypatch):
    panel, _ = gappy
    calls: dict[str, int] = {}
    real_fill = filling.fill

    def flaky(block_panel, **kwargs):
        name = block_panel.attrs["source"].rsplit(" ", 1)[-1]
        calls[name] = calls.get(name, 0) + 1
        if name == "g01-w00" or (name == "g00-w01" and calls[name] == 1):
            raise RuntimeError(f"worker lost while filling {name}")
        return real_fill(block_panel, **kwargs)

    monkeypatch.setattr(parallel, "fill", flaky)
    result, summary = parallel.fill_blocks(panel, plan, model=TINY, options=OPTIONS)
    assert calls == {"g00-w00": 1, "g00-w01": 2, "g01-w00": 2, "g01-w01": 1}
    assert summary["failed_blocks"] == ["g01-w00"]
    runs = {r["name"]: r for r in summary["blocks"]["runs"]}
    assert runs["g00-w01"]["status"] == "filled" and runs["g00-w01"]["attempts"] == 2
    assert runs["g01-w00"]["error"] == "RuntimeError: worker lost while filling g01-w00"
    assert any("g01-w00 failed after 2 attempts" in w
               for w in summary["diagnostics"]["warnings"])
    # The failed block's core stays missing and is flagged; everything else is filled.
    failed = next(b for b in plan.blocks if b.name == "g01-w00")
    in_failed = np.zeros(panel["value"].shape, dtype=bool)
    in_failed[list(failed.rows), slice(*failed.core)] = True
    missing = panel["value"].isnull().values
    flag = result["fill_flag"].values
    assert (flag[missing & in_failed] == flags.NOT_FILLED).all()
    assert np.isnan(result["filled"].values[missing & in_failed]).all()
    assert np.isin(flag[missing & ~in_failed], (flags.FILLED, flags.FILLED_UNCERTAIN)).all()
    assert filling.observed_unchanged(panel, result)
    assert not np.isin(result["missing_cell"].values,
                       np.flatnonzero((missing & in_failed).ravel())).any()


def test_when_every_block_fails_the_shared_error_is_raised(gappy, plan, monkeypatch):
    def refuse(block_panel, **kwargs):
        raise UsageError("the flag rule looks at a level that is not computed")

    monkeypatch.setattr(parallel, "fill", refuse)
    with pytest.raises(UsageError, match=r"all 4 blocks that ran failed; the first, g00-w00, "
                                         r"with UsageError: the flag rule"):
        parallel.fill_blocks(gappy[0], plan, model=TINY, options=OPTIONS)


def test_mixed_failures_of_every_block_are_a_fit_error(gappy, plan, monkeypatch):
    def broken(block_panel, **kwargs):
        raise (ValueError if "w00" in block_panel.attrs["source"] else KeyError)("lost")

    monkeypatch.setattr(parallel, "fill", broken)
    with pytest.raises(FitError, match="all 4 blocks that ran failed"):
        parallel.fill_blocks(gappy[0], plan, model=TINY, options=OPTIONS)


def test_a_window_without_enough_observations_is_skipped(gappy, plan):
    panel = gappy[0].copy(deep=True)
    core = plan.blocks[3]  # group 1, second window: silence it (a network outage)
    panel["value"].values[list(core.rows), core.window[0]:] = np.nan
    result, summary = parallel.fill_blocks(panel, plan, model=TINY, options=OPTIONS)
    runs = {r["name"]: r for r in summary["blocks"]["runs"]}
    assert runs["g01-w01"]["status"] == "skipped" and runs["g01-w01"]["attempts"] == 0
    assert summary["failed_blocks"] == []
    silent = result["fill_flag"].values[list(core.rows), slice(*core.core)]
    assert (silent == flags.NOT_FILLED).all()


# --- Dask -----------------------------------------------------------------------------------


def test_dask_on_two_local_workers_gives_the_in_process_result(gappy, plan, in_process):
    result, summary = parallel.fill_blocks(gappy[0], plan, model=TINY, options=OPTIONS,
                                           runner=parallel.DaskRunner(workers=2))
    assert summary["blocks"]["runner"] == "DaskRunner"
    assert summary["failed_blocks"] == []
    assert all(run["diagnostics"]["cores"] == 1 for run in summary["blocks"]["runs"])
    # Chains run in turn inside a (daemonic) Dask worker and in parallel processes here; the
    # sampler's draws depend on the seed only, so the fills agree to rounding.
    for name in ("fill_mean", "fill_median", "fill_sd", "lower_90", "upper_90", "fill_draws"):
        np.testing.assert_allclose(result[name].values, in_process[0][name].values,
                                   rtol=1e-6, err_msg=name)
    np.testing.assert_array_equal(result["fill_flag"].values, in_process[0]["fill_flag"].values)


def test_dask_retries_a_failing_block_on_a_running_scheduler(gappy, plan):
    from distributed import LocalCluster

    panel = gappy[0]
    # The second job's spec wants a cycle longer than its window: fill raises in the worker.
    yearly = spec.parse({"base": "hourly", "rank": 1,
                         "seasonal": [{"period": "365D", "harmonics": 1}]})
    jobs = []
    lengths = filling.real_gap_length(panel)
    for block, model in zip(plan.blocks[:2], (TINY, yearly), strict=True):
        window = {"series": list(block.rows), "time": slice(*block.window)}
        jobs.append(parallel.BlockJob(block, panel.isel(window), panel.sizes["time"], model,
                                      OPTIONS, None, lengths.isel(window)))
    done = []
    with LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster:
        outcomes = parallel.DaskRunner(scheduler=cluster.scheduler_address).run(jobs,
                                                                                 done.append)
    assert [o.status for o in outcomes] == ["filled", "failed"]
    assert [o.attempts for o in outcomes] == [1, 2]
    assert outcomes[1].error.startswith("SpecError: seasonal[0].period = '365D'")
    assert sorted(o.name for o in done) == [plan.blocks[0].name, plan.blocks[1].name]
    assert outcomes[0].core.sizes["time"] == plan.blocks[0].core[1] - plan.blocks[0].core[0]


def test_without_blocks_dask_is_not_imported():
    code = ("import sys, gapband, gapband.parallel, gapband.filling; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == "[]"


def test_fill_command_runs_blocks_and_refuses_two_clusters(gappy, tmp_path):
    from gapband.cli import main

    panel, _ = gappy
    csv = tmp_path / "gappy.csv"
    panel["value"].to_pandas().T.rename_axis("time").to_csv(csv)
    model = tmp_path / "tiny.toml"
    model.write_text('base = "hourly"\nrank = 1\n[[seasonal]]\nperiod = "1D"\nharmonics = 2\n')
    common = [str(csv), "--model", str(model), "--draws", "60", "--tune", "60", "--quiet",
              "--keep-draws", "0"]
    with pytest.raises(SystemExit) as done:
        main(["fill", *common, "--out", str(tmp_path / "out"),
              "--blocks", "series=3,window=14D,overlap=3D"])
    assert done.value.code == 0
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert len(summary["blocks"]["runs"]) == 4 and not summary["failed_blocks"]
    with pytest.raises(SystemExit) as done:
        main(["fill", *common, "--out", str(tmp_path / "two"), "--workers", "2",
              "--scheduler", "tcp://127.0.0.1:1"])
    assert done.value.code == 2


def test_every_block_uses_the_number_of_factors_chosen_on_the_whole_panel(monkeypatch):
    # A slow factor over the whole record and a daily one: the whole panel
    # supports one factor, some 8-day windows alone would choose two.
    from gapband import inference
    from gapband.model import choose_rank, standardised

    two = spec.parse({"base": "hourly", "rank": 2, "seasonal": [{"period": "1D", "harmonics": 2}]})
    rng = np.random.default_rng(0)
    hour = np.arange(24 * 48)
    slow, daily = 3 * np.sin(2 * np.pi * hour / hour.size), np.sin(2 * np.pi * hour / 24)
    values = (10 + rng.uniform(0.5, 1.5, (6, 1)) * slow + rng.uniform(-1, 1, (6, 1)) * daily
              + rng.normal(0, 0.3, (6, hour.size)))
    values[rng.random(values.shape) < 0.05] = np.nan
    panel = _panel(values)
    plan = parallel.plan_blocks(panel, model=two, max_series=6, window="8D", overlap="3D")
    whole = parallel.whole_panel_rank(panel, two, OPTIONS.rules.min_observed)
    alone = {choose_rank(standardised(panel.isel(time=slice(*b.window)), two)[0], two)
             for b in plan.blocks}
    assert alone - {whole}, "no window alone would choose otherwise: the check proves nothing"

    used = []
    fit = inference.fit
    monkeypatch.setattr(inference, "fit", lambda *a, **kw: used.append(kw["rank"]) or fit(*a, **kw))
    options = filling.FillOptions(draws=20, tune=20, chains=1, seed=0, progress=False)
    _, summary = parallel.fill_blocks(panel, plan, model=two, options=options)
    assert used == [whole] * len(plan.blocks)
    assert summary["blocks"]["rank"] == whole
