"""Traffic log of instrument traffic: every write and query, with time, duration and reply.

A run saves it beside its data (JSON lines) so anyone can later see exactly what went on the wire,
and tests can prove from it that no setting above a cap was ever written. A long run streams it
to a file as it goes (``TrafficLog.stream``: one JSON line per exchange, flushed per point)
without keeping the entries in memory.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Literal, TextIO

from labrun.errors import InputError

Direction = Literal["write", "query"]

EVENT_KIND = "traffic_log"  # the run event naming the file a run's traffic streamed to
# every event kind that names such a file: "transcript" is the name runs stored before 0.2
EVENT_KINDS = (EVENT_KIND, "transcript")


def split_units(message: str) -> list[str]:
    """Split a message at ``;`` outside double-quoted strings (IEEE 488.2 message units).

    Program and response message units are separated by ``;``; string data is double-quoted,
    with a doubled quote standing for one (IEEE 488.2, string program/response data).
    """
    units, start, quoted = [], 0, False
    for i, ch in enumerate(message):
        if ch == '"':
            quoted = not quoted
        elif ch == ";" and not quoted:
            units.append(message[start:i].strip())
            start = i + 1
    units.append(message[start:].strip())
    return units


@dataclass(frozen=True)
class TrafficLogEntry:
    """One exchange on the wire; ``error`` set when it failed.

    ``reply`` is None for a plain write; a "write" that carries queries (an IEEE 488.2 compound
    message: setting, read-back and error query in one) keeps its response message. A block or
    a list of values stands in ``reply`` as a summary (``<block 8004 bytes>``); ``data`` keeps
    what the summary stands for (base64 of the block as received, or the value list's text), so
    the exchange can be played back exactly (``labrun replay --traffic-log``).
    """

    timestamp: float
    duration_s: float
    resource: str
    role: str | None
    direction: Direction
    text: str
    reply: str | None = None
    error: str | None = None
    attempt: int = 1
    data: str | None = None


def json_line(entry: TrafficLogEntry) -> str:
    """One entry as a JSON line (``data`` only when there is a payload: most lines have none)."""
    row = asdict(entry)
    if row["data"] is None:
        del row["data"]
    return json.dumps(row, ensure_ascii=False)


class TrafficLog:
    """Thread-safe, append-only record of instrument traffic shared by every session of a bench.

    ``sink``: a text file each entry is written to as one JSON line when it is recorded (call
    :meth:`flush` at safe points, :meth:`close` at the end). ``retain``: keep the entries in
    ``entries`` too (the default; a streaming run turns it off so memory stays flat).
    """

    def __init__(self, sink: TextIO | None = None, *, retain: bool = True,
                 path: str | Path | None = None) -> None:
        self.entries: list[TrafficLogEntry] = []
        self.sink = sink
        self.retain = retain
        self.path = Path(path) if path is not None else None
        self.count = 0  # exchanges recorded, retained or not
        self._lock = threading.Lock()

    @classmethod
    def stream(cls, path: str | Path, *, append: bool = False,
               retain: bool = False) -> TrafficLog:
        """A traffic log that writes JSON lines to ``path`` as exchanges happen (``append``: keep
        what the file holds, e.g. when a run is resumed). InputError if it cannot be written."""
        path = Path(path)
        try:
            fh = path.open("a" if append else "w", encoding="utf-8")
        except OSError as exc:
            raise InputError(f"cannot write the traffic log: {exc.strerror or exc}",
                             file=str(path), field="--traffic-log") from None
        return cls(fh, retain=retain, path=path.resolve())

    def record(self, *, resource: str, role: str | None, direction: Direction, text: str,
               started: float, reply: str | None = None, error: str | None = None,
               attempt: int = 1, data: str | None = None) -> TrafficLogEntry:
        """Record one exchange that started at ``started`` (``time.time()``) and ended now."""
        entry = TrafficLogEntry(timestamp=started, duration_s=max(0.0, time.time() - started),
                                resource=resource, role=role, direction=direction, text=text,
                                reply=reply, error=error, attempt=attempt, data=data)
        with self._lock:
            self.count += 1
            if self.retain:
                self.entries.append(entry)
            if self.sink is not None:
                self.sink.write(json_line(entry) + "\n")
        return entry

    def flush(self) -> None:
        """Push what the sink buffered to the file (a crash after this keeps it)."""
        with self._lock:
            if self.sink is not None:
                self.sink.flush()

    def close(self) -> None:
        """Flush and close the sink (entries recorded afterwards are only retained)."""
        with self._lock:
            sink, self.sink = self.sink, None
        if sink is not None:
            sink.flush()
            sink.close()

    def __enter__(self) -> TrafficLog:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def writes(self, role: str | None = None) -> list[TrafficLogEntry]:
        """Every write (optionally of one role), in order: what was sent as a command."""
        return [e for e in self.entries
                if e.direction == "write" and (role is None or e.role == role)]

    def commands(self, role: str | None = None) -> list[str]:
        """The settings the writes carried, in order: every unit of a write's message that is
        not a query (a compound message may carry several), without its root colon."""
        return [unit.lstrip(":") for e in self.writes(role) for unit in split_units(e.text)
                if unit and not unit.split(" ", 1)[0].endswith("?")]

    def save(self, path: str | Path) -> Path:
        """Write the traffic log as JSON lines (one entry per line) and return the path."""
        path = Path(path)
        with self._lock:
            lines = [json_line(e) for e in self.entries]
        try:
            path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
        except OSError as exc:
            raise InputError(f"cannot write the traffic log: {exc.strerror or exc}",
                             file=str(path)) from None
        return path

    @classmethod
    def load(cls, path: str | Path) -> TrafficLog:
        """Read a traffic log saved by :meth:`save`."""
        traffic_log = cls()
        for line in Path(path).read_text(encoding="utf-8").splitlines():
            if line.strip():
                traffic_log.entries.append(TrafficLogEntry(**json.loads(line)))
        traffic_log.count = len(traffic_log.entries)
        return traffic_log

    def __len__(self) -> int:
        return self.count
