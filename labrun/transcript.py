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

Direction = Literal["write", "query"]


@dataclass(frozen=True)
class TranscriptEntry:
    """One exchange on the wire; ``reply`` is None for writes, ``error`` set when it failed."""

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

    def save(self, path: str | Path) -> Path:
        """Write the transcript as JSON lines (one entry per line) and return the path."""
        path = Path(path)
        with self._lock:
            lines = [json.dumps(asdict(e), ensure_ascii=False) for e in self.entries]
        path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
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
