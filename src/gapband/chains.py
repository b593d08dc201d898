"""Run Markov chains in rounds until their draws agree, here or in worker processes.

A sampler hands this module a *job*: ``job.start(stream)`` returns a chain
with ``sweep(n, tuning, report)`` (returning one row of probes per kept
sweep: the quantities convergence is judged on) and ``result()``. :func:`run`
burns every chain in, then runs rounds of sweeps until a judge says the
probes of all chains agree, a fixed number of sweeps is done, or a time
budget is spent. A chain that fails numerically (:class:`ChainFailure`) is
started afresh from a new start, a bounded number of times; one that cannot
be saved stops the run with :class:`ChainLost`, whose message says why.
"""

from __future__ import annotations

import multiprocessing
import queue
import signal
import sys
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from threadpoolctl import threadpool_limits

#: Chains by default: enough for R-hat to see a chain that wandered off.
DEFAULT_CHAINS = 4

#: Burn-in sweeps when not given (the sampler adapts its steps during them).
GIBBS_TUNE = 500

#: Seconds of sampling after which rounds stop, converged or not (the fill says which).
TIME_BUDGET = 600.0

#: Most draws kept per chain when running until convergence (longer runs are thinned).
KEPT_DRAWS = 250

#: Fresh starts a chain gets after a numerical failure before the run stops.
MAX_RESTARTS = 3

#: Seconds between progress reports of a chain.
REPORT_EVERY = 0.25


class ChainFailure(Exception):
    """A chain reached a state it cannot sweep from (a precision not numerically positive definite).

    ``detail`` describes the state in the user's terms (series and parameter values).
    """

    def __init__(self, what: str, detail: str = ""):
        super().__init__(what + (f" ({detail})" if detail else ""))


class ChainLost(Exception):
    """A chain failed after every fresh start; the message says where and what to try."""


@dataclass(frozen=True)
class Plan:
    """How long to run: burn-in, then a fixed number of sweeps or until convergence.

    Attributes
    ----------
    tune : int
        Burn-in sweeps per chain (the sampler adapts its steps during them).
    draws : int or None
        Kept sweeps per chain; None runs rounds until the judge is satisfied
        or ``budget`` is spent.
    budget : float
        Seconds of sampling after which rounds stop, converged or not.
    first : int
        Sweeps per chain in the first round when ``draws`` is None; later
        rounds add half the sweeps done so far (at least ``first``/2).
    """

    tune: int
    draws: int | None
    budget: float
    first: int = 200


@dataclass
class Outcome:
    """What :func:`run` returns."""

    results: list  # each chain's result(), in stream order
    probes: list[np.ndarray]  # each chain's probe rows, (sweeps, columns)
    verdict: object  # the judge's last verdict (None with fixed draws and no judge call)
    sweeps: int  # kept sweeps per chain
    restarts: list[str] = field(default_factory=list)  # why each fresh start happened
    stopped_by: str = "draws"  # "draws", "converged" or "budget"
    seconds: float = 0.0


Judge = Callable[[list[np.ndarray]], object]


def run(job, streams: list[np.random.SeedSequence], cores: int, plan: Plan, judge: Judge,
        status: Callable[[str, int], None] | None = None) -> Outcome:
    """Burn in every chain, then sweep in rounds until ``plan`` says stop.

    Parameters
    ----------
    job
        Has ``start(stream)`` returning a chain (see the module docstring); picklable.
    streams : list of SeedSequence
        One per chain; the same streams give the same draws on any number of cores.
    cores : int
        Chains run at once; 1 runs them in turn in this process.
    plan : Plan
    judge : callable
        Takes every chain's probes and returns a verdict with a bool
        ``converged`` and a str ``status`` (shown in the progress line).
    status : callable, optional
        Called with (text, sweeps done since the last call) as the run goes.

    Raises
    ------
    ChainLost
        A chain failed after :data:`MAX_RESTARTS` fresh starts.
    """
    status = status or (lambda text, done: None)
    started = time.perf_counter()
    pool = (_Local(job, streams, plan.tune) if cores == 1
            else _Workers(job, streams, plan.tune, cores))
    probes: list[list[np.ndarray]] = [[] for _ in streams]
    verdict, sweeps, stopped_by = None, 0, "draws"
    try:
        size = plan.draws if plan.draws is not None else plan.first
        while size > 0:
            for index, (rows, replaced) in pool.draw(size, status).items():
                probes[index] = [rows] if replaced else [*probes[index], rows]
            sweeps += size
            if plan.draws is not None:
                break
            verdict = judge([np.concatenate(rows) for rows in probes])
            status(verdict.status, 0)
            if verdict.converged:
                stopped_by = "converged"
                break
            elapsed = time.perf_counter() - started
            rate = elapsed / sweeps  # seconds per sweep per chain, burn-in included
            size = min(max(sweeps // 2, plan.first // 2), int((plan.budget - elapsed) / rate))
            stopped_by = "budget"
        results, restarts = pool.finish()
    finally:
        pool.close()
    flat = [np.concatenate(rows) for rows in probes]
    if plan.draws is not None:
        verdict = judge(flat)
    return Outcome(results, flat, verdict, sweeps, restarts, stopped_by,
                   time.perf_counter() - started)


class _Tracked:
    """One chain with its fresh starts: burns in, catches up after a failure, counts sweeps."""

    def __init__(self, job, stream: np.random.SeedSequence, tune: int, index: int):
        self.job, self.tune, self.index = job, tune, index
        self.starts = iter(stream.spawn(MAX_RESTARTS + 1))
        self.failures: list[str] = []
        self.kept = 0
        self.chain = None

    def draw(self, sweeps: int, report) -> tuple[np.ndarray, bool]:
        """``sweeps`` more kept sweeps: their probes, and whether earlier probes were replaced."""
        replaced = self.chain is None
        while True:
            try:
                if self.chain is None:
                    self.chain = self.job.start(next(self.starts))
                    self.chain.sweep(self.tune, True, report)
                    rows = self.chain.sweep(self.kept + sweeps, False, report)
                else:
                    rows = self.chain.sweep(sweeps, False, report)
                self.kept += sweeps
                return rows, replaced
            except ChainFailure as failure:
                self.failures.append(f"chain {self.index + 1}: {failure}")
                if len(self.failures) > MAX_RESTARTS:
                    raise ChainLost(
                        f"chain {self.index + 1} of the sampler failed after {MAX_RESTARTS} "
                        f"fresh starts; last: {failure}") from None
                self.chain, replaced = None, True


class _Local:
    """Chains run in turn in this process, on one BLAS thread.

    The sampler's matrix products are small, and an idle BLAS thread spins on a core.
    """

    def __init__(self, job, streams, tune: int):
        self.chains = [_Tracked(job, stream, tune, i) for i, stream in enumerate(streams)]

    def draw(self, sweeps: int, status) -> dict[int, tuple[np.ndarray, bool]]:
        with threadpool_limits(1):
            return {tracked.index: tracked.draw(sweeps, lambda done: status("", done))
                    for tracked in self.chains}

    def finish(self) -> tuple[list, list[str]]:
        return ([tracked.chain.result() for tracked in self.chains],
                [failure for tracked in self.chains for failure in tracked.failures])

    def close(self) -> None:
        pass


class _Workers:
    """Chains on worker processes; worker i holds chains i, i + cores, ...

    Each worker answers commands (sweep, finish) on a queue of its own and
    reports sweeps done, probes, results and failures on one shared queue.
    The workers are ours alone, so an interruption or a failure stops every
    one of them at once. Workers are forked on Linux (no re-import of the
    caller's script, so scripts need no ``if __name__ == "__main__"`` guard)
    and spawned elsewhere, where forking a process with threads is unsafe.
    """

    def __init__(self, job, streams, tune: int, cores: int):
        context = multiprocessing.get_context("fork" if sys.platform == "linux" else "spawn")
        self.reports = context.Queue()
        self.commands = [context.Queue() for _ in range(cores)]
        self.count = len(streams)
        self.workers = [
            context.Process(target=_serve, daemon=True,
                            args=(job, list(enumerate(streams))[first::cores], tune,
                                  self.commands[first], self.reports))
            for first in range(cores)]
        self.finished = False
        for worker in self.workers:
            worker.start()

    def draw(self, sweeps: int, status) -> dict[int, tuple[np.ndarray, bool]]:
        for commands in self.commands:
            commands.put(("draw", sweeps))
        return self._collect("probes", status)

    def finish(self) -> tuple[list, list[str]]:
        for commands in self.commands:
            commands.put(("finish", 0))
        done = self._collect("chain", lambda text, n: None)
        self.finished = True
        return ([done[i][0] for i in range(self.count)],
                [failure for i in range(self.count) for failure in done[i][1]])

    def _collect(self, kind: str, status) -> dict[int, tuple]:
        collected: dict[int, tuple] = {}
        while len(collected) < self.count:
            try:
                message, index, *payload = self.reports.get(timeout=0.1)
            except queue.Empty:
                if not any(worker.is_alive() for worker in self.workers):
                    raise RuntimeError("a sampler process ended without its draws") from None
                continue
            if message == "sweeps":
                status("", payload[0])
            elif message == "lost":
                raise ChainLost(payload[0])
            elif message == "failed":
                raise RuntimeError(f"sampler chain {index + 1} failed:\n{payload[0]}")
            elif message == kind:
                collected[index] = tuple(payload)
        return collected

    def close(self) -> None:
        for worker in self.workers:
            if not self.finished:  # interrupted or failed: stop the chains now
                worker.terminate()
            worker.join()


def _serve(job, chains: list[tuple[int, np.random.SeedSequence]], tune: int, commands,
           reports) -> None:
    """A worker process: run its chains as commanded, on one BLAS thread.

    The worker leaves interruptions to its parent: it ignores SIGINT (a
    Ctrl-C reaches the whole process group) and dies quietly on SIGTERM,
    which is how the parent stops it, instead of running a signal handler
    inherited from the parent (the command line's raises an exception,
    whose traceback the dying worker would print).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    tracked = [_Tracked(job, stream, tune, index) for index, stream in chains]
    with threadpool_limits(1):
        while True:
            command, sweeps = commands.get()
            for chain in tracked:
                index = chain.index
                try:
                    if command == "finish":
                        reports.put(("chain", index, chain.chain.result(), chain.failures))
                        continue
                    rows, replaced = chain.draw(sweeps, lambda done, index=index: reports.put(
                        ("sweeps", index, done)))
                    reports.put(("probes", index, rows, replaced))
                except ChainLost as lost:
                    reports.put(("lost", index, str(lost)))
                    return
                except Exception:
                    reports.put(("failed", index, traceback.format_exc()))
                    return
            if command == "finish":
                return
