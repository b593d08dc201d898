"""Exact block-Gibbs sampler for the gapband model (numpy, scipy and numba kernels).

The model and its priors are those of :mod:`gapband.model`, unchanged (HalfNormal
priors on every sd, Uniform priors on the AR coefficients' partial
autocorrelations and on the own AR(1) coefficients); this module draws from
the same posterior by cycling through exact conditional distributions
(block Gibbs; Gelfand & Smith, JASA 1990). One sweep:

1. each series' own sd, own AR(1) coefficient and noise sd, with the own
   path and the loadings integrated out: given the shared paths, a series
   is a regression on them plus an AR(1) path plus noise, whose density is
   exact via one tridiagonal factorisation of all series
   (:func:`_own_marginal`); an adaptive random-walk Metropolis step per
   series (the Uniform and HalfNormal priors are not conjugate here);
2. each series' loadings ``L``, ``B``: that Bayesian linear regression,
   batched over series, with the own path integrated out (its covariance
   enters through tridiagonal solves, by Woodbury);
3. the paths, in three exact draws: every series' own AR(1) path given the
   shared paths (one stacked tridiagonal draw); the trend and short-term
   AR paths of every factor with the Fourier coefficients given the own
   paths; and the same shared paths given the noise, the own paths
   following (:meth:`_Sampler._paths`). The shared state is a Gaussian
   Markov random field in time, banded when ordered time first, with a
   dense border for the coefficients (:class:`gapband.gmrf.BorderedGaussian`);
4. Student-t noise only: one Gamma((ν+1)/2, (ν + r²/σ²)/2) precision weight
   per observed cell (normal scale mixture; Geweke, J. Appl. Econometrics 1993);
5. noise sd and trend step sd given the paths: with a HalfNormal(c) prior on
   the sd and n Gaussian terms with sum of squares S, the variance has the
   generalised inverse Gaussian conditional ``∝ v^((1-n)/2 - 1)·exp(-(v/c² +
   S/v)/2)``, drawn exactly with scipy.stats.geninvgauss;
6. the partial autocorrelations of each AR(p) factor: an independence
   Metropolis-Hastings step whose proposal is the least-squares regression on
   the path (stationarity kept: a non-stationary proposal is rejected);
7. a group move per factor along the scale the likelihood cannot see
   (loadings × c, path / c), which only the priors decide.

Steps 1 and 2 integrate the own paths (and step 1 the loadings) out and
steps 2 and 3 draw them, the order a partially collapsed Gibbs sampler
needs (van Dyk & Park, JASA 2008). Metropolis step sizes adapt during
burn-in only. Quantities fixed by ``spec.fixed`` are held at their value.
Only observed cells enter the likelihood.

Cost per sweep is O(N·T·k²) for N series, T steps and k = rank + AR
factors, plus O(T·k³·lags²) for the shared paths: linear in the number of
series. Chains run in parallel processes.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import xarray as xr
from rich.console import Console
from rich.progress import Progress, TextColumn, TimeElapsedColumn
from scipy.stats import geninvgauss

from gapband import chains as chains_
from gapband.chains import ChainFailure
from gapband.convergence import PROBE_CELLS, Verdict, assess, chain_widths
from gapband.convergence import probes as convergence_probes
from gapband.errors import FitError
from gapband.gmrf import (
    BorderedGaussian,
    StackedAr1,
    ar1_entries,
    ar1_log_det,
    gaussian_log_evidence,
)
from gapband.spec import OWN_RHO_MAX, SCALE_FLOOR, STEP_FLOOR, ModelSpec

#: Floors that keep variances and sums of squares strictly positive.
_TINY = 1e-12

#: Independence proposals for the AR coefficients are widened by this factor
#: so their tails cover the target's (a narrower proposal than the target
#: makes an independence sampler sticky).
_PROPOSAL_WIDEN = 1.25

#: Group-move Metropolis steps along each factor's scale per sweep (cheap: priors only).
_SCALE_STEPS = 5

#: Rounds of the inverse-gamma rejection sampler before scipy's GIG takes over.
_GIG_ROUNDS = 20

#: Collapsed Metropolis steps on each series' own sd, coefficient and noise sd per sweep.
#: This block mixes slowest of all; each step costs a few per cent of a sweep
#: (the rest is the shared paths' banded draws), so five steps buy several
#: times its mixing for about a third more time (docs/inference.md).
_OWN_STEPS = 5


class _RowsFailed(np.linalg.LinAlgError):
    """A step that cannot be evaluated for some series (their rows)."""

    def __init__(self, what: str, rows: np.ndarray):
        super().__init__(what)
        self.rows = rows


@dataclass
class _State:
    loading: np.ndarray  # (N, r)
    trend: np.ndarray  # (r, T)
    coef: np.ndarray  # (r, H)
    short_loading: np.ndarray  # (N, rb)
    ar: np.ndarray  # (rb, T)
    pacf: np.ndarray  # (rb, p)
    own_path: np.ndarray  # (N, T): own sd times the unit path
    own_sd: np.ndarray  # (N,)
    own_rho: np.ndarray  # (N,)
    noise: np.ndarray  # (N,)
    innovation: np.ndarray  # (r,)
    weight: np.ndarray  # (N, T): Student-t precision weights (1 for normal noise)


class _Sampler:
    """One chain of the block-Gibbs sampler over fixed data."""

    def __init__(self, z: np.ndarray, fourier: np.ndarray, spec: ModelSpec, rank: int,
                 ar_factors: int, rng: np.random.Generator):
        self.spec = spec
        self.rng = rng
        self.seen = ~np.isnan(z)
        self.z = np.where(self.seen, z, 0.0)
        self.fourier = fourier
        self.rank, self.ar_factors, self.order = rank, ar_factors, spec.ar_order
        self.accepted = {"ar_pacf": 0, "own": 0, "rescale": 0, "trend_scale": 0}
        self.proposed = {"ar_pacf": 0, "own": 0, "rescale": 0, "trend_scale": 0}
        self.trend_step, self.trend_tuned, self.tuning = 0.1, 0, False
        self.scale_step = 0.05
        self.scale_tuned = 0
        self.own_step = np.full(z.shape[0], 0.3)
        self.own_shape = np.broadcast_to(np.eye(3), (z.shape[0], 3, 3)).copy()
        self.own_history: list[np.ndarray] = []
        self.own_tuned = 0

    # -- initial point ---------------------------------------------------------
    def initial(self) -> _State:
        """An over-dispersed start for one chain.

        The SVD of the mean-imputed panel, loadings jittered by 30 %, and
        every scale and coefficient drawn across its plausible range.
        Chains that start apart and still agree are evidence of
        convergence; chains started alike can agree without it (Gelman &
        Rubin, Statistical Science 7, 1992).
        """
        spec, rng = self.spec, self.rng
        n_series, n_time = self.z.shape
        r, rb, h = self.rank, self.ar_factors, self.fourier.shape[1]
        counts = np.maximum(self.seen.sum(axis=1, keepdims=True), 1)
        centre = self.z.sum(axis=1, keepdims=True) / counts
        filled = np.where(self.seen, self.z, centre)
        u, s, vt = np.linalg.svd(filled, full_matrices=False)
        loading = u[:, :r] * s[:r] / np.sqrt(n_time)
        loading = loading * (1.0 + 0.3 * rng.standard_normal(loading.shape))
        trend = vt[:r] * np.sqrt(n_time)
        if spec.fixed.loading is not None:
            loading = np.full((n_series, r), spec.fixed.loading)
        def spread(prior: float, size: int) -> np.ndarray:
            """Scales from a fifth of the prior scale to twice it, log-uniform."""
            return prior * np.exp(rng.uniform(np.log(0.2), np.log(2.0), size))

        return _State(
            loading=loading,
            trend=trend,
            coef=np.zeros((r, h)),
            short_loading=0.3 * rng.standard_normal((n_series, rb)),
            ar=np.zeros((rb, n_time)),
            pacf=rng.uniform(-0.5, 0.9, (rb, self.order)) * (np.arange(self.order) == 0),
            own_path=np.zeros((n_series, n_time)),
            own_sd=np.maximum(_given(spec.fixed.own, spread(spec.priors.own, n_series)),
                              SCALE_FLOOR),
            own_rho=rng.uniform(0.1, 0.95, n_series),
            noise=np.maximum(_given(spec.fixed.noise, spread(spec.priors.noise, n_series)),
                             SCALE_FLOOR),
            innovation=np.maximum(_given(spec.fixed.trend_innovation,
                                         spread(spec.priors.trend_innovation, r)), STEP_FLOOR),
            weight=np.ones((n_series, n_time)),
        )

    # -- one sweep -------------------------------------------------------------
    def sweep(self, s: _State, tuning: bool = False) -> None:
        """Update every block once, in place; ``tuning`` adapts MH step sizes (burn-in).

        The own paths are integrated out of the first two blocks and drawn in
        the third (a partially collapsed Gibbs sampler; van Dyk & Park, JASA
        2008: each marginalised draw is followed by a draw of what it left out).
        """
        self.tuning = tuning
        # The factor of every series' own-path precision at the new own
        # scales, shared by the next two blocks (their weights are unchanged).
        factor, loading_posterior = (self._own_collapsed(s, tuning) if self.spec.own_ar
                                     else (None, None))
        self._loadings(s, loading_posterior)
        self._paths(s, factor)
        if self.spec.noise == "student_t":
            self._weights(s)
        if self.spec.fixed.noise is None:
            resid = np.where(self.seen, self.z - self._mean(s), 0.0)
            s.noise = np.sqrt(_gig_variance(
                (s.weight * resid**2).sum(axis=1), self.seen.sum(axis=1),
                self.spec.priors.noise, self.rng, floor=SCALE_FLOOR**2))
        if self.spec.fixed.trend_innovation is None:
            steps = np.diff(s.trend, axis=1)
            s.innovation = np.sqrt(_gig_variance(
                (steps**2).sum(axis=1), np.full(self.rank, steps.shape[1]),
                self.spec.priors.trend_innovation, self.rng, floor=STEP_FLOOR**2))
        if self.ar_factors:
            self._ar_pacf(s)
        for _ in range(_SCALE_STEPS):
            self._rescale(s, tuning)

    def _rescale(self, s: _State, tuning: bool) -> None:
        """Move each factor along the direction the likelihood cannot see.

        Scaling a factor's loadings by c and its path (with its Fourier
        coefficients and step sd) by 1/c leaves every prediction unchanged,
        so only the priors decide such a move; Gibbs blocks cross this ridge
        slowly. A Metropolis step on log c (jointly with the partial
        autocorrelations, on the atanh scale, for AR factors) with the
        Jacobian of the map is an exact group move (Liu & Sabatti, JASA 2000).
        """
        rng, priors = self.rng, self.spec.priors
        n_series, n_time = self.z.shape
        log_c = self.scale_step * rng.standard_normal(self.rank + self.ar_factors)
        c = np.exp(log_c)
        accept = np.zeros(c.size, dtype=bool)
        if self.spec.fixed.loading is None:
            tau_free = self.spec.fixed.trend_innovation is None
            h = s.coef.shape[1]
            for k in range(self.rank):
                new_tau = s.innovation[k] / c[k] if tau_free else s.innovation[k]
                if new_tau < STEP_FLOOR:
                    continue  # outside the prior's support
                log_ratio = (
                    _walk_logp(s.trend[k] / c[k], new_tau, priors.level)
                    - _walk_logp(s.trend[k], s.innovation[k], priors.level)
                    - 0.5 * ((c[k] ** 2 - 1) * (s.loading[:, k] ** 2).sum() / priors.loading**2
                             + (c[k] ** -2 - 1) * (s.coef[k] ** 2).sum() / priors.seasonal**2)
                    + (n_series - n_time - h - tau_free) * log_c[k])
                if tau_free:
                    log_ratio -= 0.5 * (new_tau**2 - s.innovation[k] ** 2) / (
                        priors.trend_innovation**2)
                if np.log(rng.random()) < log_ratio:
                    accept[k] = True
                    s.loading[:, k] *= c[k]
                    s.trend[k] /= c[k]
                    s.coef[k] /= c[k]
                    s.innovation[k] = new_tau
        for j in range(self.ar_factors):
            i = self.rank + j
            shift = self.scale_step * 0.2 * rng.standard_normal(self.order)
            pacf = np.tanh(np.arctanh(np.clip(s.pacf[j], -0.999999, 0.999999)) + shift)
            log_ratio = (
                _ar_loglik(s.ar[j] / c[i], pacf) - _ar_loglik(s.ar[j], s.pacf[j])
                - 0.5 * (c[i] ** 2 - 1) * (s.short_loading[:, j] ** 2).sum() / priors.loading**2
                + (n_series - n_time) * log_c[i]
                + np.log1p(-pacf**2).sum() - np.log1p(-s.pacf[j] ** 2).sum())
            if np.log(rng.random()) < log_ratio:
                accept[i] = True
                s.short_loading[:, j] *= c[i]
                s.ar[j] /= c[i]
                s.pacf[j] = pacf
        self.accepted["rescale"] += int(accept.sum())
        self.proposed["rescale"] += accept.size
        if tuning:
            self.scale_tuned += 1
            self.scale_step = _robbins_monro(self.scale_step, self.scale_tuned, accept.mean())

    def finite(self, s: _State) -> bool:
        """Whether every scale and path of the state is a finite number."""
        return all(np.isfinite(v).all() for v in (s.noise, s.own_sd, s.own_rho, s.innovation,
                                                   s.trend, s.ar, s.loading, s.coef))

    def mean_at(self, s: _State, n: np.ndarray, t: np.ndarray) -> np.ndarray:
        """The model mean (standardised units) at cells (series n, time t), own path included."""
        factor = s.trend[:, t] + s.coef @ self.fourier[t].T  # (r, cells)
        mean = np.einsum("ck,kc->c", s.loading[n], factor)
        if self.ar_factors:
            mean += np.einsum("ck,kc->c", s.short_loading[n], s.ar[:, t])
        if self.spec.own_ar:
            mean += s.own_path[n, t]
        return mean

    def _season(self, s: _State) -> np.ndarray:
        return s.coef @ self.fourier.T  # (r, T)

    def _mean(self, s: _State, own: bool = True) -> np.ndarray:
        mean = s.loading @ (s.trend + self._season(s))
        if self.ar_factors:
            mean += s.short_loading @ s.ar
        if own and self.spec.own_ar:
            mean += s.own_path
        return mean

    def _cell_weight(self, s: _State) -> np.ndarray:
        """Precision of each cell's observation (0 where unobserved), (N, T)."""
        return self.seen * s.weight / s.noise[:, None] ** 2

    def _paths(self, s: _State, factor: StackedAr1 | None = None) -> None:
        """The shared paths, and the own paths when the spec has them.

        With own paths, three exact draws in turn: the own paths given the
        shared ones; the shared paths given the own ones; and the shared
        paths given the noise, the own paths following as the signal minus
        the shared part. The second mixes slowly when the noise is small
        against the own paths, the third when the own innovations are small
        against the noise; in turn, each covers the other's weak side (the
        idea of interweaving two data augmentations; Yu & Meng, JCGS 2011).
        Each is a banded draw over the shared state only, so a sweep costs
        O(N·T) in the number of series, not O(N²·T).
        """
        if self.spec.own_ar:
            self._own_paths(s, factor)
        self._shared_given_own(s)
        if self.spec.own_ar:
            self._shared_given_signal(s)

    def _own_paths(self, s: _State, factor: StackedAr1 | None = None) -> None:
        """Every series' own AR(1) path given the rest: one stacked tridiagonal draw.

        ``factor`` is the factorised precision of the paths when already known.
        """
        weight = self._cell_weight(s)
        if factor is None:
            factor = StackedAr1.of(s.own_sd, s.own_rho, weight)
        resid = self.z - self._mean(s, own=False)
        s.own_path = factor.draw(weight * resid, self.rng)

    def _shared_prior(self, s: _State, innovation: np.ndarray | None = None,
                      ) -> tuple[np.ndarray, int, float]:
        """Prior precision of the shared state, lower banded; the state size d; its log|Q|.

        The state at time t is (trend_1..r, ar_1..rb); ordered time first,
        its precision has lower bandwidth d·(lags + 1) - 1. ``innovation``
        replaces the state's trend step sds. log|Q| follows from the
        prediction-error form (a unit Jacobian): a walk contributes
        -log level² - (T - 1)·log δ², an AR path -Σ log v_t.
        """
        innovation = s.innovation if innovation is None else innovation
        r, rb, p = self.rank, self.ar_factors, self.order
        n_time = self.z.shape[1]
        ab, d = self._empty_band()
        times = np.arange(n_time) * d
        level_precision = 1.0 / self.spec.priors.level**2
        log_det = r * np.log(level_precision) - 2.0 * (n_time - 1) * np.log(innovation).sum()
        for k in range(r):
            step_precision = 1.0 / innovation[k] ** 2
            diagonal = np.full(n_time, 2.0 * step_precision)
            diagonal[[0, -1]] = step_precision
            diagonal[0] += level_precision
            _add(ab, times + k, times + k, diagonal)
            _add(ab, times[1:] + k, times[:-1] + k, -step_precision)
        for j in range(rb):
            coefs, variances = _ar_rows(s.pacf[j], n_time)
            log_det -= np.log(variances).sum()
            k = r + j
            for i in range(p + 1):
                for m in range(i, p + 1):  # the lower entry Q[t-i, t-m], i <= m
                    t = np.arange(m, n_time)
                    _add(ab, times[t - i] + k, times[t - m] + k,
                         coefs[t, i] * coefs[t, m] / variances[t])
        return ab, d, float(log_det)

    def _shared_given_own(self, s: _State) -> None:
        """Trend and AR paths of all factors with their Fourier coefficients, given the own paths.

        Observation n at time t sees c_n·x_t + (L_n ⊗ F_t)·β with c_n = (L_n,
        B_n), x_t the shared state and β the Fourier coefficients: the
        precision of x is banded and β borders it (:class:`BorderedGaussian`).
        The trend step sds move first, jointly with these paths
        (:meth:`_trend_scales`).
        """
        data = self._shared_data(s)
        posterior = None
        if self.spec.fixed.trend_innovation is None:
            posterior = self._trend_scales(s, data)
        if posterior is None:
            posterior = self._shared_posterior(s, data, s.innovation)[0]
        self._store_shared(s, *posterior.draw(self.rng))

    def _empty_band(self) -> tuple[np.ndarray, int]:
        """A zero lower banded matrix shaped like the shared state's precision; state size d."""
        d = self.rank + self.ar_factors
        lags = max(1, self.order if self.ar_factors else 1)
        return np.zeros((d * (lags + 1), self.z.shape[1] * d)), d

    def _shared_data(self, s: _State) -> dict:
        """What the observations add to the shared state's precision, given the own paths.

        A lower banded data precision (the prior's shape), the canonical mean,
        and with seasonal cycles the border, corner (with β's prior) and its
        canonical mean; plus yᵀWy, log|W| and the observed count for the
        marginal likelihood.
        """
        ab, d = self._empty_band()
        n_time = self.z.shape[1]
        times = np.arange(n_time) * d
        shared = np.concatenate([s.loading, s.short_loading], axis=1)  # (N, d)
        weight = self._cell_weight(s)
        target = self.z - s.own_path
        weighted = weight * target
        rows, cols = np.tril_indices(d)
        data = np.einsum("nt,nk,nl->tkl", weight, shared, shared, optimize=True)
        _add(ab, times[:, None] + rows, times[:, None] + cols, data[:, rows, cols])
        out = {"ab": ab, "rhs": np.einsum("nt,nk->tk", weighted, shared, optimize=True).ravel(),
               "border": None, "corner": None, "corner_rhs": None,
               "quadratic": float((weighted * target).sum()),
               "log_det": float(np.log(weight[self.seen]).sum()),
               "observed": int(self.seen.sum()), "prior_log_det": 0.0}
        if self.fourier.shape[1]:
            fourier = self.fourier
            cross = np.einsum("nt,nk,nj->tkj", weight, shared, s.loading, optimize=True)
            border = cross[:, :, :, None] * fourier[:, None, None, :]
            per_time = np.einsum("nt,nk,nl->tkl", weight, s.loading, s.loading, optimize=True)
            corner = np.einsum("tkl,th,tg->khlg", per_time, fourier, fourier, optimize=True)
            size = corner.shape[0] * corner.shape[1]
            precision = 1.0 / self.spec.priors.seasonal**2
            out |= {"border": border.reshape(n_time * d, size),
                    "corner": corner.reshape(size, size) + np.eye(size) * precision,
                    "corner_rhs": np.einsum("nt,nk,th->kh", weighted, s.loading, fourier,
                                            optimize=True).ravel(),
                    "prior_log_det": size * np.log(precision)}
        return out

    def _shared_posterior(self, s: _State, data: dict, innovation: np.ndarray,
                          ) -> tuple[BorderedGaussian, float]:
        """The shared state's conditional at trend step sds ``innovation``, and evidence.

        The evidence is the log marginal likelihood of the data with the
        shared state integrated out (:func:`gaussian_log_evidence`).
        """
        ab, _, prior_log_det = self._shared_prior(s, innovation)
        posterior = BorderedGaussian.of(ab + data["ab"], data["rhs"], data["border"],
                                        data["corner"], data["corner_rhs"])
        evidence = gaussian_log_evidence(posterior, prior_log_det + data["prior_log_det"],
                                         data["quadratic"], data["log_det"], data["observed"])
        return posterior, evidence

    def _trend_scales(self, s: _State, data: dict) -> BorderedGaussian | None:
        """The trend step sds jointly with the shared paths, the paths integrated out.

        A random-walk Metropolis step on log δ (all factors at once) accepted
        on the marginal likelihood of the data given everything but the
        shared state (:meth:`_shared_posterior`), times the truncated
        HalfNormal prior; the paths are then drawn at the accepted δ. Drawing
        δ given the paths alone crosses slowly between a rough trend and a
        smooth one, since the paths pin δ down (the one-block update:
        Knorr-Held & Rue, Scandinavian Journal of Statistics 29, 2002).
        Returns the conditional at the accepted δ; None when neither can be
        evaluated (the caller factorises at the current δ and fails there).
        """
        prior = self.spec.priors.trend_innovation
        proposal = s.innovation * np.exp(self.trend_step * self.rng.standard_normal(self.rank))

        def log_post(innovation):
            try:
                posterior, evidence = self._shared_posterior(s, data, innovation)
            except np.linalg.LinAlgError:
                return None, -np.inf  # not evaluable: a proposal there is rejected
            logp = evidence + np.sum(np.log(innovation) - 0.5 * (innovation / prior) ** 2)
            return posterior, logp

        current, now = log_post(s.innovation)
        inside = bool(np.all(proposal >= STEP_FLOOR))
        proposed, then = log_post(proposal) if inside else (None, -np.inf)
        accept = np.log(self.rng.random()) < then - now
        self.proposed["trend_scale"] += 1
        if accept:
            self.accepted["trend_scale"] += 1
            s.innovation = proposal
        if self.tuning:
            self.trend_tuned += 1
            self.trend_step = _robbins_monro(self.trend_step, self.trend_tuned, float(accept))
        return proposed if accept else current

    def _shared_given_signal(self, s: _State) -> None:
        """The shared paths given the noise: the own paths are the signal minus the shared part.

        With the noise held, the signal y = z - ε (at missing cells, the
        current model value) is fixed and each own path is y_n minus the
        shared part, an AR(1) with tridiagonal precision Q_n; the shared
        state's precision gains Σ_n Q_n[t, s]·c_n·c_nᵀ, at lags 0 and 1 only.
        """
        ab, d, _ = self._shared_prior(s)
        n_time = self.z.shape[1]
        times = np.arange(n_time) * d
        signal = self._mean(s)
        # Q_n = (inner on the diagonal, end at both ends, off next to it) for each series.
        inner, end, off = ar1_entries(s.own_sd, s.own_rho)
        q_signal = inner[:, None] * signal
        q_signal[:, [0, -1]] = end[:, None] * signal[:, [0, -1]]
        q_signal[:, 1:] += off[:, None] * signal[:, :-1]
        q_signal[:, :-1] += off[:, None] * signal[:, 1:]

        shared = np.concatenate([s.loading, s.short_loading], axis=1)  # (N, d)
        inner_cc, end_cc, off_cc = (np.einsum("n,nk,nl->kl", q, shared, shared)
                                    for q in (inner, end, off))
        rows, cols = np.tril_indices(d)
        diagonal = np.broadcast_to(inner_cc[rows, cols], (n_time, rows.size)).copy()
        diagonal[[0, -1]] = end_cc[rows, cols]
        _add(ab, times[:, None] + rows, times[:, None] + cols, diagonal)
        k, m = np.divmod(np.arange(d * d), d)  # every entry of the block Q[t, t-1]
        _add(ab, times[1:, None] + k, times[:-1, None] + m,
             np.broadcast_to(off_cc[k, m], (n_time - 1, k.size)))
        rhs = np.einsum("nt,nk->tk", q_signal, shared, optimize=True).ravel()
        border = corner = corner_rhs = None
        if self.fourier.shape[1]:
            fourier = self.fourier
            inner_cl, end_cl, off_cl = (np.einsum("n,nk,nj->kj", q, shared, s.loading)
                                        for q in (inner, end, off))
            neighbours = np.zeros_like(fourier)
            neighbours[1:] += fourier[:-1]
            neighbours[:-1] += fourier[1:]
            at_t = np.broadcast_to(inner_cl, (n_time, *inner_cl.shape)).copy()
            at_t[[0, -1]] = end_cl
            border = (at_t[:, :, :, None] * fourier[:, None, None, :]
                      + off_cl[None, :, :, None] * neighbours[:, None, None, :])
            ends = np.outer(fourier[0], fourier[0]) + np.outer(fourier[-1], fourier[-1])
            lagged = fourier[1:].T @ fourier[:-1]
            inner_ll, end_ll, off_ll = (np.einsum("n,nk,nl->kl", q, s.loading, s.loading)
                                        for q in (inner, end, off))
            corner = (np.einsum("kl,hg->khlg", inner_ll, fourier.T @ fourier - ends)
                      + np.einsum("kl,hg->khlg", end_ll, ends)
                      + np.einsum("kl,hg->khlg", off_ll, lagged + lagged.T))
            corner_rhs = np.einsum("nt,nk,th->kh", q_signal, s.loading, fourier, optimize=True)
            size = corner.shape[0] * corner.shape[1]
            border, corner_rhs = border.reshape(rhs.size, size), corner_rhs.ravel()
            corner = corner.reshape(size, size) + np.eye(size) / self.spec.priors.seasonal**2
        self._store_shared(s, *BorderedGaussian.of(ab, rhs, border, corner,
                                                   corner_rhs).draw(self.rng))
        s.own_path = signal - self._mean(s, own=False)

    def _store_shared(self, s: _State, x: np.ndarray, beta: np.ndarray) -> None:
        """Put a draw of the shared state (and the Fourier coefficients β) into ``s``."""
        r, n_time = self.rank, self.z.shape[1]
        if beta.size:
            s.coef = beta.reshape(s.coef.shape)
        x = x.reshape(n_time, -1)
        s.trend = x[:, :r].T.copy()
        s.ar = x[:, r:].T.copy()

    def _regression(self, s: _State) -> tuple[np.ndarray, np.ndarray | None]:
        """What the loadings regress: the target (N, T) and the design paths (k, T).

        The design is the trend plus season of each factor (unless the
        loadings are fixed) and the short-term AR paths; None when nothing
        is free, the target then being the data minus the whole shared part.
        """
        fixed = self.spec.fixed.loading is not None
        paths = [s.ar] if self.ar_factors else []
        if fixed:
            target = self.z - s.loading @ (s.trend + self._season(s))
        else:
            target = self.z
            paths.insert(0, s.trend + self._season(s))
        if not paths:
            return target, None
        return target, np.concatenate(paths, axis=0)

    def _loadings(self, s: _State, posterior: tuple[np.ndarray, np.ndarray] | None = None,
                  ) -> None:
        """Each series' loadings: Bayesian linear regression on the paths, batched.

        With own AR(1) paths, these are integrated out (see
        :func:`_own_marginal`); ``posterior`` is the regression's canonical
        parameters, when known.
        """
        target, design = self._regression(s)
        if design is None:
            return
        if posterior is None and self.spec.own_ar:
            posterior = _own_marginal(target, self.seen * s.weight, s.own_sd, s.own_rho,
                                      s.noise, design, self.spec.priors.loading)[2]
        elif posterior is None:
            posterior = _loading_posterior(target, design, self._cell_weight(s),
                                           self.spec.priors.loading)
        drawn = _draw_dense(*posterior, self.rng)
        if self.spec.fixed.loading is None:
            s.loading = drawn[:, : self.rank].copy()
        if self.ar_factors:
            s.short_loading = drawn[:, -self.ar_factors:].copy()

    def _own_collapsed(self, s: _State, tuning: bool) -> tuple[StackedAr1, tuple | None]:
        """Own sd, own AR(1) coefficient and noise sd with the own path integrated out.

        Given the shared paths, each series is a regression on them (the
        loadings) plus an AR(1) path plus noise; with the loadings' Gaussian
        prior and the path both integrated out its density is exact and cheap
        (:func:`_own_marginal`, :func:`_loading_posterior`). A random-walk
        Metropolis step on (log sd, logit rho, log noise sd) under it,
        followed by fresh draws of the loadings and the path, moves along the
        trade-offs between own persistence, noise and the shared part that
        updates conditioned on each other cross only slowly (collapsed
        Gibbs; Liu, JASA 1994).
        Returns the factorised precision of the own paths given the data and
        the loadings' regression (canonical parameters, or None when nothing
        is regressed) at the new values, for the next blocks.
        """
        spec, rng = self.spec, self.rng
        target, design = self._regression(s)
        base = self.seen * s.weight
        free = np.array([spec.fixed.own is None, True, spec.fixed.noise is None])
        current = np.column_stack([np.log(s.own_sd), _logit(s.own_rho / OWN_RHO_MAX),
                                   np.log(s.noise)])

        def log_post(theta):
            sd, noise = np.exp(theta[:, 0]), np.exp(theta[:, 2])
            rho = OWN_RHO_MAX * _expit(theta[:, 1])
            value, factor, regression = _own_marginal(target, base, sd, rho, noise, design,
                                                      spec.priors.loading)
            # Priors in the transformed coordinates (with their Jacobians):
            # HalfNormal on the sds (truncated at the floor: the proposal is
            # refused below it), Uniform(0, OWN_RHO_MAX) on rho.
            value += np.log(rho) + np.log1p(-rho / OWN_RHO_MAX)
            if free[0]:
                value += theta[:, 0] - 0.5 * (sd / spec.priors.own) ** 2
            if free[2]:
                value += theta[:, 2] - 0.5 * (noise / spec.priors.noise) ** 2
            return value, factor, regression

        now, factor, regression = log_post(current)
        floor = np.log(SCALE_FLOOR)
        for _ in range(_OWN_STEPS):
            shock = np.einsum("nij,nj->ni", self.own_shape, rng.standard_normal(current.shape))
            proposal = current + self.own_step[:, None] * free * shock
            inside = ((np.abs(proposal[:, 1]) < 30.0)  # rho inside its range in floating point
                      & (proposal[:, 0] >= floor) & (proposal[:, 2] >= floor))
            then, proposed, proposed_regression = log_post(
                np.where(inside[:, None], proposal, current))
            then = np.where(inside, then, -np.inf)
            accept = np.log(rng.random(now.size)) < then - now
            current = np.where(accept[:, None], proposal, current)
            now = np.where(accept, then, now)
            # Each series' rows are its own: keep the accepted ones.
            factor = factor.where(accept, proposed)
            if regression is not None:
                regression = tuple(np.where(accept.reshape(-1, *[1] * (new.ndim - 1)), new, old)
                                   for old, new in zip(regression, proposed_regression,
                                                       strict=True))
            self.accepted["own"] += int(accept.sum())
            self.proposed["own"] += accept.size
            if tuning:
                self._adapt_own(current, accept, free)
        if not np.isfinite(now).all():
            raise _RowsFailed("the own-persistence density cannot be evaluated",
                              np.flatnonzero(~np.isfinite(now)))
        s.own_sd, s.own_rho, s.noise = (np.exp(current[:, 0]),
                                        OWN_RHO_MAX * _expit(current[:, 1]),
                                        np.exp(current[:, 2]))
        return factor, regression

    def _adapt_own(self, current: np.ndarray, accept: np.ndarray, free: np.ndarray) -> None:
        """Adapt the own-scale proposal during burn-in.

        The step size follows Robbins-Monro towards 30 % acceptance, the
        proposal's shape the covariance of the draws so far (adaptive
        Metropolis; Haario, Saksman & Tamminen, Bernoulli 2001).
        """
        self.own_tuned += 1
        self.own_step = _robbins_monro(self.own_step, self.own_tuned, accept)
        self.own_history.append(current)
        if self.own_tuned >= 150 and self.own_tuned % 50 == 0:
            history = np.stack(self.own_history[len(self.own_history) // 3 :], axis=1)
            centred = history - history.mean(axis=1, keepdims=True)
            cov = np.einsum("nsi,nsj->nij", centred, centred) / history.shape[1]
            cov = cov * np.outer(free, free) + 1e-6 * np.eye(3)
            scale = np.sqrt(np.einsum("nii->ni", cov)).mean(axis=1)
            self.own_shape = np.linalg.cholesky(cov / scale[:, None, None] ** 2)
            self.own_step = 2.38 / np.sqrt(free.sum()) * scale

    def _ar_pacf(self, s: _State) -> None:
        """AR(p) coefficients of each short-term factor: independence MH, kept stationary."""
        p = self.order
        n_time = s.ar.shape[1]
        for j in range(self.ar_factors):
            x = s.ar[j]
            lagged = np.column_stack([x[p - i : n_time - i] for i in range(1, p + 1)])
            y = x[p:]
            gram = lagged.T @ lagged + _TINY * np.eye(p)
            centre = np.linalg.solve(gram, lagged.T @ y)
            variance = max(float(((y - lagged @ centre) ** 2).mean()), 1e-6)
            cov = _PROPOSAL_WIDEN**2 * variance * np.linalg.inv(gram)
            chol = np.linalg.cholesky(cov)
            phi = centre + chol @ self.rng.standard_normal(p)
            proposal = _step_down(phi)
            self.proposed["ar_pacf"] += 1
            if np.any(np.abs(proposal) >= 1.0):
                continue  # outside the stationary region: the target density is 0

            current_phi = _levinson(s.pacf[j])[0][-1]
            # Proposal densities (normal in φ) and targets (uniform prior on the
            # partial autocorrelations, so the density in φ carries 1/|∂φ/∂κ|).
            w_new = np.linalg.solve(chol, phi - centre)
            w_old = np.linalg.solve(chol, current_phi - centre)
            log_ratio = (_ar_loglik(x, proposal) - _log_jacobian(proposal)
                         - _ar_loglik(x, s.pacf[j]) + _log_jacobian(s.pacf[j])
                         + 0.5 * float(w_new @ w_new) - 0.5 * float(w_old @ w_old))
            if np.log(self.rng.random()) < log_ratio:
                s.pacf[j] = proposal
                self.accepted["ar_pacf"] += 1

    def _weights(self, s: _State) -> None:
        """Student-t noise as a normal scale mixture: Gamma precision weight per cell."""
        df = self.spec.noise_df
        resid = self.z - self._mean(s)
        rate = 0.5 * (df + resid**2 / s.noise[:, None] ** 2)
        s.weight = np.where(self.seen,
                            self.rng.gamma(0.5 * (df + 1.0), 1.0 / rate), 1.0)


def sample(
    z: np.ndarray,
    fourier: np.ndarray,
    spec: ModelSpec,
    *,
    rank: int,
    ar_factors: int,
    coords: dict,
    plan: chains_.Plan,
    chains: int = 4,
    seed: int = 0,
    cores: int = 1,
    progress: bool = False,
    keep: int = chains_.KEPT_DRAWS,
) -> tuple[xr.Dataset, dict, dict]:
    """Draw from the posterior of the gapband model by block Gibbs.

    Parameters
    ----------
    z : ndarray, shape (series, time)
        Standardised (transformed) data, NaN where missing.
    fourier : ndarray, shape (time, harmonic)
        The seasonal design matrix.
    spec : ModelSpec
    rank, ar_factors : int
        Number of shared and short-term factors.
    coords : dict
        Coordinate values of ``series``, ``time``, ``factor``, ``short_factor``,
        ``lag`` and ``harmonic``.
    plan : gapband.chains.Plan
        Burn-in sweeps, then a fixed number of kept sweeps or rounds until
        the chains agree (:mod:`gapband.convergence`) within a time budget.
    chains : int
        Chains, each from its own over-dispersed start.
    seed : int
        Each chain's generator is spawned from ``numpy.random.SeedSequence(seed)``;
        the same seed gives the same draws, however many cores run them.
    cores : int
        Chains run at once, each in its own process; 1 (the default) runs
        them one after another here. :func:`gapband.inference.fit` chooses it.
    progress : bool
        Show a progress line (sweeps, R-hat and ESS against their targets) on stderr.
    keep : int
        Most draws kept per chain; a longer run keeps every second, fourth...
        sweep (the diagnostics use every sweep). With a fixed ``plan.draws``,
        every sweep is kept.

    Returns
    -------
    posterior : Dataset
        Dims (chain, draw, ...) with the names and dims of the PyMC model's
        posterior (``loading``, ``trend_innovation``, ``level``, ``trend``,
        ``seasonal_coef``, ``ar_pacf``, ``ar_coef``, ``ar``, ``short_loading``,
        ``own_rho``, ``own``, ``noise``, as the spec has them). Own paths
        are kept where they are needed, not whole: ``own_gap`` (chain, draw,
        gap), float32, their value at each missing cell (flat index
        ``series × T + time`` in coordinate ``gap``), and ``own_mean``
        (chain, series, time), their posterior mean per chain.
    diagnostics : dict
        The convergence verdict (:class:`gapband.convergence.Verdict`),
        ``chain_width_ratio`` per series, ``sweeps`` per chain, ``stopped_by``
        ("converged", "budget" or "draws"), ``restarts`` (why a chain was
        started afresh), ``sampler``, ``divergences`` (always 0),
        ``acceptance`` of the Metropolis-Hastings steps, ``cores``.
    timings : dict
        Seconds of burn-in (``tune``) and kept sweeps (``sample``), summed
        over chains, and ``wall`` for the whole run.

    Raises
    ------
    FitError
        A chain failed numerically after every fresh start; the message names
        the series and parameter values and says what to try.
    """
    cores = max(1, min(chains, cores))
    streams = np.random.SeedSequence(seed).spawn(chains)
    gap_cells = np.flatnonzero(np.isnan(z).ravel())
    pool = gap_cells if gap_cells.size else np.arange(z.size)
    probe_cells = np.sort(np.random.default_rng(seed).choice(
        pool, size=min(PROBE_CELLS, pool.size), replace=False))
    job = _Job(z, fourier, spec, rank, ar_factors, plan.draws or keep, probe_cells,
               list(map(str, coords["series"])))
    series = np.asarray(coords["series"])

    def judge(rows: list[np.ndarray]) -> Verdict:
        return assess(job.probe_dataset(rows, series))

    started = time.perf_counter()
    bar = Progress(
        TextColumn(f"gibbs, {chains} chains on {cores} core{'s' * (cores > 1)}"),
        TextColumn("{task.completed:,.0f} sweeps"), TextColumn("{task.fields[status]}"),
        TimeElapsedColumn(), console=Console(stderr=True), disable=not progress,
        transient=True)
    with bar:
        task = bar.add_task("sweeps", total=None, status="burn-in")

        def status(text: str, done: int) -> None:
            bar.update(task, advance=done, **({"status": text} if text else {}))

        try:
            outcome = chains_.run(job, streams, cores, plan, judge, status)
        except chains_.ChainLost as lost:
            raise FitError(f"{lost}. This happens when a series is constant for long "
                           "stretches or has a scale far from the others': check the series "
                           "named, try another --seed, or fit it with fewer series") from None
    accepted: dict[str, int] = {}
    proposed: dict[str, int] = {}
    timings = {"tune": 0.0, "sample": 0.0}
    for result in outcome.results:
        for name in result.accepted:
            accepted[name] = accepted.get(name, 0) + result.accepted[name]
            proposed[name] = proposed.get(name, 0) + result.proposed[name]
        for phase in timings:
            timings[phase] += result.seconds[phase]
    timings["wall"] = time.perf_counter() - started
    posterior = _dataset(outcome.results, coords, gap_cells)
    checked = job.probe_dataset(outcome.probes, series)
    acceptance = {name: accepted[name] / proposed[name] for name in accepted if proposed[name]}
    diagnostics = outcome.verdict.as_dict() | {
        "chain_width_ratio": chain_widths(checked, series[probe_cells // z.shape[1]]),
        "sweeps": outcome.sweeps, "stopped_by": outcome.stopped_by,
        "restarts": outcome.restarts, "sampler": "gibbs", "divergences": 0,
        "acceptance": acceptance, "cores": cores}
    return posterior, diagnostics, timings


@dataclass
class _Chain:
    """What one chain returns: kept draws, own-path mean, MH counts, seconds."""

    arrays: dict[str, np.ndarray]
    own_mean: np.ndarray | None
    accepted: dict[str, int]
    proposed: dict[str, int]
    seconds: dict[str, float]


@dataclass
class _Job:
    """Everything a chain needs; picklable, so a chain can run in another process."""

    z: np.ndarray
    fourier: np.ndarray
    spec: ModelSpec
    rank: int
    ar_factors: int
    keep: int
    probe_cells: np.ndarray
    series: list[str]

    def start(self, stream: np.random.SeedSequence) -> _Run:
        """A chain from a fresh over-dispersed start."""
        return _Run(self, np.random.default_rng(stream))

    def probe_dataset(self, rows: list[np.ndarray], series: np.ndarray) -> xr.Dataset:
        """Every chain's probe rows (:meth:`_Run.probe`) as a :func:`convergence.probes` set."""
        n_draw = min(len(r) for r in rows)
        stacked = np.stack([r[:n_draw] for r in rows])  # (chain, draw, column)
        q, n = self.probe_cells.size, self.z.shape[0]
        own = stacked[:, :, 2 * q + n:] if self.spec.own_ar else None
        return convergence_probes(stacked[:, :, :q], stacked[:, :, q:2 * q],
                                  stacked[:, :, 2 * q:2 * q + n], own, series)


class _Run:
    """One chain of the sampler: its state, its store of kept draws, its sweeps."""

    def __init__(self, job: _Job, rng: np.random.Generator):
        self.job, self.rng = job, rng
        self.sampler = _Sampler(job.z, job.fourier, job.spec, job.rank, job.ar_factors, rng)
        self.state = self.sampler.initial()
        self.store = _Store(job.keep, job.z.shape, job.rank, job.ar_factors,
                            job.fourier.shape[1], job.spec, np.flatnonzero(np.isnan(job.z)))
        self.seconds = {"tune": 0.0, "sample": 0.0}
        n_time = job.z.shape[1]
        self.probe_series, self.probe_times = np.divmod(job.probe_cells, n_time)

    def sweep(self, sweeps: int, tuning: bool, report) -> np.ndarray:
        """Run ``sweeps`` sweeps; their probe rows (none when tuning). ``report(k)``: k done."""
        start = last = time.perf_counter()
        rows = []
        pending = 0
        for _ in range(sweeps):
            try:
                self.sampler.sweep(self.state, tuning=tuning)
            except np.linalg.LinAlgError as err:
                rows = getattr(err, "rows", ())
                where = (" for series " + ", ".join(repr(self.job.series[i]) for i in rows)
                         if len(rows) else "")
                raise ChainFailure(f"a Gibbs step failed{where}: {err}",
                                   self.describe()) from None
            if not self.sampler.finite(self.state):
                raise ChainFailure("a Gibbs step gave a value that is not finite",
                                   self.describe())
            if not tuning:
                self.store.keep(self.state)
                rows.append(self.probe())
            pending += 1
            if time.perf_counter() - last > chains_.REPORT_EVERY:
                report(pending)
                pending, last = 0, time.perf_counter()
        report(pending)
        self.seconds["tune" if tuning else "sample"] += time.perf_counter() - start
        width = 2 * self.job.probe_cells.size + self.job.z.shape[0] * (1 + self.job.spec.own_ar)
        return np.array(rows).reshape(len(rows), width)

    def probe(self) -> np.ndarray:
        """Probes of the current sweep: cell means and draws, noise and own innovation sds."""
        s, n, t = self.state, self.probe_series, self.probe_times
        mean = self.sampler.mean_at(s, n, t)
        shock = (self.rng.standard_t(self.job.spec.noise_df, n.size)
                 if self.job.spec.noise == "student_t" else self.rng.standard_normal(n.size))
        parts = [mean, mean + s.noise[n] * shock, s.noise]
        if self.job.spec.own_ar:
            parts.append(s.own_sd * np.sqrt(1.0 - s.own_rho**2))
        return np.concatenate(parts)

    def describe(self) -> str:
        """The state in the user's terms: the series with the smallest scales, the trend steps."""
        s, names = self.state, self.job.series
        lowest = np.argsort(s.noise)[:3]
        text = "smallest noise sd: " + ", ".join(
            f"{names[i]!r} {s.noise[i]:.3g}" for i in lowest)
        if self.job.spec.own_ar:
            i = int(np.argmin(s.own_sd))
            text += f"; smallest own sd: {names[i]!r} {s.own_sd[i]:.3g} (rho {s.own_rho[i]:.3f})"
        return text + "; trend step sd: " + ", ".join(f"{v:.3g}" for v in s.innovation) + \
            " (standardised units)"

    def result(self) -> _Chain:
        return _Chain(self.store.arrays(), self.store.own_mean(), self.sampler.accepted,
                      self.sampler.proposed, self.seconds)


#: Posterior variables of the own paths that only this sampler keeps (see :func:`sample`).
OWN_KEPT = ("own_gap", "own_mean")


class _Store:
    """Kept draws of one chain, in the PyMC model's variable names, at most ``capacity``.

    When full, every second kept draw is dropped and from then on every
    second sweep is kept (and so on, doubling): memory stays bounded
    however long a chain runs, and the kept draws stay evenly spread.
    """

    def __init__(self, capacity, shape, rank, ar_factors, harmonics, spec: ModelSpec,
                 gap_cells: np.ndarray):
        n_series, n_time = shape
        sizes = {"loading": (n_series, rank), "trend_innovation": (rank,), "level": (rank,),
                 "trend": (rank, n_time), "noise": (n_series,)}
        if harmonics:
            sizes["seasonal_coef"] = (rank, harmonics)
        if ar_factors:
            sizes |= {"ar_pacf": (ar_factors, spec.ar_order),
                      "ar_coef": (ar_factors, spec.ar_order),
                      "ar": (ar_factors, n_time), "short_loading": (n_series, ar_factors)}
        if spec.own_ar:
            sizes |= {"own_rho": (n_series,), "own": (n_series,)}
        self.buffers = {name: np.empty((capacity, *size)) for name, size in sizes.items()}
        self.gap_cells = gap_cells
        self.own_sum = None
        if spec.own_ar:
            self.buffers["own_gap"] = np.empty((capacity, gap_cells.size), dtype="float32")
            self.own_sum = np.zeros(shape)
        self.capacity, self.kept, self.thin, self.seen, self.own_count = capacity, 0, 1, 0, 0

    def keep(self, s: _State) -> None:
        """Offer this sweep's state; every ``thin``-th is kept."""
        if self.own_sum is not None:
            self.own_sum += s.own_path
            self.own_count += 1
        self.seen += 1
        if self.seen % self.thin:
            return
        if self.kept == self.capacity:
            for array in self.buffers.values():
                half = array[1::2][: self.capacity // 2]
                array[: half.shape[0]] = half
            self.kept, self.thin = self.capacity // 2, 2 * self.thin
            if self.seen % self.thin:
                return
        values = {"loading": s.loading, "trend_innovation": s.innovation,
                  "level": s.trend[:, 0], "trend": s.trend, "noise": s.noise,
                  "seasonal_coef": s.coef, "ar_pacf": s.pacf, "ar": s.ar,
                  "short_loading": s.short_loading, "own_rho": s.own_rho, "own": s.own_sd}
        if "ar_coef" in self.buffers:
            values["ar_coef"] = np.array([_levinson(k)[0][-1] for k in s.pacf])
        if self.own_sum is not None:
            values["own_gap"] = s.own_path.ravel()[self.gap_cells]
        for name, array in self.buffers.items():
            array[self.kept] = values[name]
        self.kept += 1

    def arrays(self) -> dict[str, np.ndarray]:
        return {name: array[: self.kept] for name, array in self.buffers.items()}

    def own_mean(self) -> np.ndarray | None:
        return None if self.own_sum is None else self.own_sum / max(self.own_count, 1)


_DIMS = {
    "loading": ("series", "factor"), "trend_innovation": ("factor",), "level": ("factor",),
    "trend": ("factor", "time"), "seasonal_coef": ("factor", "harmonic"),
    "ar_pacf": ("short_factor", "lag"), "ar_coef": ("short_factor", "lag"),
    "ar": ("short_factor", "time"), "short_loading": ("series", "short_factor"),
    "own_rho": ("series",), "own": ("series",), "own_gap": ("gap",),
    "noise": ("series",),
}


def _dataset(chains: list[_Chain], coords: dict, gap_cells: np.ndarray) -> xr.Dataset:
    data = {
        name: (("chain", "draw", *_DIMS[name]), np.stack([chain.arrays[name] for chain in chains]))
        for name in chains[0].arrays
    }
    if chains[0].own_mean is not None:
        data["own_mean"] = (("chain", "series", "time"),
                            np.stack([chain.own_mean for chain in chains]))
    n_draw = next(iter(chains[0].arrays.values())).shape[0]
    used = {dim for dims in _DIMS.values() for dim in dims if dim in coords}
    extra = {"gap": gap_cells} if "own_gap" in data else {}
    return xr.Dataset(data, coords={"chain": np.arange(len(chains)), "draw": np.arange(n_draw)}
                      | extra | {dim: coords[dim] for dim in used | {"series", "time"}})


def _add(ab: np.ndarray, rows: np.ndarray, cols: np.ndarray, values) -> None:
    """Add ``values`` at the lower entries (rows, cols) of a lower banded matrix."""
    ab[rows - cols, cols] += values


def _loading_posterior(target: np.ndarray, design: np.ndarray, weight: np.ndarray,
                       prior: float) -> tuple[np.ndarray, np.ndarray]:
    """Canonical parameters of each series' loadings given the paths, without own paths.

    Parameters
    ----------
    target : ndarray, shape (N, T)
    design : ndarray, shape (k, T)
        The regressors, shared by all series.
    weight : ndarray, shape (N, T)
        Observation precision (0 where unobserved).
    prior : float
        Prior sd of every loading (Normal(0, prior²)).

    Returns
    -------
    precision : ndarray, shape (N, k, k)
        ``XᵀWX + I/prior²``.
    rhs : ndarray, shape (N, k)
        ``XᵀWy``; the posterior is N(precision⁻¹·rhs, precision⁻¹)
        (Bayesian linear regression: Gelman et al., Bayesian Data Analysis,
        3rd ed., 2013, section 14.2). With own paths, see :func:`_own_marginal`.
    """
    precision = np.einsum("nt,kt,lt->nkl", weight, design, design, optimize=True)
    rhs = np.einsum("nt,kt->nk", weight * target, design, optimize=True)
    return precision + np.eye(design.shape[0]) / prior**2, rhs


def _own_marginal(resid: np.ndarray, base: np.ndarray, sd: np.ndarray, rho: np.ndarray,
                  noise: np.ndarray, design: np.ndarray | None = None, prior: float = 1.0,
                  ) -> tuple[np.ndarray, StackedAr1, tuple[np.ndarray, np.ndarray] | None]:
    """Log density of each row's observed residuals: stationary AR(1) path plus noise.

    Parameters
    ----------
    resid : ndarray, shape (N, T)
        Residuals (any value where unobserved).
    base : ndarray, shape (N, T)
        Observation precision before the noise sd: 0 where unobserved, the
        Student-t weight (1 for normal noise) where observed.
    sd, rho, noise : ndarray, shape (N,)
        Marginal sd and coefficient of the path, noise sd.
    design : ndarray, shape (k, T), optional
        Regressors whose coefficients (Normal(0, ``prior``²) each) are
        integrated out as well.

    Returns
    -------
    logp : ndarray, shape (N,)
        -inf for a row that cannot be evaluated (a precision that is not
        numerically positive definite at its parameters).
    factor : StackedAr1
        The factorised Q + W.
    regression : tuple or None
        The coefficients' posterior canonical parameters, precision
        ``XᵀK⁻¹X + I/prior²`` (N, k, k) and ``XᵀK⁻¹y`` (N, k), where K is
        the covariance of path plus noise; None without a design.

    Notes
    -----
    With path precision Q, observation precision W and K⁻¹ = W - W(Q +
    W)⁻¹W (Woodbury), the marginal log density is ``-y'K⁻¹y/2 + (log|W| +
    log|Q| - log|Q + W|)/2 - n/2·log 2π`` (Rue & Held, 2005, section 2.3:
    the Gaussian integral). Integrating out coefficients β ~ N(0, s²I) of
    a regression with posterior precision P and canonical mean c adds
    ``c'P⁻¹c/2 - log|P|/2 - k·log s`` (the same Gaussian integral; the
    posterior is Gelman et al., Bayesian Data Analysis, 3rd ed., 2013,
    section 14.2, with error covariance K).
    """
    n_time = resid.shape[1]
    factor, terms = StackedAr1.regress(sd, rho, base, noise**-2.0, resid, design)
    logp = 0.5 * (-terms.quadratic + terms.log_weight + ar1_log_det(sd, rho, n_time)
                  - terms.log_det - terms.observed * np.log(2.0 * np.pi))
    failed = terms.failed
    if design is not None:
        k = design.shape[0]
        gram = np.where(failed[:, None, None], 0.0, terms.gram)
        regression = (gram + np.eye(k) / prior**2, np.where(failed[:, None], 0.0, terms.cross))
        chol, singular = _cholesky_rows(regression[0])
        half = np.linalg.solve(chol, regression[1][..., None])[..., 0]
        logp += (0.5 * (half**2).sum(axis=1)
                 - np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
                 - k * np.log(prior))
        failed = failed | singular
    else:
        regression = None
    # A row that cannot be evaluated has no density there: a proposal to it is rejected.
    logp = np.where(failed | ~np.isfinite(logp), -np.inf, logp)
    return logp, factor, regression


def _robbins_monro(step, tuned: int, acceptance):
    """A Metropolis step size moved toward 30 % acceptance (Robbins-Monro, gain 1/n^0.6)."""
    gain = 1.0 / (1.0 + tuned) ** 0.6
    return step * np.exp(gain * (acceptance - 0.3))


def _cholesky_rows(matrices: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Cholesky factors of a stack of matrices (B, k, k) and which were not positive definite.

    A failed matrix gets the identity as its factor, so the stack stays usable;
    the caller discards its row.
    """
    try:
        return np.linalg.cholesky(matrices), np.zeros(matrices.shape[0], dtype=bool)
    except np.linalg.LinAlgError:
        pass
    chol = np.broadcast_to(np.eye(matrices.shape[1]), matrices.shape).copy()
    singular = np.zeros(matrices.shape[0], dtype=bool)
    for i, matrix in enumerate(matrices):
        try:
            chol[i] = np.linalg.cholesky(matrix)
        except np.linalg.LinAlgError:
            singular[i] = True
    return chol, singular


def _walk_logp(path: np.ndarray, step_sd: float, level_sd: float) -> float:
    """Log density of a Gaussian random walk with start ~ N(0, level_sd²)."""
    steps = np.diff(path)
    return float(-0.5 * (path[0] / level_sd) ** 2 - 0.5 * (steps**2).sum() / step_sd**2
                 - steps.size * np.log(step_sd))


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, 1e-12, 1.0 - 1e-12)
    return np.log(p) - np.log1p(-p)


def _expit(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def _given(fixed: float | None, default: np.ndarray) -> np.ndarray:
    return default if fixed is None else np.full(np.shape(default), fixed)


def _gig_variance(squares: np.ndarray, counts: np.ndarray, prior: float,
                  rng: np.random.Generator, floor: float = 0.0) -> np.ndarray:
    """Draw variances v with HalfNormal(prior) on sqrt(v) and n Gaussian terms of sum S.

    The prior is truncated below at ``floor`` (a variance): draws under it are
    drawn again, as in any rejection from a truncated density. Where nearly
    all the conditional's mass lies under the floor (a series constant to
    the last digit), the draw is the floor after a few rounds.

    The conditional density ∝ v^(p-1)·exp(-(a·v + b/v)/2) with p = (1 - n)/2,
    a = 1/prior², b = S is GIG(p, a, b). Its factor v^(p-1)·exp(-b/(2v)) is
    an inverse-gamma kernel (shape (n - 1)/2, scale S/2) and the rest,
    exp(-a·v/2), is at most 1, so an inverse-gamma draw accepted with that
    probability is an exact draw (rejection sampling; Robert & Casella,
    Monte Carlo Statistical Methods, 2004, section 2.3). Draws still
    rejected after a few rounds, and n < 2, come from
    scipy.stats.geninvgauss (exact, but slow per element).
    """
    a = 1.0 / prior**2
    b = np.maximum(np.asarray(squares, dtype="float64"), _TINY)
    n = np.broadcast_to(np.asarray(counts, dtype="float64"), b.shape)
    out = np.full(b.shape, np.nan)
    for _ in range(_GIG_ROUNDS):
        todo = np.flatnonzero(np.isnan(out) & (n >= 2))
        if not todo.size:
            break
        v = 0.5 * b[todo] / rng.gamma(0.5 * (n[todo] - 1.0))
        accept = (rng.random(todo.size) < np.exp(-0.5 * a * v)) & (v >= floor)
        out[todo[accept]] = v[accept]
    for _ in range(_GIG_ROUNDS):
        rest = np.flatnonzero(np.isnan(out))
        if not rest.size:
            break
        p = 0.5 * (1.0 - n[rest])
        y = geninvgauss.rvs(p, np.sqrt(a * b[rest]), random_state=rng)
        v = np.sqrt(b[rest] / a) * np.atleast_1d(y)
        out[rest[v >= floor]] = v[v >= floor]
    return np.where(np.isnan(out), floor, out)


def _draw_dense(precision: np.ndarray, rhs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Batched exact draws x ~ N(P⁻¹b, P⁻¹), precision (B, d, d), rhs (B, d)."""
    chol = np.linalg.cholesky(precision)
    mean = np.linalg.solve(precision, rhs[..., None])[..., 0]
    shock = rng.standard_normal(rhs.shape)[..., None]
    # x = mean + L⁻ᵀz has covariance (L·Lᵀ)⁻¹.
    return mean + np.linalg.solve(np.swapaxes(chol, -1, -2), shock)[..., 0]


def _levinson(pacf: np.ndarray) -> tuple[list[np.ndarray], list[float]]:
    """Durbin-Levinson (as gapband.model._levinson, for one process in numpy).

    Returns the AR coefficients of each order 1..p and the innovation
    variances of the unit-variance process.
    """
    phis, variances = [], []
    previous = np.zeros(0)
    variance = 1.0
    for kappa in pacf:
        current = np.r_[previous - kappa * previous[::-1], kappa]
        variance *= 1.0 - kappa**2
        phis.append(current)
        variances.append(variance)
        previous = current
    return phis, variances


def _step_down(phi: np.ndarray) -> np.ndarray:
    """Inverse Durbin-Levinson: AR coefficients → partial autocorrelations."""
    pacf = np.empty(phi.size)
    current = np.asarray(phi, dtype="float64")
    for m in range(phi.size, 0, -1):
        kappa = current[-1]
        pacf[m - 1] = kappa
        if abs(kappa) >= 1.0:
            pacf[:m] = kappa  # non-stationary: flag and stop
            return pacf
        previous = current[:-1]
        current = (previous + kappa * previous[::-1]) / (1.0 - kappa**2)
    return pacf


def _log_jacobian(pacf: np.ndarray) -> float:
    """Log |det ∂φ/∂κ| of the Durbin-Levinson map.

    Step m maps (φ⁽ᵐ⁻¹⁾, κ_m) to φ⁽ᵐ⁾ = ((I - κ_m·J)φ⁽ᵐ⁻¹⁾, κ_m) with J the
    exchange matrix of size m - 1, whose eigenvalues are +1 (⌈(m-1)/2⌉ times)
    and -1 (⌊(m-1)/2⌋ times); the map is block triangular, so its determinant
    is (1 - κ_m)^⌈(m-1)/2⌉·(1 + κ_m)^⌊(m-1)/2⌋.
    """
    total = 0.0
    for m, kappa in enumerate(pacf, start=1):
        total += (m // 2) * np.log1p(-kappa) + ((m - 1) // 2) * np.log1p(kappa)
    return float(total)


def _ar_rows(pacf: np.ndarray, n_time: int) -> tuple[np.ndarray, np.ndarray]:
    """Prediction-error rows of a stationary unit-variance AR(p) path.

    Returns ``coefs`` (T, p + 1) with ``e_t = Σ_i coefs[t, i]·x[t - i]`` and
    ``variances`` (T,) of e_t: the first values use the lower-order
    coefficients (the exact decomposition the PyMC model uses), so the path's
    density is ∏ N(e_t; 0, variances[t]) and its precision Σ_t a_t·a_tᵀ/v_t.
    """
    p = pacf.size
    phis, innovations = _levinson(pacf)
    coefs = np.zeros((n_time, p + 1))
    coefs[:, 0] = 1.0
    variances = np.empty(n_time)
    variances[0] = 1.0
    for m in range(1, p):
        coefs[m, 1 : m + 1] = -phis[m - 1]
        variances[m] = innovations[m - 1]
    coefs[p:, 1:] = -phis[-1]
    variances[p:] = innovations[-1]
    return coefs, np.maximum(variances, _TINY)


def _ar_loglik(x: np.ndarray, pacf: np.ndarray) -> float:
    """Exact log density of a stationary unit-variance AR(p) path x (T,)."""
    coefs, variances = _ar_rows(pacf, x.size)
    p = pacf.size
    errors = coefs[:, 0] * x
    for i in range(1, p + 1):
        errors[i:] += coefs[i:, i] * x[:-i]
    return float(-0.5 * (np.log(2.0 * np.pi * variances) + errors**2 / variances).sum())
