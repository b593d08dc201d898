"""Read thousands of generated station files, mostly faulty, and count what went wrong.

Each case (tests/test_fuzz_readers.py: ``cases``) is read with
``gapband.read`` and run through ``gapband inspect``. Printed: cases run,
cases with faults, cases that must be refused, and the two failure counts —
unhandled exceptions (anything that is not one of gapband's own errors;
target 0) and wrong outcomes (a clean file refused, a bad file read, an
observed cell changed, or a message not naming the file; target 0).

    python tests/benchmarks/fuzz_readers.py [--cases 2500] [--seed 0]
"""

from __future__ import annotations

import argparse
import collections
import sys
import tempfile
import time
from pathlib import Path

from hypothesis import HealthCheck, Phase, given, seed, settings

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from test_fuzz_readers import cases, inspect_case, read_case  # noqa: E402


def main() -> None:
    """Run the cases and print the counts."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=2500)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    counts: collections.Counter[str] = collections.Counter()
    examples: dict[str, list[str]] = collections.defaultdict(list)
    started = time.perf_counter()

    @seed(args.seed)
    @settings(max_examples=args.cases, deadline=None, database=None, phases=[Phase.generate],
              suppress_health_check=list(HealthCheck))
    @given(case=cases(faulty=0.9))
    def run(case):
        counts["cases"] += 1
        counts["faulty"] += bool(case.faults)
        counts["must_fail"] += case.expected is None
        with tempfile.TemporaryDirectory() as tmp:
            for stage, check in (("read", read_case), ("inspect", inspect_case)):
                try:
                    counts[f"{stage}_{check(case, Path(tmp))}"] += 1
                except AssertionError as err:
                    counts["wrong"] += 1
                    examples["wrong"].append(f"{stage} {case.faults} {case.read_kw}: {err}"[:400])
                except Exception as err:  # the figure this script exists to count
                    counts["unhandled"] += 1
                    examples["unhandled"].append(
                        f"{stage} {case.faults}: {type(err).__name__}: {err}"[:400])

    run()
    seconds = time.perf_counter() - started
    print(f"cases: {counts['cases']} ({counts['faulty']} with faults, "
          f"{counts['must_fail']} that must be refused) in {seconds:.0f} s")
    print(f"read: {counts['read_panel']} panels, {counts['read_error']} gapband errors; "
          f"inspect: exit 0 {counts['inspect_0']}, exit 3 {counts['inspect_3']}")
    print(f"unhandled exceptions: {counts['unhandled']}")
    print(f"wrong outcomes: {counts['wrong']}")
    for kind in ("unhandled", "wrong"):
        for text in examples[kind][:5]:
            print(f"  {kind}: {text}")


if __name__ == "__main__":
    main()
