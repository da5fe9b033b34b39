"""The fault-path table of issue 13, measured on the virtual lab: for each fault forced mid-run,
the seconds from the fault until every reachable source was off and every reachable shutter
closed (polled on the lab's own state), until the run ended, and how it ended.

Targets (issue 13): sources and shutters off within (the faulted instrument's timeout + 1 s),
printed as a ratio against that bound (<= 1 meets it); the run ends aborted with a reason within
the retry policy's stated total time (``RetryPolicy.give_up_s``), printed as a ratio too.
Default: the shipped profiles' own timeouts (OSA 20 s, others 3 s) and the default retry policy,
several minutes. ``--quick``: every timeout 1 s (SQLite's lock wait too), a 2 s dark limit
(what CI checks in tests/test_fault_paths.py and tests/test_store_faults.py). Not a test.
Run: python benchmarks/bench_faults.py [--quick] [ROW...]
"""

from __future__ import annotations

import argparse
import logging
import re
import tempfile
from pathlib import Path

from labrun.faultdrill import ROWS, Measured, measure
from labrun.faults import RetryPolicy

QUICK_MS = {name: 1000 for name in (
    "generic-osa", "generic-laser", "generic-attenuator", "generic-pol-controller",
    "generic-switch", "generic-power-meter", "generic-amplifier")}
QUICK_POLICY = RetryPolicy(attempts=50, backoff_s=0.05, max_backoff_s=0.2, dark_limit_s=2.0)


def _s(value: float | None) -> str:
    return "never" if value is None else f"{value:.2f} s"


def _ratio(value: float | None, bound: float) -> str:
    return "-" if value is None else f"{value / bound:.2f}"


def short_reason(reason: str) -> str:
    """The run's reason without the point key and the instrument address."""
    text = reason.split("|r0: ", 1)[-1]
    text = re.sub(r" at TCPIP\S+ via @\w+ \((\w+)[^;]*; check power, cable and address",
                  r" (\1)", text)
    return re.sub(r"; the database refused the final status .*, kept in \S+",
                  "; final status kept in the fallback record", text)[:140]


def row_text(m: Measured) -> str:
    """One markdown table row."""
    bound = m.timeout_s + 1.0
    kept = f"stored {m.stored_status}" + (f", fallback record {m.fallback_status}"
                                          if m.fallback_status else "")
    outcome = f"{m.status} ({kept}): {short_reason(m.reason)}" if m.reason else m.status
    return (f"| {m.fault} | {_s(m.sources_off_s)} ({_ratio(m.sources_off_s, bound)}) "
            f"| {_s(m.shutters_closed_s)} ({_ratio(m.shutters_closed_s, bound)}) "
            f"| {bound:.1f} s | {m.run_end_s:.2f} s ({_ratio(m.run_end_s, m.give_up_s)}) "
            f"| {m.give_up_s:.1f} s | {outcome} |")


def main() -> None:
    """Measure the rows asked for (all by default) and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1 s timeouts, 2 s dark limit")
    parser.add_argument("rows", nargs="*", choices=[*ROWS, []], help="rows to measure")
    args = parser.parse_args()
    logging.disable(logging.WARNING)  # the table is the output; safe-off warnings go unseen
    timeouts = QUICK_MS if args.quick else None
    policy = QUICK_POLICY if args.quick else RetryPolicy()
    print(f"policy: {policy}")
    print("| fault | sources off (/ bound) | shutters closed (/ bound) | bound: timeout + 1 s "
          "| run end (/ stated total) | stated total | outcome |")
    print("|---|---|---|---|---|---|---|")
    for name in args.rows or list(ROWS):
        with tempfile.TemporaryDirectory() as folder:
            m = measure(ROWS[name], Path(folder), timeouts_ms=timeouts, policy=policy,
                        busy_timeout_ms=1000 if args.quick else None)
        print(row_text(m), flush=True)


if __name__ == "__main__":
    main()
