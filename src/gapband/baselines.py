"""Simple fills to score gapband against: what a practitioner would do without it.

Each baseline takes a Panel and returns it with ``point`` (the fill) and,
for the Kalman smoother, ``mean`` and ``sd`` of its Gaussian predictive,
dims ("series", "time"), NaN at observed cells. A series with no
observation (the Kalman smoother: fewer than two) gets NaN.

- :func:`linear`: per-series linear interpolation between the nearest
  observations; the first or last observation is carried to the record's ends.
- :func:`seasonal_profile`: the mean of the series' observations at the same
  position in its dominant period of the spec.
- :func:`kalman`: a per-series state-space model (local level plus the
  spec's seasonal cycles as trigonometric terms) fitted by maximum
  likelihood, filled by the Kalman smoother, with Gaussian intervals.
"""

from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from gapband.panel import step_of
from gapband.spec import ModelSpec

NAMES = ("linear", "seasonal", "kalman")


def linear(panel: xr.Dataset) -> xr.Dataset:
    """Fill each series by linear interpolation in time (point only)."""
    values = panel["value"].transpose("series", "time").values
    steps = np.arange(values.shape[1])
    point = np.full(values.shape, np.nan)
    for n, row in enumerate(values):
        seen = ~np.isnan(row)
        if seen.any():
            point[n] = np.interp(steps, steps[seen], row[seen])
    return _with(panel, point=point)


def seasonal_profile(panel: xr.Dataset, spec: ModelSpec) -> xr.Dataset:
    """Fill each cell with its series' mean at the same position in the dominant period.

    The candidate periods are the spec's seasonal cycles that fit in the
    record; a series' dominant one is the period whose position means explain
    most of the variance of its observations. A position never observed, or
    a spec without cycles, gets the series' overall mean.

    Returns
    -------
    Dataset
        The Panel plus ``point`` and ``period`` (dims ("series",): the chosen
        period in grid steps, NaN when none).
    """
    values = panel["value"].transpose("series", "time").values
    n_series, n_time = values.shape
    seen = ~np.isnan(values)
    counts = seen.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        overall = np.where(seen, values, 0.0).sum(axis=1) / counts
    best = np.broadcast_to(overall[:, None], values.shape).copy()
    best_period = np.full(n_series, np.nan)
    best_fit = np.full(n_series, -np.inf)
    total = np.where(seen, (values - overall[:, None]) ** 2, 0.0).sum(axis=1)
    for period, _ in _cycles(panel, spec):
        profile = _position_means(values, seen, period, overall)
        resid = np.where(seen, (values - profile) ** 2, 0.0).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            explained = 1.0 - resid / total
        better = explained > best_fit
        best[better] = profile[better]
        best_period[better] = period
        best_fit[better] = explained[better]
    result = _with(panel, point=best)
    result["period"] = (("series",), best_period,
                        {"long_name": "period of the seasonal profile", "units": "grid steps"})
    return result


def kalman(panel: xr.Dataset, spec: ModelSpec) -> xr.Dataset:
    """Fill each series with a Kalman smoother of a local level plus the spec's cycles.

    statsmodels' ``UnobservedComponents`` (level ``"llevel"``, each seasonal
    cycle of the spec that fits in the record as ``freq_seasonal`` with its
    period in grid steps and its harmonics), fitted by maximum likelihood on
    the series' observations. The predictive of a missing cell is Gaussian
    with the smoothed signal as mean and the smoothed signal variance plus
    the irregular variance as variance.

    Returns
    -------
    Dataset
        The Panel plus ``point`` and ``mean`` (equal) and ``sd``.
    """
    from statsmodels.tools.sm_exceptions import ConvergenceWarning
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    values = panel["value"].transpose("series", "time").values
    cycles = [{"period": period, "harmonics": harmonics}
              for period, harmonics in _cycles(panel, spec)]
    mean = np.full(values.shape, np.nan)
    var = np.full(values.shape, np.nan)
    for n, row in enumerate(values):
        if np.count_nonzero(~np.isnan(row)) < 2:
            continue
        model = UnobservedComponents(row, level="llevel", freq_seasonal=cycles or None)
        with warnings.catch_warnings():
            # A maximum-likelihood fit that stops early is still a fair baseline.
            warnings.simplefilter("ignore", ConvergenceWarning)
            smoothed = model.fit(disp=False).smoother_results
        mean[n] = smoothed.smoothed_forecasts[0]
        var[n] = smoothed.smoothed_forecasts_error_cov[0, 0]
    sd = np.sqrt(np.maximum(var, 0.0))
    return _with(panel, point=mean, mean=mean, sd=sd)


def _cycles(panel: xr.Dataset, spec: ModelSpec) -> list[tuple[float, int]]:
    step, n_time = step_of(panel), panel.sizes["time"]
    cycles = [(s.steps(step), s.harmonics) for s in spec.seasonal]
    return [(p, h) for p, h in cycles if p <= n_time and 2 * h < p]


def _position_means(values: np.ndarray, seen: np.ndarray, period: float,
                    fallback: np.ndarray) -> np.ndarray:
    """Each cell's series mean at its position ``floor(t mod period)`` (observed cells only)."""
    n_series, n_time = values.shape
    n_positions = int(np.ceil(period))
    position = np.floor(np.mod(np.arange(n_time), period)).astype("int64")
    index = np.arange(n_series)[:, None] * n_positions + position[None, :]
    size = n_series * n_positions
    sums = np.bincount(index[seen], weights=values[seen], minlength=size)
    counts = np.bincount(index[seen], minlength=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = (sums / counts)[index]
    return np.where(np.isnan(means), fallback[:, None], means)


def _with(panel: xr.Dataset, **fills: np.ndarray) -> xr.Dataset:
    """The Panel plus each fill, kept only at missing cells."""
    missing = panel["value"].transpose("series", "time").isnull().values
    result = panel.copy()
    for name, values in fills.items():
        result[name] = (("series", "time"), np.where(missing, values, np.nan))
    return result
