"""Awkward numbers: a sensible fill with honest intervals, or a clear message — never silent NaN."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from gapband import filling, flags, spec
from gapband.errors import InputError
from gapband.panel import make_panel

TINY = spec.parse({"base": "hourly", "rank": 1, "seasonal": [{"period": "1D", "harmonics": 2}]})
FAST = {"draws": 80, "tune": 60, "progress": False, "keep_draws": 0, "seed": 3}


def _panel(values: np.ndarray, source: str = "guards.csv"):
    n_series, n_time = values.shape
    return make_panel(values, [f"s{i}" for i in range(n_series)],
                      pd.date_range("2024-01-01", periods=n_time, freq="h"), "h", source=source)


def _daily(n_time: int, level: float, amplitude: float, noise: float, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n_time)
    return level + amplitude * np.sin(2 * np.pi * t / 24) + rng.normal(0, noise, n_time)


def _fill(values: np.ndarray, **options):
    rules = filling.FlagRules(min_observed=options.pop("min_observed", flags.MIN_OBSERVED),
                              extrapolate=options.pop("extrapolate", False))
    return filling.fill(_panel(values), model=options.pop("model", TINY),
                        options=filling.FillOptions(**FAST, rules=rules, **options))


def assert_no_silent_nan(result) -> None:
    """Every missing cell is flagged not_filled, or has finite, ordered summaries."""
    missing = result["value"].isnull().values
    not_filled = result["fill_flag"].values == flags.NOT_FILLED
    filled = missing & ~not_filled
    names = ["fill_median", "fill_sd"] + [f"{side}_{level}"
                                          for level in flags.interval_levels(result)
                                          for side in ("lower", "upper")]
    for name in names:
        assert np.isfinite(result[name].values[filled]).all(), name
        assert np.isnan(result[name].values[missing & not_filled]).all(), name
    assert (result["lower_95"].values[filled] <= result["fill_median"].values[filled]).all()
    assert (result["fill_median"].values[filled] <= result["upper_95"].values[filled]).all()


def _width(result, series: str, level: int = 95) -> np.ndarray:
    cell = result.sel(series=series)
    gap = cell["value"].isnull()
    return (cell[f"upper_{level}"] - cell[f"lower_{level}"]).where(gap, drop=True).values


def test_constant_series_is_filled_with_its_constant():
    values = np.array([_daily(96, 10, 1, 0.2, 1), _daily(96, 20, 2, 0.2, 2), np.full(96, 5.0)])
    values[:, 40:46] = np.nan
    result, _ = _fill(values)
    assert_no_silent_nan(result)
    gap = result.sel(series="s2", time=result["time"][40:46])
    np.testing.assert_allclose(gap["fill_median"].values, 5.0, rtol=1e-3)
    assert bool(((gap["lower_95"] <= 5.0) & (gap["upper_95"] >= 5.0)).all())


def test_series_with_one_observation_is_flagged_or_filled_with_wide_intervals():
    values = np.array([_daily(96, 10, 1, 0.2, 1), _daily(96, 20, 2, 0.2, 2),
                       np.full(96, np.nan)])
    values[2, 50] = 3.0
    values[:2, 40:46] = np.nan
    result, summary = _fill(values)
    assert_no_silent_nan(result)
    assert summary["flags"]["series"]["s2"]["not_filled"] == 95
    # Asked to fill it anyway, the one observation gives far wider intervals.
    result, _ = _fill(values, min_observed=1, extrapolate=True)
    assert_no_silent_nan(result)
    assert _width(result, "s2").min() > max(_width(result, "s0").max(), _width(result, "s1").max())


def test_extreme_magnitudes_in_one_panel_each_keep_their_own_scale():
    # Source for the units: none needed, the check is relative to each series' own spread.
    values = np.array([1e-9 * _daily(96, 1, 1, 0.2, 1), 1e9 * _daily(96, 1, 1, 0.2, 2),
                       _daily(96, 10, 1, 0.2, 3)])
    values[:, 40:46] = np.nan
    result, _ = _fill(values)
    assert_no_silent_nan(result)
    for series in ("s0", "s1", "s2"):
        seen = result["value"].sel(series=series)
        spread = float(seen.max() - seen.min())
        gap = result.sel(series=series)["fill_median"].where(seen.isnull(), drop=True)
        assert float(gap.min()) > float(seen.min()) - spread, series
        assert float(gap.max()) < float(seen.max()) + spread, series
        width = _width(result, series)
        assert (width > 1e-3 * spread).all() and (width < 10 * spread).all(), series


def test_panel_with_95_percent_missing():
    rng = np.random.default_rng(7)
    values = np.array([_daily(480, 10 + 5 * i, 1 + i, 0.3, i) for i in range(3)])
    values[rng.random(values.shape) < 0.95] = np.nan
    observed = (~np.isnan(values)).sum(axis=1)
    assert (observed >= flags.MIN_OBSERVED).all(), observed
    result, summary = _fill(values)
    assert_no_silent_nan(result)
    # only the record's ends are left empty (before a first, after a last observation)
    reasons = summary["flag_reasons"]["overall"]
    assert summary["flags"]["overall"]["not_filled"] == reasons["extrapolated"]
    assert reasons["few_observations"] == reasons["no_fill"] == 0
    # With almost nothing observed, the 90 % intervals are far wider than at the observed noise.
    assert np.nanmedian(_width(result, "s0", 90)) > 2 * 1.645 * 0.3


def test_too_few_observations_everywhere_is_a_clear_message():
    values = np.full((3, 96), np.nan)
    values[:, ::20] = 1.0  # 5 observations per series
    with pytest.raises(InputError, match=r"guards\.csv: no series has 10 or more observations; "
                       r"lower --min-observed"):
        _fill(values)


@pytest.mark.parametrize(("scale", "shown"), [(1e200, r"1\.\d+e\+200"), (1e-200, r"\d\.\d+e-200")])
def test_values_out_of_float64_reach_are_refused_with_the_place(scale, shown):
    values = np.array([_daily(96, 10, 1, 0.2, 1), scale * _daily(96, 1, 0.5, 0.1, 2)])
    values[:, 40:46] = np.nan
    with pytest.raises(InputError, match=rf"guards\.csv: series 's1' holds {shown} at "
                       r"2024-01-0\d \d\d:00:00; .*rescale the data"):
        _fill(values)


def test_back_transform_overflow_is_flagged_not_filled_and_said():
    # log-normal values reaching float64's top: exp() of the upper draws overflows.
    rng = np.random.default_rng(9)
    logs = rng.uniform(np.log(1e300), np.log(1e308), 96)
    values = np.array([_daily(96, 10, 1, 0.2, 1), np.exp(logs)])
    values[:, 40:60] = np.nan
    model = spec.parse({"base": "hourly", "rank": 1, "transform": "log",
                        "seasonal": [{"period": "1D", "harmonics": 2}]})
    result, summary = _fill(values, model=model)
    assert_no_silent_nan(result)
    unusable = summary["flags"]["series"]["s1"]["not_filled"]
    assert unusable > 0
    assert any(f"{unusable} missing cells got no finite predictive" in w
               for w in summary["diagnostics"]["warnings"])
