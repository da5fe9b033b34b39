"""How a session waits for an operation to finish, as the profile's ``[completion]`` says.

``opc``: ``*OPC?`` answers 1 (IEEE 488.2 12.5.3, the session's own ``opc_wait``); ``poll``: a
status query asked every ``interval_s`` until its reply matches ``done``, InstrumentError after
``timeout_s``; ``wai``: ``*WAI`` (IEEE 488.2 10.39: nothing after it runs before pending
operations finish) followed by a query whose reply confirms it; ``fixed``: a fixed time (the
bench's settle scale applies); ``stb``: the ``arm`` commands (e.g. ``*CLS`` and ``*OPC``, with
``*ESE 1`` in init), then the status byte (IEEE 488.2 ``*STB?``) read until every bit of
``mask`` is set (bit 5, value 32: the event status summary, set once ``*OPC`` has fired and
``*ESE`` enables it; a reply that is not a whole number 0..255 is an InstrumentError, and
profile loading requires ``*CLS`` in ``arm`` so no bit is left from the previous operation).
A trace is read only after one of them returned.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable

from labrun.errors import InstrumentError
from labrun.profiles import CompletionSpec
from labrun.scpi import ScpiSession


def waiter(spec: CompletionSpec, settle_scale: float = 1.0
           ) -> Callable[[ScpiSession], None] | None:
    """The wait a session runs instead of ``*OPC?`` (None for method ``opc``)."""
    if spec.method == "opc":
        return None
    if spec.method == "poll":
        return lambda session: _poll(session, spec)
    if spec.method == "wai":
        return lambda session: _wai(session, spec)
    if spec.method == "stb":
        return lambda session: _stb(session, spec)
    return lambda _session: time.sleep(spec.fixed_s * max(0.0, settle_scale))


def _poll(session: ScpiSession, spec: CompletionSpec) -> None:
    """Ask the status query until its reply fullmatches ``done``; InstrumentError on timeout."""
    assert spec.query is not None and spec.done is not None
    done = re.compile(spec.done)
    deadline = time.monotonic() + spec.timeout_s
    while True:
        reply = session.query(spec.query)
        if done.fullmatch(reply.strip()):
            return
        if time.monotonic() >= deadline:
            raise InstrumentError(f"operation not complete after {spec.timeout_s:g} s: "
                                  f"{spec.query} still answers {reply!r}", role=session.role,
                                  resource=session.resource)
        time.sleep(spec.interval_s)


def _wai(session: ScpiSession, spec: CompletionSpec) -> None:
    """``*WAI``, then the confirming query: its reply comes only once the operation is done."""
    session.write("*WAI")
    session.query(spec.query or "*STB?")


def _status_byte(reply: str) -> int | None:
    """The status byte a reply holds (IEEE 488.2 11.2: a whole number 0..255), None for any
    other reply ("-1" would have every bit set, "inf" overflows, "3.5" is no byte)."""
    try:
        number = float(reply.strip())
        value = int(number)
    except (ValueError, OverflowError):
        return None
    return value if value == number and 0 <= value <= 255 else None


def _stb(session: ScpiSession, spec: CompletionSpec) -> None:
    """Send the arm commands, then read the status byte until every bit of ``mask`` is set;
    InstrumentError on a reply that is no byte or after ``timeout_s``."""
    assert spec.mask is not None
    for command in spec.arm:
        session.write(command)
    query = spec.query or "*STB?"
    deadline = time.monotonic() + spec.timeout_s
    while True:
        reply = session.query(query)
        stb = _status_byte(reply)
        if stb is None:
            raise InstrumentError(f"{query} answered {reply!r}, not a status byte (a whole "
                                  "number 0..255)", role=session.role, resource=session.resource)
        if stb & spec.mask == spec.mask:
            return
        if time.monotonic() >= deadline:
            raise InstrumentError(f"operation not complete after {spec.timeout_s:g} s: "
                                  f"{query} still answers {stb} (waiting for bits {spec.mask})",
                                  role=session.role, resource=session.resource)
        time.sleep(spec.interval_s)
