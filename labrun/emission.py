"""The emission watch (safety-critical): after every sweep, each source's output state,
interlock and power are checked against what the run expects; a surprise aborts the run.

A source found on or off unexpectedly, an open interlock, or a power setting changed behind
labrun's back (front panel, reset) ends the run (``RunAborted``, every source then off); a power
reading above the bench cap raises ``SafetyError`` at once. One surprising reply is read once
more before it ends a night, and the disagreement is recorded as a fault event. The functions
take the engine's ``Runner`` (its applied-settings cache, store and adapters).
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from labrun.errors import SafetyError
from labrun.instruments.base import FLOAT_SLACK
from labrun.outcomes import RunAborted

if TYPE_CHECKING:
    from labrun.engine import Runner


def check_emission(run: Runner, between: Callable[[], None] | None = None) -> None:
    """Abort if a source's output is not in the expected state, its interlock is open, or
    its power setting changed behind labrun's back (front panel, reset).

    An open interlock forces emission off, so where a source reports its output state that
    one query covers both (the interlock is then read to name the reason); the interlock is
    read on its own only for sources that do not report their output. The power travels in
    the same message as the state where the profile takes compound messages. ``between`` (the
    trace's reduction) runs while the sources answer where the readings seam takes it, else
    once the watch has passed.
    """
    run.check_progress()
    roles = run.sources()
    adapters = [run.role(r) for r in roles]
    overlap = between is not None and run.readings_take_between
    readings = (run.source_readings(adapters, between=between) if overlap
                else run.source_readings(adapters))
    _check_readings(run, roles, adapters, readings)
    if between is not None and not overlap:
        between()


def _check_readings(run: Runner, roles: list[str], adapters: list[Any],
                    readings: list[Any]) -> None:
    """The watch's verdict on the sources' readings (RunAborted, SafetyError)."""
    for role, adapter, reading in zip(roles, adapters, readings, strict=True):
        state, power = reading
        if state is None and adapter.interlock_closed() is False:
            raise RunAborted(f"interlock open on {role}")
        if state is not None and bool(state) != run.expected_on(role):
            if confirm_state(run, role, adapter) == run.expected_on(role):
                continue
            run.check_progress()  # labrun itself switched it off meanwhile: a retry
            found = "on" if state else "off"
            raise RunAborted(f"{role} output found {found} unexpectedly"
                             + interlock_note(run))
        if power is not None and run.expected_on(role):
            run.check_power(role, adapter, float(power))


def check_power(run: Runner, role: str, adapter: Any, power: float) -> None:
    """Refuse a source whose power reads above its bench cap (SafetyError at once, never
    re-read or retried) or, confirmed by a second read, away from the value labrun set by
    more than the profile's tolerance (RunAborted): a corrupted reply must not end a night."""
    check_cap(role, power, adapter.cap_dbm)
    want = run.applied.get((role, "set_power_dbm"))
    if want is None:  # not set by this run yet (or its setting failed): only the cap applies
        return
    tol = float(adapter.profile.op("set_power_dbm").tolerance or 0.0) + FLOAT_SLACK
    if abs(power - float(want)) <= tol:
        return
    again = reread(run, role, lambda: float(adapter.power_dbm()), lambda v: f"{v:g} dBm",
                   f"power reply {power:g} dBm disagreed with the {float(want):g} dBm set")
    if again is not None:
        check_cap(role, again, adapter.cap_dbm)
        if abs(again - float(want)) <= tol:
            return
    shown = power if again is None else again
    raise RunAborted(f"{role} power changed behind labrun's back: reads {shown:g} dBm, "
                     f"set {float(want):g} dBm (tolerance {tol:.3g} dB)")


def confirm_state(run: Runner, role: str, adapter: Any) -> bool | None:
    """Read a surprising output state once more: one corrupted reply must not end a night.

    The run aborts (sources off) unless the second read shows the expected state; either
    way the disagreement is recorded as a fault event.
    """
    again = reread(run, role, adapter.output_state, lambda v: "on" if v else "off",
                   "output state reply disagreed with the expected state")
    return None if again is None else bool(again)


def reread(run: Runner, role: str, read: Callable[[], Any], show: Callable[[Any], str],
           surprise: str) -> Any:
    """Read a surprising reply once more and record the disagreement as a fault event; the
    second reading, or None when it failed."""
    try:
        again = read()
    except Exception as exc:  # noqa: BLE001 - any failure leaves the surprise standing
        again, detail = None, f"re-read failed: {exc}"
    else:
        detail = f"re-read says {show(again)}"
    run.event("fault", f"{role} {surprise}; {detail}", role=role)
    return again


def interlock_note(run: Runner) -> str:
    """' (interlock open on laser_a)' when an interlock explains a surprise, else ''."""
    opened = []
    for role in run.sources():
        with contextlib.suppress(Exception):
            if run.role(role).interlock_closed() is False:
                opened.append(role)
    return f" (interlock open on {', '.join(opened)})" if opened else ""


def check_cap(role: str, power: float, cap: float | None) -> None:
    """Refuse (SafetyError, never retried) a source power reading above its bench cap."""
    if cap is not None and power > cap + FLOAT_SLACK:
        raise SafetyError(f"{role} power reads {power:g} dBm, above the bench cap {cap:g} dBm")
