"""Whether chains agree, judged on what a fill reports (ArviZ diagnostics).

The quantities (*probes*) are those the outputs rest on and that do not
depend on how the factors are labelled: each probe cell's predictive mean
(``cell_mean``) and one predictive draw per sweep (``cell_draw``, whose
quantiles are the interval bounds), plus the identified scale parameters,
each series' noise sd and own innovation sd (``own·sqrt(1 - ρ²)``; the
marginal sd is weakly identified as ρ → 1 even when chains agree). The rule:
rank-normalised split R-hat at most :data:`R_HAT_MAX` on every probe, bulk
ESS of every cell mean and tail ESS of every cell draw at least
:data:`ESS_MIN` (Vehtari, Gelman, Simpson, Carpenter & Bürkner, Bayesian
Analysis 16, 2021: the thresholds are theirs).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import arviz as az
import numpy as np
import xarray as xr

R_HAT_MAX = 1.01
ESS_MIN = 400

#: Cells whose predictive mean and draws are checked (missing cells first).
PROBE_CELLS = 100


@dataclass(frozen=True)
class Verdict:
    """The diagnostics of one set of chains, JSON-ready through :meth:`as_dict`."""

    converged: bool
    r_hat_max: float | None
    ess_bulk_min: float | None
    ess_tail_min: float | None
    worst: str  # the probe with the largest R-hat
    n_draws: int

    @property
    def status(self) -> str:
        """A short progress line: R-hat and ESS against their targets."""
        if self.r_hat_max is None:
            return "R-hat needs 2 chains"
        return (f"R-hat {self.r_hat_max:.3f} (≤ {R_HAT_MAX}) · "
                f"ESS {min(self.ess_bulk_min, self.ess_tail_min):.0f} (≥ {ESS_MIN})")

    def as_dict(self) -> dict:
        """The verdict's fields, JSON-ready."""
        return {"r_hat_max": self.r_hat_max, "ess_bulk_min": self.ess_bulk_min,
                "ess_tail_min": self.ess_tail_min, "worst": self.worst,
                "n_draws": self.n_draws, "converged": self.converged}


def probes(cell_mean: np.ndarray, cell_draw: np.ndarray, noise: np.ndarray,
           own_innovation: np.ndarray | None, series: np.ndarray) -> xr.Dataset:
    """The probe dataset: arrays (chain, draw, cell) and (chain, draw, series)."""
    data = {"cell_mean": (("chain", "draw", "cell"), cell_mean),
            "cell_draw": (("chain", "draw", "cell"), cell_draw),
            "noise": (("chain", "draw", "series"), noise)}
    if own_innovation is not None:
        data["own_innovation"] = (("chain", "draw", "series"), own_innovation)
    return xr.Dataset(data, coords={"series": series})


def assess(checked: xr.Dataset) -> Verdict:
    """Judge a probe dataset (:func:`probes`) by the rule of this module."""
    n_chain, n_draw = checked.sizes["chain"], checked.sizes["draw"]
    if n_chain < 2 or n_draw < 4:  # R-hat needs several chains (and split halves)
        return Verdict(False, None, None, None, "", n_chain * n_draw)
    with warnings.catch_warnings():
        # A probe held fixed (a fixed noise sd) has no within-chain variance:
        # its R-hat is NaN, read below as agreement.
        warnings.simplefilter("ignore", RuntimeWarning)
        r_hat = az.rhat(checked)
    worst_name, worst_value, worst_at = "", -np.inf, 0
    for name in r_hat.data_vars:
        values = np.nan_to_num(r_hat[name].values, nan=1.0)  # constant probes agree
        if values.max() > worst_value:
            worst_name, worst_value, worst_at = name, float(values.max()), int(values.argmax())
    label = checked[worst_name].dims[-1]
    where = checked[label].values[worst_at] if label in checked.coords else worst_at
    bulk = az.ess(checked[["cell_mean"]], method="bulk")["cell_mean"].values
    tail = az.ess(checked[["cell_draw"]], method="tail")["cell_draw"].values
    ess_bulk = float(np.nanmin(bulk, initial=np.inf))
    ess_tail = float(np.nanmin(tail, initial=np.inf))
    converged = worst_value <= R_HAT_MAX and min(ess_bulk, ess_tail) >= ESS_MIN
    return Verdict(bool(converged), worst_value, ess_bulk, ess_tail,
                   f"{worst_name}[{where}]", n_chain * n_draw)


def chain_widths(checked: xr.Dataset, cell_series: np.ndarray, level: float = 90) -> dict:
    """How far apart the chains' own intervals are, per series.

    For each chain, the central ``level`` % interval width of every probe
    cell's draws; per series, the median over its cells; returned as the
    ratio of the widest chain's median to the narrowest's (1 when they
    agree), for series with probe cells.
    """
    tail = (100 - level) / 200
    draws = checked["cell_draw"].values  # (chain, draw, cell)
    widths = np.quantile(draws, 1 - tail, axis=1) - np.quantile(draws, tail, axis=1)
    ratios = {}
    for name in np.unique(cell_series):
        per_chain = np.median(widths[:, cell_series == name], axis=1)
        if per_chain.min() > 0:
            ratios[str(name)] = float(per_chain.max() / per_chain.min())
    return ratios
