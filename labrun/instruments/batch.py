"""Settings of several instruments at once: written together, read back together, in parallel.

The engine checks every setting of a point first (``Adapter.planned``: ranges, caps, nothing
sent), then writes them all with ``write_all`` and, after its one settle wait, verifies them all
with ``read_back_all``. Where a profile takes IEEE 488.2 compound messages, each instrument gets
one message (its settings, ``*OPC?`` after any that waits, the error query:
``SOUR:WAV 1550.0000;:SOUR:POW 3.000;:SYST:ERR?``) and every instrument's message is sent before
any reply is read (``scpi.query_each``); without a settle time to wait, the read-back queries ride
in the same message. Other instruments get the settings one at a time, each followed by the
error queue.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from labrun.instruments.base import Adapter, PlannedSetting
from labrun.profiles import SOURCE_SWITCHES
from labrun.scpi import compound, query_each
from labrun.trafficlog import Direction


def _by_adapter(planned: Sequence[PlannedSetting]) -> list[tuple[Adapter, list[PlannedSetting]]]:
    """The settings grouped per instrument, instruments and settings in their first order."""
    groups: dict[int, tuple[Adapter, list[PlannedSetting]]] = {}
    for p in planned:
        groups.setdefault(id(p.adapter), (p.adapter, []))[1].append(p)
    return list(groups.values())


def _units(adapter: Adapter, group: Sequence[PlannedSetting], read_back: bool
           ) -> tuple[list[str], list[tuple[str, PlannedSetting]]]:
    """The program message units of one instrument's message (error query excluded) and what
    each reply answers: ("opc", setting) or ("back", setting), in order."""
    units: list[str] = []
    expects: list[tuple[str, PlannedSetting]] = []
    opc = adapter.session.opc_query
    for p in group:
        units.append(p.text)
        if p.op.wait and opc:
            units.append(opc)
            expects.append(("opc", p))
    if read_back:
        for p in group:
            if p.back_text is not None:
                units.append(p.back_text)
                expects.append(("back", p))
    return units, expects


def _check(expects: Sequence[tuple[str, PlannedSetting]], replies: Sequence[str]) -> None:
    """Verify ``*OPC?`` replies and read-backs (a read-back above a cap is a SafetyError)."""
    for (what, p), reply in zip(expects, replies, strict=True):
        adapter = p.adapter
        if what == "opc":
            if reply.strip().lstrip("+") not in ("1", "1.0"):
                raise adapter.instrument_error(f"{adapter.session.opc_query} answered "
                                                f"{reply!r}, expected 1")
            continue
        assert p.back is not None
        adapter.verify(p.op, adapter.parse(p.back, reply), p.target, cap=p.cap)


def write_all(planned: Sequence[PlannedSetting], *, read_back: bool = False) -> None:
    """Write every setting (checked beforehand), all instruments at once; with ``read_back``
    also verify each one in the same exchange (for settings that need no settle time)."""
    compound_msgs: list[tuple[Adapter, str, str, list[tuple[str, PlannedSetting]]]] = []
    for adapter, group in _by_adapter(planned):
        if not adapter.compound_ok() or (adapter.session.completion is not None
                                          and any(p.op.wait for p in group)):
            _write_one_by_one(adapter, group, read_back)  # a wait other than *OPC? in between
            continue
        switches = [p for p in group if p.op.name in SOURCE_SWITCHES]
        if switches:  # switching light travels alone, after the instrument's other settings
            write_all([p for p in group if p not in switches], read_back=read_back)
            for p in switches:
                adapter.switch_alone(p, settle=False)
            continue
        units, expects = _units(adapter, group, read_back)
        message = compound(units[0], [*units[1:], str(adapter.session.error_query)])
        compound_msgs.append((adapter, "; ".join(p.text for p in group), message, expects))
    _exchange(compound_msgs, direction="write")


def read_back_all(planned: Sequence[PlannedSetting]) -> None:
    """Read back and verify every setting that has a read-back, all instruments at once."""
    msgs: list[tuple[Adapter, str, str, list[tuple[str, PlannedSetting]]]] = []
    for adapter, group in _by_adapter([p for p in planned if p.back_text is not None]):
        if not adapter.compound_ok():
            for p in group:
                assert p.back is not None
                got = adapter.read(p.back.name, index=p.index)
                adapter.verify(p.op, got, p.target, cap=p.cap)
            continue
        queries = [str(p.back_text) for p in group]
        message = compound(queries[0], [*queries[1:], str(adapter.session.error_query)])
        msgs.append((adapter, "; ".join(queries), message, [("back", p) for p in group]))
    _exchange(msgs, direction="query")


def _exchange(msgs: Sequence[tuple[Adapter, str, str, list[tuple[str, Any]]]], *,
              direction: Direction) -> None:
    """Send one compound message per instrument, all before any reply is read; check each
    reply's error query and units, then the replies."""
    if not msgs:
        return
    replies = query_each([(a.session, message) for a, _, message, _ in msgs],
                         direction=direction)
    for (adapter, what, message, expects), reply in zip(msgs, replies, strict=True):
        units = adapter.session.check_reply(what, message, reply, len(expects))
        _check(expects, units)


def _write_one_by_one(adapter: Adapter, group: Sequence[PlannedSetting], read_back: bool
                      ) -> None:
    """Settings of an instrument without compound messages: each written, its error queue
    drained, ``*OPC?`` where it waits; then the read-backs when asked for."""
    for p in group:
        adapter.session.write(p.text)
        if p.op.wait:
            adapter.session.opc_wait()
    if read_back:
        for p in group:
            if p.back is not None:
                got = adapter.read(p.back.name, index=p.index)
                adapter.verify(p.op, got, p.target, cap=p.cap)

