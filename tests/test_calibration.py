"""Widening factors per gap length: the conformal rule, pooling, narrowing, and a real test.

The factor checks use simulated Gaussian cells, where the right answer is
known; the end-to-end check fits a panel simulated from the model's
structure (tests/gap_patterns.py) with long outages.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
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


# ---- widening the joint draws --------------------------------------------------------------

#: Factors per level (rows: 50, 80, 90, 95) and bucket (columns: the five gap lengths).
RISING = np.array([[0.8, 1.0, 1.1, 1.2, 1.3],
                   [0.9, 1.0, 1.2, 1.4, 1.5],
                   [1.0, 1.0, 1.3, 1.5, 1.8],
                   [1.1, 1.0, 1.4, 1.7, 2.0]])


def _factors(table: np.ndarray) -> dict:
    return {str(level): {label: float(table[i, b]) for b, label in enumerate(calibration.BUCKETS)}
            for i, level in enumerate(LEVELS)}


def _widening(table: np.ndarray) -> calibration.Calibration:
    """A calibration with the factors of ``table``, as :func:`calibration.read` would give."""
    return calibration.Calibration(
        "check/holdout.json", "0" * 64, "gibbs", "gaps", "none", {}, "", None,
        _factors(table), longest_tested=1000)


def _normal_draws(n_draws: int, seed: int = 0) -> tuple:
    """Joint draws of 5 series × 200 missing hours, N(mu, sd) per cell, one bucket per series.

    Returns the draws Dataset, the cells' exact medians, sds and the gap lengths.
    """
    rng = np.random.default_rng(seed)
    lengths = np.array([1, 4, 12, 60, 200])  # one gap length of each bucket
    gap = np.repeat(lengths[:, None], 200, axis=1)
    mu, sd = rng.normal(10, 3, gap.shape), rng.uniform(0.5, 2.0, gap.shape)
    values = (mu.ravel() + sd.ravel() * rng.standard_normal((n_draws, gap.size)))
    grid = {"series": [f"s{i}" for i in range(5)],
            "time": np.datetime64("2024-01-01") + np.arange(200) * np.timedelta64(1, "h")}
    draws = xr.Dataset({"fill_draws": (("fill_draw", "missing_cell"), values.astype("float32"),
                                       {"comment": "joint draws", "calibrated": "no"})},
                       coords={"missing_cell": np.arange(gap.size)})
    as_grid = {"coords": grid, "dims": ("series", "time")}
    return (draws, xr.DataArray(mu, **as_grid), xr.DataArray(sd, **as_grid),
            xr.DataArray(gap, **as_grid))


def _summaries(median: xr.DataArray, lower: dict, upper: dict) -> xr.Dataset:
    out = xr.Dataset({"fill_median": median})
    for level in LEVELS:
        out[f"lower_{level}"], out[f"upper_{level}"] = lower[level], upper[level]
    return out


def _draw_bounds(draws: xr.Dataset, like: xr.DataArray) -> tuple[dict, dict]:
    """Each cell's central interval bounds over its draws, per level, on the grid of ``like``.

    Source: numpy.quantile's default method, linear interpolation between order
    statistics (Hyndman & Fan 1996, definition 7) -- the definition gapband stats uses.
    """
    values = draws["fill_draws"].values.astype("float64")
    lower, upper = {}, {}
    for level in LEVELS:
        lo, hi = np.quantile(values, [0.5 - level / 200, 0.5 + level / 200], axis=0)
        lower[level], upper[level] = like.copy(data=lo.reshape(like.shape)), \
            like.copy(data=hi.reshape(like.shape))
    return lower, upper


@pytest.mark.parametrize("n_draws", [200, 1000])
def test_widened_draws_have_the_widened_bounds_of_their_own_intervals(n_draws):
    draws, mu, _, gap = _normal_draws(n_draws)
    widening = _widening(RISING)
    median = mu.copy(data=np.median(draws["fill_draws"].values.astype("float64"), axis=0)
                     .reshape(mu.shape))
    before_lower, before_upper = _draw_bounds(draws, median)
    expected = calibration.widen(_summaries(median, before_lower, before_upper), widening,
                                 LEVELS, gap)
    widened = calibration.widen_draws(draws.copy(deep=True), median, widening, LEVELS, gap)
    lower, upper = _draw_bounds(widened, median)
    for level in LEVELS:
        for side, got in (("lower", lower), ("upper", upper)):
            want = expected[f"{side}_{level}"]
            half = np.abs(want - median)
            # Off only where a bound falls between two draws of different factors: second
            # order in the factor's step between neighbouring ranks; measured below 0.2 %
            # of the half-width with 200 draws. 0.5 % leaves room, a wrong rank-to-level
            # rule (e.g. the factor of the next level out) misses it by several %.
            assert float((np.abs(got[level] - want) / half).max()) < 5e-3, (side, level)
    # the draws' median is where the median was: every draw there keeps its place
    np.testing.assert_allclose(np.median(widened["fill_draws"].values, axis=0),
                               median.values.ravel(), rtol=0, atol=1e-5)


def test_widened_draws_match_widened_exact_bounds_to_monte_carlo_error():
    draws, mu, sd, gap = _normal_draws(200, seed=1)
    widening = _widening(RISING)
    # Source: scipy.stats.norm.ppf, the exact quantiles the draws come from.
    exact_lower = {lv: mu - stats.norm.ppf(0.5 + lv / 200) * sd for lv in LEVELS}
    exact_upper = {lv: mu + stats.norm.ppf(0.5 + lv / 200) * sd for lv in LEVELS}
    expected = calibration.widen(_summaries(mu, exact_lower, exact_upper), widening, LEVELS,
                                 gap)
    widened = calibration.widen_draws(draws, mu, widening, LEVELS, gap)
    lower, upper = _draw_bounds(widened, mu)
    factor = {lv: xr.DataArray(RISING[i][calibration.bucket_of(gap.values)], dims=gap.dims)
              for i, lv in enumerate(LEVELS)}
    for level in LEVELS:
        p = 0.5 - level / 200
        z = stats.norm.ppf(p)
        # Source: a sample quantile of K draws is asymptotically normal with sd
        # sqrt(p (1 - p) / K) / f(q_p) (Serfling 1980, Approximation Theorems of
        # Mathematical Statistics, sec. 2.3.3; the section number from memory); the
        # widened bound moves c times as far. Tolerance: 4.5 sd per cell (1,000 cells).
        mc_sd = np.sqrt(p * (1 - p) / 200) / stats.norm.pdf(z) * sd * factor[level]
        for side, got in (("lower", lower), ("upper", upper)):
            error = (got[level] - expected[f"{side}_{level}"]) / mc_sd
            assert float(np.abs(error).max()) < 4.5, (side, level)
            # and no bias beyond Monte Carlo error over the 1,000 cells
            assert abs(float(error.mean())) < 4.5 / np.sqrt(error.size) + 0.15, (side, level)


def test_draws_keep_their_order_and_a_factor_of_one_leaves_them_bit_for_bit():
    draws, mu, _, gap = _normal_draws(200, seed=2)
    raw = draws["fill_draws"].values.copy()
    # factors falling with level too (bucket 2-6 at 1 throughout)
    falling = RISING[::-1].copy()
    falling[:, 1] = 1.0
    for table in (RISING, falling):
        widened = calibration.widen_draws(draws.copy(deep=True), mu, _widening(table), LEVELS,
                                          gap)["fill_draws"].values
        assert widened.dtype == np.float32
        order = np.argsort(raw, axis=0, kind="stable")
        steps = np.diff(np.take_along_axis(widened, order, axis=0), axis=0)
        assert (steps >= 0).all()  # no two draws of a cell swap places
        if table is RISING:  # factors of 0.8 and more: distinct draws stay distinct
            apart = np.diff(np.take_along_axis(raw, order, axis=0), axis=0) > 0
            assert (steps[apart] > 0).all()
        one = (gap.values == 4).ravel()  # the bucket whose factor is 1 at every level
        np.testing.assert_array_equal(widened[:, one], raw[:, one])
        assert not np.array_equal(widened[:, ~one], raw[:, ~one])


def test_falling_factors_never_give_the_draws_narrower_bounds_than_widen():
    draws, mu, _, gap = _normal_draws(200, seed=3)
    falling = RISING[::-1]
    median = mu.copy(data=np.median(draws["fill_draws"].values.astype("float64"), axis=0)
                     .reshape(mu.shape))
    expected = calibration.widen(_summaries(median, *_draw_bounds(draws, median)),
                                 _widening(falling), LEVELS, gap)
    widened = calibration.widen_draws(draws, median, _widening(falling), LEVELS, gap)
    lower, upper = _draw_bounds(widened, median)
    for level in LEVELS:
        half = expected[f"upper_{level}"] - median
        assert float(((upper[level] - expected[f"upper_{level}"]) / half).min()) > -5e-3
        half = median - expected[f"lower_{level}"]
        assert float(((expected[f"lower_{level}"] - lower[level]) / half).min()) > -5e-3


def test_widened_draws_say_so_and_older_draws_read_as_not_calibrated():
    draws, mu, _, gap = _normal_draws(3)
    widened = calibration.widen_draws(draws, mu, _widening(RISING), LEVELS, gap)
    attrs = widened["fill_draws"].attrs
    assert attrs["calibrated"] == "yes" and attrs["calibration_file"] == "check/holdout.json"
    assert "check/holdout.json" in attrs["comment"] and attrs["comment"].startswith("joint")
    assert calibration.draws_calibration(widened) == "check/holdout.json"
    widened["fill_draws"].attrs = {"comment": "joint draws"}  # as an older gapband wrote them
    assert calibration.draws_calibration(widened) is None
    assert calibration.draws_calibration(widened.drop_vars("fill_draws")) is None
