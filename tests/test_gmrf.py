"""Exact draws of AR(1) paths seen through noise (banded precision)."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.tsa.arima_process import ArmaProcess

from gapband.gmrf import ar1_band, draw_ar1_given_noisy


def test_ar1_precision_inverts_the_ar1_autocovariance():
    # Source: statsmodels ArmaProcess.acovf, the theoretical autocovariance
    # of the AR(1), scaled to marginal variance s².
    rho, sd, n = 0.7, 1.8, 15
    ab = ar1_band(np.array([sd]), np.array([rho]), np.zeros((1, n)))
    precision = np.diag(ab[0]) + np.diag(ab[1, :-1], -1) + np.diag(ab[1, :-1], 1)
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
