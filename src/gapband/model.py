"""Build the PyMC model from a Panel and a ModelSpec.

Each series n is transformed (optionally), standardised, and modelled as

    z[n,t] = Σ_k L[n,k]·(trend[k,t] + season[k,t]) + Σ_j B[n,j]·ar[j,t] + e[n,t] + ε[n,t]

Prior forms, chosen so that an exact block-Gibbs sampler can share them:

- ``L``, ``B`` ~ Normal(0, priors.loading): Gaussian regressions given the paths.
- ``trend[k]``: Gaussian random walk, start ~ Normal(0, priors.level), step sd
  ~ HalfNormal(priors.trend_innovation); written non-centred here.
- Fourier coefficients of ``season`` ~ Normal(0, priors.seasonal).
- ``ar[j]``: stationary AR(p) with unit marginal variance (the loadings ``B``
  carry the scale), partial autocorrelations ~ Uniform(-1, 1) mapped to AR
  coefficients by the Durbin-Levinson recursion.
- ``e[n] = own_sd[n]·u[n]``, ``u[n]`` a stationary AR(1) with unit marginal
  variance and coefficient ~ Uniform(0, OWN_RHO_MAX), ``own_sd`` ~ HalfNormal(priors.own).
- ``ε[n,t]`` ~ Normal(0, noise[n]) or Student-t(noise_df), ``noise`` ~
  HalfNormal(priors.noise).

Every scale has a HalfNormal prior on the sd, truncated below at a floor
(:data:`gapband.spec.SCALE_FLOOR`, :data:`gapband.spec.STEP_FLOOR`) that keeps
every precision of the sampler well posed: given the rest, the variance
then has a generalised inverse Gaussian conditional, which can be drawn
exactly (scipy.stats.geninvgauss); the block-Gibbs sampler
(:mod:`gapband.gibbs`) does so and samples this same model. Sign and
permutation of the factors are not identified; only the predictions, which
are invariant, are used and diagnosed.

Only observed cells enter the likelihood (gathered by flat index).
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pymc as pm
import pytensor.tensor as pt
import xarray as xr

from gapband.errors import FitError
from gapband.panel import step_of
from gapband.spec import OWN_RHO_MAX, SCALE_FLOOR, STEP_FLOOR, ModelSpec, check_against

# A pip-installed PyTensor cannot link a system BLAS and says so at its first
# compile; it falls back to NumPy's BLAS, which serves these models well.
warnings.filterwarnings("ignore", message="PyTensor could not link to a BLAS",
                        category=UserWarning)
logging.getLogger("pytensor.tensor.blas").setLevel(logging.ERROR)

Transform = Literal["none", "log", "log1p"]

#: Sampled variables that only serve the sampler's geometry; predict does not need them.
RAW_VARIABLES = ("trend_steps",)


@dataclass(frozen=True)
class BuiltModel:
    """A PyMC model together with what is needed to map its draws back to the data.

    Attributes
    ----------
    model : pymc.Model
    mean, scale : DataArray, dims ("series",)
        Standardisation of each series, in transformed units: z = (x - mean) / scale.
    transform : {"none", "log", "log1p"}
    observed : ndarray of int
        Flat (C-order, series × time) indices of the observed cells.
    rank, ar_factors : int
        Chosen number of shared and short-term factors.
    fourier : DataArray, dims ("time", "harmonic")
        The seasonal design matrix.
    spec : ModelSpec
    z : ndarray, shape (series, time)
        The standardised (transformed) values the model is fitted to, NaN
        where missing; samplers outside PyMC (``gibbs``) read the data here.
    """

    model: pm.Model
    mean: xr.DataArray
    scale: xr.DataArray
    transform: Transform
    observed: np.ndarray
    rank: int
    ar_factors: int
    fourier: xr.DataArray
    spec: ModelSpec
    z: np.ndarray


def build(panel: xr.Dataset, spec: ModelSpec, rank: int | None = None) -> BuiltModel:
    """Build the model of a Panel under a spec.

    Parameters
    ----------
    panel : Dataset
        A Panel (dims ``("series", "time")``, variable ``value``).
    spec : ModelSpec
    rank : int, optional
        Shared factors to use (at most the number of series); by default
        chosen from the data (:func:`choose_rank`).

    Returns
    -------
    BuiltModel

    Raises
    ------
    SpecError
        The spec does not suit the Panel (see :func:`gapband.spec.check_against`).
    FitError
        The Panel has no observed value, or too few time steps for the AR order.
    """
    check_against(spec, panel)
    n_series, n_time = panel.sizes["series"], panel.sizes["time"]
    if n_time <= spec.ar_order + 1:
        raise FitError(f"the panel has {n_time} time steps; the model needs more than "
                       f"ar_order + 1 = {spec.ar_order + 1}")
    if not panel["value"].notnull().any():
        raise FitError("the panel has no observed value; there is nothing to fit")
    z, mean, scale = standardised(panel, spec)
    observed = np.flatnonzero(~np.isnan(z.ravel()))
    rank = choose_rank(z, spec) if rank is None else min(rank, n_series)
    ar_factors = min(spec.ar_factors, n_series)
    fourier = _fourier(panel, spec)

    coords = {
        "series": panel["series"].values,
        "time": panel["time"].values,
        "step": np.arange(n_time - 1),
        "factor": np.arange(rank),
        "short_factor": np.arange(ar_factors),
        "lag": np.arange(1, spec.ar_order + 1),
        "harmonic": fourier["harmonic"].values,
    }
    with pm.Model(coords=coords) as model:
        mu = _shared(spec, rank, n_series, fourier.values)
        if ar_factors:
            mu = mu + _short_term(spec, ar_factors)
        if spec.own_ar:
            mu = mu + _own(spec, n_series)
        noise = _scale("noise", spec.priors.noise, spec.fixed.noise, n_series, "series")
        # Indices as tensors: indexing with a numpy array inspects every element in Python.
        sigma = noise[pt.as_tensor(observed // n_time)]
        mu_obs = mu.flatten()[pt.as_tensor(observed)]
        z_obs = z.ravel()[observed]
        if spec.noise == "student_t":
            pm.StudentT("z", nu=spec.noise_df, mu=mu_obs, sigma=sigma, observed=z_obs)
        else:
            pm.Normal("z", mu=mu_obs, sigma=sigma, observed=z_obs)

    series = panel["series"]
    return BuiltModel(
        model=model,
        mean=xr.DataArray(mean, coords={"series": series}, dims="series"),
        scale=xr.DataArray(scale, coords={"series": series}, dims="series"),
        transform=spec.transform,
        observed=observed,
        rank=rank,
        ar_factors=ar_factors,
        fourier=fourier,
        spec=spec,
        z=z,
    )


def forward(values: np.ndarray, transform: Transform) -> np.ndarray:
    """Apply the transform to values in original units."""
    if transform == "log":
        return np.log(values)
    if transform == "log1p":
        return np.log1p(values)
    return np.asarray(values, dtype="float64")


def inverse(values: np.ndarray, transform: Transform) -> np.ndarray:
    """Map transformed values back to original units (exp keeps log fills positive)."""
    if transform == "log":
        return np.exp(values)
    if transform == "log1p":
        return np.expm1(values)
    return values


def standardised(panel: xr.Dataset, spec: ModelSpec) -> tuple[np.ndarray, np.ndarray,
                                                               np.ndarray]:
    """The Panel's values transformed and standardised as the model sees them.

    Returns z (series, time), NaN where missing, and each series' mean and
    scale (series,) in transformed units.
    """
    transformed = forward(panel["value"].transpose("series", "time").values, spec.transform)
    mean, scale = _standardisation(transformed, spec.standardise)
    return (transformed - mean[:, None]) / scale[:, None], mean, scale


def choose_rank(z: np.ndarray, spec: ModelSpec) -> int:
    """Number of shared factors the data support, capped by ``spec.rank``.

    Counts the singular values of the centred, scaled, mean-imputed
    ``(series, time)`` array whose squared share of the total is at least
    ``spec.rank_share`` and above the average share 1/N (Kaiser's rule: a
    factor must explain more than one series' worth of variance); at least
    1, at most ``spec.rank`` and the number of series.
    """
    observed = ~np.isnan(z)
    counts = np.maximum(observed.sum(axis=1, keepdims=True), 1)
    mean = np.where(observed, z, 0.0).sum(axis=1, keepdims=True) / counts
    centred = np.where(observed, z - mean, 0.0)
    sd = np.sqrt((centred**2).sum(axis=1, keepdims=True) / counts)
    filled = centred / np.where(sd > 0, sd, 1.0)
    singular = np.linalg.svd(filled, compute_uv=False)
    total = float((singular**2).sum())
    share = singular**2 / total if total > 0 else np.ones(1)
    supported = int(((share >= spec.rank_share) & (share > 1.0 / z.shape[0])).sum())
    return int(np.clip(supported, 1, min(spec.rank, z.shape[0])))


def draw_arrays(posterior: xr.Dataset, built: BuiltModel) -> dict[str, np.ndarray]:
    """Posterior draws as numpy arrays with one leading ``sample`` axis (chain × draw).

    Returns the arrays :func:`mean_at` needs: ``loading`` (S, N, r), ``factor``
    (S, r, T, trend plus season), ``short_loading`` (S, N, r_b), ``ar`` (S, r_b, T),
    ``own`` (S, N) sd, ``own_rho`` (S, N), ``noise`` (S, N), and the own paths
    as the fit kept them: ``own_unit`` (S, N, T), the unit paths everywhere
    (NUTS, ADVI), or ``own_gap`` (S, M), the paths at the M missing cells
    ``gap_cells`` (Gibbs).
    """

    def take(name: str) -> np.ndarray:
        # A plain reshape: xarray's stack cannot reshape a variable with a
        # zero-length dim (own_gap of a panel with nothing missing).
        values = posterior[name].transpose("chain", "draw", ...).values
        return values.reshape(values.shape[0] * values.shape[1], *values.shape[2:])

    factor = take("trend")
    if built.fourier.sizes["harmonic"]:
        factor = factor + np.einsum("skh,th->skt", take("seasonal_coef"), built.fourier.values)
    arrays = {"loading": take("loading"), "factor": factor, "noise": take("noise")}
    if built.ar_factors:
        arrays |= {"short_loading": take("short_loading"), "ar": take("ar")}
    if built.spec.own_ar:
        arrays |= {"own": take("own"), "own_rho": take("own_rho")}
        if "own_gap" in posterior:
            arrays |= {"own_gap": take("own_gap"), "gap_cells": posterior["gap"].values}
        else:
            arrays["own_unit"] = take("own_unit")
    return arrays


def per_draw(posterior: xr.Dataset) -> list[str]:
    """The posterior variables that have one value per draw (dims ``chain`` and ``draw``).

    Others, such as the Gibbs sampler's per-chain ``own_mean``, would be
    broadcast over every draw by stacking the two dims.
    """
    return [name for name, var in posterior.data_vars.items()
            if {"chain", "draw"} <= set(var.dims)]


def mean_at(arrays: dict[str, np.ndarray], cells: np.ndarray, n_time: int) -> np.ndarray:
    """Draws of the model mean (standardised units) at flat cells, shape (S, cells).

    Working memory is about ``S × len(cells) × max(r, r_b) × 8`` bytes.
    """
    n, t = np.divmod(cells, n_time)
    out = np.einsum("sck,skc->sc", arrays["loading"][:, n, :], arrays["factor"][:, :, t])
    if "ar" in arrays:
        out += np.einsum("sck,skc->sc", arrays["short_loading"][:, n, :], arrays["ar"][:, :, t])
    if "own_unit" in arrays:
        out += arrays["own"][:, n] * arrays["own_unit"][:, n, t]
    elif "own_gap" in arrays:
        out += arrays["own_gap"][:, _gap_positions(arrays["gap_cells"], cells)]
    return out


def _gap_positions(gap_cells: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """Positions of ``cells`` among the kept missing cells (ValueError if one is not)."""
    where = np.minimum(np.searchsorted(gap_cells, cells), max(gap_cells.size - 1, 0))
    if gap_cells.size == 0 or np.any(gap_cells[where] != cells):
        raise ValueError("own paths were kept at the missing cells only; "
                         "these cells include an observed one")
    return where


def _standardisation(transformed: np.ndarray, standardise: bool) -> tuple[np.ndarray, np.ndarray]:
    n_series = transformed.shape[0]
    if not standardise:
        return np.zeros(n_series), np.ones(n_series)
    counts = (~np.isnan(transformed)).sum(axis=1)
    # A series with fewer than two values (or a constant one) has no scale of
    # its own; it borrows the whole panel's so the priors stay meaningful.
    pooled_mean = float(np.nanmean(transformed))
    pooled_sd = float(np.nanstd(transformed)) if counts.sum() > 1 else 1.0
    pooled_sd = pooled_sd if pooled_sd > 0 else 1.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-missing rows, replaced below
        mean = np.nanmean(transformed, axis=1)
        sd = np.nanstd(transformed, axis=1)
    mean = np.where(counts > 0, mean, pooled_mean)
    scale = np.where((counts > 1) & (sd > 0), sd, pooled_sd)
    return mean, scale


def _fourier(panel: xr.Dataset, spec: ModelSpec) -> xr.DataArray:
    step = step_of(panel)
    t = np.arange(panel.sizes["time"], dtype="float64")
    columns, labels = [], []
    for i, season in enumerate(spec.seasonal):
        period = season.steps(step)
        for h in range(1, season.harmonics + 1):
            angle = 2.0 * np.pi * h * t / period
            columns += [np.cos(angle), np.sin(angle)]
            labels += [f"s{i}_cos{h}", f"s{i}_sin{h}"]
    values = np.column_stack(columns) if columns else np.zeros((t.size, 0))
    return xr.DataArray(values, dims=("time", "harmonic"), coords={"harmonic": labels})


def _scale(name: str, prior: float, fixed: float | None, size: int, dims: str,
           floor: float = SCALE_FLOOR):
    """HalfNormal(prior) truncated below at ``floor`` (see :data:`gapband.spec.SCALE_FLOOR`)."""
    if fixed is None:
        return pm.Truncated(name, pm.HalfNormal.dist(sigma=prior), lower=floor, dims=dims)
    return pm.Deterministic(name, pt.as_tensor(np.full(size, fixed)), dims=dims)


def _shared(spec: ModelSpec, rank: int, n_series: int, fourier: np.ndarray):
    priors = spec.priors
    if spec.fixed.loading is None:
        loading = pm.Normal("loading", 0.0, priors.loading, dims=("series", "factor"))
    else:
        loading = pm.Deterministic(
            "loading", pt.as_tensor(np.full((n_series, rank), spec.fixed.loading)),
            dims=("series", "factor"),
        )
    innovation = _scale("trend_innovation", priors.trend_innovation,
                        spec.fixed.trend_innovation, rank, "factor", floor=STEP_FLOOR)
    level = pm.Normal("level", 0.0, priors.level, dims="factor")
    # Non-centred: the sampler moves unit steps, the walk is their scaled sum.
    steps = pm.Normal("trend_steps", 0.0, 1.0, dims=("factor", "step"))
    walk = pt.cumsum(innovation[:, None] * steps, axis=1)
    trend = pm.Deterministic(
        "trend",
        level[:, None] + pt.concatenate([pt.zeros((rank, 1)), walk], axis=1),
        dims=("factor", "time"),
    )
    factor = trend
    if fourier.shape[1]:
        coef = pm.Normal("seasonal_coef", 0.0, priors.seasonal, dims=("factor", "harmonic"))
        factor = trend + pt.dot(coef, pt.as_tensor(fourier.T))
    return pt.dot(loading, factor)


def _short_term(spec: ModelSpec, ar_factors: int):
    order = spec.ar_order
    pacf = pm.Uniform("ar_pacf", -1.0, 1.0, dims=("short_factor", "lag"))
    pm.Deterministic("ar_coef", pt.stack(_levinson(pacf, order)[0][-1], axis=1),
                     dims=("short_factor", "lag"))
    ar = pm.CustomDist(
        "ar", pacf, logp=lambda value, p: _stationary_ar_logp(value, p, (ar_factors, order)),
        random=_stationary_ar_random((ar_factors, order)), dims=("short_factor", "time"),
    )
    loading = pm.Normal("short_loading", 0.0, spec.priors.loading,
                        dims=("series", "short_factor"))
    return pt.dot(loading, ar)


def _own(spec: ModelSpec, n_series: int):
    rho = pm.Uniform("own_rho", 0.0, OWN_RHO_MAX, dims="series")
    sd = _scale("own", spec.priors.own, spec.fixed.own, n_series, "series")
    # The unit path's density does not involve sd, which keeps the sd free of
    # the funnel a centred scale would create.
    unit = pm.CustomDist(
        "own_unit", rho[:, None],
        logp=lambda value, p: _stationary_ar_logp(value, p, (n_series, 1)),
        random=_stationary_ar_random((n_series, 1)), dims=("series", "time"),
    )
    return sd[:, None] * unit


def _levinson(pacf, order: int):
    """Durbin-Levinson: partial autocorrelations → AR coefficients of each order 1..p.

    Returns the coefficient lists ``phi[m]`` (order m + 1, each entry one row
    per process) and the innovation variances of a unit-variance process.
    """
    phis, variances = [], []
    previous: list = []
    variance = 1.0
    for m in range(order):
        kappa = pacf[:, m]
        current = [previous[i] - kappa * previous[m - 1 - i] for i in range(m)] + [kappa]
        variance = variance * (1.0 - kappa**2)
        phis.append(current)
        variances.append(variance)
        previous = current
    return phis, variances


def _stationary_ar_random(shape: tuple[int, int]):
    """A draw function for :func:`_stationary_ar_logp`'s rows (prior predictive checks).

    Each row starts from its stationary distribution and follows the same
    prediction-error recursion as the density: order m < p with the order-m
    coefficients, then the full order.
    """
    rows, order = shape

    def random(pacf, rng=None, size=None):
        pacf = np.broadcast_to(np.asarray(pacf, dtype=float), shape)
        phis, variances = _levinson(pacf, order)
        n_time = size[-1]
        shocks = rng.standard_normal((rows, n_time))
        x = np.empty((rows, n_time))
        x[:, 0] = shocks[:, 0]
        for t in range(1, n_time):
            m = min(t, order)
            pred = sum(phis[m - 1][i] * x[:, t - 1 - i] for i in range(m))
            x[:, t] = pred + np.sqrt(variances[m - 1]) * shocks[:, t]
        return x.reshape(size)

    return random


def _normal_logp(x, mu, var):
    return -0.5 * (np.log(2.0 * np.pi) + pt.log(var) + (x - mu) ** 2 / var)


def _stationary_ar_logp(x, pacf, shape: tuple[int, int]):
    """Exact log density of the rows of x, each a stationary unit-variance AR(order).

    ``shape`` is (rows, order): static shapes let PyTensor broadcast a single row.

    The first values are conditioned on their predecessors with the
    lower-order coefficients (the exact prediction-error decomposition), the
    rest with the full order; all rows and times at once, without a scan.
    """
    rows, order = shape
    pacf = pt.specify_shape(pacf, shape)
    x = pt.specify_shape(x, (rows, None))
    phis, variances = _levinson(pacf, order)
    n_time = x.shape[1]
    logp = pt.sum(_normal_logp(x[:, 0], 0.0, 1.0))
    for m in range(1, order):
        pred = sum(phis[m - 1][i] * x[:, m - 1 - i] for i in range(m))
        logp += pt.sum(_normal_logp(x[:, m], pred, variances[m - 1]))
    pred = sum(phis[-1][i][:, None] * x[:, order - 1 - i : n_time - 1 - i] for i in range(order))
    logp += pt.sum(_normal_logp(x[:, order:], pred, variances[-1][:, None]))
    return logp
