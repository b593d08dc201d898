"""Interrupt ``gapband fill`` many times and count truncated or partial outputs.

Each run fills a small CSV in a subprocess (tests/test_interrupt.py) and
gets SIGINT or SIGTERM a random moment into the fit or into the summaries
and writes; half the runs overwrite a complete earlier fill, half start in
an empty folder. Printed: runs, how they ended, and the counts of truncated
files (target 0), temporary files left (target 0), folders holding a mixture
of old and new outputs (target 0) and unclean exits (target 0).

    python tests/benchmarks/interrupt_runs.py [--runs 24] [--seed 0]
"""

from __future__ import annotations

import argparse
import collections
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_interrupt import (  # noqa: E402
    check_exit,
    check_folder,
    fill_command,
    interrupted_run,
    snapshot,
    write_inputs,
)


def main() -> None:
    """Run the interrupted fills and print the counts."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=24)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    rng = random.Random(args.seed)
    counts: collections.Counter[str] = collections.Counter()
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        csv_path, spec_path = write_inputs(folder)
        previous = folder / "previous"
        subprocess.run(fill_command(csv_path, spec_path, previous), check=True,
                       capture_output=True, timeout=600)
        for run in range(args.runs):
            signum = (signal.SIGINT, signal.SIGTERM)[run % 2]
            phase = ("fit", "write")[(run // 2) % 2]
            out = folder / f"run{run}"
            if (run // 4) % 2:
                shutil.copytree(previous, out)
            before = snapshot(out) if out.exists() else {}
            delay = rng.uniform(0.0, 2.0 if phase == "fit" else 1.0)
            code, stdout, stderr = interrupted_run(fill_command(csv_path, spec_path, out),
                                                   signum, phase, delay)
            counts["stopped" if code == 128 + signum else "finished"] += 1
            problems = check_folder(out, before) if out.exists() else {}
            problems["unclean exit"] = check_exit(code, stdout, stderr, signum)
            for kind, found in problems.items():
                counts[kind] += len(found)
                for text in found:
                    print(f"run {run} ({signal.Signals(signum).name} in {phase} after "
                          f"{delay:.2f} s): {kind}: {text}")
    print(f"runs: {args.runs} in {time.perf_counter() - started:.0f} s "
          f"({counts['stopped']} stopped by the signal, {counts['finished']} finished first)")
    print(f"truncated files: {counts['truncated']}")
    print(f"temporary files left: {counts['temporary']}")
    print(f"mixed old/new sets: {counts['mixed']}")
    print(f"unclean exits: {counts['unclean exit']}")


if __name__ == "__main__":
    main()
