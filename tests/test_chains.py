"""Chains run in rounds until they agree: the run-length rule and fresh starts, on toy jobs.

The judge is gapband.convergence, whose R-hat and ESS are ArviZ's (the
rank-normalised split R-hat and the bulk and tail ESS of Vehtari, Gelman,
Simpson, Carpenter & Bürkner, Bayesian Analysis 16, 2021).
"""

from __future__ import annotations

import numpy as np
import pytest

from gapband import chains, convergence

SERIES = np.array(["a", "b"])


class _Toy:
    """A chain whose probes are independent normal draws, shifted by ``offset``."""

    def __init__(self, rng, offset, fail_at):
        self.rng, self.offset, self.fail_at, self.done = rng, offset, fail_at, 0

    def sweep(self, n, tuning, report):
        self.done += n
        if self.fail_at is not None and self.done >= self.fail_at:
            raise chains.ChainFailure("a step failed", "noise sd 1e-9")
        report(n)
        if tuning:
            return np.empty((0, 6))
        return self.rng.normal(self.offset, 1.0, (n, 6))

    def result(self):
        return self.done


class _Job:
    """Chain i is offset by ``offsets[i]``; chain 1 fails after ``fail_at`` sweeps.

    Only chain 1's first start fails, or every one of its starts with ``always``
    (a chain is known by its stream's spawn key: (chain, start)).
    """

    def __init__(self, offsets, fail_at=None, always=False):
        self.offsets, self.fail_at, self.always = offsets, fail_at, always

    def start(self, stream):
        chain, start = stream.spawn_key
        fails = self.fail_at if chain == 0 and (self.always or start == 0) else None
        return _Toy(np.random.default_rng(stream), self.offsets[chain], fails)


def _judge(rows):
    n = min(len(r) for r in rows)
    stacked = np.stack([r[:n] for r in rows])
    return convergence.assess(convergence.probes(stacked[:, :, :2], stacked[:, :, 2:4],
                                                 stacked[:, :, 4:6], None, SERIES))


def _streams(n):
    return np.random.SeedSequence(0).spawn(n)


def test_chains_that_agree_stop_once_rhat_and_ess_reach_their_targets():
    plan = chains.Plan(tune=10, draws=None, budget=60.0, first=200)
    outcome = chains.run(_Job([0.0] * 4), _streams(4), 1, plan, _judge)
    assert outcome.stopped_by == "converged"
    assert outcome.verdict.converged
    assert outcome.verdict.r_hat_max <= convergence.R_HAT_MAX
    assert min(outcome.verdict.ess_bulk_min, outcome.verdict.ess_tail_min) >= convergence.ESS_MIN
    assert all(p.shape == (outcome.sweeps, 6) for p in outcome.probes)


def test_chains_that_disagree_run_until_the_budget_and_say_so():
    plan = chains.Plan(tune=10, draws=None, budget=1.5, first=200)
    outcome = chains.run(_Job([0.0, 0.0, 0.0, 3.0]), _streams(4), 1, plan, _judge)
    assert outcome.stopped_by == "budget"
    assert not outcome.verdict.converged
    assert outcome.verdict.r_hat_max > 1.3  # one chain three sds away from the rest
    assert outcome.sweeps > 200  # more rounds were tried within the budget


def test_a_fixed_number_of_draws_is_one_round_and_still_judged():
    plan = chains.Plan(tune=10, draws=50, budget=60.0)
    outcome = chains.run(_Job([0.0] * 2), _streams(2), 1, plan, _judge)
    assert (outcome.stopped_by, outcome.sweeps) == ("draws", 50)
    assert outcome.verdict.n_draws == 100


@pytest.mark.parametrize("cores", [1, 2])
def test_a_failed_chain_starts_afresh_and_catches_up(cores):
    plan = chains.Plan(tune=10, draws=40, budget=60.0)
    job = _Job([0.0, 0.0], fail_at=25)
    outcome = chains.run(job, _streams(2), cores, plan, _judge)
    assert outcome.restarts == ["chain 1: a step failed (noise sd 1e-9)"]
    assert all(p.shape == (40, 6) for p in outcome.probes)
    assert outcome.results[0] == 50  # the fresh start burned in and swept all 40 again


@pytest.mark.parametrize("cores", [1, 2])
def test_a_chain_that_cannot_be_saved_is_lost_with_its_reason(cores):
    plan = chains.Plan(tune=10, draws=40, budget=60.0)
    with pytest.raises(chains.ChainLost, match=r"chain 1 of the sampler failed after 3 fresh "
                       r"starts; last: a step failed \(noise sd 1e-9\)"):
        chains.run(_Job([0.0, 0.0], fail_at=25, always=True), _streams(2), cores, plan, _judge)


def test_chain_widths_compare_each_chains_interval():
    rng = np.random.default_rng(1)
    draws = rng.normal(size=(2, 2000, 4))
    draws[1, :, 2:] *= 2.0  # chain 2 twice as wide on series b's cells
    checked = convergence.probes(draws, draws, np.ones((2, 2000, 2)), None, SERIES)
    ratios = convergence.chain_widths(checked, np.array(["a", "a", "b", "b"]))
    assert ratios["a"] == pytest.approx(1.0, abs=0.1)
    assert ratios["b"] == pytest.approx(2.0, rel=0.1)
