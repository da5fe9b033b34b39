"""Owns timing the virtual lab from outside: when did each watched condition first hold.

``StateWatch`` polls named predicates on the lab's own state (``lab.role_dark(role)`` and the
like) every few milliseconds in a background thread and keeps the first monotonic time each one
held after ``arm()``; fault-path tests and benchmarks/bench_faults.py measure the time from a
fault to each role's safe state with it, never from labrun's own account.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable


class StateWatch:
    """First time (``time.monotonic()``) each named condition held, polled every ``step_s``."""

    def __init__(self, checks: dict[str, Callable[[], bool]], step_s: float = 0.005):
        self.checks = dict(checks)
        self.step_s = step_s
        self.first: dict[str, float] = {}
        self.t0: float | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def arm(self, t0: float | None = None) -> StateWatch:
        """Start watching; conditions are timed from ``t0`` (default: now)."""
        self.t0 = time.monotonic() if t0 is None else t0
        self.first.clear()
        self._thread = threading.Thread(target=self._poll, name="vlab-watch", daemon=True)
        self._thread.start()
        return self

    def _poll(self) -> None:
        while not self._stop.is_set():
            now = time.monotonic()
            for name, check in self.checks.items():
                if name not in self.first and check():
                    self.first[name] = now
            if len(self.first) == len(self.checks):
                return
            self._stop.wait(self.step_s)

    def after(self, name: str) -> float | None:
        """Seconds from ``t0`` until ``name`` first held, or None (not yet)."""
        if name not in self.first or self.t0 is None:
            return None
        return max(0.0, self.first[name] - self.t0)

    def stop(self) -> None:
        """Stop polling (idempotent)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
