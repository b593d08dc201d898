"""Compiled loops over many stacked AR(1) paths (numba), one series at a time.

A sweep of the block-Gibbs sampler factorises and solves one tridiagonal
system per series, then sums products of the solutions with the data. Done
with numpy and LAPACK, each of those is a pass over the whole (N, T) panel;
here one series' row is factorised, solved and summed while it sits in
cache, so a panel of millions of cells is read a couple of times, not a few
dozen. The recurrences are LAPACK's dpttrf/dpttrs (L·D·Lᵀ of a symmetric
positive definite tridiagonal matrix; Golub & Van Loan, Matrix
Computations, 4th ed., 2013, section 4.3.6), and the tests check them
against scipy's LAPACK.

The AR(1) precision Q of row i has ``inner[i]`` on its diagonal
(``end[i]`` at the first and last step) and ``off[i]`` next to it
(:func:`gapband.gmrf.ar1_entries`); the observation precision W is added
to its diagonal. The kernels that factorise return the number of a row whose factorisation failed (a
pivot that is not positive), or -1; :func:`regression_terms` marks such rows
and goes on.
"""

from __future__ import annotations

import functools

import numba
import numpy as np

# Signatures are given so the kernels compile (or load from numba's cache)
# once, when this module is imported, not in each chain process.
_jit = functools.partial(numba.njit, cache=True, nogil=True, boundscheck=False)
_ROWS = "float64[::1], float64[::1], float64[::1]"


@numba.njit(inline="always")
def _prior_diagonal(t, n_time, inner, end):
    """Q[t, t] of a stationary AR(1) path of n_time steps (1/sd² for a single step)."""
    if n_time == 1:
        return 2.0 * end - inner
    return end if t == 0 or t == n_time - 1 else inner


@_jit(f"int64({_ROWS}, float64[:, ::1], float64[:, ::1], float64[:, ::1])")
def factor(inner, end, off, weight, diagonal, lower):
    """L·D·Lᵀ of each row's ``Q + W`` into ``diagonal`` (D) and ``lower`` (L's sub-diagonal)."""
    rows, n_time = weight.shape
    for i in range(rows):
        e = off[i]
        d = _prior_diagonal(0, n_time, inner[i], end[i]) + weight[i, 0]
        if not d > 0.0:
            return i
        diagonal[i, 0] = d
        for t in range(1, n_time):
            ell = e / d
            lower[i, t - 1] = ell
            d = _prior_diagonal(t, n_time, inner[i], end[i]) + weight[i, t] - ell * e
            if not d > 0.0:
                return i
            diagonal[i, t] = d
        lower[i, n_time - 1] = 0.0
    return -1


@_jit("void(float64[:, ::1], float64[:, ::1], float64[:, ::1], float64[:, ::1], "
      "float64[:, ::1])")
def draw(diagonal, lower, rhs, z, x):
    """Draw x ~ N((L·D·Lᵀ)⁻¹·rhs, (L·D·Lᵀ)⁻¹) from standard normals ``z``, all (rows, time).

    ``x = (L·D·Lᵀ)⁻¹(rhs + L·D^½·z)``: the added term has covariance
    L·D·Lᵀ (Rue & Held, Gaussian Markov Random Fields, 2005, section 2.4).
    """
    rows, n_time = rhs.shape
    for i in range(rows):
        # L·D^½·z (L unit lower bidiagonal), then the forward substitution, in one pass.
        scaled = np.sqrt(diagonal[i, 0]) * z[i, 0]
        u = rhs[i, 0] + scaled
        x[i, 0] = u
        for t in range(1, n_time):
            previous = scaled
            scaled = np.sqrt(diagonal[i, t]) * z[i, t]
            u = rhs[i, t] + scaled + lower[i, t - 1] * (previous - u)
            x[i, t] = u
        v = x[i, n_time - 1] / diagonal[i, n_time - 1]
        x[i, n_time - 1] = v
        for t in range(n_time - 2, -1, -1):
            v = x[i, t] / diagonal[i, t] - lower[i, t] * v
            x[i, t] = v


@_jit(f"int64({_ROWS}, float64[:, ::1], float64[:, ::1], float64[::1], float64[:, ::1], "
      "float64[:, ::1], float64[:, ::1], float64[:, :, ::1], float64[:, ::1])")
def regression_terms(inner, end, off, resid, base, scale, design, diagonal, lower, products,
                     sums):
    """Everything the collapsed own-path density and the loadings' posterior need, per row.

    With W = ``base``·``scale`` (row-wise observation precision), y =
    ``resid`` and X = ``design`` (k, T), factorises Q + W into ``diagonal``
    and ``lower`` and fills, for each row,

    - ``products`` (rows, k + 1, k + 1): A'K⁻¹A for A = [X y], with K⁻¹ = W -
      W(Q + W)⁻¹W. It is computed as (A - Â)'W(A - Â) + Â'QÂ with Â = (Q +
      W)⁻¹WA, and Â'QÂ as a sum of squared AR(1) innovations: a sum of
      Gram matrices, positive semi-definite in floating point too. The
      shorter form A'WA - Â'WA cancels when the noise is small beside the
      path and can lose positive definiteness;
    - ``sums`` (rows, 3): log|Q + W|, the sum of log W over observed cells,
      and the number of observed cells.

    A row whose factorisation fails (a pivot that is not positive) gets NaN
    in ``sums[i, 0]`` and the others go on; returns the number of such rows.
    """
    rows, n_time = resid.shape
    k = design.shape[0]
    weighted = np.empty((k + 1, n_time))  # W[X y], one column per row
    remainder = np.empty((k + 1, n_time))  # forward solves
    inverse = np.empty(n_time)
    later = np.empty(k + 1)  # Â at the next step
    now = np.empty(k + 1)  # Â at this step
    failed = 0
    for i in range(rows):
        e, w_scale = off[i], scale[i]
        innovation = 1.0 / end[i]  # the AR(1) innovation variance v
        rho = -e * innovation
        log_det = log_weight = observed = 0.0
        # log|Q + W| as a running product, folded into a log when it strays
        # far from 1: one log per many steps instead of one per step.
        product, inv, ell = 1.0, 0.0, 0.0
        ok = True
        # Forward: factorise and substitute forward.
        for t in range(n_time):
            b = base[i, t]
            w = b * w_scale
            ell = e * inv
            d = _prior_diagonal(t, n_time, inner[i], end[i]) + w - ell * e
            if not d > 0.0:
                ok = False
                break
            inv = 1.0 / d
            inverse[t] = inv
            diagonal[i, t] = d
            if t > 0:
                lower[i, t - 1] = ell
            product *= d
            if not 1e-100 < product < 1e100:
                log_det += np.log(product)
                product = 1.0
            if b > 0.0:
                observed += 1.0
                if b != 1.0:  # a Student-t weight (normal noise has weight 1)
                    log_weight += np.log(b)
            for j in range(k):
                weighted[j, t] = w * design[j, t]
            weighted[k, t] = w * resid[i, t]
            if t == 0:
                for j in range(k + 1):
                    remainder[j, t] = weighted[j, t]
            else:
                for j in range(k + 1):
                    remainder[j, t] = weighted[j, t] - ell * remainder[j, t - 1]
        if not ok:
            failed += 1
            sums[i, 0] = np.nan
            continue
        lower[i, n_time - 1] = 0.0
        log_det += np.log(product)
        # Backward: finish the solves and sum the two Gram matrices.
        total = products[i]
        total[:, :] = 0.0
        later[:] = 0.0
        for t in range(n_time - 1, -1, -1):
            ell = lower[i, t]
            w = base[i, t] * w_scale
            for j in range(k + 1):
                now[j] = remainder[j, t] * inverse[t] - ell * later[j]
            for j in range(k + 1):
                r_j = (design[j, t] if j < k else resid[i, t]) - now[j]
                if t < n_time - 1:
                    step_j = later[j] - rho * now[j]
                for m in range(j + 1):
                    r_m = (design[m, t] if m < k else resid[i, t]) - now[m]
                    value = w * r_j * r_m
                    if t < n_time - 1:
                        value += step_j * (later[m] - rho * now[m]) / innovation
                    total[j, m] += value
            for j in range(k + 1):
                later[j] = now[j]
        # The first step: x_0²/sd² with sd² = v/(1 - ρ²) (Q itself when there is one step).
        first = (1.0 - rho * rho) / innovation
        for j in range(k + 1):
            for m in range(j + 1):
                total[j, m] += first * later[j] * later[m]
        for j in range(k + 1):
            for m in range(j):
                total[m, j] = total[j, m]
        sums[i, 0] = log_det
        sums[i, 1] = log_weight + observed * np.log(w_scale)
        sums[i, 2] = observed
    return failed
