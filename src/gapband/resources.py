"""Memory a fill needs, estimated before the fit, against the memory available.

The estimate follows what a fit keeps and what the predictive works on:

- ``gibbs`` keeps, per chain and draw, the shared paths (trend per factor,
  AR path per short-term factor: T float64 each), the loadings and scales,
  and each series' own path at the missing cells only (float32), plus one
  own-path mean per chain (:class:`gapband.gibbs._Store`);
- ``nuts`` and ``advi`` keep every draw of every variable of the PyMC model,
  own paths included: N × T per draw (:mod:`gapband.model`);
- the predictive copies the draws into arrays (``model.draw_arrays``; for
  NUTS and ADVI the own paths are also redrawn, :func:`gapband.predict.condition_own`)
  and works on ``(6 + r) × draws × chunk`` floats at a time (:func:`gapband.predict.summarise`).

:func:`check` refuses a fill that would not fit, before it starts, instead of
the operating system stopping it halfway.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from gapband.errors import MemoryLimitError
from gapband.spec import ModelSpec

_FLOAT64, _FLOAT32 = 8, 4
#: Working arrays of a sampler, in float64 (series × time) arrays: the data,
#: weights, means, residuals and their temporaries (common practice: measured
#: peak of a Gibbs sweep, rounded up).
WORKING_ARRAYS = 20
#: Missing cells the predictive summarises at a time (gapband.predict.summarise).
CHUNK_CELLS = 4096


@dataclass(frozen=True)
class Estimate:
    """Bytes a fill needs, by what holds them."""

    parts: dict[str, int]

    @property
    def total(self) -> int:
        """All parts together, in bytes."""
        return sum(self.parts.values())

    def text(self) -> str:
        """The parts in words, largest first."""
        ordered = sorted(self.parts.items(), key=lambda item: -item[1])
        return ", ".join(f"{name} {size_text(size)}" for name, size in ordered if size)


def kept_draws(
    n_series: int, n_time: int, n_missing: int, spec: ModelSpec, *, method: str, draws: int,
    chains: int, rank: int,
) -> dict[str, int]:
    """Bytes of one copy of the posterior draws a fit keeps, by kind.

    Parameters
    ----------
    n_series, n_time, n_missing : int
        Shape of the fitted Panel and its missing cells.
    spec : ModelSpec
    method : {"gibbs", "nuts", "advi"}
    draws, chains : int
        Draws per chain and chains (ADVI gives one chain of ``draws``).
    rank : int
        Shared factors (at most ``spec.rank``; the fit may choose fewer).
    """
    chains = 1 if method == "advi" else chains
    samples = chains * draws
    short = min(spec.ar_factors, n_series)
    columns = fourier_columns(spec)
    scalars = (n_series * (rank + short + 1 + 2 * spec.own_ar) + rank * (2 + columns)
               + 2 * short * spec.ar_order)
    parts = {
        "shared paths": samples * (rank + short) * n_time * _FLOAT64,
        "loadings and scales": samples * scalars * _FLOAT64,
    }
    if spec.own_ar and method == "gibbs":
        parts["own paths at missing cells"] = samples * n_missing * _FLOAT32
        parts["own-path means"] = chains * n_series * n_time * _FLOAT64
    elif spec.own_ar:
        parts["own paths"] = samples * n_series * n_time * _FLOAT64
    if method != "gibbs":  # the random-walk steps the trends are built from
        parts["shared paths"] += samples * rank * (n_time - 1) * _FLOAT64
    return parts


def estimate(
    n_series: int, n_time: int, n_missing: int, spec: ModelSpec, *, method: str, draws: int,
    chains: int, cores: int, keep_draws: int, n_levels: int, rank: int | None = None,
) -> Estimate:
    """Peak memory of a fill, in bytes, by what holds it.

    The kept draws count twice for ``gibbs`` (as sampled, then as the
    predictive's arrays) and three times for ``nuts`` and ``advi`` (the
    trace, the arrays, the redrawn own paths); each of ``cores`` chains
    running at once has :data:`WORKING_ARRAYS` series × time arrays (and,
    for ``gibbs``, its banded precision and border); the result holds
    ``9 + 2 × n_levels`` series × time arrays and ``keep_draws`` joint
    draws of the missing cells (float32). ``rank`` defaults to ``spec.rank``.
    """
    rank = min(spec.rank if rank is None else rank, n_series)
    kept = kept_draws(n_series, n_time, n_missing, spec, method=method, draws=draws,
                      chains=chains, rank=rank)
    copies = 2 if method == "gibbs" else 3
    samples = (1 if method == "advi" else chains) * draws
    cells = n_series * n_time
    working = WORKING_ARRAYS * cells * _FLOAT64
    if method == "gibbs":
        state = rank + min(spec.ar_factors, n_series)
        lags = max(1, spec.ar_order if spec.ar_factors else 1)
        band = state * (lags + 1) * n_time * state
        border = n_time * state * rank * fourier_columns(spec)
        working += 2 * (band + border) * _FLOAT64
    chunk = min(CHUNK_CELLS, n_missing)
    return Estimate({
        "posterior draws": copies * sum(kept.values()),
        "sampler working arrays": max(1, min(cores, chains)) * working,
        "predictive working arrays": (6 + rank) * samples * chunk * _FLOAT64,
        "result arrays": (9 + 2 * n_levels) * cells * _FLOAT64,
        "joint draws kept": keep_draws * n_missing * _FLOAT32,
    })


def fourier_columns(spec: ModelSpec) -> int:
    """Columns of the seasonal design: a cosine and a sine per harmonic."""
    return sum(2 * season.harmonics for season in spec.seasonal)


def available_memory() -> int | None:
    """Bytes this process can still allocate, or None when unknown.

    The smaller of the system's available memory (``MemAvailable`` in
    /proc/meminfo, else free pages from ``os.sysconf``) and what a cgroup
    memory limit (a container's) leaves.
    """
    found = [size for size in (_meminfo_available(), _cgroup_headroom()) if size is not None]
    return min(found) if found else None


def _meminfo_available() -> int | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        return None


def _cgroup_headroom() -> int | None:
    """Limit minus usage of this process's cgroup (v2, else v1); None without a limit."""
    for limit_file, usage_file in (
        ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
        ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
         "/sys/fs/cgroup/memory/memory.usage_in_bytes"),
    ):
        try:
            limit = Path(limit_file).read_text().strip()
            usage = int(Path(usage_file).read_text().strip())
        except (OSError, ValueError):
            continue
        # "max" (v2) or a huge number (v1) means no limit.
        if limit == "max" or int(limit) >= 1 << 60:
            return None
        return max(int(limit) - usage, 0)
    return None


def check(estimated: Estimate, *, source: str, draws: int, chains: int,
          keep_draws: int) -> None:
    """Refuse a fill whose estimate exceeds the memory available.

    Raises
    ------
    MemoryLimitError
        With the estimate, what is available and the ways to need less.
    """
    available = available_memory()
    if available is None or estimated.total <= available:
        return
    share = available / estimated.total
    fewer = max(10, int(draws * share * 0.8))
    raise MemoryLimitError(
        f"{source}: this fill needs about {size_text(estimated.total)} of memory "
        f"({estimated.text()}), but {size_text(available)} is available. To need less: "
        f"fewer draws (e.g. --draws {fewer}) or --chains 1 (now {chains}), fewer joint "
        f"draws kept (--keep-draws, now {keep_draws}; 0 keeps none), or fill the panel in "
        "blocks of series and time windows (gapband.parallel, one after another or on a "
        "Dask cluster); or run on a machine with more memory"
    )


def size_text(size: float) -> str:
    """Bytes in binary units: '512 B', '3.2 MiB', '1.5 GiB'."""
    units = ("B", "KiB", "MiB", "GiB", "TiB")
    power = 0
    while size >= 1024 and power < len(units) - 1:
        size, power = size / 1024, power + 1
    return f"{size:.0f} B" if power == 0 else f"{size:.1f} {units[power]}"
