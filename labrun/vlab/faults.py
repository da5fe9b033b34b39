"""Seeded fault injection for one simulated instrument: swallowed commands (the client times out),
dropped connections, garbled replies, spurious error-queue entries and short traces; and, on
demand, a hung instrument (``hung``: accepts connections and commands, never replies).

Each instrument draws from its own generator (seed, role), so its fault sequence does not depend on
how the threads of other instruments interleave.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

from labrun.vlab.realism import role_rng
from labrun.vlab.scenario import Faults

# SCPI-1999 codes of the spurious error-queue entries (messages from labrun.vlab.scpi.ERRORS).
SPURIOUS_CODES: tuple[int, ...] = (-300, -310, -221, -230)
_PRINTABLE = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789#?!*%$&"


@dataclass(frozen=True)
class Decision:
    """What goes wrong with one received command."""

    drop: bool = False
    timeout: bool = False
    garble: bool = False
    spurious: int | None = None


NO_FAULT = Decision()
HUNG = Decision(timeout=True)


class FaultInjector:
    """Draws per-command faults at the scenario's probabilities and counts what it injected."""

    def __init__(self, faults: Faults, role: str, seed: int):
        self.faults = faults
        self.active = faults.enabled and (not faults.roles or role in faults.roles)
        self._rng = role_rng(seed, "faults", role)
        self.counts: Counter[str] = Counter()
        self.hung = False  # set by VirtualLab.hang(): every command swallowed, no draw made

    def on_command(self) -> Decision:
        """Decide the fate of one received command (always draws the same number of variates)."""
        if self.hung:
            self.counts["hung"] += 1
            return HUNG
        if not self.active:
            return NO_FAULT
        f = self.faults
        u = self._rng.random(5)
        spurious = None
        if u[3] < f.spurious_error_probability:
            spurious = SPURIOUS_CODES[int(u[4] * len(SPURIOUS_CODES)) % len(SPURIOUS_CODES)]
        decision = Decision(drop=bool(u[0] < f.drop_probability),
                            timeout=bool(u[1] < f.timeout_probability),
                            garble=bool(u[2] < f.garble_probability), spurious=spurious)
        for name in ("drop", "timeout", "garble"):
            if getattr(decision, name):
                self.counts[name] += 1
        if spurious:
            self.counts["spurious"] += 1
        return decision

    def garble(self, reply: bytes) -> bytes:
        """Corrupt a reply body (first byte and about 10 % of the rest), keeping the terminator."""
        body = bytearray(reply[:-1] if reply.endswith(b"\n") else reply)
        if not body:
            body = bytearray(b"?")
        n = max(1, len(body) // 10)
        where = {0, *self._rng.integers(0, len(body), n).tolist()}
        for i in where:
            new = _PRINTABLE[int(self._rng.integers(0, len(_PRINTABLE)))]
            body[i] = new if new != body[i] else ord("~")
        return bytes(body) + b"\n"

    def short_trace_length(self, n: int) -> int | None:
        """A truncated trace length (10-90 % of n) at the short-trace probability, else None."""
        if not self.active or self.faults.short_trace_probability <= 0 or n < 2:
            return None
        if self._rng.random() >= self.faults.short_trace_probability:
            return None
        self.counts["short_trace"] += 1
        return max(1, int(n * self._rng.uniform(0.1, 0.9)))
