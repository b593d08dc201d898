"""Widening factors per gap length: the conformal rule, pooling, narrowing, and a real test.

The factor checks use simulated Gaussian cells, where the right answer is
known; the end-to-end check fits a panel simulated from the model's
structure (tests/gap_patterns.py) with long outages.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import gap_patterns
from gapband import calibration, filling, flags, holdout
from gapband.panel import gap_runs, make_panel, run_lengths
from gapband.scores import covered

LEVELS = (50, 80, 90, 95)


def _cells(bucket: np.ndarray, sd_ratio: np.ndarray, seed: int = 0) -> dict:
    """Per-cell scores: truth N(mu, 1), a Gaussian predictor with sd ``sd_ratio`` per cell."""
    rng = np.random.default_rng(seed)
    mu = rng.normal(0, 3, bucket.size)
    cells = {"truth": mu + rng.standard_normal(bucket.size), "point": mu}
    for level in LEVELS:
        # Source: scipy.stats.norm.ppf, the exact quantiles of the predictor.
        half = stats.norm.ppf(0.5 + level / 200) * sd_ratio
        cells[f"lower_{level}"], cells[f"upper_{level}"] = mu - half, mu + half
    return cells


def _direct_factor(cells: dict, inside: np.ndarray, level: float) -> float:
    """The ceil((n+1)(1-alpha))-th smallest conformity score, written out plainly."""
    y, m = cells["truth"][inside], cells["point"][inside]
    lo, hi = cells[f"lower_{level}"][inside], cells[f"upper_{level}"][inside]
    score = np.where(y < m, (m - y) / (m - lo), (y - m) / (hi - m))
    n = score.size
    k = math.ceil((n + 1) * level / 100)
    return float(np.sort(score)[k - 1])


def test_each_bucket_factor_is_the_conformal_order_statistic_of_its_cells():
    rng = np.random.default_rng(1)
    bucket = rng.permutation(np.repeat(np.arange(5), [400, 300, 250, 150, 120]))
    # intervals too narrow, more so for longer gaps: every factor above 1
    cells = _cells(bucket, np.array([0.8, 0.7, 0.6, 0.5, 0.4])[bucket])
    derived = calibration.derive(cells, bucket, np.arange(bucket.size), LEVELS)
    for b, label in enumerate(calibration.BUCKETS):
        assert derived["by_bucket"][label]["pooled_with"] == [label]
        for level in LEVELS:
            # Source: split-conformal quantile, Lei et al., JASA 113 (2018) 1094, and
            # Angelopoulos & Bates, arXiv:2107.07511, sec. 1: the ceil((n+1)(1-alpha))-th
            # smallest calibration score, 1 - alpha = level / 100.
            expected = _direct_factor(cells, bucket == b, level)
            assert derived["factors"][str(level)][label] == pytest.approx(expected, rel=1e-8)
            assert derived["by_bucket"][label]["coverage_after"][str(level)] >= level / 100


def test_a_thin_bucket_pools_its_neighbours_by_distance():
    counts = [500, 40, 30, 0, 5]
    assert calibration.pool_of(counts, 0) == [0]
    assert calibration.pool_of(counts, 1) == [0, 1, 2]  # 40 < 100: distance 1 brings 570
    # 0 cells, then 35 within distance 1, 75 within 2, all 575 within 3
    assert calibration.pool_of(counts, 3) == [0, 1, 2, 3, 4]
    assert calibration.pool_of([10, 10], 0) == [0, 1]  # everything, still thin
    bucket = np.repeat(np.arange(5), counts)
    cells = _cells(bucket, np.full(bucket.size, 0.6))
    derived = calibration.derive(cells, bucket, np.arange(bucket.size), LEVELS)
    # the larger of the pool's factor and the bucket's own (its 40 cells suffice at 90 %)
    expected = max(_direct_factor(cells, np.isin(bucket, [0, 1, 2]), 90),
                   _direct_factor(cells, bucket == 1, 90))
    assert derived["factors"]["90"]["2-6"] == pytest.approx(expected, rel=1e-8)
    # 5 cells are too few for a factor of their own at 90 %: the pool's alone
    assert derived["factors"]["90"][">168"] == pytest.approx(
        _direct_factor(cells, np.ones(bucket.size, dtype=bool), 90), rel=1e-8)
    # a thin bucket that under-covers keeps its own, larger factor
    narrow = dict(cells)
    for level in LEVELS:
        for side in ("lower", "upper"):
            narrow[f"{side}_{level}"] = np.where(
                bucket == 1, cells["point"] + 0.3 * (cells[f"{side}_{level}"] - cells["point"]),
                cells[f"{side}_{level}"])
    derived = calibration.derive(narrow, bucket, np.arange(bucket.size), LEVELS)
    own = _direct_factor(narrow, bucket == 1, 90)
    assert own > _direct_factor(narrow, np.isin(bucket, [0, 1, 2]), 90)
    assert derived["factors"]["90"]["2-6"] == pytest.approx(own, rel=1e-8)
    assert derived["by_bucket"]["2-6"]["coverage_after"]["90"] >= 0.9
    assert derived["by_bucket"]["25-168"]["n_cells"] == 0
    assert derived["by_bucket"]["25-168"]["n_pooled"] == 575


def test_no_narrowing_without_evidence_of_over_coverage():
    # too wide by 10 %: with 60 cells the over-coverage is not shown, the factor stays 1
    few = np.zeros(60, dtype="int64")
    derived = calibration.derive(_cells(few, np.full(60, 1.1), seed=2), few, np.arange(60),
                                 (50,))
    record = derived["by_bucket"]["1"]
    assert record["conformal"]["50"] < 1 and not record["narrowed"]["50"]
    assert derived["factors"]["50"]["1"] == 1.0
    # twice too wide over 3,000 cells, each its own run: shown beyond doubt, narrowed
    many = np.zeros(3000, dtype="int64")
    cells = _cells(many, np.full(3000, 2.0), seed=3)
    derived = calibration.derive(cells, many, np.arange(3000), (50,))
    record = derived["by_bucket"]["1"]
    hits = int(covered(cells["truth"], cells["lower_50"], cells["upper_50"]).sum())
    # Source: scipy.stats.binomtest, one-sided: coverage above 50 %.
    assert record["p_over"]["50"] == pytest.approx(
        stats.binomtest(hits, 3000, 0.5, alternative="greater").pvalue, rel=1e-9)
    assert record["narrowed"]["50"] and derived["factors"]["50"]["1"] == record["conformal"]["50"]
    assert derived["factors"]["50"]["1"] == pytest.approx(0.5, rel=0.1)
    # the same cells in 3 runs of 1,000: 3 pieces of evidence cannot show it, no narrowing
    derived = calibration.derive(cells, many, np.repeat([0, 1, 2], 1000), (50,))
    record = derived["by_bucket"]["1"]
    k = math.floor(hits / 3000 * 3)
    # Source: scipy.stats.binomtest, one-sided, on the runs.
    assert record["p_over"]["50"] == pytest.approx(
        stats.binomtest(k, 3, 0.5, alternative="greater").pvalue, rel=1e-9)
    assert not record["narrowed"]["50"] and derived["factors"]["50"]["1"] == 1.0


def test_a_fill_in_a_gap_longer_than_tested_is_flagged():
    values = np.ones((1, 40))
    values[0, 5:7] = np.nan      # a gap of 2: tested
    values[0, 20:30] = np.nan    # a gap of 10: longer than the 6 steps tested
    panel = make_panel(values, ["a"], np.arange(40) * np.timedelta64(1, "h")
                       + np.datetime64("2020-01-01"), "h")
    panel["fill_median"] = panel["value"].fillna(1.0).where(panel["value"].isnull())
    flagged = flags.assign(panel, tested_gap=6, max_var_width=None)  # no intervals here
    flag = flagged["fill_flag"].values[0]
    assert (flag[20:30] == flags.FILLED_UNCERTAIN).all()
    assert (flag[5:7] == flags.FILLED).all()
    assert "longer than the 6 steps the calibration's holdout tested" in \
        flagged["fill_flag"].attrs["comment"]
    off = flags.assign(panel, tested_gap=6, flag_untested=False,
                       max_var_width=None)["fill_flag"].values[0]
    assert (off[20:30] == flags.FILLED).all()


def _with_outages(seed: int) -> tuple:
    """A panel simulated from the model's structure, with short gaps and long outages."""
    panel = gap_patterns.simulated_panel(6, 1200, "h", seed=seed)
    rng = np.random.default_rng(seed)
    values = panel["value"].values.copy()
    for n in range(values.shape[0]):
        start = int(rng.integers(50, 1000))
        values[n, start : start + int(rng.integers(40, 120))] = np.nan  # an outage
        for _ in range(10):
            length = int(rng.choice([1, 2, 4, 9, 16]))
            at = int(rng.integers(1, 1190))
            values[n, at : at + length] = np.nan
    return panel.copy(data={"value": values})


def _run_ids(missing: np.ndarray) -> np.ndarray:
    """An id per missing run, at each cell of the run (-1 where observed)."""
    ids = np.full(missing.shape, -1)
    for i, (n, start, length) in enumerate(gap_runs(missing)):
        ids[n, start : start + length] = i
    return ids


def _clustered_variance(hit: np.ndarray, run: np.ndarray) -> float:
    """Variance of a coverage rate over cells that come in runs (clusters).

    Source: the variance of a ratio estimator under cluster sampling,
    (R / (R - 1)) Σ (k_r - p m_r)² / (Σ m_r)² over R clusters with m_r cells and
    k_r hits (Cochran, Sampling Techniques, 3rd ed. 1977, sec. 6.3 and 9.7).
    """
    _, index = np.unique(run, return_inverse=True)
    m = np.bincount(index)
    k = np.bincount(index, weights=hit.astype("float64"))
    p = k.sum() / m.sum()
    r = m.size
    return float(r / (r - 1) * ((k - p * m) ** 2).sum() / m.sum() ** 2)


def test_calibrated_coverage_per_bucket_is_nominal_on_a_fresh_split(tmp_path):
    panel = _with_outages(0)
    options = filling.FillOptions(draws=100, tune=100, chains=2, seed=0, progress=False,
                                  keep_draws=0)
    report = holdout.run(panel, options=options, baseline_names=(), max_repeats=2)
    path = holdout.write(report, tmp_path)
    # two fresh splits: other cells hidden the same way, filled with the factors applied
    parts = []
    for seed in (11, 12):
        fresh = holdout.mask(panel, seed=seed).hidden.values
        masked = panel.copy()
        masked["value"] = panel["value"].where(~fresh)
        result, summary = filling.fill(masked, options=options, calibration=path)
        assert summary["calibration"]["longest_tested_steps"] == \
            report["evidence"]["longest_tested_steps"]
        missing = masked["value"].isnull().values
        parts.append({
            "truth": panel["value"].values[fresh],
            "bucket": calibration.bucket_of(run_lengths(missing)[fresh]),
            "run": _run_ids(missing)[fresh] + seed * missing.size,  # distinct over splits
            **{f"{side}_{level}": result[f"{side}_{level}"].values[fresh]
               for level in LEVELS for side in ("lower", "upper")}})
    pooled = {key: np.concatenate([part[key] for part in parts]) for key in parts[0]}
    truth, bucket, run = pooled["truth"], pooled["bucket"], pooled["run"]
    checked = 0
    for b, label in enumerate(calibration.BUCKETS):
        own = bucket == b
        n_test = int(own.sum())
        n_cal = report["widening"]["by_bucket"][label]["n_pooled"]
        if np.unique(run[own]).size < 10:
            continue
        for level in LEVELS:
            hit = covered(truth[own], pooled[f"lower_{level}"][own],
                          pooled[f"upper_{level}"][own])
            p = level / 100
            # Cells of one run are correlated: the test side's variance is the clustered
            # one; the calibration side's is the split-conformal coverage spread over
            # calibration sets of n_cal cells, p(1-p)/(n_cal+2) (its Beta law: Angelopoulos
            # & Bates, arXiv:2107.07511, sec. 3.2), times the same design effect.
            test_var = _clustered_variance(hit, run[own])
            effect = max(test_var / (p * (1 - p) / n_test), 1.0)
            tolerance = 3.29 * math.sqrt(test_var + effect * p * (1 - p) / (n_cal + 2))
            # 3.29 sd: two-sided 0.1 % under the normal approximation.
            assert abs(hit.mean() - p) <= tolerance, (label, level, hit.mean(), tolerance)
            checked += 1
    assert checked >= 4 * len(LEVELS)  # the outages' bucket among them:
    assert np.unique(run[bucket == calibration.bucket_of(np.array([40]))[0]]).size >= 10
