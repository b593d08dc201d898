"""Exact draws of AR(1) paths seen through noise (banded precision)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg.lapack import dpttrf
from statsmodels.tsa.arima_process import ArmaProcess

from gapband.gmrf import StackedAr1, ar1_entries, draw_ar1_given_noisy


def test_ar1_precision_inverts_the_ar1_autocovariance():
    # Source: statsmodels ArmaProcess.acovf, the theoretical autocovariance
    # of the AR(1), scaled to marginal variance s².
    rho, sd, n = 0.7, 1.8, 15
    precision = _dense_precision(sd, rho, n)
    acov = ArmaProcess([1.0, -rho], [1.0]).acovf(n)
    lags = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    np.testing.assert_allclose(np.linalg.inv(precision), sd**2 * acov[lags] / acov[0],
                               atol=1e-10)


def test_draws_match_the_dense_gaussian_conditional():
    # Source: conditional of a Gaussian prior x ~ N(0, C) observed as
    # y = x + noise, noise ~ N(0, s²I), is N(P⁻¹y/s², P⁻¹) with
    # P = C⁻¹ + I/s² on the observed cells (Rue & Held, Gaussian Markov
    # Random Fields, 2005, section 2.3); computed densely with numpy.
    rng = np.random.default_rng(4)
    rho, sd, noise, n = 0.85, 1.2, 0.4, 12
    y = rng.normal(size=n)
    y[[2, 3, 7]] = np.nan
    seen = ~np.isnan(y)
    lags = np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    posterior_precision = np.linalg.inv(sd**2 * rho**lags) + np.diag(seen / noise**2)
    cov = np.linalg.inv(posterior_precision)
    mean = cov @ np.where(seen, y, 0.0) / noise**2

    rows = 20_000
    draws = draw_ar1_given_noisy(
        np.tile(y, (rows, 1)), np.full(rows, rho), np.full(rows, sd), np.full(rows, noise), rng
    )
    se = np.sqrt(np.diag(cov) / rows)
    assert np.all(np.abs(draws.mean(axis=0) - mean) < 5 * se)
    np.testing.assert_allclose(np.cov(draws.T), cov, atol=0.03)


def test_unobserved_path_is_drawn_from_the_prior():
    rng = np.random.default_rng(5)
    rows = 20_000
    draws = draw_ar1_given_noisy(
        np.full((rows, 6), np.nan), np.full(rows, 0.5), np.full(rows, 2.0), np.ones(rows), rng
    )
    assert draws.std(axis=0) == pytest.approx(np.full(6, 2.0), rel=0.03)
    assert np.corrcoef(draws[:, 0], draws[:, 1])[0, 1] == pytest.approx(0.5, abs=0.03)


def _dense_precision(sd: float, rho: float, n: int) -> np.ndarray:
    inner, end, off = (float(v[0]) for v in ar1_entries(np.array([sd]), np.array([rho])))
    diagonal = np.full(n, inner)
    diagonal[[0, -1]] = end
    return np.diag(diagonal) + off * (np.eye(n, k=1) + np.eye(n, k=-1))


@pytest.mark.parametrize("n_time", [2, 7, 400])
def test_factor_matches_lapack(n_time):
    # Source: LAPACK dpttrf (scipy.linalg.lapack), the L·D·Lᵀ factorisation
    # of a symmetric positive definite tridiagonal matrix.
    rng = np.random.default_rng(6)
    rows = 5
    sd, rho = rng.uniform(0.1, 3.0, rows), rng.uniform(0.0, 0.999, rows)
    weight = rng.uniform(0.0, 50.0, (rows, n_time)) * (rng.random((rows, n_time)) > 0.3)
    factor = StackedAr1.of(sd, rho, weight)
    for i in range(rows):
        inner, end, off = (v[i] for v in ar1_entries(sd, rho))
        diagonal = np.full(n_time, inner) + weight[i]
        diagonal[[0, -1]] += end - inner
        d, e, info = dpttrf(diagonal, np.full(n_time - 1, off))
        assert info == 0
        np.testing.assert_allclose(factor.diagonal[i], d, rtol=1e-12)
        np.testing.assert_allclose(factor.lower[i, :-1], e, rtol=1e-12)


def test_a_single_step_has_the_stationary_precision():
    # One step of a stationary AR(1) has variance sd² whatever ρ (common practice).
    factor = StackedAr1.of(np.array([2.0, 0.5]), np.array([0.3, 0.9]), np.array([[0.0], [4.0]]))
    np.testing.assert_allclose(factor.diagonal[:, 0], [0.25, 4.0 + 4.0])


def test_regression_terms_match_the_dense_covariance():
    # Source: y = X·β + path + noise with an AR(1) path (autocovariance
    # sd²·ρ^|i-j|) and noise of precision W on the observed cells has error
    # covariance K = C + W⁻¹ there; XᵀK⁻¹X, XᵀK⁻¹y and yᵀK⁻¹y computed
    # densely with numpy, log|Q + W| with numpy.linalg.slogdet.
    rng = np.random.default_rng(7)
    rows, n_time, k = 3, 60, 2
    sd, rho = np.array([0.7, 2.0, 0.05]), np.array([0.9, 0.2, 0.999])
    base = rng.gamma(2.0, 0.5, (rows, n_time)) * (rng.random((rows, n_time)) > 0.2)
    scale = np.array([4.0, 0.5, 1e4])
    resid, design = rng.normal(size=(rows, n_time)), rng.normal(size=(k, n_time))
    factor, terms = StackedAr1.regress(sd, rho, base, scale, resid, design)
    lags = np.abs(np.subtract.outer(np.arange(n_time), np.arange(n_time)))
    for i in range(rows):
        seen = base[i] > 0
        weight = base[i, seen] * scale[i]
        cov = (sd[i] ** 2 * rho[i] ** lags)[np.ix_(seen, seen)] + np.diag(1.0 / weight)
        k_inv = np.linalg.inv(cov)
        x, y = design[:, seen], resid[i, seen]
        np.testing.assert_allclose(terms.gram[i], x @ k_inv @ x.T, rtol=1e-7)
        np.testing.assert_allclose(terms.cross[i], x @ k_inv @ y, rtol=1e-7)
        assert terms.quadratic[i] == pytest.approx(y @ k_inv @ y, rel=1e-7)
        assert terms.log_weight[i] == pytest.approx(np.log(weight).sum(), rel=1e-12)
        assert terms.observed[i] == seen.sum()
        dense = _dense_precision(sd[i], rho[i], n_time) + np.diag(base[i] * scale[i])
        assert terms.log_det[i] == pytest.approx(np.linalg.slogdet(dense)[1], rel=1e-9)
    alone = StackedAr1.of(sd, rho, base * scale[:, None])  # the factor kept for the next draws
    np.testing.assert_allclose(factor.diagonal, alone.diagonal, rtol=1e-12)
    np.testing.assert_allclose(factor.lower, alone.lower, rtol=1e-12)


def test_log_det_of_a_long_path_stays_finite():
    # A path of 50,000 steps whose pivots are all far from 1: their product
    # over- or underflows float64, their log-sum must not (common practice).
    for scale in (1e-6, 1e6):
        base = np.ones((1, 50_000))
        _, terms = StackedAr1.regress(np.array([1.0]), np.array([0.5]), base,
                                      np.array([scale]), np.zeros((1, 50_000)), None)
        expected = np.log(StackedAr1.of(np.array([1.0]), np.array([0.5]),
                                        base * scale).diagonal).sum()
        assert np.isfinite(terms.log_det[0])
        assert terms.log_det[0] == pytest.approx(expected, rel=1e-10)


def test_a_matrix_that_is_not_positive_definite_is_refused():
    with pytest.raises(np.linalg.LinAlgError, match="row 1"):
        StackedAr1.of(np.ones(2), np.full(2, 0.5), np.array([[1.0, 1.0], [-10.0, 1.0]]))
