"""Scores against reference libraries, closed forms and worked examples."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scoringrules as sr
from scipy import stats

from gapband import scores


def _ensemble(seed: int, cells: int = 40, draws: int = 25):
    rng = np.random.default_rng(seed)
    y = rng.normal(size=cells) * 3
    x = rng.normal(loc=rng.normal(size=cells), scale=2.0, size=(draws, cells))
    return y, x


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_crps_ensemble_matches_scoringrules(seed):
    y, x = _ensemble(seed)
    # Source: scoringrules (PyPI) crps_ensemble, energy form E|X-y| - E|X-X'|/2 ("nrg").
    expected = sr.crps_ensemble(y, x, m_axis=0, estimator="nrg")
    np.testing.assert_allclose(scores.crps_ensemble(y, x), expected, rtol=0, atol=1e-10)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_fair_crps_matches_scoringrules(seed):
    y, x = _ensemble(seed)
    # Source: scoringrules (PyPI) crps_ensemble with its fair (unbiased) estimator.
    expected = sr.crps_ensemble(y, x, m_axis=0, estimator="fair")
    np.testing.assert_allclose(scores.crps_ensemble(y, x, fair=True), expected, rtol=0,
                               atol=1e-10)


def test_crps_with_ties_and_a_single_draw():
    y = np.array([1.0, 0.0])
    x = np.array([[1.0, 2.0], [1.0, 2.0], [3.0, -2.0]])
    # Source: scoringrules (PyPI) crps_ensemble, energy form.
    np.testing.assert_allclose(scores.crps_ensemble(y, x),
                               sr.crps_ensemble(y, x, m_axis=0, estimator="nrg"), atol=1e-12)
    # One draw: the CRPS of a point forecast is the absolute error (Gneiting & Raftery 2007,
    # JASA 102:359, section 4.2: the CRPS generalises the absolute error).
    np.testing.assert_allclose(scores.crps_ensemble(y, x[:1]), np.abs(x[0] - y))
    with pytest.raises(ValueError, match="at least two draws"):
        scores.crps_ensemble(y, x[:1], fair=True)


def test_crps_normal_matches_scoringrules():
    rng = np.random.default_rng(4)
    y, mu, sd = rng.normal(size=50), rng.normal(size=50), rng.uniform(0.1, 3, 50)
    # Source: Gneiting & Raftery 2007, JASA 102:359, eq. 21, as implemented by
    # scoringrules.crps_normal (PyPI).
    np.testing.assert_allclose(scores.crps_normal(y, mu, sd), sr.crps_normal(y, mu, sd),
                               rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("fair", [False, True])
def test_crps_of_many_normal_draws_approaches_the_closed_form(fair):
    rng = np.random.default_rng(5)
    y = np.array([-2.0, 0.0, 0.7, 3.0])
    mu, sd = np.array([0.0, 1.0, 0.5, -1.0]), np.array([1.0, 0.5, 2.0, 1.5])
    m = 200_000
    draws = mu + sd * rng.standard_normal((m, 4))
    # Source: Gneiting & Raftery 2007, JASA 102:359, eq. 21 (scoringrules.crps_normal).
    exact = sr.crps_normal(y, mu, sd)
    # Monte Carlo error of E|X - y| is at most sd(|X - y|)/sqrt(m) <= sqrt(sd^2 + (y-mu)^2)/sqrt(m);
    # allow five of those.
    tolerance = 5 * np.sqrt(sd**2 + (y - mu) ** 2) / np.sqrt(m)
    assert (np.abs(scores.crps_ensemble(y, draws, fair=fair) - exact) < tolerance).all()


def test_interval_score_worked_example():
    # Source: Gneiting & Raftery 2007, JASA 102:359, eq. 43, worked by hand for a central
    # 90 % interval [0, 10] (alpha = 0.1, so 2/alpha = 20):
    #   y = 12 (above): 10 + 20 * (12 - 10) = 50
    #   y = -1 (below): 10 + 20 * (0 - (-1)) = 30
    #   y = 4 (inside): 10
    y = np.array([12.0, -1.0, 4.0])
    got = scores.interval_score(y, np.zeros(3), np.full(3, 10.0), 90)
    np.testing.assert_allclose(got, [50.0, 30.0, 10.0])


def test_interval_score_matches_scoringrules():
    rng = np.random.default_rng(6)
    y, lo = rng.normal(size=30), rng.normal(size=30) - 1
    hi = lo + rng.uniform(0, 3, 30)
    # Source: scoringrules (PyPI) interval_score, alpha = 1 - level.
    np.testing.assert_allclose(scores.interval_score(y, lo, hi, 80),
                               sr.interval_score(y, lo, hi, 0.2), rtol=1e-12)


@pytest.mark.parametrize("level", [50, 80, 90, 95])
def test_exact_normal_intervals_reach_nominal_coverage(level):
    n = 20_000
    rng = np.random.default_rng(7)
    y = rng.standard_normal(n)
    # Source: scipy.stats.norm.ppf for the exact central interval of N(0, 1).
    half = stats.norm.ppf(0.5 + level / 200)
    hits = int(scores.covered(y, -half, half).sum())
    # Source: scipy.stats.binomtest — the hit count is Binomial(n, level/100) when the
    # intervals are exact; a 99.9 % two-sided test must not reject.
    assert stats.binomtest(hits, n, level / 100).pvalue > 1e-3


@pytest.mark.parametrize("level", [50, 90])
def test_intervals_from_draws_of_the_true_distribution_cover_nominally(level):
    rng = np.random.default_rng(8)
    cells = 4000
    mu, sd = rng.normal(size=cells), rng.uniform(0.5, 2, cells)
    y = mu + sd * rng.standard_normal(cells)
    draws = mu + sd * rng.standard_normal((400, cells))
    cell_scores = scores.score_draws(y, draws, [level])
    hits = int(cell_scores[f"covered_{level}"].sum())
    # Source: scipy.stats.binomtest (Binomial(n, level) under correct intervals); the
    # empirical quantiles of 400 draws leave a small bias, inside a 99.9 % test.
    assert stats.binomtest(hits, cells, level / 100).pvalue > 1e-3


def test_too_narrow_intervals_are_detected():
    rng = np.random.default_rng(9)
    y = rng.standard_normal(4000)
    draws = 0.6 * rng.standard_normal((400, 4000))  # sd 0.6 where the truth has 1
    hits = int(scores.score_draws(y, draws, [90])["covered_90"].sum())
    # Source: scipy.stats.binomtest; true coverage is P(|Z| < 0.6 * 1.645) = 0.68.
    assert stats.binomtest(hits, 4000, 0.9, alternative="less").pvalue < 1e-6


def test_pit_is_uniform_under_the_true_distribution():
    rng = np.random.default_rng(10)
    cells = 3000
    mu, sd = rng.normal(size=cells), rng.uniform(0.5, 2, cells)
    y = mu + sd * rng.standard_normal(cells)
    draws = mu + sd * rng.standard_normal((999, cells))
    pit = scores.pit_ensemble(y, draws)
    # Source: scipy.stats.kstest against Uniform(0, 1).
    assert stats.kstest(pit, "uniform").pvalue > 1e-3
    # Source: scipy.stats.norm.cdf, the exact PIT of a Gaussian predictive.
    np.testing.assert_allclose(scores.pit_normal(y, mu, sd), stats.norm.cdf(y, mu, sd),
                               rtol=1e-12)
    assert stats.kstest(scores.pit_normal(y, mu, sd), "uniform").pvalue > 1e-3


def test_pit_of_an_overconfident_predictor_is_not_uniform():
    rng = np.random.default_rng(11)
    y = rng.standard_normal(3000)
    pit = scores.pit_ensemble(y, 0.5 * rng.standard_normal((999, 3000)))
    # Source: scipy.stats.kstest; too narrow draws pile the PIT up at 0 and 1.
    assert stats.kstest(pit, "uniform").pvalue < 1e-6
    counts = scores.pit_histogram(pit)
    assert counts.sum() == 3000 and counts[0] > counts[4] and counts[-1] > counts[5]


def test_pit_mid_rank_with_ties():
    draws = np.array([[0.0], [1.0], [1.0], [2.0]])
    # 1 draw below, 2 tied: (1 + (2 + 1)/2) / (4 + 1) = 0.5 (by hand from the definition).
    assert scores.pit_ensemble(np.array([1.0]), draws)[0] == pytest.approx(0.5)


def test_breakdown_matches_pandas_groupby():
    rng = np.random.default_rng(12)
    cells = 500
    y = rng.normal(size=cells)
    draws = rng.normal(size=(50, cells))
    per_cell = scores.score_draws(y, draws, [50, 90])
    series = rng.integers(0, 3, cells)
    bucket = rng.choice([0, 2], cells)  # bucket 1 stays empty
    out = scores.breakdown(per_cell, [50, 90], {"series": (series, ["a", "b", "c"]),
                                               "gap_length": (bucket, ["1", "2-6", "7-24"])})
    frame = pd.DataFrame({"series": series, "abs": per_cell["abs_error"],
                          "sq": per_cell["sq_error"], "crps": per_cell["crps"],
                          "cov90": per_cell["covered_90"], "is50": per_cell["interval_score_50"]})
    # Source: pandas groupby means (reference library).
    by = frame.groupby("series").mean()
    for code, name in enumerate(["a", "b", "c"]):
        record = out["series"][name]
        assert record["n"] == int((series == code).sum())
        assert record["mae"] == pytest.approx(by.loc[code, "abs"], rel=1e-12)
        assert record["rmse"] == pytest.approx(np.sqrt(by.loc[code, "sq"]), rel=1e-12)
        assert record["crps"] == pytest.approx(by.loc[code, "crps"], rel=1e-12)
        assert record["coverage"]["90"] == pytest.approx(by.loc[code, "cov90"], rel=1e-12)
        assert record["interval_score"]["50"] == pytest.approx(by.loc[code, "is50"], rel=1e-12)
    assert list(out["gap_length"]) == ["1", "7-24"]
    assert out["overall"]["mae"] == pytest.approx(frame["abs"].mean(), rel=1e-12)


def test_point_and_gaussian_predictors_report_what_they_have():
    y = np.array([1.0, 2.0, 4.0])
    point = scores.summarise(scores.score_point(y, np.array([1.5, 2.0, 3.0])), [90])
    assert point["mae"] == pytest.approx(0.5) and point["rmse"] == pytest.approx(
        np.sqrt((0.25 + 1) / 3))
    assert point["crps"] is None and point["coverage"] is None
    gauss = scores.summarise(scores.score_normal(y, y, np.ones(3), [90]), [90])
    assert gauss["coverage"] == {"90": 1.0} and gauss["crps_fair"] is None
    # Source: scipy.stats.norm.ppf(0.95) * 2, the width of a 90 % interval of N(., 1).
    assert gauss["mean_width"]["90"] == pytest.approx(2 * stats.norm.ppf(0.95))
