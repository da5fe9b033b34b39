"""Fuzz every input file labrun reads: thousands of malformed plans, benches, profiles, scenarios
and traces through the real CLI entry points, in-process (issue 13 item 5).

Each input must end with exit 0 and a valid, finite result, or exit 2 and one line on stderr:
never a traceback, a hang, an instrument session opened, or a known-bad input accepted. The
generators live in tests/_fuzz_support.py (the CI test runs a small hypothesis-driven sample).

Run: python benchmarks/fuzz_inputs.py [N] [--seed S] [--show K]
Prints the counts per file kind and verdict, the slowest input and the figures the issue asks
for: tracebacks, hangs and bad inputs accepted, out of N.
"""

from __future__ import annotations

import argparse
import collections
import logging
import sys
import tempfile
import time
from pathlib import Path
from random import Random

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from _fuzz_support import FAILURES, KINDS, make_case, run_case  # noqa: E402


def main() -> int:
    """Run N generated inputs and print the tallies; exit 1 when any failure occurred."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("n", nargs="?", type=int, default=2000, help="inputs to run (2000)")
    ap.add_argument("--seed", type=int, default=13, help="seed of the generator (13)")
    ap.add_argument("--show", type=int, default=5, help="examples printed per failure kind")
    ap.add_argument("--time-limit", type=float, default=20.0, help="seconds before a hang")
    args = ap.parse_args()
    logging.disable(logging.CRITICAL)
    rng = Random(args.seed)
    tally: collections.Counter[tuple[str, str]] = collections.Counter()
    bad_inputs: collections.Counter[str] = collections.Counter()
    examples: dict[str, list[str]] = collections.defaultdict(list)
    slowest = (0.0, "")
    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(args.n):
            kind = KINDS[i % len(KINDS)]
            folder = Path(tmp) / f"case{i}"
            folder.mkdir()
            case = make_case(rng, folder, kind)
            outcome = run_case(case, time_limit_s=args.time_limit)
            tally[(kind, outcome.verdict)] += 1
            bad_inputs[kind] += case.bad
            if outcome.seconds > slowest[0]:
                slowest = (outcome.seconds, f"{kind}: {'; '.join(case.what)}")
            if outcome.verdict in FAILURES and len(examples[outcome.verdict]) < args.show:
                examples[outcome.verdict].append(f"{kind}: {'; '.join(case.what)} -> "
                                                 f"{outcome.detail}")
    wall = time.perf_counter() - start
    verdicts = ("ok", "refused", *FAILURES)
    print(f"{'kind':<10}" + "".join(f"{v:>12}" for v in verdicts) + f"{'known bad':>12}")
    for kind in KINDS:
        print(f"{kind:<10}" + "".join(f"{tally[(kind, v)]:>12}" for v in verdicts)
              + f"{bad_inputs[kind]:>12}")
    total = {v: sum(tally[(k, v)] for k in KINDS) for v in verdicts}
    print(f"{'total':<10}" + "".join(f"{total[v]:>12}" for v in verdicts)
          + f"{sum(bad_inputs.values()):>12}")
    for verdict, lines in examples.items():
        print(f"\n{verdict}:")
        for line in lines:
            print(f"  {line}")
    print(f"\nslowest input {slowest[0]:.2f} s ({slowest[1]}); {wall:.0f} s for {args.n} inputs "
          f"({wall / max(args.n, 1) * 1000:.0f} ms each)")
    print(f"{total['traceback']} tracebacks, {total['hang']} hangs, "
          f"{total['accepted']} bad inputs accepted, {total['bad_result']} bad results, "
          f"{total['bad_message']} bad messages, {total['opened']} instruments opened "
          f"over {args.n} inputs")
    return 1 if any(total[v] for v in FAILURES) else 0


if __name__ == "__main__":
    sys.exit(main())
