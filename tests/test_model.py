"""Building the PyMC model: likelihood pieces, rank choice, standardisation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytensor.tensor as pt
import pytest
from scipy import stats
from statsmodels.tsa.arima_process import ArmaProcess

from gapband import model, spec
from gapband.errors import FitError, SpecError
from gapband.panel import make_panel


def _panel(values: np.ndarray, step: str = "h"):
    n_series, n_time = values.shape
    time = pd.date_range("2024-01-01", periods=n_time, freq=step)
    return make_panel(values, [f"s{i}" for i in range(n_series)], time, step)


def _hourly_values(n_series=3, n_time=72, seed=0):
    rng = np.random.default_rng(seed)
    t = np.arange(n_time)
    cycle = np.sin(2 * np.pi * t / 24)
    values = np.array([10 + (i + 1) * cycle + rng.normal(0, 0.3, n_time) for i in range(n_series)])
    values[0, 10:20] = np.nan
    values[-1, rng.choice(n_time, 8, replace=False)] = np.nan
    return values


@pytest.mark.parametrize("coefficients", [[0.6], [0.5, -0.3], [0.9, -0.5, 0.2], [-0.4]])
def test_stationary_ar_logp_is_the_exact_gaussian_density(coefficients):
    # Source: the exact Gaussian likelihood of a stationary AR(p) is the
    # multivariate normal with Toeplitz autocovariance (Brockwell & Davis,
    # Time Series: Theory and Methods, 2nd ed., 1991, section 8.7, section
    # number from memory); the
    # autocovariance and partial autocorrelations come from statsmodels.
    process = ArmaProcess(np.r_[1.0, -np.asarray(coefficients)], [1.0])
    order = len(coefficients)
    pacf = process.pacf(order + 1)[1:]
    acov = process.acovf(40)
    acov = acov / acov[0]  # unit marginal variance, as in the model
    x = np.random.default_rng(1).normal(size=(2, 40))
    expected = sum(stats.multivariate_normal(cov=_toeplitz(acov)).logpdf(row) for row in x)
    got = model._stationary_ar_logp(
        pt.as_tensor(x), pt.as_tensor(np.tile(pacf, (2, 1))), (2, order)
    ).eval()
    np.testing.assert_allclose(got, expected, rtol=1e-10)


@pytest.mark.parametrize("coefficients", [[0.6], [0.9, -0.5, 0.2]])
def test_stationary_ar_draws_have_the_density_s_covariance(coefficients):
    # Source: statsmodels ArmaProcess.acovf, scaled to unit variance, is the
    # covariance of the density above; the draws (for prior predictive checks)
    # must have it from their first value on (stationary start), within the
    # Monte Carlo error of 20,000 rows (sd of a sample correlation < 0.01).
    process = ArmaProcess(np.r_[1.0, -np.asarray(coefficients)], [1.0])
    order = len(coefficients)
    pacf = process.pacf(order + 1)[1:]
    acov = process.acovf(6) / process.acovf(1)[0]
    draw = model._stationary_ar_random((20_000, order))
    x = draw(np.tile(pacf, (20_000, 1)), rng=np.random.default_rng(4), size=(20_000, 6))
    np.testing.assert_allclose(np.cov(x, rowvar=False), _toeplitz(acov), atol=0.04)


def test_prior_predictive_draws_come_from_the_whole_model():
    # PyMC's prior predictive sampling (pm.sample_prior_predictive) must reach
    # every variable, the short-term and own AR paths included.
    import pymc as pm

    panel = _panel(_hourly_values(n_time=200))
    built = model.build(panel, spec.parse({"base": "hourly", "rank": 1}))
    with built.model:
        prior = pm.sample_prior_predictive(draws=5, random_seed=2).prior
    assert {"ar", "own_unit", "trend"} <= set(prior.data_vars)
    assert np.isfinite(prior["own_unit"].values).all() and np.isfinite(prior["ar"].values).all()


def _toeplitz(acov):
    idx = np.arange(acov.size)
    return acov[np.abs(idx[:, None] - idx[None, :])]


def test_levinson_maps_pacf_back_to_the_ar_coefficients():
    # Source: statsmodels ArmaProcess.pacf gives the partial autocorrelations
    # of a known AR(3); Durbin-Levinson must recover its coefficients.
    phi = np.array([0.9, -0.5, 0.2])
    pacf = ArmaProcess(np.r_[1.0, -phi], [1.0]).pacf(4)[1:]
    phis, _ = model._levinson(pt.as_tensor(pacf[None, :]), 3)
    np.testing.assert_allclose([c.eval()[0] for c in phis[-1]], phi, rtol=1e-10)


def test_only_observed_cells_enter_and_no_variable_per_missing_cell():
    values = _hourly_values()
    # rank capped at 1 so the data-driven rank choice cannot change the size
    hourly = spec.parse({"base": "hourly", "rank": 1,
                         "seasonal": [{"period": "1D", "harmonics": 2}]})
    few_gaps = model.build(_panel(values), hourly)
    more = values.copy()
    more[2, 30:60] = np.nan
    many_gaps = model.build(_panel(more), few_gaps.spec)

    def n_free(built):
        point = built.model.initial_point()
        return sum(np.size(v) for v in point.values())

    assert n_free(few_gaps) == n_free(many_gaps)
    assert few_gaps.observed.size == np.isfinite(values).sum()
    z = many_gaps.model["z"]
    assert many_gaps.model.rvs_to_values[z].eval().size == np.isfinite(more).sum()
    assert np.isfinite(few_gaps.model.point_logps()["z"])


def test_standardisation_and_log_transform():
    values = np.exp(_hourly_values())
    checked = spec.parse({"transform": "log", "seasonal": [], "rank": 1})
    built = model.build(_panel(values), checked)
    logs = np.log(values)
    np.testing.assert_allclose(built.mean.values, np.nanmean(logs, axis=1))
    np.testing.assert_allclose(built.scale.values, np.nanstd(logs, axis=1))
    assert built.transform == "log"
    back = model.inverse(model.forward(values, "log1p"), "log1p")
    np.testing.assert_allclose(back, values)


def test_series_without_values_borrows_the_panel_scale():
    values = _hourly_values()
    values[2] = np.nan
    built = model.build(_panel(values), spec.parse({"seasonal": [], "rank": 1}))
    assert np.isfinite(built.mean.values).all() and (built.scale.values > 0).all()
    np.testing.assert_allclose(built.mean.values[2], np.nanmean(values))


def test_unstandardised_spec_keeps_units():
    built = model.build(_panel(_hourly_values()), spec.parse({"seasonal": [],
                                                              "standardise": False}))
    assert (built.mean.values == 0).all() and (built.scale.values == 1).all()


def test_rank_follows_the_data_and_the_cap():
    rng = np.random.default_rng(3)
    t = np.arange(200)
    f1, f2 = np.sin(2 * np.pi * t / 50), np.cumsum(rng.normal(size=200)) / 5
    loadings = rng.normal(size=(6, 2))
    values = loadings @ np.vstack([f1, f2]) + rng.normal(0, 0.05, (6, 200))
    z = (values - values.mean(1, keepdims=True)) / values.std(1, keepdims=True)
    assert model.choose_rank(z, spec.parse({"rank": 5})) == 2
    assert model.choose_rank(z, spec.parse({"rank": 1})) == 1
    assert model.choose_rank(z[:1], spec.parse({"rank": 5})) == 1


def test_fixed_values_replace_priors():
    fixed = spec.parse({"seasonal": [], "rank": 1, "ar_factors": 0, "own_ar": False,
                        "fixed": {"loading": 1.0, "trend_innovation": 0.2, "noise": 0.5}})
    built = model.build(_panel(_hourly_values(1)), fixed)
    free = {v.name for v in built.model.free_RVs}
    assert free == {"level", "trend_steps"}
    np.testing.assert_allclose(built.model["noise"].eval(), [0.5])


def test_student_t_noise_builds():
    built = model.build(_panel(_hourly_values()), spec.parse({"noise": "student_t",
                                                              "seasonal": []}))
    assert built.model["z"].owner.op.__class__.__name__ == "StudentTRV"
    assert np.isfinite(built.model.point_logps()["z"])


def test_build_refuses_what_cannot_be_fitted():
    with pytest.raises(FitError, match=r"no observed value"):
        model.build(_panel(np.full((2, 30), np.nan)), spec.parse({"seasonal": []}))
    with pytest.raises(FitError, match=r"needs more than ar_order \+ 1"):
        model.build(_panel(np.ones((1, 3))), spec.parse({"seasonal": [], "ar_order": 2}))
    with pytest.raises(SpecError, match=r"seasonal\[1\].period = '7D' is 168 steps"):
        model.build(_panel(_hourly_values()), spec.preset("hourly"))
