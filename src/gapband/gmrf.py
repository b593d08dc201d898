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
from scipy.linalg.lapack import dpttrf, dpttrs, dtbtrs

#: Smallest innovation variance used, so a path with sd → 0 or ρ → 1 stays
#: numerically positive definite.
_TINY = 1e-10


def ar1_band(sd: np.ndarray, rho: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Lower banded ``Q + W`` of many AR(1) paths, stacked block-diagonally.

    Parameters
    ----------
    sd, rho : ndarray, shape (rows,)
        Marginal sd and coefficient of each stationary AR(1) path.
    weight : ndarray, shape (rows, time)
        Observation precision of each cell (0 where unobserved).

    Returns
    -------
    ndarray, shape (2, rows·time)
        One tridiagonal block per path, without coupling between consecutive
        paths, so one banded factorisation serves them all in O(rows·time).
    """
    rows, n_time = weight.shape
    inner, end, off = ar1_entries(sd, rho)
    ab = np.empty((2, rows, n_time))
    ab[0] = inner[:, None]
    ab[0, :, [0, -1]] = end
    ab[1] = off[:, None]
    ab[1, :, -1] = 0.0
    ab[0] += weight
    return ab.reshape(2, -1)


def ar1_entries(sd: np.ndarray, rho: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The entries of each stationary AR(1) path's tridiagonal precision Q.

    Returns ``inner`` (the diagonal inside the path), ``end`` (the diagonal
    at its first and last step) and ``off`` (next to the diagonal), each of
    shape (rows,), for marginal sds ``sd`` and coefficients ``rho``.
    """
    innovation = np.maximum(np.maximum(sd, np.sqrt(_TINY)) ** 2 * (1.0 - rho**2), _TINY)
    return (1.0 + rho**2) / innovation, 1.0 / innovation, -rho / innovation


@dataclass(frozen=True)
class StackedAr1:
    """``Q + W`` of many AR(1) paths seen through noise, factorised once as L·D·Lᵀ.

    Q is each path's stationary AR(1) precision and W the observation
    precision of its cells; the paths are stacked, so one tridiagonal
    factorisation (LAPACK dpttrf) serves all of them in O(rows·time), and
    rows can be swapped between two factorisations (:meth:`where`).
    """

    diagonal: np.ndarray  # D, shape (rows, time)
    lower: np.ndarray  # sub-diagonal of the unit lower bidiagonal L, shape (rows, time)

    @classmethod
    def of(cls, sd: np.ndarray, rho: np.ndarray, weight: np.ndarray) -> StackedAr1:
        """Factorise for marginal sds and coefficients (rows,) and weights (rows, time)."""
        ab = ar1_band(sd, rho, weight)
        diagonal, lower, info = dpttrf(ab[0], ab[1, :-1])
        if info:
            raise np.linalg.LinAlgError(f"tridiagonal factorisation failed (info = {info})")
        return cls(diagonal.reshape(weight.shape), np.append(lower, 0.0).reshape(weight.shape))

    def solve(self, b: np.ndarray) -> np.ndarray:
        """(Q + W)⁻¹·b for b of shape (rows, time) or (k, rows, time) (k right-hand sides)."""
        # (k, rows·time) in C order is (rows·time, k) in the Fortran order LAPACK wants.
        columns = b.reshape(-1, self.diagonal.size).T
        x, info = dpttrs(self.diagonal.ravel(), self.lower.ravel()[:-1], columns)
        if info:
            raise np.linalg.LinAlgError(f"tridiagonal solve failed (info = {info})")
        return x.T.reshape(b.shape)

    def log_det(self) -> np.ndarray:
        """log|Q + W| of each row's block, shape (rows,)."""
        return np.log(self.diagonal).sum(axis=1)

    def draw(self, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """One draw of x ~ N((Q + W)⁻¹·rhs, (Q + W)⁻¹), rhs of shape (rows, time).

        ``x = (Q + W)⁻¹(rhs + L·D^½·z)``: the added term has covariance
        L·D·Lᵀ = Q + W, so x has covariance (Q + W)⁻¹ (Rue & Held, 2005,
        section 2.4, with the factorisation in L·D·Lᵀ form).
        """
        y = np.sqrt(self.diagonal) * rng.standard_normal(rhs.shape)
        y[:, 1:] += self.lower[:, :-1] * y[:, :-1]
        return self.solve(rhs + y)

    def where(self, rows: np.ndarray, other: StackedAr1) -> StackedAr1:
        """A copy with the blocks of ``rows`` (bool, shape (rows,)) taken from ``other``."""
        pick = rows[:, None]
        return StackedAr1(np.where(pick, other.diagonal, self.diagonal),
                          np.where(pick, other.lower, self.lower))


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
    weight = seen / np.maximum(noise_sd, np.sqrt(_TINY))[:, None] ** 2
    rhs = np.where(seen, resid, 0.0) * weight
    return StackedAr1.of(sd, rho, weight).draw(rhs, rng)


def draw_banded(ab: np.ndarray, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One exact draw of x ~ N(Q⁻¹·rhs, Q⁻¹) for a banded precision Q.

    Parameters
    ----------
    ab : ndarray, shape (u + 1, n)
        Q in lower banded form (``ab[i, j] = Q[j + i, j]``, the layout of
        scipy.linalg.cholesky_banded with ``lower=True``); u is the lower bandwidth.
    rhs : ndarray, shape (n,)
        The canonical mean parameter b (the mean is Q⁻¹b).
    rng : numpy Generator

    Returns
    -------
    ndarray, shape (n,)

    Notes
    -----
    With Q = L·Lᵀ, ``x = Q⁻¹b + L⁻ᵀz`` for standard normal z has covariance
    Q⁻¹ (Rue & Held, 2005, algorithm 2.5); the factorisation and both solves
    are banded, so a draw costs O(n·u²).
    """
    return draw_factored(cholesky_banded(ab, lower=True, check_finite=False), rhs, rng)


def draw_factored(lower: np.ndarray, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """:func:`draw_banded` given the lower banded Cholesky factor L of Q.

    ``x = L⁻ᵀ(L⁻¹b + z)``: the mean ``Q⁻¹b`` plus ``L⁻ᵀz``, in two triangular solves.
    """
    return solve_lower(lower, solve_lower(lower, rhs) + rng.standard_normal(rhs.shape),
                       transpose=True)


def draw_bordered(
    ab: np.ndarray,
    rhs: np.ndarray,
    border: np.ndarray,
    corner: np.ndarray,
    corner_rhs: np.ndarray,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray]:
    """Exact joint draw of (x, β) whose precision is banded in x with a dense border.

    The joint precision is ``[[Q, B], [Bᵀ, C]]`` with Q banded (n × n, lower
    banded form ``ab``), B dense (n × m) and C dense (m × m, small); the
    canonical mean parameters are ``rhs`` (n,) and ``corner_rhs`` (m,). β is
    drawn from its marginal, whose precision is the Schur complement
    ``C - Bᵀ·Q⁻¹·B``, then x given β (Rue & Held, 2005, section 2.3: the
    conditional of a GMRF) — m banded solves, so cost O(n·u·(u + m)).

    Returns
    -------
    x : ndarray, shape (n,)
    beta : ndarray, shape (m,)
    """
    lower = cholesky_banded(ab, lower=True, check_finite=False)
    # With Q = L·Lᵀ: Bᵀ·Q⁻¹·B = VᵀV and Bᵀ·Q⁻¹·b = Vᵀw for V = L⁻¹B, w = L⁻¹b.
    solved = solve_lower(lower, np.column_stack([border, rhs]))
    v, w = solved[:, :-1], solved[:, -1]
    schur = corner - v.T @ v
    schur_rhs = corner_rhs - v.T @ w
    factor = np.linalg.cholesky(schur)
    beta = np.linalg.solve(schur, schur_rhs) + np.linalg.solve(
        factor.T, rng.standard_normal(corner_rhs.size))
    return draw_factored(lower, rhs - border @ beta, rng), beta


def solve_lower(lower: np.ndarray, b: np.ndarray, transpose: bool = False) -> np.ndarray:
    """Solve L·x = b (or Lᵀ·x = b) for a lower banded Cholesky factor L (LAPACK dtbtrs).

    ``b`` may be a vector (n,) or a matrix (n, k) of right-hand sides.
    """
    x, info = dtbtrs(lower, b.reshape(b.shape[0], -1), uplo="L", trans="T" if transpose else "N")
    if info:
        raise np.linalg.LinAlgError(f"banded triangular solve failed (info = {info})")
    return x.reshape(b.shape)
