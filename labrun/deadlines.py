"""Deadlines watched by one daemon thread: the point watchdog (labrun/faults.py) and the store's
slow-write alarm (labrun/runstore.py) arm one per point or per write, and starting a thread for
each cost more than the rest of a point's bookkeeping at time scale 0."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Protocol


class Deadline(Protocol):
    """What the monitor watches: when it is due, the flag it sets, the call it makes."""

    deadline: float
    fired: threading.Event
    on_overrun: Callable[[], None]


class Alarm:
    """Calls ``on_overrun`` once (in a thread of its own) unless disarmed within ``after_s``;
    a context manager (armed inside the ``with``)."""

    def __init__(self, after_s: float, on_overrun: Callable[[], None]):
        self.on_overrun = on_overrun
        self.fired = threading.Event()
        self.started = time.monotonic()
        self.deadline = self.started + after_s

    def __enter__(self) -> Alarm:
        MONITOR.arm(self)
        return self

    def __exit__(self, *exc_info: object) -> None:
        MONITOR.disarm(self)


class Monitor:
    """One daemon thread watching every armed Deadline: it sleeps until the earliest one and
    fires what is due; each ``on_overrun`` runs in a thread of its own, so a slow safe-off
    never delays another deadline."""

    def __init__(self) -> None:
        self._cond = threading.Condition()
        self._armed: dict[int, Deadline] = {}
        self._thread: threading.Thread | None = None

    def arm(self, dog: Deadline) -> None:
        """Watch ``dog`` until ``disarm`` (starting the thread on first use)."""
        with self._cond:
            self._armed[id(dog)] = dog
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._watch, name="labrun-deadlines",
                                                daemon=True)
                self._thread.start()
            self._cond.notify()

    def armed(self) -> int:
        """How many deadlines are being watched now."""
        with self._cond:
            return len(self._armed)

    def disarm(self, dog: Deadline) -> None:
        """Stop watching ``dog`` (its attempt ended)."""
        with self._cond:
            self._armed.pop(id(dog), None)

    def fire_if_due(self, dog: Deadline) -> bool:
        """From the watched thread itself: fire ``dog`` now if its time has come and the
        monitor has not yet (a starved monitor thread must not let an overrun pass), calling
        ``on_overrun`` here; True when ``dog`` has fired, here or before."""
        with self._cond:
            if dog.fired.is_set():
                return True
            if time.monotonic() < dog.deadline:
                return False
            self._armed.pop(id(dog), None)
            dog.fired.set()
        dog.on_overrun()
        return True

    def _watch(self) -> None:
        with self._cond:
            while True:
                now = time.monotonic()
                due = [d for d in self._armed.values() if d.deadline <= now]
                for dog in due:
                    del self._armed[id(dog)]
                    dog.fired.set()
                    threading.Thread(target=dog.on_overrun, name="point-overrun",
                                     daemon=True).start()
                nearest = min((d.deadline for d in self._armed.values()), default=None)
                self._cond.wait(None if nearest is None else max(0.0, nearest - now))


MONITOR = Monitor()
