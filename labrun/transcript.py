"""Transcript of instrument traffic: every write and query, with time, duration and reply.

A run saves it beside its data (JSON lines) so anyone can later see exactly what went on the wire,
and tests can prove from it that no setting above a cap was ever written.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Literal

from labrun.errors import InputError

Direction = Literal["write", "query"]


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
class TranscriptEntry:
    """One exchange on the wire; ``error`` set when it failed.

    ``reply`` is None for a plain write; a "write" that carries queries (an IEEE 488.2 compound
    message: setting, read-back and error query in one) keeps its response message.
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


class Transcript:
    """Thread-safe, append-only record of instrument traffic shared by every session of a bench."""

    def __init__(self) -> None:
        self.entries: list[TranscriptEntry] = []
        self._lock = threading.Lock()

    def record(self, *, resource: str, role: str | None, direction: Direction, text: str,
               started: float, reply: str | None = None, error: str | None = None,
               attempt: int = 1) -> TranscriptEntry:
        """Append one exchange that started at ``started`` (``time.time()``) and ended now."""
        entry = TranscriptEntry(timestamp=started, duration_s=max(0.0, time.time() - started),
                                resource=resource, role=role, direction=direction, text=text,
                                reply=reply, error=error, attempt=attempt)
        with self._lock:
            self.entries.append(entry)
        return entry

    def writes(self, role: str | None = None) -> list[TranscriptEntry]:
        """Every write (optionally of one role), in order: what was sent as a command."""
        return [e for e in self.entries
                if e.direction == "write" and (role is None or e.role == role)]

    def commands(self, role: str | None = None) -> list[str]:
        """The setting each write carried (the first unit of a compound message), in order."""
        return [split_units(e.text)[0] for e in self.writes(role)]

    def save(self, path: str | Path) -> Path:
        """Write the transcript as JSON lines (one entry per line) and return the path."""
        path = Path(path)
        with self._lock:
            lines = [json.dumps(asdict(e), ensure_ascii=False) for e in self.entries]
        try:
            path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
        except OSError as exc:
            raise InputError(f"cannot write the transcript: {exc.strerror or exc}",
                             file=str(path)) from None
        return path

    @classmethod
    def load(cls, path: str | Path) -> Transcript:
        """Read a transcript saved by :meth:`save`."""
        transcript = cls()
        for line in Path(path).read_text(encoding="utf-8").splitlines():
            if line.strip():
                transcript.entries.append(TranscriptEntry(**json.loads(line)))
        return transcript

    def __len__(self) -> int:
        return len(self.entries)
