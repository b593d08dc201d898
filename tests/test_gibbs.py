"""The exact block-Gibbs sampler: each block against a closed form, the whole against
the Kalman smoother and NUTS, seeds and the fill path."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from gapband import chains, filling, gibbs, inference, predict, spec
from gapband.errors import FitError, UsageError
from gapband.gmrf import draw_banded, draw_bordered
from gapband.panel import make_panel


def _panel(values: np.ndarray, step: str = "h"):
    n_series, n_time = values.shape
    time = pd.date_range("2024-01-01", periods=n_time, freq=step)
    return make_panel(values, [f"s{i}" for i in range(n_series)], time, step)


def _simulated(seed=0, n_series=4, n_time=150, share=0.15):
    """A shared smooth factor with a daily cycle, a shared AR(1) factor and noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_time)
    common = np.cumsum(rng.normal(0, 0.15, n_time)) + np.sin(2 * np.pi * t / 24)
    ar = np.zeros(n_time)
    for i in range(1, n_time):
        ar[i] = 0.7 * ar[i - 1] + rng.normal(0, 0.5)
    truth = np.array([(1 + 0.5 * i) * common + (1 - 0.3 * i) * ar + rng.normal(0, 0.3, n_time)
                      for i in range(n_series)])
    hidden = rng.random(truth.shape) < share
    return _panel(np.where(hidden, np.nan, truth)), truth, hidden


SIMPLE = {"rank": 1, "seasonal": [{"period": 24, "harmonics": 1}], "ar_factors": 1,
          "ar_order": 1, "own_ar": False}


def _assert_cov_close(draws: np.ndarray, cov: np.ndarray) -> None:
    """Sample covariance within 4 standard errors, se² = (c_ii·c_jj + c_ij²)/n (Wishart)."""
    sd = np.sqrt(np.diag(cov))
    se = np.sqrt((np.outer(sd, sd) ** 2 + cov**2) / draws.shape[0])
    np.testing.assert_array_less(np.abs(np.cov(draws.T) - cov), 4 * se + 1e-12)


def _dense(ab: np.ndarray) -> np.ndarray:
    n = ab.shape[1]
    q = np.zeros((n, n))
    for i in range(ab.shape[0]):
        q += np.diag(ab[i, : n - i], -i)
        if i:
            q += np.diag(ab[i, : n - i], i)
    return q


def test_banded_and_bordered_draws_match_the_dense_gaussian():
    # Source: a Gaussian in canonical form with precision P and linear term b
    # is N(P⁻¹b, P⁻¹) (Rue & Held, Gaussian Markov Random Fields, 2005,
    # section 2.1); computed densely with numpy.linalg.
    rng = np.random.default_rng(1)
    n, bandwidth, m = 10, 2, 2
    ab = np.zeros((bandwidth + 1, n))
    ab[0] = 3.0 + rng.random(n)
    ab[1, :-1] = -0.8 + 0.2 * rng.random(n - 1)
    ab[2, :-2] = 0.3 * rng.random(n - 2)
    rhs = rng.normal(size=n)
    border = 0.3 * rng.normal(size=(n, m))
    corner = np.array([[2.0, 0.3], [0.3, 1.5]])
    corner_rhs = rng.normal(size=m)
    joint = np.block([[_dense(ab), border], [border.T, corner]])
    cov = np.linalg.inv(joint)
    mean = cov @ np.r_[rhs, corner_rhs]

    draws = 20_000
    banded = np.array([draw_banded(ab, rhs, rng) for _ in range(draws)])
    banded_cov = np.linalg.inv(_dense(ab))
    np.testing.assert_array_less(np.abs(banded.mean(axis=0) - banded_cov @ rhs),
                                 5 * np.sqrt(np.diag(banded_cov) / draws))
    _assert_cov_close(banded, banded_cov)

    bordered = np.array([np.r_[draw_bordered(ab, rhs, border, corner, corner_rhs, rng)]
                         for _ in range(draws)])
    np.testing.assert_array_less(np.abs(bordered.mean(axis=0) - mean),
                                 5 * np.sqrt(np.diag(cov) / draws))
    _assert_cov_close(bordered, cov)


def _sampler(z, spec_dict, rank=1, ar_factors=0, fourier=None, seed=0):
    model_spec = spec.parse(spec_dict)
    fourier = np.zeros((z.shape[1], 0)) if fourier is None else fourier
    return gibbs._Sampler(z, fourier, model_spec, rank, ar_factors,
                          np.random.default_rng(seed)), model_spec


@pytest.mark.parametrize("own_ar", [False, True])
def test_loading_draws_match_the_conjugate_regression(own_ar):
    # Source: Bayesian linear regression with known error covariance K and a
    # N(0, s²I) prior has posterior N(V·XᵀK⁻¹y, V), V = (XᵀK⁻¹X + I/s²)⁻¹
    # (Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, section 14.2,
    # with K = σ²I; the general K is the generalised least-squares form of
    # the same section). With an own AR(1) path integrated out,
    # K = own_sd²·ρ^|i-j| + σ²I on the observed cells; computed densely.
    rng = np.random.default_rng(2)
    n_time, sd, rho, noise, prior = 40, 0.6, 0.7, 0.4, 0.8
    z = rng.normal(size=(2, n_time))
    z[0, 5:9] = np.nan
    sampler, _ = _sampler(z, {"rank": 1, "seasonal": [], "ar_factors": 1, "own_ar": own_ar,
                              "priors": {"loading": prior}}, rank=1, ar_factors=1)
    state = sampler.initial()
    state.trend = np.cumsum(rng.normal(size=(1, n_time)), axis=1) * 0.3
    state.ar = rng.normal(size=(1, n_time))
    state.noise = np.full(2, noise)
    state.own_sd, state.own_rho = np.full(2, sd), np.full(2, rho)
    design = np.vstack([state.trend, state.ar]).T
    draws = np.array([(sampler._loadings(state), np.c_[state.loading, state.short_loading])[1]
                      for _ in range(20_000)])

    lags = np.abs(np.subtract.outer(np.arange(n_time), np.arange(n_time)))
    for n in range(2):
        seen = ~np.isnan(z[n])
        k = noise**2 * np.eye(n_time) + (sd**2 * rho**lags if own_ar else 0.0)
        k_inv = np.linalg.inv(k[np.ix_(seen, seen)])
        x = design[seen]
        v = np.linalg.inv(x.T @ k_inv @ x + np.eye(2) / prior**2)
        mean = v @ x.T @ k_inv @ z[n, seen]
        np.testing.assert_array_less(np.abs(draws[:, n].mean(axis=0) - mean),
                                     5 * np.sqrt(np.diag(v) / draws.shape[0]))
        _assert_cov_close(draws[:, n], v)


def test_own_marginal_matches_the_dense_normal_density():
    # Source: an AR(1) path with autocovariance sd²·ρ^|i-j| plus independent
    # noise is Gaussian with that covariance plus σ²I on the observed cells
    # (scipy.stats.multivariate_normal.logpdf, computed densely).
    rng = np.random.default_rng(3)
    n_time = 30
    resid = rng.normal(size=(2, n_time))
    base = np.ones((2, n_time))
    base[1, [3, 4, 17]] = 0.0
    sd, rho, noise = np.array([0.9, 0.4]), np.array([0.8, 0.3]), np.array([0.5, 0.2])
    got, _, _ = gibbs._own_marginal(resid, base, sd, rho, noise)
    lags = np.abs(np.subtract.outer(np.arange(n_time), np.arange(n_time)))
    for n in range(2):
        seen = base[n] > 0
        cov = (sd[n] ** 2 * rho[n] ** lags + noise[n] ** 2 * np.eye(n_time))[np.ix_(seen, seen)]
        expected = stats.multivariate_normal(np.zeros(seen.sum()), cov).logpdf(resid[n, seen])
        assert got[n] == pytest.approx(expected, rel=1e-9)

    # With regressors X whose coefficients ~ N(0, s²I) integrated out too, the
    # covariance gains s²·XXᵀ (same source, computed densely).
    design, prior = rng.normal(size=(2, n_time)), 0.7
    got, _, _ = gibbs._own_marginal(resid, base, sd, rho, noise, design, prior)
    for n in range(2):
        seen = base[n] > 0
        cov = (sd[n] ** 2 * rho[n] ** lags + noise[n] ** 2 * np.eye(n_time)
               + prior**2 * design.T @ design)[np.ix_(seen, seen)]
        expected = stats.multivariate_normal(np.zeros(seen.sum()), cov).logpdf(resid[n, seen])
        assert got[n] == pytest.approx(expected, rel=1e-9)


def test_ar_pieces_match_yule_walker_and_a_numeric_jacobian():
    # Source: a stationary AR(2) with unit variance has autocorrelations
    # ρ1 = φ1/(1 - φ2), ρk = φ1·ρ(k-1) + φ2·ρ(k-2) (Yule-Walker equations;
    # Brockwell & Davis, 2002, section 3.3, from memory); the exact density of
    # a path is then the dense normal density with that Toeplitz covariance.
    pacf = np.array([0.6, -0.3])
    phi = gibbs._levinson(pacf)[0][-1]
    n_time = 25
    acf = np.empty(n_time)
    acf[0], acf[1] = 1.0, phi[0] / (1 - phi[1])
    for k in range(2, n_time):
        acf[k] = phi[0] * acf[k - 1] + phi[1] * acf[k - 2]
    lags = np.abs(np.subtract.outer(np.arange(n_time), np.arange(n_time)))
    x = np.random.default_rng(4).normal(size=n_time)
    dense = stats.multivariate_normal(np.zeros(n_time), acf[lags]).logpdf(x)
    assert gibbs._ar_loglik(x, pacf) == pytest.approx(dense, rel=1e-9)
    np.testing.assert_allclose(gibbs._step_down(phi), pacf, atol=1e-12)

    # The Jacobian of partial autocorrelations → coefficients, by central differences.
    pacf3 = np.array([0.5, -0.4, 0.3])
    step = 1e-6
    columns = [(gibbs._levinson(pacf3 + step * e)[0][-1]
                - gibbs._levinson(pacf3 - step * e)[0][-1]) / (2 * step) for e in np.eye(3)]
    numeric = np.log(abs(np.linalg.det(np.column_stack(columns))))
    assert gibbs._log_jacobian(pacf3) == pytest.approx(numeric, abs=1e-7)


def test_variance_draws_follow_the_gig_conditional():
    # Source: with sd ~ HalfNormal(c) and n Gaussian terms of sum of squares S,
    # p(v | ·) ∝ v^(-(n+1)/2)·exp(-S/(2v) - v/(2c²)); its mean by numerical
    # integration (scipy.integrate.quad) against the sample mean of the draws.
    rng = np.random.default_rng(5)
    squares, count, prior = 7.0, 12, 0.5
    draws = gibbs._gig_variance(np.full(10_000, squares), np.full(10_000, count), prior, rng)

    def density(v):
        return v ** (-(count + 1) / 2) * np.exp(-squares / (2 * v) - v / (2 * prior**2))

    norm = integrate.quad(density, 0, np.inf)[0]
    mean = integrate.quad(lambda v: v * density(v), 0, np.inf)[0] / norm
    assert draws.mean() == pytest.approx(mean, rel=0.02)  # about 4 standard errors
    # Source: scipy.stats.geninvgauss, GIG(p, a, b) as sqrt(b/a)·GIG(p, sqrt(ab)).
    a, p = 1 / prior**2, (1 - count) / 2
    reference = stats.geninvgauss(p, np.sqrt(a * squares), scale=np.sqrt(squares / a))
    assert stats.kstest(draws, reference.cdf).pvalue > 1e-3
    # A prior far narrower than the data asks for: the scipy fallback takes over.
    wide = gibbs._gig_variance(np.full(2_000, 500.0), np.full(2_000, 5), 0.05, rng)
    reference = stats.geninvgauss(-2.0, np.sqrt(500.0) / 0.05, scale=np.sqrt(500.0) * 0.05)
    assert stats.kstest(wide, reference.cdf).pvalue > 1e-3


def test_same_seed_same_draws_names_match_the_pymc_model():
    panel, _, _ = _simulated(n_time=80)
    small = spec.parse(SIMPLE | {"own_ar": True, "ar_order": 2})
    first = inference.fit(panel, small, method="gibbs", draws=30, tune=10, seed=4)
    again = inference.fit(panel, small, method="gibbs", draws=30, tune=10, seed=4)
    other = inference.fit(panel, small, method="gibbs", draws=30, tune=10, seed=5)
    assert first.posterior.equals(again.posterior)
    assert not np.array_equal(first.posterior["trend"].values, other.posterior["trend"].values)
    names = {v.name for v in first.built.model.free_RVs + first.built.model.deterministics}
    # Own paths are kept at the missing cells and as a mean, not whole.
    assert set(first.posterior.data_vars) == (names - {"trend_steps", "own_unit"}
                                              | set(gibbs.OWN_KEPT))
    for name in names & set(first.posterior.data_vars):  # the PyMC model's dims
        assert first.posterior[name].dims[2:] == tuple(first.built.model.named_vars_to_dims
                                                       .get(name, ())), name
    np.testing.assert_array_equal(first.posterior["gap"].values,
                                  np.flatnonzero(panel["value"].isnull().values.ravel()))
    assert {"build", "tune", "sample", "diagnostics"} <= set(first.timings)
    assert first.diagnostics["divergences"] == 0
    assert first.diagnostics["n_draws"] == 4 * 30  # four chains by default


def test_chains_in_processes_give_the_draws_of_one_process():
    panel, _, _ = _simulated(n_time=60)
    small = spec.parse(SIMPLE | {"own_ar": True})
    built = inference.build(panel, small)
    coords = {name: np.asarray(values) for name, values in built.model.coords.items()}
    runs = [gibbs.sample(built.z, built.fourier.values, small, rank=built.rank,
                         ar_factors=built.ar_factors, coords=coords,
                         plan=chains.Plan(tune=5, draws=15, budget=60.0),
                         chains=2, seed=3, cores=cores)
            for cores in (1, 2)]
    assert runs[0][0].equals(runs[1][0])
    assert [run[1]["cores"] for run in runs] == [1, 2]


def test_student_t_noise_runs_and_weights_observed_cells():
    panel, truth, hidden = _simulated(seed=2, n_time=80)
    robust = spec.parse(SIMPLE | {"noise": "student_t", "noise_df": 4.0, "own_ar": True})
    fitted = inference.fit(panel, robust, method="gibbs", draws=40, tune=20, seed=1)
    filled = predict.summarise(fitted, panel, levels=(90,))
    assert np.isfinite(filled["fill_mean"].values[hidden]).all()


def test_fill_with_gibbs_leaves_observed_cells_unchanged():
    panel, truth, hidden = _simulated(seed=3, n_time=96)
    # Hidden cells at a record's ends are filled too (they are not, by default).
    options = filling.FillOptions(method="gibbs", draws=60, tune=30, seed=2, progress=False,
                                  rules=filling.FlagRules(extrapolate=True))
    result, summary = filling.fill(panel, model=spec.parse(SIMPLE), options=options)
    observed = ~hidden
    np.testing.assert_array_equal(result["filled"].values[observed], truth[observed])
    assert np.isfinite(result["filled"].values[hidden]).all()
    assert summary["method"] == "gibbs" and not summary["approximate"]
    again, _ = filling.fill(panel, model=spec.parse(SIMPLE), options=options)
    np.testing.assert_array_equal(result["filled"].values, again["filled"].values)


def test_unknown_method_lists_gibbs():
    panel, _, _ = _simulated(n_time=40)
    with pytest.raises(UsageError, match=r"use one of 'nuts', 'advi', 'gibbs'"):
        inference.fit(panel, spec.parse(SIMPLE), method="hmc")


@pytest.mark.slow
def test_gibbs_agrees_with_nuts_on_a_small_panel(record_property):
    # Source: PyMC NUTS on the same model and priors (gapband.model) is the
    # reference. Tolerance: the difference of two Monte Carlo means has
    # standard error sd·sqrt(1/ESS_gibbs + 1/ESS_nuts); allow 4 of them per
    # cell, and sds within 15 % (sd estimates from a few hundred effective
    # draws carry about 5 % error each). Four chains each (issue 14), started
    # apart, so that R-hat can see a chain that settled elsewhere; the draws
    # kept in all are those two chains kept before (NUTS 2,000, Gibbs 4,000).
    panel, _, hidden = _simulated(seed=0)
    simple = spec.parse(SIMPLE)
    exact = inference.fit(panel, simple, method="nuts", draws=500, tune=500, chains=4,
                          seed=1)
    fast = inference.fit(panel, simple, method="gibbs", draws=1000, tune=500, chains=4,
                         seed=1)
    assert exact.posterior.sizes["chain"] == fast.posterior.sizes["chain"] == 4
    a = predict.summarise(exact, panel, levels=(90,))
    b = predict.summarise(fast, panel, levels=(90,))
    sd = a["fill_sd"].values[hidden]
    ess = min(exact.diagnostics["ess_bulk_min"], fast.diagnostics["ess_bulk_min"])
    record_property("ess_min", ess)
    record_property("r_hat_max", [exact.diagnostics["r_hat_max"], fast.diagnostics["r_hat_max"]])
    record_property("timings", {"nuts": exact.timings, "gibbs": fast.timings})
    tolerance = 4 * sd * np.sqrt(2 / ess)
    np.testing.assert_array_less(np.abs(a["fill_mean"].values[hidden]
                                        - b["fill_mean"].values[hidden]), tolerance)
    np.testing.assert_allclose(b["fill_sd"].values[hidden], sd, rtol=0.15)


def test_collapsed_density_has_no_false_mode_as_the_own_sd_vanishes():
    # Source: white noise y ~ N(0, σ²I) is the limit of an AR(1) path plus that
    # noise as the path's sd goes to 0 (the path's covariance vanishes), so the
    # collapsed density must approach scipy's independent-normal density,
    # within a shrinking distance. The density once used unfloored values
    # beside a floored factorisation and grew without bound on such a series
    # (1,766 above the limit at sd 1e-4, 15,869 at 1e-8).
    rng = np.random.default_rng(11)
    n_time, noise = 2000, 0.7
    resid = rng.normal(0.0, noise, size=(1, n_time))
    white = stats.norm(0.0, noise).logpdf(resid).sum()
    distance = []
    for sd in (1e-1, 1e-2, spec.SCALE_FLOOR):
        got, _, _ = gibbs._own_marginal(resid, np.ones((1, n_time)), np.array([sd]),
                                        np.array([0.6]), np.array([noise]))
        distance.append(abs(float(got[0]) - white))
    # The gap shrinks like sd² (the path's variance), to 1e-4 at the floor.
    assert distance == sorted(distance, reverse=True)
    assert distance[-1] < 1e-4


def test_collapsed_density_is_exact_when_the_noise_is_tiny_beside_the_path():
    # Source: the dense Gaussian density of path plus noise (scipy.stats
    # multivariate_normal), at the noise floor where the Woodbury form
    # W - W(Q + W)⁻¹W cancels: the sampler's form must not.
    rng = np.random.default_rng(12)
    n_time = 60
    sd, rho, noise = np.array([1.3]), np.array([0.95]), np.array([spec.SCALE_FLOOR])
    lags = np.abs(np.subtract.outer(np.arange(n_time), np.arange(n_time)))
    cov = sd[0] ** 2 * rho[0] ** lags + noise[0] ** 2 * np.eye(n_time)
    resid = rng.multivariate_normal(np.zeros(n_time), cov)[None, :]
    design, prior = rng.normal(size=(3, n_time)), 1.0
    got, _, regression = gibbs._own_marginal(resid, np.ones((1, n_time)), sd, rho, noise,
                                             design, prior)
    full = cov + prior**2 * design.T @ design
    expected = stats.multivariate_normal(np.zeros(n_time), full).logpdf(resid[0])
    assert got[0] == pytest.approx(expected, rel=1e-7)
    np.linalg.cholesky(regression[0][0])  # positive definite


def test_a_row_that_cannot_be_evaluated_is_minus_infinity_not_an_error():
    rng = np.random.default_rng(13)
    resid = rng.normal(size=(3, 40))
    sd = np.array([0.5, np.nan, 0.5])  # an impossible value: the factorisation fails there
    got, _, _ = gibbs._own_marginal(resid, np.ones((3, 40)), sd, np.full(3, 0.5),
                                    np.full(3, 0.3), rng.normal(size=(2, 40)), 1.0)
    assert got[1] == -np.inf
    assert np.isfinite(got[[0, 2]]).all()


def test_a_chain_that_fails_is_started_afresh_and_the_restart_is_recorded(monkeypatch):
    panel, _, _ = _simulated(n_time=60)
    small = spec.parse(SIMPLE | {"own_ar": True})
    original = gibbs._Sampler._store_shared
    calls = {"n": 0}

    def fails_once(self, *args):
        calls["n"] += 1
        if calls["n"] == 3:
            raise np.linalg.LinAlgError("3-th leading minor not positive definite")
        return original(self, *args)

    monkeypatch.setattr(gibbs._Sampler, "_store_shared", fails_once)
    fitted = inference.fit(panel, small, method="gibbs", draws=20, tune=5, chains=2, cores=1,
                           seed=1)
    restarts = fitted.diagnostics["restarts"]
    assert len(restarts) == 1
    assert restarts[0].startswith("chain 1: a Gibbs step failed: 3-th leading minor")
    assert "smallest noise sd: 's" in restarts[0]
    assert fitted.posterior.sizes["draw"] == 20


def test_a_chain_that_always_fails_stops_the_fit_with_a_clear_message(monkeypatch):
    panel, _, _ = _simulated(n_time=60)

    def always(self, *args):
        raise np.linalg.LinAlgError("not positive definite")

    monkeypatch.setattr(gibbs._Sampler, "_store_shared", always)
    with pytest.raises(FitError, match=r"chain 1 of the sampler failed after 3 fresh starts; "
                       r"last: a Gibbs step failed: not positive definite \(smallest noise sd: "
                       r"'s\d' .*trend step sd: .*check the series named, try another --seed"):
        inference.fit(panel, spec.parse(SIMPLE), method="gibbs", draws=10, tune=2, chains=2,
                      cores=1)


def test_trend_scale_move_uses_the_kalman_filter_likelihood():
    # Source: statsmodels UnobservedComponents (local level + AR(1) + irregular),
    # whose Kalman filter log-likelihood with a known initial state and no
    # burn-in is the exact marginal likelihood the joint trend-scale move
    # accepts on; missing cells are skipped by both.
    from statsmodels.tsa.statespace.structural import UnobservedComponents

    rng = np.random.default_rng(5)
    n_time, delta, phi, short, noise, level_sd = 120, 0.15, 0.6, 0.8, 0.4, 1.0
    level = np.cumsum(np.r_[rng.normal(0, level_sd), rng.normal(0, delta, n_time - 1)])
    ar = np.zeros(n_time)
    ar[0] = rng.normal()
    for t in range(1, n_time):
        ar[t] = phi * ar[t - 1] + rng.normal(0, np.sqrt(1 - phi**2))
    y = level + short * ar + rng.normal(0, noise, n_time)
    y[[5, 6, 7, 40, 80, 81]] = np.nan
    model = spec.parse({"rank": 1, "seasonal": [], "ar_factors": 1, "ar_order": 1,
                        "own_ar": False, "fixed": {"loading": 1.0, "noise": noise},
                        "priors": {"level": level_sd}})
    sampler = gibbs._Sampler(y[None, :], np.zeros((n_time, 0)), model, 1, 1, rng)
    state = sampler.initial()
    state.short_loading[:], state.pacf[:] = short, phi
    state.innovation[:], state.noise[:] = delta, noise
    ours = sampler._shared_posterior(state, sampler._shared_data(state), state.innovation)[1]

    reference = UnobservedComponents(y, level="llevel", autoregressive=1)
    reference.ssm.initialize_known(np.zeros(2), np.diag([level_sd**2, short**2]))
    reference.ssm.loglikelihood_burn = 0
    expected = reference.loglike(np.array([noise**2, delta**2, short**2 * (1 - phi**2), phi]))
    assert ours == pytest.approx(expected, rel=1e-6)
