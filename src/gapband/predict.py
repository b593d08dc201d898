"""Posterior predictive of the missing cells, summarised chunk by chunk.

For each posterior draw, a missing cell's predictive value is the model mean
(the factor sum plus the series' own persistence) plus a noise draw, mapped
back to original units: first the standardisation, then the inverse
transform. Summaries are computed over blocks of missing cells so memory
stays bounded however many cells there are.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr
from rich.progress import track

from gapband.errors import UsageError
from gapband.gmrf import draw_ar1_given_noisy
from gapband.inference import Fit
from gapband.model import draw_arrays, forward, inverse, mean_at, per_draw

DEFAULT_LEVELS = (50, 80, 90, 95)


def summarise(
    fit: Fit,
    panel: xr.Dataset,
    *,
    levels: Sequence[float] = DEFAULT_LEVELS,
    seed: int = 0,
    chunk_cells: int = 4096,
    progress: bool = False,
) -> xr.Dataset:
    """Summarise the posterior predictive distribution of every missing cell.

    Parameters
    ----------
    fit : Fit
        A fit of this Panel (:func:`gapband.inference.fit`).
    panel : Dataset
        The Panel that was fitted.
    levels : sequence of float
        Central interval levels in percent, each in (0, 100).
    seed : int
        Seed of the noise draws; the same seed gives the same summaries.
    progress : bool
        Show a progress bar (with time remaining) over the chunks.
    chunk_cells : int
        Missing cells summarised at a time. Each working array holds
        ``draws × chunk_cells × 8`` bytes (draws = chains × draws per chain;
        65 MB for 2,000 draws of 4096 cells); peak use is about
        ``(6 + r) × draws × chunk_cells × 8`` bytes with r the number of
        factors, on top of the posterior itself.

    Returns
    -------
    Dataset
        The Panel with ``fill_mean``, ``fill_median``, ``fill_sd`` and
        ``lower_<L>`` / ``upper_<L>`` for each level L, dims ("series",
        "time"), float64, in the units of ``value``, NaN at observed cells.
        ``value`` is unchanged.

    Raises
    ------
    UsageError
        A level outside (0, 100), a non-positive chunk size, or a Panel that
        is not the one fitted.
    """
    levels = _check_levels(levels)
    if not isinstance(chunk_cells, int) or chunk_cells < 1:
        raise UsageError(f"chunk_cells = {chunk_cells!r} must be a positive integer")
    n_series, n_time = panel.sizes["series"], panel.sizes["time"]
    missing = np.flatnonzero(panel["value"].isnull().values.ravel())
    predictive = Predictive.of(fit, panel, seed=seed)
    probs = [p for level in levels for p in (0.5 - level / 200, 0.5 + level / 200)]

    names = ["fill_mean", "fill_median", "fill_sd"] + [
        f"{side}_{_label(level)}" for level in levels for side in ("lower", "upper")
    ]
    out = {name: np.full(n_series * n_time, np.nan) for name in names}
    chunks = range(0, missing.size, chunk_cells)
    for begin in track(chunks, description="predictive", disable=not progress, transient=True):
        cells = missing[begin : begin + chunk_cells]
        values = predictive.draws(cells)
        out["fill_mean"][cells] = values.mean(axis=0)
        out["fill_sd"][cells] = values.std(axis=0, ddof=1) if values.shape[0] > 1 else np.nan
        quantiles = np.quantile(values, [0.5, *probs], axis=0)
        out["fill_median"][cells] = quantiles[0]
        for name, row in zip(names[3:], quantiles[1:], strict=True):
            out[name][cells] = row

    units = panel["value"].attrs.get("units")
    result = panel.copy()
    for name in names:
        attrs = {"long_name": _long_name(name)}
        if units is not None:
            attrs["units"] = units
        result[name] = (("series", "time"), out[name].reshape(n_series, n_time), attrs)
    return result


@dataclass
class Predictive:
    """Posterior predictive draws of any cells of a fitted Panel, in original units.

    Build with :meth:`of`; :meth:`draws` then gives one row per posterior
    draw for the flat cell indices asked for (series × n_time + time).
    """

    arrays: dict[str, np.ndarray]
    mean: np.ndarray
    scale: np.ndarray
    fit: Fit
    n_time: int
    rng: np.random.Generator

    @classmethod
    def of(cls, fit: Fit, panel: xr.Dataset, *, seed: int = 0) -> Predictive:
        """Prepare the draws of a fit of ``panel`` (own paths redrawn exactly)."""
        _check_same_panel(fit, panel)
        arrays = draw_arrays(fit.posterior, fit.built)
        mean, scale = fit.built.mean.values, fit.built.scale.values
        rng = np.random.default_rng(seed)
        if "own_unit" in arrays and fit.spec.noise == "normal":
            z = (forward(panel["value"].values, fit.built.transform) - mean[:, None]) / scale[
                :, None
            ]
            arrays["own_unit"] = condition_own(arrays, z, rng)
        return cls(arrays, mean, scale, fit, panel.sizes["time"], rng)

    def draws(self, cells: np.ndarray) -> np.ndarray:
        """Predictive draws at flat ``cells``, shape (draws, cells), original units.

        Memory: about ``(2 + r) × draws × len(cells) × 8`` bytes.
        """
        series = cells // self.n_time
        z = mean_at(self.arrays, cells, self.n_time)
        spec = self.fit.spec
        z += _noise(self.rng, z.shape, spec.noise, spec.noise_df) * self.arrays["noise"][:, series]
        return inverse(self.mean[series] + self.scale[series] * z, self.fit.built.transform)


def condition_own(arrays: dict[str, np.ndarray], z: np.ndarray,
                  rng: np.random.Generator) -> np.ndarray:
    """Redraw each series' own AR(1) path exactly, given the rest of each draw.

    Given the factor part, the loadings and the scales of a draw, the own
    path is a Gaussian AR(1) seen through Gaussian noise at the observed
    cells, so its conditional distribution is exact and cheap
    (:func:`gapband.gmrf.draw_ar1_given_noisy`). Drawing it afresh
    (Rao-Blackwellisation) gives the missing cells the information of their
    observed neighbours even when the fit itself — ADVI's mean-field
    approximation above all — represents the path poorly.

    Returns the unit-variance paths, shape (S, N, T), as ``own_unit``.
    """
    n_draws, n_series, n_time = arrays["own_unit"].shape
    unit = np.empty_like(arrays["own_unit"])
    everywhere = np.arange(n_time)
    for n in range(n_series):
        cells = n * n_time + everywhere
        without_own = mean_at({k: v for k, v in arrays.items() if k != "own_unit"}, cells,
                              n_time)
        resid = z[n][None, :] - without_own
        sd = np.maximum(arrays["own"][:, n], 1e-12)
        path = draw_ar1_given_noisy(resid, arrays["own_rho"][:, n], sd, arrays["noise"][:, n], rng)
        unit[:, n, :] = path / sd[:, None]
    return unit


def components(fit: Fit) -> xr.Dataset:
    """Posterior-mean contribution of each model component to every cell.

    Contributions are in transformed units (after the transform, before
    adding the series mean): ``mean + trend + seasonal + short_term + own``
    is the posterior mean of the transformed value without noise.

    Returns
    -------
    Dataset
        Variables ``trend``, ``seasonal``, ``short_term`` and ``own``, dims
        ("series", "time"); a component the spec leaves out is zero.
    """
    drawn = [name for name in per_draw(fit.posterior) if name != "own_gap"]
    post = fit.posterior[drawn].stack(sample=("chain", "draw")).transpose("sample", ...)
    built = fit.built
    scale = built.scale.values[:, None]
    n_draws = post.sizes["sample"]
    loading = post["loading"].values
    shape = (built.scale.size, built.fourier.sizes["time"])

    def average(expression: str, *arrays: np.ndarray) -> np.ndarray:
        return scale * np.einsum(expression, *arrays, optimize=True) / n_draws

    parts = {"trend": average("snk,skt->nt", loading, post["trend"].values)}
    parts["seasonal"] = (
        average("snk,skh,th->nt", loading, post["seasonal_coef"].values, built.fourier.values)
        if built.fourier.sizes["harmonic"] else np.zeros(shape)
    )
    parts["short_term"] = (
        average("snj,sjt->nt", post["short_loading"].values, post["ar"].values)
        if built.ar_factors else np.zeros(shape)
    )
    if "own_mean" in fit.posterior:  # kept as a per-chain mean by the Gibbs sampler
        parts["own"] = scale * fit.posterior["own_mean"].mean("chain").values
    elif built.spec.own_ar:
        parts["own"] = average("sn,snt->nt", post["own"].values, post["own_unit"].values)
    else:
        parts["own"] = np.zeros(shape)
    coords = {"series": built.scale["series"].values, "time": post["time"].values}
    return xr.Dataset(
        {name: (("series", "time"), value, {"long_name": f"posterior mean {name} contribution "
                                                         "(transformed units)"})
         for name, value in parts.items()},
        coords=coords,
    )


def _noise(rng: np.random.Generator, shape: tuple[int, int], family: str,
           df: float) -> np.ndarray:
    if family == "student_t":
        return rng.standard_t(df, size=shape)
    return rng.standard_normal(shape)


def _check_levels(levels: Sequence[float]) -> tuple[float, ...]:
    try:
        checked = tuple(float(level) for level in levels)
    except (TypeError, ValueError) as exc:
        raise UsageError(f"interval levels {levels!r} must be numbers in (0, 100)") from exc
    if not checked:
        raise UsageError("no interval level given; give central interval levels in percent, "
                         "each strictly between 0 and 100 (e.g. 50, 90)")
    bad = [level for level in checked if not 0 < level < 100]
    if bad:
        raise UsageError(
            f"interval level {bad[0]:g} is not allowed; give central interval levels in "
            "percent, each strictly between 0 and 100 (e.g. 50, 90)"
        )
    return checked


def _check_same_panel(fit: Fit, panel: xr.Dataset) -> None:
    fitted = fit.built.mean["series"].values
    same_series = panel.sizes["series"] == fitted.size and (
        panel["series"].values == fitted
    ).all()
    observed = np.flatnonzero(panel["value"].notnull().values.ravel())
    same_cells = same_series and np.array_equal(observed, fit.built.observed)
    if not (same_series and panel.sizes["time"] == fit.built.fourier.sizes["time"]
            and same_cells):
        raise UsageError("this Panel is not the one the fit was made on (series, time grid or "
                         "observed cells differ); summarise the Panel that was fitted")


def _label(level: float) -> str:
    return f"{level:g}".replace(".", "_")


def _long_name(name: str) -> str:
    if name.startswith(("lower_", "upper_")):
        side, level = name.split("_", 1)
        return (f"{side} bound of the {level.replace('_', '.')}% central credible interval "
                "of the filled value")
    return {
        "fill_mean": "posterior predictive mean of the filled value",
        "fill_median": "posterior predictive median of the filled value",
        "fill_sd": "posterior predictive standard deviation of the filled value",
    }[name]
