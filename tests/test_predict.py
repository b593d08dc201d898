"""Posterior predictive summaries of the missing cells."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapband import inference, predict, spec
from gapband.errors import UsageError
from gapband.panel import make_panel


def _concentrations(seed=0, n_series=2, n_time=72):
    """Positive, skewed hourly values with gaps, units attached."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_time)
    logs = np.array([1 + 0.8 * np.sin(2 * np.pi * t / 24) + rng.normal(0, 0.4, n_time)
                     for _ in range(n_series)])
    values = np.exp(logs)
    values[0, 30:45] = np.nan
    values[1, rng.choice(n_time, 10, replace=False)] = np.nan
    time = pd.date_range("2024-03-01", periods=n_time, freq="h")
    return make_panel(values, [f"station{i}" for i in range(n_series)], time, "h",
                      units="ug m-3")


LOG_SPEC = {"rank": 1, "seasonal": [{"period": "1D", "harmonics": 2}], "ar_factors": 0,
            "own_ar": True, "transform": "log"}


@pytest.fixture(scope="module")
def log_fit():
    panel = _concentrations()
    fitted = inference.fit(panel, spec.parse(LOG_SPEC), method="advi", draws=300, seed=0,
                           max_iterations=5000)
    return panel, fitted


def test_log_transform_keeps_fills_positive(log_fit):
    panel, fitted = log_fit
    filled = predict.summarise(fitted, panel, levels=(50, 80, 90, 95, 99))
    missing = panel["value"].isnull().values
    for name in ["fill_mean", "fill_median", "lower_99", "lower_95", "lower_50"]:
        assert (filled[name].values[missing] > 0).all(), name
    # intervals nest and bracket the median
    assert (filled["lower_95"] <= filled["lower_50"]).values[missing].all()
    assert (filled["lower_50"] <= filled["fill_median"]).values[missing].all()
    assert (filled["fill_median"] <= filled["upper_50"]).values[missing].all()
    assert (filled["upper_50"] <= filled["upper_95"]).values[missing].all()


def test_observed_cells_untouched_and_fills_only_missing(log_fit):
    panel, fitted = log_fit
    before = panel["value"].values.copy()
    filled = predict.summarise(fitted, panel)
    assert filled["value"].values.tobytes() == before.tobytes()
    assert panel["value"].values.tobytes() == before.tobytes()
    missing = np.isnan(before)
    expected = {"fill_mean", "fill_median", "fill_sd"} | {
        f"{side}_{level}" for level in (50, 80, 90, 95) for side in ("lower", "upper")}
    assert expected <= set(filled.data_vars)
    for name in expected:
        da = filled[name]
        assert da.dims == ("series", "time") and da.dtype == np.float64
        assert np.isnan(da.values[~missing]).all() and np.isfinite(da.values[missing]).all()
        assert da.attrs["units"] == "ug m-3" and da.attrs["long_name"]
    assert filled["lower_90"].attrs["long_name"].startswith("lower bound of the 90% central")


def test_chunking_and_seed(log_fit):
    panel, fitted = log_fit
    whole = predict.summarise(fitted, panel, seed=3)
    assert whole.identical(predict.summarise(fitted, panel, seed=3))
    chunked = predict.summarise(fitted, panel, seed=3, chunk_cells=7)
    # different chunking draws the noise in another order: equal up to Monte Carlo error
    missing = panel["value"].isnull().values
    sd = whole["fill_sd"].values[missing]
    np.testing.assert_array_less(
        np.abs(chunked["fill_mean"].values[missing] - whole["fill_mean"].values[missing]),
        6 * sd / np.sqrt(300),
    )


@pytest.mark.parametrize("levels", [(0,), (100,), (50, -5), (150,), ("wide",), ()])
def test_levels_outside_the_open_interval_are_refused(log_fit, levels):
    panel, fitted = log_fit
    with pytest.raises(UsageError, match=r"strictly between 0 and 100|"
                                         r"must be numbers in \(0, 100\)"):
        predict.summarise(fitted, panel, levels=levels)


def test_other_panel_is_refused(log_fit):
    panel, fitted = log_fit
    changed = panel.copy(deep=True)
    changed["value"][0, 0] = np.nan
    with pytest.raises(UsageError, match=r"not the one the fit was made on"):
        predict.summarise(fitted, changed)
    with pytest.raises(UsageError, match=r"chunk_cells = 0 must be a positive integer"):
        predict.summarise(fitted, panel, chunk_cells=0)


def test_components_add_up_to_the_mean_signal(log_fit):
    panel, fitted = log_fit
    parts = predict.components(fitted)
    assert set(parts.data_vars) == {"trend", "seasonal", "short_term", "own"}
    assert (parts["short_term"] == 0).all()  # no short-term factor in this spec
    # the daily cycle in the data is 0.8 on the log scale
    amplitude = (parts["seasonal"].max("time") - parts["seasonal"].min("time")) / 2
    np.testing.assert_allclose(amplitude.values, 0.8, rtol=0.3)
