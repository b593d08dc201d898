"""Scores of probabilistic fills against held-out truth (pure numpy, vectorised).

Usable on their own: every function takes arrays of cells — the truth ``y``,
shape (cells,), and either predictive draws, shape (draws, cells), a Gaussian
mean and sd, or a point value — and returns one score per cell. The
``score_*`` functions bundle the per-cell scores of one predictor, and
:func:`breakdown` averages them overall and per group (series, gap length).

Conventions: central intervals at level L (percent) run from the
``(1 - L/100)/2`` to the ``(1 + L/100)/2`` quantile; every score is
negatively oriented (smaller is better) except coverage.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from scipy.special import ndtr, ndtri

PIT_BINS = 10


def level_key(level: float) -> str:
    """The text key of an interval level in score tables: 90 -> "90", 97.5 -> "97.5"."""
    return f"{level:g}"


def covered(y: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    """True where ``lower <= y <= upper``."""
    return (y >= lower) & (y <= upper)


def interval_score(y: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                   level: float) -> np.ndarray:
    """Interval score of central intervals at ``level`` percent.

    Gneiting & Raftery (2007), JASA 102:359, eq. 43, with ``alpha = 1 - level/100``:
    ``(u - l) + 2/alpha * (l - y) * [y < l] + 2/alpha * (y - u) * [y > u]``.
    """
    alpha = 1.0 - level / 100.0
    return ((upper - lower) + 2.0 / alpha * np.maximum(lower - y, 0.0)
            + 2.0 / alpha * np.maximum(y - upper, 0.0))


def crps_ensemble(y: np.ndarray, draws: np.ndarray, *, fair: bool = False) -> np.ndarray:
    """CRPS of the empirical distribution of ``draws`` (shape (M, cells)) at ``y``.

    ``mean|X - y| - sum_ij |x_i - x_j| / (2 M^2)`` — the CRPS of the ensemble's
    own step distribution; with ``fair=True`` the second term divides by
    ``2 M (M - 1)`` instead, an unbiased estimate of the CRPS of the
    distribution the draws come from (Ferro 2014, QJRMS 140:1917).
    The pair sum is computed from the sorted draws in O(M log M):
    ``sum_ij |x_i - x_j| = 2 sum_i (2i - M - 1) x_(i)``.
    """
    draws = np.asarray(draws, dtype="float64")
    m = draws.shape[0]
    if fair and m < 2:
        raise ValueError("the fair CRPS needs at least two draws per cell")
    spread_to_truth = np.abs(draws - y).mean(axis=0)
    weights = 2.0 * np.arange(1, m + 1) - m - 1
    pair_sum = 2.0 * np.tensordot(weights, np.sort(draws, axis=0), axes=1)
    return spread_to_truth - pair_sum / (2.0 * m * (m - 1 if fair else m))


def crps_normal(y: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """CRPS of Normal(mean, sd) at ``y`` in closed form.

    Gneiting & Raftery (2007), JASA 102:359, eq. 21:
    ``sd * (z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi))`` with ``z = (y - mean)/sd``.
    """
    z = (y - mean) / sd
    density = np.exp(-0.5 * z**2) / np.sqrt(2.0 * np.pi)
    return sd * (z * (2.0 * ndtr(z) - 1.0) + 2.0 * density - 1.0 / np.sqrt(np.pi))


def pit_ensemble(y: np.ndarray, draws: np.ndarray) -> np.ndarray:
    """Probability integral transform of ``y`` under the draws: its mid-rank.

    ``(#{x < y} + (#{x == y} + 1) / 2) / (M + 1)``: the rank of ``y`` among the
    M draws and itself, ties split evenly, scaled into (0, 1). When ``y`` is
    exchangeable with the draws it is uniform on the M + 1 mid-points.
    """
    below = (draws < y).sum(axis=0)
    ties = (draws == y).sum(axis=0)
    return (below + 0.5 * (ties + 1)) / (draws.shape[0] + 1)


def pit_normal(y: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """Probability integral transform of ``y`` under Normal(mean, sd)."""
    return ndtr((y - mean) / sd)


def pit_histogram(pit: np.ndarray, bins: int = PIT_BINS) -> np.ndarray:
    """Counts of PIT values in ``bins`` equal bins over [0, 1] (flat when calibrated)."""
    return np.histogram(pit, bins=bins, range=(0.0, 1.0))[0]


def score_draws(y: np.ndarray, draws: np.ndarray, levels: Sequence[float]) -> dict:
    """Every per-cell score of a predictor given by draws, shape (draws, cells).

    Returns
    -------
    dict of str to ndarray (cells,)
        ``point`` (the median), ``abs_error``, ``sq_error``, ``crps``,
        ``crps_fair``, ``pit`` and per level L: ``lower_L``, ``upper_L``,
        ``covered_L``, ``interval_score_L``, ``width_L``.
    """
    probs = [p for level in levels for p in (0.5 - level / 200, 0.5 + level / 200)]
    quantiles = np.quantile(draws, [0.5, *probs], axis=0)
    median = quantiles[0]
    bounds = {level: (quantiles[1 + 2 * i], quantiles[2 + 2 * i])
              for i, level in enumerate(levels)}
    return {
        **_point_scores(y, median),
        "crps": crps_ensemble(y, draws),
        "crps_fair": crps_ensemble(y, draws, fair=True),
        "pit": pit_ensemble(y, draws),
        **_interval_scores(y, bounds),
    }


def score_normal(y: np.ndarray, mean: np.ndarray, sd: np.ndarray,
                 levels: Sequence[float]) -> dict:
    """Every per-cell score of a Gaussian predictor (keys as :func:`score_draws`, no fair CRPS)."""
    bounds = {}
    for level in levels:
        half = ndtri(0.5 + level / 200) * sd
        bounds[level] = (mean - half, mean + half)
    return {
        **_point_scores(y, mean),
        "crps": crps_normal(y, mean, sd),
        "pit": pit_normal(y, mean, sd),
        **_interval_scores(y, bounds),
    }


def score_point(y: np.ndarray, point: np.ndarray) -> dict:
    """The per-cell scores of a point predictor: ``point``, ``abs_error``, ``sq_error``."""
    return _point_scores(y, point)


def summarise(cells: Mapping[str, np.ndarray], levels: Sequence[float]) -> dict:
    """Average per-cell scores into one record (all cells form one group).

    Returns
    -------
    dict
        ``n``, ``mae``, ``rmse`` and, where the predictor has them, ``crps``,
        ``crps_fair`` and per level (keyed by :func:`level_key`) ``coverage``,
        ``interval_score`` and ``mean_width``; None where it has not.
    """
    codes = np.zeros(cells["abs_error"].size, dtype="int64")
    return _grouped(cells, codes, 1, levels)[0]


def breakdown(
    cells: Mapping[str, np.ndarray],
    levels: Sequence[float],
    groups: Mapping[str, tuple[np.ndarray, Sequence[str]]],
) -> dict:
    """Average per-cell scores overall and within each group.

    Parameters
    ----------
    cells : mapping of str to ndarray (cells,)
        Per-cell scores from a ``score_*`` function.
    levels : sequence of float
        Interval levels in percent.
    groups : mapping of str to (codes, names)
        For each grouping (e.g. "series", "gap_length"), an integer code per
        cell and the names of the codes, in the order the output keeps.

    Returns
    -------
    dict
        ``{"overall": record, <grouping>: {name: record, ...}, ...}`` with
        records as :func:`summarise`; groups without cells are left out.
    """
    out = {"overall": summarise(cells, levels)}
    for grouping, (codes, names) in groups.items():
        records = _grouped(cells, np.asarray(codes), len(names), levels)
        out[grouping] = {str(name): rec for name, rec in zip(names, records, strict=True)
                         if rec["n"]}
    return out


def _grouped(cells: Mapping[str, np.ndarray], codes: np.ndarray, n_groups: int,
             levels: Sequence[float]) -> list[dict]:
    counts = np.bincount(codes, minlength=n_groups)

    def mean(name: str) -> np.ndarray | None:
        if name not in cells:
            return None
        values = np.asarray(cells[name], dtype="float64")
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.bincount(codes, weights=values, minlength=n_groups) / counts

    means = {name: mean(name) for name in ("abs_error", "sq_error", "crps", "crps_fair")}
    per_level = {
        (kind, level): mean(f"{source}_{level_key(level)}")
        for level in levels
        for kind, source in (("coverage", "covered"), ("interval_score", "interval_score"),
                             ("mean_width", "width"))
    }

    def at(values: np.ndarray | None, g: int) -> float | None:
        return None if values is None else float(values[g])

    records = []
    for g in range(n_groups):
        record = {
            "n": int(counts[g]),
            "mae": at(means["abs_error"], g),
            "rmse": float(np.sqrt(means["sq_error"][g])),
            "crps": at(means["crps"], g),
            "crps_fair": at(means["crps_fair"], g),
        }
        for kind in ("coverage", "interval_score", "mean_width"):
            has = all(per_level[kind, level] is not None for level in levels)
            record[kind] = ({level_key(lv): at(per_level[kind, lv], g) for lv in levels}
                            if has else None)
        records.append(record)
    return records


def _point_scores(y: np.ndarray, point: np.ndarray) -> dict:
    error = point - y
    return {"point": point, "abs_error": np.abs(error), "sq_error": error**2}


def _interval_scores(y: np.ndarray, bounds: dict) -> dict:
    out = {}
    for level, (lower, upper) in bounds.items():
        key = level_key(level)
        out[f"lower_{key}"] = lower
        out[f"upper_{key}"] = upper
        out[f"covered_{key}"] = covered(y, lower, upper)
        out[f"interval_score_{key}"] = interval_score(y, lower, upper, level)
        out[f"width_{key}"] = upper - lower
    return out
