"""Role adapters and opening a whole bench: ``open_bench(bench) -> Instruments``.

Each adapter speaks only through its profile; ``Instruments`` maps role -> adapter and can put
every source in a safe state (``safe_off_all``) without ever raising.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from typing import Any, NamedTuple

from labrun.bench import Bench
from labrun.completion import waiter
from labrun.errors import InputError
from labrun.instruments.amplifier import AmplifierAdapter
from labrun.instruments.attenuator import AttenuatorAdapter
from labrun.instruments.base import Adapter
from labrun.instruments.laser import LaserAdapter
from labrun.instruments.osa import OsaAdapter
from labrun.instruments.pol_controller import PolControllerAdapter
from labrun.instruments.power_meter import PowerMeterAdapter
from labrun.instruments.switch import SwitchAdapter
from labrun.roles import OFF_ROLES
from labrun.scpi import FaultHook, Idn, ScpiSession, compound, query_each, send_each
from labrun.trafficlog import TrafficLog, split_units

__all__ = [
    "ADAPTERS", "Adapter", "AmplifierAdapter", "AttenuatorAdapter", "Instruments",
    "LaserAdapter", "OsaAdapter", "PolControllerAdapter", "PowerMeterAdapter", "SwitchAdapter",
    "SourceReading", "open_bench", "open_instrument", "output_states", "read_each",
    "source_readings",
]

log = logging.getLogger("labrun.instruments")

ADAPTERS: dict[str, type[Adapter]] = {
    cls.kind: cls for cls in (LaserAdapter, AttenuatorAdapter, PolControllerAdapter, OsaAdapter,
                              PowerMeterAdapter, AmplifierAdapter, SwitchAdapter)
}
# Order in which safe_off_all darkens the bench: the strongest source first, attenuators last.
SAFE_OFF_ORDER = OFF_ROLES
SAFE_OFF_TRIES = 3  # a garbled reply or a stray error-queue entry must not leave a source on


def make_session(bench: Bench, role: str, traffic_log: TrafficLog | None = None,
                 on_fault: FaultHook | None = None) -> ScpiSession:
    """An (unopened) SCPI session for one role, configured from its profile.

    Compound messages are used when the profile declares them, except on pyvisa-sim (``@sim``),
    whose devices answer only whole messages listed in their YAML file.
    """
    spec = bench.instruments[role]
    p = spec.profile
    compound = p.capabilities.compound_messages and spec.backend != "@sim"
    wait = waiter(p.completion, bench.settle_scale)  # None: *OPC?
    return ScpiSession(spec.resource, spec.backend, write_termination=p.write_termination,
                       read_termination=p.read_termination, timeout_ms=p.timeout_ms,
                       error_query=p.error_query, opc_query=p.opc_query if wait is None else None,
                       traffic_log=traffic_log, completion=wait,
                       role=role, sim_file=bench.sim_file, compound=compound,
                       on_fault=on_fault, init=p.init, error_form=p.replies.pattern("error"))


def open_instrument(bench: Bench, role: str, *, traffic_log: TrafficLog | None = None,
                    on_fault: FaultHook | None = None, initialise: bool = True) -> Adapter:
    """Connect one role, send its profile's init commands (unless ``initialise`` is False: the
    safe-off fallback sends only what switching off needs) and return its adapter."""
    spec = bench.instruments[role]
    session = make_session(bench, role, traffic_log, on_fault).open()
    adapter = ADAPTERS[spec.kind](spec, session, settle_scale=bench.settle_scale)
    if not initialise:
        return adapter
    try:
        adapter.initialise()
    except Exception:
        session.close()
        raise
    return adapter


class Instruments(Mapping[str, Adapter]):
    """The open instruments of a bench, by role."""

    def __init__(self, bench: Bench, adapters: dict[str, Adapter]):
        self.bench = bench
        self._adapters = adapters

    def __getitem__(self, role: str) -> Adapter:
        return self._adapters[role]

    def __iter__(self) -> Iterator[str]:
        return iter(self._adapters)

    def __len__(self) -> int:
        return len(self._adapters)

    def close(self) -> None:
        """Close every session (leaves instrument states as they are; see safe_off_all)."""
        for adapter in self._adapters.values():
            adapter.close()

    def __enter__(self) -> Instruments:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def safe_off_all(self) -> list[str]:
        """Darken every source and attenuator present; return problems, never raise."""
        problems: list[str] = []
        for role in SAFE_OFF_ORDER:
            adapter = self._adapters.get(role)
            safe_off = getattr(adapter, "safe_off", None)
            if safe_off is None:
                continue
            for attempt in range(1, SAFE_OFF_TRIES + 1):
                try:
                    safe_off()
                    break
                except Exception as exc:  # noqa: BLE001 - every source must still be tried
                    message = str(exc) if str(exc).startswith(role) else f"{role}: {exc}"
                    log.error("safe_off failed (try %d of %d): %s", attempt, SAFE_OFF_TRIES,
                              message)
                    if attempt == SAFE_OFF_TRIES:
                        problems.append(message)
        return problems

    def identities(self) -> dict[str, Idn]:
        """``*IDN?`` of every instrument, by role."""
        return {role: adapter.idn() for role, adapter in self._adapters.items()}

    def confirmed_identities(self, reads: int = 4) -> dict[str, Idn]:
        """``*IDN?`` of every instrument, each read until two answers in a row agree, so a
        garbled reply is never taken for an identity (InstrumentError after ``reads`` reads)."""
        return {role: adapter.confirmed_idn(reads) for role, adapter in self._adapters.items()}


def read_each(reads: Sequence[tuple[Adapter, str]]) -> list[Any]:
    """Read one value query from each of several instruments at once (``scpi.query_each``: all
    queries sent before any reply is read), parsed per operation. One read per instrument."""
    ops = [adapter.query_text(name) for adapter, name in reads]
    replies = query_each([(adapter.session, text) for (adapter, _), (_, text)
                          in zip(reads, ops, strict=True)])
    return [adapter.parse(op, reply) for (adapter, _), (op, _), reply
            in zip(reads, ops, replies, strict=True)]


def output_states(adapters: Sequence[Adapter]) -> list[bool | None]:
    """Emission state of each source (None where the instrument does not report it), read from
    all of them at once."""
    reporting = [a for a in adapters if a.profile.capabilities.output_state
                 and a.profile.has("read_output_state")]
    states = dict(zip([id(a) for a in reporting],
                      read_each([(a, "read_output_state") for a in reporting]), strict=True))
    return [states.get(id(a)) for a in adapters]


class SourceReading(NamedTuple):
    """What a source reports during a run: emission state and power setting (None where the
    instrument does not report it)."""

    state: bool | None
    power_dbm: float | None


def _source_queries(adapter: Adapter) -> list[str]:
    """The watch queries of one source: output state (if reported), then power (if mapped)."""
    names = []
    if adapter.profile.capabilities.output_state and adapter.profile.has("read_output_state"):
        names.append("read_output_state")
    if adapter.profile.has("read_power_dbm"):
        names.append("read_power_dbm")
    return names


def source_readings(adapters: Sequence[Adapter],
                    between: Callable[[], None] | None = None) -> list[SourceReading]:
    """Output state and power of each source, read from all of them at once; where the profile
    takes compound messages both queries travel in one message (``OUTP:STAT?;:SOUR:POW?``), so
    watching the power costs no extra round trip.

    ``between`` runs once the first messages are sent and before their replies are read (the
    engine reduces the trace while the sources answer); if it raises, the replies are dropped
    (their connections closed) and its exception goes on.
    """
    names = [_source_queries(a) for a in adapters]
    ops = [[a.query_text(n) for n in ns] for a, ns in zip(adapters, names, strict=True)]
    # messages[i]: the messages to send to adapter i, each a list of the operations it asks
    messages: list[list[list[Any]]] = []
    for a, op_texts in zip(adapters, ops, strict=True):
        if len(op_texts) > 1 and a.session.compound:
            messages.append([op_texts])
        else:
            messages.append([[ot] for ot in op_texts])
    values: list[dict[str, Any]] = [{} for _ in adapters]
    for k in range(max((len(m) for m in messages), default=0)):
        batch = [(i, m[k]) for i, m in enumerate(messages) if k < len(m)]
        texts = [compound(parts[0][1], [t for _, t in parts[1:]]) for _, parts in batch]
        pending = send_each([(adapters[i].session, t) for (i, _), t
                             in zip(batch, texts, strict=True)])
        if k == 0 and between is not None:
            try:
                between()
            except BaseException:
                pending.abandon()
                raise
        replies = pending.read()
        for (i, parts), text, reply in zip(batch, texts, replies, strict=True):
            units = split_units(reply) if len(parts) > 1 else [reply]
            if len(units) != len(parts):
                raise adapters[i].instrument_error(f"reply {reply!r} to {text!r} has "
                                                    f"{len(units)} units, expected {len(parts)}")
            for (op, _), unit in zip(parts, units, strict=True):
                values[i][op.name] = adapters[i].parse(op, unit)
    return [SourceReading(v.get("read_output_state"), v.get("read_power_dbm")) for v in values]


def open_bench(bench: Bench, *, traffic_log: TrafficLog | None = None,
               roles: Iterable[str] | None = None,
               on_fault: FaultHook | None = None) -> Instruments:
    """Open the instruments of ``bench`` (all, or only ``roles``); closes all if one fails."""
    wanted = list(bench.instruments) if roles is None else list(roles)
    for role in wanted:
        if role not in bench.instruments:
            raise InputError(f"role {role!r} is not on this bench", file=str(bench.path),
                             field="instruments")
    adapters: dict[str, Adapter] = {}
    try:
        for role in wanted:
            adapters[role] = open_instrument(bench, role, traffic_log=traffic_log,
                                             on_fault=on_fault)
    except BaseException:
        for adapter in adapters.values():
            adapter.close()
        raise
    return Instruments(bench, adapters)
