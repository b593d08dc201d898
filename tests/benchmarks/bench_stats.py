"""Time ``gapband stats`` on the demo network's hourly no2: the common limit-value statistics.

Issue 16's target: the common hourly and daily limit-value statistics with
intervals in under 10 s on the demo network. Each command runs as its own
process through the installed ``gapband`` script, as a user runs it (so the
times include starting Python, importing gapband and reading filled.nc)::

    python tests/benchmarks/bench_stats.py                       # generate, fill, time
    python tests/benchmarks/bench_stats.py --fill /tmp/x/fill-no2  # time an existing fill

Without ``--fill`` it writes the demo network (``demo/generate.py``: the
invented Tolmere Basin, a year of hourly values) into a temporary folder and
fills its no2 with a short run (``--draws 200 --tune 100 --chains 2``,
keeping the default 200 joint draws). Printed: per command its wall-clock
seconds (the target's figure), CPU seconds (user + system: what the command
costs, less sensitive to a busy machine), exit code and rows written; exit
code 1 when a command fails or its wall-clock time exceeds the target.
"""

from __future__ import annotations

import argparse
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

TARGET_SECONDS = 10.0
ROOT = Path(__file__).resolve().parents[2]

#: name -> the options after ``gapband stats DIR``.
COMMANDS = {
    "floor: start, read the fill, one mean": ["--period", "year", "--mean"],
    "hourly limit (count, p99.8, max, mean)": [
        "--period", "year", "--exceed", "200", "--percentile", "99.8", "--max", "--mean",
        "--min-capture", "period=90"],
    "daily-mean limit (count, p90.4, mean)": [
        "--period", "year", "--over", "day-mean", "--exceed", "50", "--percentile", "90.4",
        "--mean", "--min-capture", "day=18/24", "--min-capture", "period=90"],
    "daily max running 8-h mean (count, max)": [
        "--period", "year", "--over", "day-max-running", "--running", "8h", "--exceed", "120",
        "--max", "--min-capture", "running=6/8", "--min-capture", "day=18/24"],
    "per day: max hour, max running 8-h mean": [
        "--period", "day", "--max", "--over", "step", "--over", "running", "--running", "8h"],
    "all units at once (year)": [
        "--period", "year", "--mean", "--max", "--percentile", "99.8", "--percentile", "90.4",
        "--exceed", "200", "--exceed", "50", "--over", "step", "--over", "day-mean",
        "--over", "day-max", "--over", "running", "--over", "day-max-running",
        "--running", "8h", "--min-capture", "18/24", "--min-capture", "period=90"],
}


def gapband() -> str:
    """The ``gapband`` script beside this Python."""
    script = Path(sys.executable).with_name("gapband")
    return str(script) if script.exists() else "gapband"


def make_fill(work: Path) -> Path:
    """Generate the demo network and fill its no2 with a short run; the fill's folder."""
    subprocess.run([sys.executable, str(ROOT / "demo" / "generate.py"), "--out",
                    str(work / "demo")], check=True)
    out = work / "fill-no2"
    subprocess.run([gapband(), "fill", str(work / "demo" / "tolmere_no2.csv"), "--out", str(out),
                    "--transform", "log", "--draws", "200", "--tune", "100", "--chains", "2",
                    "--seed", "1", "--quiet"], check=True)
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--fill", type=Path, help="an existing gapband fill of the demo no2")
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="bench-stats-"))
    try:
        fill = args.fill or make_fill(work)
        failed = False
        print(f"{'statistics':44} {'seconds':>8} {'CPU s':>6} {'exit':>5} {'rows':>6}")
        for i, (name, options) in enumerate(COMMANDS.items()):
            out = work / f"stats-{i}"
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            start = time.perf_counter()
            run = subprocess.run([gapband(), "stats", str(fill), "--out", str(out), *options],
                                 capture_output=True, text=True)
            seconds = time.perf_counter() - start
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu = after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime
            files = list(out.glob("stats-*.csv"))
            rows = len(pd.read_csv(files[0])) if run.returncode == 0 and files else 0
            print(f"{name:44} {seconds:8.2f} {cpu:6.2f} {run.returncode:5d} {rows:6d}")
            if run.returncode != 0:
                print(run.stderr.strip().splitlines()[-1] if run.stderr.strip() else "")
            failed |= run.returncode != 0 or seconds > TARGET_SECONDS
        print(f"target: each under {TARGET_SECONDS:g} s")
        return 1 if failed else 0
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
