"""Simple fills to score gapband against: what a practitioner would do without it.

Each baseline takes a Panel and returns it with ``point`` (the fill) and,
for the Kalman smoother and the dynamic factor model, ``mean`` and ``sd`` of
its Gaussian predictive, dims ("series", "time"), NaN at observed cells. A
series with no observation (the Kalman smoother and the dynamic factor
model: fewer than two) gets NaN.

- :func:`linear`: per-series linear interpolation between the nearest
  observations; the first or last observation is carried to the record's ends.
- :func:`seasonal_profile`: the mean of the series' observations at the same
  position in its dominant period of the spec.
- :func:`kalman`: a per-series state-space model (local level plus the
  spec's seasonal cycles as trigonometric terms) fitted by maximum
  likelihood, filled by the Kalman smoother, with Gaussian intervals.
- :func:`dynamic_factor`: the multivariate state-space reference, statsmodels'
  ``DynamicFactorMQ`` (shared factors with AR(2) dynamics, each series'
  idiosyncratic AR(1)) fitted by EM, filled by the Kalman smoother, with
  Gaussian intervals. Its cost grows with the cube of the number of series
  and its memory with the square, so it is not among :data:`DEFAULT_NAMES`.

:func:`fill` runs one baseline by name; :func:`check` refuses, before any
fit, a baseline that cannot run on a Panel.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd
import xarray as xr

from gapband.errors import InputError, MemoryLimitError, UsageError
from gapband.panel import step_of
from gapband.resources import available_memory, size_text
from gapband.spec import ModelSpec

NAMES = ("linear", "seasonal", "kalman", "dfm")
#: Baselines a holdout scores unless told otherwise (the dynamic factor model
#: is opt-in: see docs/calibration.md for its cost on large panels).
DEFAULT_NAMES = ("linear", "seasonal", "kalman")

#: Shared factors of the dynamic factor model (fewer with fewer than 3 series)
#: and the order of their autoregression.
DFM_FACTORS = 2
DFM_FACTOR_ORDER = 2
#: Cap on the EM iterations of its fit (statsmodels stops earlier when the
#: log-likelihood changes by less than its tolerance).
DFM_MAX_EM = 200
#: Fewest time steps it is fitted on: below this the factor dynamics have
#: too little to be estimated from (our choice).
DFM_MIN_STEPS = 10
#: Peak memory of a fit, in state-covariance arrays (k_states² × (T + 1)
#: float64; k_states = factors × order + series). Measured: the peak RSS of
#: fits of 30 and 60 series × 2,000 steps was 36 such arrays above the start.
DFM_MEMORY_ARRAYS = 36


def fill(name: str, panel: xr.Dataset, spec: ModelSpec) -> xr.Dataset:
    """Run the baseline called ``name`` (one of :data:`NAMES`) on a Panel."""
    if name == "linear":
        return linear(panel)
    if name == "seasonal":
        return seasonal_profile(panel, spec)
    if name == "kalman":
        return kalman(panel, spec)
    if name == "dfm":
        return dynamic_factor(panel)
    raise UsageError(f"unknown baseline {name!r}; choose from {', '.join(NAMES)} (--baselines)")


def check(names: Sequence[str], panel: xr.Dataset) -> None:
    """Refuse, before any fit, a baseline among ``names`` that cannot run on ``panel``.

    Raises
    ------
    InputError
        The dynamic factor model is asked for on a Panel with fewer than two
        series of two observations or fewer than :data:`DFM_MIN_STEPS` steps.
    MemoryLimitError
        Its fit would need more memory than is available.
    """
    if "dfm" in names:
        _dfm_usable(panel)


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


def dynamic_factor(panel: xr.Dataset, *, max_em: int = DFM_MAX_EM) -> xr.Dataset:
    """Fill the Panel with statsmodels' dynamic factor model, the multivariate reference.

    ``DynamicFactorMQ`` on the series with at least two observations
    (standardised by statsmodels): :data:`DFM_FACTORS` shared factors (one
    with two series) following a VAR(:data:`DFM_FACTOR_ORDER`), each series'
    idiosyncratic part an AR(1), fitted by EM (at most ``max_em``
    iterations). The predictive of a missing cell is Gaussian with the
    Kalman-smoothed mean and variance, back on the data's scale
    (``get_prediction(information_set="smoothed")``). Like the Kalman
    smoother it runs on the values as given, without the spec's transform.

    Returns
    -------
    Dataset
        The Panel plus ``point`` and ``mean`` (equal) and ``sd``; attrs
        ``dfm_factors`` and ``dfm_em_iterations``.

    Raises
    ------
    InputError
        Too few series or steps (:func:`check`), or an EM fit that fails.
    MemoryLimitError
        The fit would need more memory than is available.
    """
    from statsmodels.tools.sm_exceptions import ConvergenceWarning, EstimationWarning
    from statsmodels.tsa.statespace.dynamic_factor_mq import DynamicFactorMQ

    rows = _dfm_usable(panel)
    values = panel["value"].transpose("series", "time").values
    factors = _dfm_factors(rows.size)
    try:
        with warnings.catch_warnings():
            # EM stopping at its cap, or restarting from statsmodels' own fallback
            # start, still gives a fair baseline.
            warnings.simplefilter("ignore", ConvergenceWarning)
            warnings.simplefilter("ignore", EstimationWarning)
            # A DataFrame, not an array: statsmodels standardises an array with
            # np.mean, which one missing value turns into NaN for the whole series.
            model = DynamicFactorMQ(pd.DataFrame(values[rows].T), factors=factors,
                                    factor_orders=DFM_FACTOR_ORDER, idiosyncratic_ar1=True)
            result = model.fit(disp=False, maxiter=max_em)
            prediction = result.get_prediction(information_set="smoothed")
    except (np.linalg.LinAlgError, ValueError) as exc:
        raise InputError(
            f"{panel.attrs.get('source', 'input')}: statsmodels' DynamicFactorMQ could not be "
            f"fitted ({exc}); leave dfm out of the baselines (--baselines)"
        ) from exc
    mean = np.full(values.shape, np.nan)
    var = np.full(values.shape, np.nan)
    mean[rows] = np.asarray(prediction.predicted_mean).T
    var[rows] = np.diagonal(np.asarray(prediction.var_pred_mean), axis1=1, axis2=2).T
    sd = np.sqrt(np.maximum(var, 0.0))
    out = _with(panel, point=mean, mean=mean, sd=sd)
    out.attrs.update(dfm_factors=factors, dfm_em_iterations=int(result.mle_retvals["iter"]))
    return out


def _dfm_factors(n_series: int) -> int:
    return min(DFM_FACTORS, n_series - 1)


def _dfm_usable(panel: xr.Dataset) -> np.ndarray:
    """Rows of the series the dynamic factor model is fitted on; refuses a Panel it cannot fit."""
    source = panel.attrs.get("source", "input")
    observed = panel["value"].transpose("series", "time").notnull().values.sum(axis=1)
    rows = np.flatnonzero(observed >= 2)
    n_time = panel.sizes["time"]
    if rows.size < 2:
        raise InputError(
            f"{source}: the dynamic factor baseline (dfm) needs at least two series with two "
            f"observations each; this Panel has {rows.size}: leave dfm out of --baselines"
        )
    if n_time < DFM_MIN_STEPS:
        raise InputError(
            f"{source}: the dynamic factor baseline (dfm) needs at least {DFM_MIN_STEPS} time "
            f"steps; this Panel has {n_time}: leave dfm out of --baselines"
        )
    k_states = _dfm_factors(rows.size) * DFM_FACTOR_ORDER + rows.size
    needed = DFM_MEMORY_ARRAYS * k_states**2 * (n_time + 1) * 8
    available = available_memory()
    if available is not None and needed > available:
        raise MemoryLimitError(
            f"{source}: the dynamic factor baseline (dfm) on {rows.size} series × {n_time} "
            f"steps needs about {size_text(needed)} of memory, but {size_text(available)} is "
            "available: leave dfm out of --baselines, or run the holdout on fewer series"
        )
    return rows


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
