"""``labrun off --bench BENCH``: every source off and every attenuator closed, now.

Opens its own connection to each source and attenuator, all at once (labrun/safe_off.py: short
timeouts, one thread per role, so one dead instrument delays none of the others), even while a
run process holds its own connections, then reads each state back and reports it. Exit 0 only
when every source is confirmed off.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import sys
import time
from typing import TYPE_CHECKING, Any

from labrun.roles import OFF_ROLES
from labrun.safe_off import BUDGET_S, PAUSE_S, in_parallel, quick_adapter, switch_off

if TYPE_CHECKING:
    from labrun.bench import Bench


def register(subparsers: Any) -> None:
    """Add the off command."""
    p = subparsers.add_parser(
        "off", help="switch every source off now (lasers, amplifier; attenuators to maximum)",
        description="Switch every light source of a bench off and set the attenuators to "
                    "maximum, over fresh connections; works while a run is stuck.")
    p.add_argument("--bench", required=True, metavar="BENCH", help="bench file (TOML)")
    p.add_argument("--json", action="store_true", help="print what was done as JSON")
    p.set_defaults(func=cmd_off)


def off_role(bench: Bench, role: str, *, budget_s: float = BUDGET_S) -> dict[str, Any]:
    """Darken one role over a fresh connection, tried again until ``budget_s``; what was done
    and what the instrument reports."""
    deadline = time.monotonic() + budget_s
    while True:
        result = _off_once(bench, role)
        if result["ok"] or deadline - time.monotonic() <= PAUSE_S:
            return result
        time.sleep(PAUSE_S)


def _off_once(bench: Bench, role: str) -> dict[str, Any]:
    """One try, as the safe-off fallback makes it (labrun/safe_off.py): open, send the profile's
    ``safe_off_init`` (never ``init``) with any failure ignored, switch off (the error queue
    read only after), read the state back."""
    result: dict[str, Any] = {"role": role, "ok": False, "output": None, "detail": ""}
    adapter = None
    try:
        adapter = quick_adapter(bench, role)
        switch_off(adapter, role)
        state = adapter.output_state()
        result["output"] = None if state is None else ("on" if state else "off")
        if role.startswith("attenuator"):
            result["attenuation_db"] = adapter.attenuation_db()
            result["ok"] = state is not True and \
                result["attenuation_db"] >= adapter.max_attenuation_db - 0.05
            result["detail"] = f"attenuation {result['attenuation_db']:g} dB, shutter " \
                               f"{result['output'] or 'not reported'}"
        else:
            result["ok"] = state is not True
            result["detail"] = "output off (read back)" if state is False else \
                "output off sent (state not reported)" if state is None else "STILL ON"
    except Exception as exc:  # noqa: BLE001 - report this role and go on to the next
        result["detail"] = f"{type(exc).__name__}: {exc}"
    finally:
        if adapter is not None:
            with contextlib.suppress(Exception):
                adapter.close()
    return result


def cmd_off(args: argparse.Namespace) -> int:
    """labrun off --bench BENCH."""
    from labrun.bench import load_bench

    bench = load_bench(args.bench)
    roles = [role for role in OFF_ROLES if role in bench.instruments]
    done = in_parallel(roles, lambda role: off_role(bench, role), BUDGET_S,
                       lambda role: {"role": role, "ok": False, "output": None,
                                     "detail": f"no answer within {BUDGET_S:g} s"})
    results = [done[role] for role in roles]
    all_off = all(r["ok"] for r in results)
    if args.json:
        print(json.dumps({"bench": bench.name, "all_off": all_off, "roles": results}, indent=2))
    else:
        for r in results:
            print(f"{r['role']:>13}: {'ok' if r['ok'] else 'FAILED'}  {r['detail']}")
    if not all_off:
        print("labrun: error: not every source is confirmed off; switch them off at the "
              "instrument and follow your local laser safety rules", file=sys.stderr)
        return 1
    return 0
