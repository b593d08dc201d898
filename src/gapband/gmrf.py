"""Exact draws of Gaussian Markov random fields in time (banded precision).

A stationary AR(1) path observed with Gaussian noise at some times has a
tridiagonal posterior precision, so its conditional distribution can be
drawn exactly in O(T) with a tridiagonal factorisation; paths of several
processes in time have a banded precision, drawn with a banded Cholesky
factorisation (Rue & Held, Gaussian Markov Random Fields, 2005, section
2.4: sampling from a GMRF in its canonical parameterisation).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import cholesky_banded
from scipy.linalg.lapack import dtbtrs

from gapband import kernels


def ar1_entries(sd: np.ndarray, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The entries of each stationary AR(1) path's tridiagonal precision Q.

    Returns ``inner`` (the diagonal inside the path), ``end`` (the diagonal
    at its first and last step) and ``off`` (next to the diagonal), each of
    shape (rows,), for marginal sds ``sd`` and coefficients ``rho``. No floor
    is applied: the priors bound sd below and rho above
    (:data:`gapband.spec.SCALE_FLOOR`, :data:`gapband.spec.OWN_RHO_MAX`), so
    this and :func:`ar1_log_det` describe the same matrix.
    """
    innovation = sd**2 * (1.0 - rho**2)
    return (1.0 + rho**2) / innovation, 1.0 / innovation, -rho / innovation


def ar1_log_det(sd: np.ndarray, rho: np.ndarray, n_time: int) -> np.ndarray:
    """log|Q| of each path's precision (:func:`ar1_entries`), from the same sd and rho.

    Q's L·D·Lᵀ pivots are 1/v for the innovation variance v = sd²(1 - ρ²),
    and 1/sd² at the last step; log|Q| = -log sd² - (T - 1)·log v.
    """
    return -np.log(sd**2) - (n_time - 1) * np.log(sd**2 * (1.0 - rho**2))


@dataclass(frozen=True)
class StackedAr1:
    """``Q + W`` of many AR(1) paths seen through noise, factorised once as L·D·Lᵀ.

    Q is each path's stationary AR(1) precision and W the observation
    precision of its cells; the paths are stacked, and each row is
    factorised, drawn and solved in turn by compiled loops
    (:mod:`gapband.kernels`, LAPACK's dpttrf/dpttrs recurrences) in
    O(rows·time). Rows can be swapped between two factorisations (:meth:`where`).
    """

    diagonal: np.ndarray  # D, shape (rows, time)
    lower: np.ndarray  # sub-diagonal of the unit lower bidiagonal L, shape (rows, time)

    @classmethod
    def of(cls, sd: np.ndarray, rho: np.ndarray, weight: np.ndarray) -> StackedAr1:
        """Factorise for marginal sds and coefficients (rows,) and weights (rows, time)."""
        factor = cls._empty(weight.shape)
        _check(kernels.factor(*ar1_entries(sd, rho), _c(weight), factor.diagonal, factor.lower))
        return factor

    @classmethod
    def regress(cls, sd: np.ndarray, rho: np.ndarray, base: np.ndarray, scale: np.ndarray,
                resid: np.ndarray, design: np.ndarray | None) -> tuple[StackedAr1, Regression]:
        """Factorise, and sum what a regression with the AR(1) path as error needs.

        A row that cannot be factorised (the matrix is not numerically
        positive definite at its parameters) is marked in ``Regression.failed``
        and its terms are meaningless; the other rows are unaffected.

        Parameters
        ----------
        sd, rho : ndarray, shape (rows,)
            The paths' marginal sds and coefficients.
        base, scale : ndarray, shapes (rows, time) and (rows,)
            Observation precision ``W = base·scale`` (``base`` 0 where unobserved).
        resid : ndarray, shape (rows, time)
            What the regressors and the path explain (any value where unobserved).
        design : ndarray, shape (k, time), or None
            Regressors shared by every row.
        """
        factor = cls._empty(resid.shape)
        design = np.zeros((0, resid.shape[1])) if design is None else _c(design)
        k, rows = design.shape[0], resid.shape[0]
        products, sums = np.empty((rows, k + 1, k + 1)), np.empty((rows, 3))
        kernels.regression_terms(*ar1_entries(sd, rho), _c(resid), _c(base), _c(scale), design,
                                 factor.diagonal, factor.lower, products, sums)
        return factor, Regression(products[:, :k, :k], products[:, :k, k], products[:, k, k],
                                  *sums.T)

    @classmethod
    def _empty(cls, shape: tuple[int, int]) -> StackedAr1:
        return cls(np.empty(shape), np.empty(shape))

    def draw(self, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """One draw of x ~ N((Q + W)⁻¹·rhs, (Q + W)⁻¹), rhs of shape (rows, time)."""
        x = np.empty(rhs.shape)
        kernels.draw(self.diagonal, self.lower, _c(rhs), rng.standard_normal(rhs.shape), x)
        return x

    def where(self, rows: np.ndarray, other: StackedAr1) -> StackedAr1:
        """A copy with the blocks of ``rows`` (bool, shape (rows,)) taken from ``other``."""
        pick = rows[:, None]
        return StackedAr1(np.where(pick, other.diagonal, self.diagonal),
                          np.where(pick, other.lower, self.lower))


@dataclass(frozen=True)
class Regression:
    """Per-row terms of y = X·β + path + noise with the AR(1) path integrated out.

    The error's precision is ``K⁻¹ = W - W(Q + W)⁻¹W`` (Woodbury), so each
    term costs tridiagonal solves only (:meth:`StackedAr1.regress`, which
    sums them in a form that does not cancel).
    """

    gram: np.ndarray  # XᵀK⁻¹X, shape (rows, k, k)
    cross: np.ndarray  # XᵀK⁻¹y, shape (rows, k)
    quadratic: np.ndarray  # yᵀK⁻¹y, shape (rows,)
    log_det: np.ndarray  # log|Q + W|, shape (rows,)
    log_weight: np.ndarray  # the sum of log W over observed cells, shape (rows,)
    observed: np.ndarray  # observed cells, shape (rows,)

    @property
    def failed(self) -> np.ndarray:
        """Rows whose factorisation failed, bool (rows,)."""
        return np.isnan(self.log_det)


def _c(a: np.ndarray) -> np.ndarray:
    """``a`` as a C-contiguous float64 array (the kernels' layout), copied only when needed."""
    return np.ascontiguousarray(a, dtype=np.float64)


def _check(failed_row: int) -> None:
    if failed_row >= 0:
        raise np.linalg.LinAlgError(
            f"tridiagonal factorisation failed in row {failed_row} (a pivot is not positive)")


def draw_ar1_given_noisy(
    resid: np.ndarray,
    rho: np.ndarray,
    sd: np.ndarray,
    noise_sd: np.ndarray,
    rng: np.random.Generator,
) -> np.ndarray:
    """Draw AR(1) paths x given observations ``resid = x + noise`` (NaN = unobserved).

    Parameters
    ----------
    resid : ndarray, shape (rows, time)
        What is left of each observation for the path to explain; NaN where
        the cell is not observed.
    rho, sd, noise_sd : ndarray, shape (rows,)
        AR(1) coefficient and marginal sd of each path, and the sd of the
        Gaussian noise on its observations.
    rng : numpy Generator

    Returns
    -------
    ndarray, shape (rows, time)
        One exact draw of every path from its conditional distribution; all
        rows share one tridiagonal factorisation (no Python loop over rows).
    """
    seen = ~np.isnan(resid)
    weight = seen / noise_sd[:, None] ** 2
    rhs = np.where(seen, resid, 0.0) * weight
    return StackedAr1.of(sd, rho, weight).draw(rhs, rng)


@dataclass(frozen=True)
class BorderedGaussian:
    """A Gaussian in canonical form whose precision is banded, with a dense border, factorised.

    The precision is ``[[Q, B], [Bᵀ, C]]`` with Q banded (n × n, lower banded
    form ``ab``: ``ab[i, j] = Q[j + i, j]``, the layout of
    scipy.linalg.cholesky_banded with ``lower=True``), B dense (n × m) and C
    dense (m × m, small; m may be 0); the canonical mean parameters are
    ``rhs`` (n,) and ``corner_rhs`` (m,). With Q = L·Lᵀ, V = L⁻¹B and w =
    L⁻¹·rhs, the Schur complement ``S = C - VᵀV`` is β's marginal precision
    (Rue & Held, Gaussian Markov Random Fields, 2005, section 2.3: the
    conditional of a GMRF); factorising costs O(n·u·(u + m)).

    Attributes
    ----------
    log_det : float
        log|precision| = log|Q| + log|S|.
    quadratic : float
        ``bᵀ·precision⁻¹·b`` for b = (rhs, corner_rhs): what, with the prior's
        log-determinant, makes a Gaussian model's marginal likelihood
        (:func:`gaussian_log_evidence`).
    """

    lower: np.ndarray
    rhs: np.ndarray
    border: np.ndarray
    schur: np.ndarray
    beta_mean: np.ndarray
    log_det: float
    quadratic: float

    @classmethod
    def of(cls, ab: np.ndarray, rhs: np.ndarray, border: np.ndarray | None = None,
           corner: np.ndarray | None = None, corner_rhs: np.ndarray | None = None,
           ) -> BorderedGaussian:
        """Factorise; LinAlgError when the precision is not numerically positive definite."""
        n = rhs.size
        if border is None:
            border, corner, corner_rhs = np.zeros((n, 0)), np.zeros((0, 0)), np.zeros(0)
        lower = cholesky_banded(ab, lower=True, check_finite=False)
        solved = solve_lower(lower, np.column_stack([border, rhs]))
        v, w = solved[:, :-1], solved[:, -1]
        schur = corner - v.T @ v
        schur_rhs = corner_rhs - v.T @ w
        factor = np.linalg.cholesky(schur) if schur.size else schur
        half = np.linalg.solve(factor, schur_rhs) if schur.size else schur_rhs
        beta_mean = np.linalg.solve(factor.T, half) if schur.size else schur_rhs
        log_det = 2.0 * (np.log(lower[0]).sum() + np.log(np.diagonal(factor)).sum())
        return cls(lower, rhs, border, factor, beta_mean, float(log_det),
                   float(w @ w + half @ half))

    def draw(self, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """One exact draw (x, β): β from its marginal, then x given β (Rue & Held, 2005)."""
        beta = self.beta_mean
        if self.schur.size:
            beta = beta + np.linalg.solve(self.schur.T, rng.standard_normal(beta.size))
        return draw_factored(self.lower, self.rhs - self.border @ beta, rng), beta


def gaussian_log_evidence(posterior: BorderedGaussian, prior_log_det: float,
                          data_quadratic: float, data_log_det: float, observed: int) -> float:
    """Log marginal likelihood of data y = A·x + e, e ~ N(0, W⁻¹), x ~ N(0, Q⁻¹), x integrated out.

    ``-yᵀWy/2 + bᵀP⁻¹b/2 + (log|W| + log|Q| - log|P|)/2 - n·log(2π)/2`` with
    P = Q + AᵀWA the posterior precision and b = AᵀWy (Rue & Held, 2005,
    section 2.3: the Gaussian integral); ``data_quadratic`` is yᵀWy,
    ``data_log_det`` log|W| over the ``observed`` cells.
    """
    return 0.5 * (posterior.quadratic - data_quadratic + data_log_det + prior_log_det
                  - posterior.log_det - observed * np.log(2.0 * np.pi))


def draw_banded(ab: np.ndarray, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One exact draw of x ~ N(Q⁻¹·rhs, Q⁻¹) for a banded precision Q (lower banded ``ab``).

    With Q = L·Lᵀ, ``x = Q⁻¹b + L⁻ᵀz`` for standard normal z has covariance
    Q⁻¹ (Rue & Held, 2005, algorithm 2.5); the factorisation and both solves
    are banded, so a draw costs O(n·u²).
    """
    return BorderedGaussian.of(ab, rhs).draw(rng)[0]


def draw_factored(lower: np.ndarray, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """:func:`draw_banded` given the lower banded Cholesky factor L of Q.

    ``x = L⁻ᵀ(L⁻¹b + z)``: the mean ``Q⁻¹b`` plus ``L⁻ᵀz``, in two triangular solves.
    """
    return solve_lower(lower, solve_lower(lower, rhs) + rng.standard_normal(rhs.shape),
                       transpose=True)


def draw_bordered(ab: np.ndarray, rhs: np.ndarray, border: np.ndarray, corner: np.ndarray,
                  corner_rhs: np.ndarray, rng: np.random.Generator,
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Exact joint draw of (x, β) whose precision is banded in x with a dense border.

    See :class:`BorderedGaussian` for the layout; returns x (n,) and β (m,).
    """
    return BorderedGaussian.of(ab, rhs, border, corner, corner_rhs).draw(rng)


def solve_lower(lower: np.ndarray, b: np.ndarray, transpose: bool = False) -> np.ndarray:
    """Solve L·x = b (or Lᵀ·x = b) for a lower banded Cholesky factor L (LAPACK dtbtrs).

    ``b`` may be a vector (n,) or a matrix (n, k) of right-hand sides.
    """
    x, info = dtbtrs(lower, b.reshape(b.shape[0], -1), uplo="L", trans="T" if transpose else "N")
    if info:
        raise np.linalg.LinAlgError(f"banded triangular solve failed (info = {info})")
    return x.reshape(b.shape)
