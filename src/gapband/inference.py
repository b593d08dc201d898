"""One entry point from a Panel and a spec to posterior draws with diagnostics.

Methods are looked up in :data:`METHODS`: ``gibbs`` (the exact block-Gibbs
sampler of :mod:`gapband.gibbs`), ``nuts`` and ``advi``, all over the one
model of :mod:`gapband.model`.
"""

from __future__ import annotations

import multiprocessing
import os
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pymc as pm
import xarray as xr

from gapband import convergence, gibbs
from gapband.chains import DEFAULT_CHAINS, GIBBS_TUNE, KEPT_DRAWS, TIME_BUDGET, Plan
from gapband.convergence import ESS_MIN, R_HAT_MAX
from gapband.errors import UsageError
from gapband.model import RAW_VARIABLES, BuiltModel, build, draw_arrays, mean_at
from gapband.spec import ModelSpec

Method = Literal["nuts", "advi", "gibbs"]

#: Draws and warm-up per chain of NUTS and ADVI when not given (they do not run by rounds).
NUTS_DRAWS = 1000


def kept_draws(method: str, draws: int | None) -> int:
    """Draws per chain a fit keeps: ``draws``, or the method's default when None."""
    if draws is not None:
        return draws
    return KEPT_DRAWS if method == "gibbs" else NUTS_DRAWS

#: NUTS step-size adaptation target; above the usual 0.8 because the noise,
#: short-term and own-persistence terms trade off along curved ridges.
TARGET_ACCEPT = 0.95

#: ADVI stops when the mean loss (negative ELBO) of the latest window of
#: iterations has improved on the window ELBO_LAG windows earlier by less than
#: this share, or by less than two standard errors of the difference (no
#: improvement the noise can show). Comparing windows 2,000 iterations apart
#: rather than adjacent ones keeps a slow but steady climb from passing as
#: converged.
ELBO_WINDOW = 500
ELBO_LAG = 4
ELBO_TOLERANCE = 1e-3

#: Step size of ADVI's adaptive optimiser; PyMC's default (1e-3) needs
#: several times more iterations on our models to reach the same ELBO.
ADVI_LEARNING_RATE = 0.01


@dataclass(frozen=True)
class Fit:
    """A fitted model: posterior draws, diagnostics and what predict needs.

    Attributes
    ----------
    method : str
        "nuts", "advi" or "gibbs".
    approximate : bool
        True when the draws come from an approximation (ADVI), not the exact posterior.
    posterior : Dataset
        Posterior draws, dims ``chain``, ``draw`` and the model's dims.
    diagnostics : dict
        JSON-ready: r_hat_max, ess_bulk_min, ess_tail_min, worst, chain_width_ratio,
        divergences, n_draws, converged,
        warnings (list of str), elbo (ADVI only), acceptance (Gibbs only).
    timings : dict of str to float
        Seconds: build, compile (NUTS with nutpie), tune (Gibbs burn-in),
        sample, diagnostics.
    built : BuiltModel
        The model and the standardisation of each series.
    spec : ModelSpec
    seed : int
    """

    method: str
    approximate: bool
    posterior: xr.Dataset
    diagnostics: dict
    timings: dict[str, float]
    built: BuiltModel
    spec: ModelSpec
    seed: int


def fit(
    panel: xr.Dataset,
    spec: ModelSpec,
    *,
    method: Method = "gibbs",
    draws: int | None = None,
    tune: int | None = None,
    chains: int = DEFAULT_CHAINS,
    seed: int = 0,
    budget: float = TIME_BUDGET,
    progress: bool = False,
    max_iterations: int = 50_000,
    cores: int | None = None,
    rank: int | None = None,
) -> Fit:
    """Fit the model of a Panel under a spec.

    Parameters
    ----------
    panel : Dataset
        A Panel.
    spec : ModelSpec
    method : {"nuts", "advi", "gibbs"}
        NUTS (nutpie when installed, else PyMC's sampler), mean-field ADVI, or
        the exact block-Gibbs sampler (:mod:`gapband.gibbs`).
    draws, tune : int, optional
        Posterior draws per chain and warm-up iterations per chain (NUTS;
        burn-in sweeps for Gibbs, default :data:`GIBBS_TUNE`). Without
        ``draws``, Gibbs samples in rounds until the chains agree
        (:mod:`gapband.convergence`) or ``budget`` is spent; NUTS and ADVI
        take :data:`NUTS_DRAWS`.
    chains : int
        Chains (NUTS, Gibbs; ADVI gives one chain of ``draws`` draws).
    budget : float
        Seconds of Gibbs sampling after which rounds stop, converged or not.
    seed : int
        Seed of every random choice; the same seed gives the same draws.
    progress : bool
        Show the sampler's progress bar.
    max_iterations : int
        Cap on ADVI iterations when the ELBO has not converged earlier.
    cores : int, optional
        Chains run at once (NUTS, Gibbs); default: as many as there are
        chains and CPUs. 1 runs them one after another in this process.
    rank : int, optional
        Shared factors to use; by default chosen from the data under the
        spec's ``rank`` and ``rank_share`` (:func:`gapband.model.choose_rank`).

    Returns
    -------
    Fit

    Raises
    ------
    UsageError
        Unknown method or a non-positive count.
    SpecError, FitError
        From building the model.
    """
    if method not in METHODS:
        raise UsageError(f"unknown inference method {method!r}; use one of "
                         + ", ".join(repr(m) for m in METHODS))
    for name, value in (("draws", draws), ("tune", tune), ("chains", chains),
                        ("max_iterations", max_iterations)):
        if value is None and name in ("draws", "tune"):
            continue
        if not isinstance(value, int) or value < (0 if name == "tune" else 1):
            raise UsageError(f"{name} = {value!r} must be a positive integer")
    if not budget > 0:
        raise UsageError(f"budget = {budget!r} must be a positive number of seconds")
    if rank is not None and (isinstance(rank, bool) or not isinstance(rank, int) or rank < 1):
        raise UsageError(f"rank = {rank!r} must be a positive integer (or None: chosen from "
                         "the data)")
    start = time.perf_counter()
    built = build(panel, spec, rank)
    timings = {"build": time.perf_counter() - start}
    run = METHODS[method]
    posterior, diagnostics, run_timings = run(
        built, draws=draws, tune=tune, chains=chains, seed=seed, progress=progress,
        max_iterations=max_iterations, cores=_cores(chains, cores), budget=budget,
    )
    timings |= run_timings
    start = time.perf_counter()
    keep = [v.name for v in built.model.free_RVs + built.model.deterministics
            if v.name not in RAW_VARIABLES and v.name in posterior]
    keep += [name for name in gibbs.OWN_KEPT if name in posterior]
    posterior = posterior[keep]
    posterior = posterior.drop_vars([c for c in posterior.coords if c not in posterior.dims])
    if method == "nuts":
        diagnostics = _identified_diagnostics(posterior, built, panel, seed) | diagnostics
    diagnostics["warnings"] = _warnings(method, diagnostics)
    diagnostics["converged"] = not diagnostics["warnings"]
    timings["diagnostics"] = time.perf_counter() - start
    return Fit(method=method, approximate=method == "advi", posterior=posterior,
               diagnostics=diagnostics, timings=timings, built=built, spec=spec, seed=seed)


def _cores(chains: int, cores: int | None) -> int:
    """Chains to run at once: ``cores`` or one per chain and CPU; 1 in a daemonic worker.

    A daemonic process (a worker of a process pool or of a Dask cluster)
    may not start processes of its own, so its chains run in turn.
    """
    if multiprocessing.current_process().daemon:
        return 1
    return max(1, min(chains, cores or os.cpu_count() or 1))


def _nuts(built: BuiltModel, *, draws: int | None, tune: int | None, chains: int, seed: int,
          progress: bool, max_iterations: int, cores: int,
          budget: float) -> tuple[xr.Dataset, dict, dict]:
    timings = {}
    draws, tune = draws or NUTS_DRAWS, NUTS_DRAWS if tune is None else tune
    nutpie = _nutpie()
    if nutpie is not None:
        start = time.perf_counter()
        compiled = nutpie.compile_pymc_model(built.model)
        timings["compile"] = time.perf_counter() - start
        start = time.perf_counter()
        idata = nutpie.sample(compiled, draws=draws, tune=tune, chains=chains, cores=cores,
                              seed=seed, progress_bar=progress, save_warmup=False,
                              target_accept=TARGET_ACCEPT)
    else:
        start = time.perf_counter()
        with built.model:
            idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                              random_seed=seed, progressbar=progress,
                              target_accept=TARGET_ACCEPT, compute_convergence_checks=False)
    timings["sample"] = time.perf_counter() - start
    divergences = int(idata.sample_stats["diverging"].sum())
    return idata.posterior, {"divergences": divergences,
                             "sampler": "nutpie" if nutpie else "pymc"}, timings


def _advi(built: BuiltModel, *, draws: int | None, tune: int | None, chains: int, seed: int,
          cores: int, progress: bool, max_iterations: int,
          budget: float) -> tuple[xr.Dataset, dict, dict]:
    draws = draws or NUTS_DRAWS
    stop = _ElboConvergence(ELBO_WINDOW, ELBO_LAG, ELBO_TOLERANCE)
    start = time.perf_counter()
    with built.model:
        approx = pm.fit(n=max_iterations, method="advi", random_seed=seed,
                        progressbar=progress, callbacks=[stop],
                        obj_optimizer=pm.adagrad_window(learning_rate=ADVI_LEARNING_RATE))
    timings = {"optimise": time.perf_counter() - start}
    start = time.perf_counter()
    idata = approx.sample(draws, random_seed=seed, return_inferencedata=True)
    timings["sample"] = time.perf_counter() - start
    losses = np.asarray(approx.hist)
    elbo = {
        "iterations": int(losses.size),
        "max_iterations": max_iterations,
        "final": float(-losses[-min(ELBO_WINDOW, losses.size):].mean()),
        "relative_change": stop.relative_change,
        "converged": stop.converged,
    }
    return idata.posterior, {"elbo": elbo}, timings


def _gibbs(built: BuiltModel, *, draws: int | None, tune: int | None, chains: int, seed: int,
           progress: bool, max_iterations: int, cores: int,
           budget: float) -> tuple[xr.Dataset, dict, dict]:
    coords = {name: np.asarray(values) for name, values in built.model.coords.items()}
    plan = Plan(tune=GIBBS_TUNE if tune is None else tune, draws=draws, budget=budget)
    return gibbs.sample(built.z, built.fourier.values, built.spec, rank=built.rank,
                        ar_factors=built.ar_factors, coords=coords, plan=plan,
                        chains=chains, seed=seed, cores=cores, progress=progress,
                        keep=KEPT_DRAWS)


#: Inference methods by name; each returns (posterior, diagnostics, timings).
METHODS: dict[str, Callable[..., tuple[xr.Dataset, dict, dict]]] = {
    "nuts": _nuts,
    "advi": _advi,
    "gibbs": _gibbs,
}


class _ElboConvergence:
    """PyMC fit callback: stop when the windowed mean loss has stopped improving."""

    def __init__(self, window: int, lag: int, tolerance: float):
        self.window = window
        self.lag = lag
        self.tolerance = tolerance
        self.converged = False
        self.relative_change: float | None = None

    def __call__(self, approx, losses, i) -> None:
        done = i + 1
        if done % self.window or done < (self.lag + 1) * self.window:
            return
        latest = np.asarray(losses[-self.window:])
        start = -(self.lag + 1) * self.window
        before = np.asarray(losses[start:start + self.window])
        improvement = before.mean() - latest.mean()
        noise = np.sqrt((latest.var() + before.var()) / self.window)
        self.relative_change = float(abs(improvement) / max(abs(latest.mean()), 1e-12))
        if self.relative_change < self.tolerance or improvement < 2.0 * noise:
            self.converged = True
            raise StopIteration(f"ELBO converged after {done} iterations")


def _identified_diagnostics(posterior: xr.Dataset, built: BuiltModel, panel: xr.Dataset,
                            seed: int) -> dict:
    """The convergence verdict of NUTS draws, on the probes Gibbs is judged on.

    The same quantities as :mod:`gapband.convergence` (predicted means and
    one predictive draw at up to :data:`gapband.convergence.PROBE_CELLS`
    cells, missing cells first; noise and own innovation sds), computed from
    the kept draws after sampling.
    """
    n_chain, n_draw = posterior.sizes["chain"], posterior.sizes["draw"]
    rng = np.random.default_rng(seed)
    missing = np.flatnonzero(panel["value"].isnull().values.ravel())
    pool = missing if missing.size else built.observed
    cells = np.sort(rng.choice(pool, size=min(convergence.PROBE_CELLS, pool.size),
                               replace=False))
    arrays = draw_arrays(posterior, built)
    if not missing.size:  # own paths kept at missing cells only: check the rest
        arrays.pop("own_gap", None)
    n_time = panel.sizes["time"]
    means = mean_at(arrays, cells, n_time)
    noise = arrays["noise"]
    draws = means + noise[:, cells // n_time] * rng.standard_normal(means.shape)
    own = (arrays["own"] * np.sqrt(1.0 - arrays["own_rho"] ** 2)
           if built.spec.own_ar else None)

    def shaped(values):
        return None if values is None else values.reshape(n_chain, n_draw, -1)

    series = panel["series"].values
    checked = convergence.probes(shaped(means), shaped(draws), shaped(noise), shaped(own),
                                 series)
    return convergence.assess(checked).as_dict() | {
        "chain_width_ratio": convergence.chain_widths(checked, series[cells // n_time])}


def _warnings(method: str, diagnostics: dict) -> list[str]:
    messages = []
    if method == "advi":
        elbo = diagnostics["elbo"]
        if not elbo["converged"]:
            change = elbo["relative_change"]
            messages.append(
                f"ADVI stopped at the cap of {elbo['max_iterations']} iterations before the "
                "ELBO converged"
                + (f" (last relative change {change:.2g})" if change is not None else "")
                + "; raise max_iterations or use method 'nuts'"
            )
        return messages
    r_hat = diagnostics["r_hat_max"]
    ess = (None if r_hat is None
           else min(diagnostics["ess_bulk_min"], diagnostics["ess_tail_min"]))
    if r_hat is None:
        messages.append("R-hat and ESS need at least 2 chains; convergence is unchecked")
    stopped = diagnostics.get("stopped_by")
    advice = ("the time budget ran out first; raise it (--budget) or fit fewer series at once"
              if stopped == "budget" else "run longer (leave --draws unset, or raise it)")
    if r_hat is not None and not r_hat <= R_HAT_MAX:
        messages.append(f"R-hat reaches {r_hat:.3f} (> {R_HAT_MAX}) at "
                        f"{diagnostics['worst']}: the chains disagree; {advice}")
    if ess is not None and not ess >= ESS_MIN:
        messages.append(f"ESS is as low as {ess:.0f} (< {ESS_MIN}): interval bounds are "
                        f"noisy; {advice}")
    if diagnostics["divergences"]:
        messages.append(f"{diagnostics['divergences']} divergent transitions: the posterior "
                        "may be explored incompletely; intervals may be too narrow")
    return messages


def _nutpie():
    """The nutpie module when installed (the faster NUTS), else None."""
    try:
        import nutpie
    except ImportError:
        return None
    return nutpie
