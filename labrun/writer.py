"""Stores a measured point on a writer thread while the run measures the next one.

A point's commit (trace encoding, one SQL transaction) takes a few milliseconds the run loop
would otherwise spend before its next point; on the writer thread it overlaps the next point's
instrument exchanges (both zlib and sqlite release the GIL while they work). Still one
transaction per point, in measuring order, and at most one point in flight: ``submit`` first
waits for the previous commit and raises its error, if any. A crash loses at most the point in
flight, which was never acknowledged as stored (its transaction rolls back), so resume measures
it again, as before.
"""

from __future__ import annotations

import queue
import sys
import threading
from collections.abc import Callable

# While a writer runs, a thread holding the GIL gives it up after this long (Python's default is
# 5 ms): the run loop mostly waits on instrument replies, and each time one arrives it must get
# the GIL back from the writer's Python work; 5 ms per reply was a third of a point at time
# scale 0 (benchmarks/bench_engine.py).
SWITCH_INTERVAL_S = 0.0005


class PointWriter:
    """One writer thread running commit jobs one at a time, in submission order."""

    def __init__(self) -> None:
        self._jobs: queue.SimpleQueue[Callable[[], None] | None] = queue.SimpleQueue()
        self._idle = threading.Event()
        self._idle.set()
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._loop, name="labrun-writer", daemon=True)
        self._switch_before = sys.getswitchinterval()
        sys.setswitchinterval(min(self._switch_before, SWITCH_INTERVAL_S))
        self._thread.start()

    def _loop(self) -> None:
        while True:
            job = self._jobs.get()
            if job is None:
                return
            try:
                job()
            except BaseException as exc:  # noqa: BLE001 - handed to the run loop by wait()
                self._error = exc
            finally:
                self._idle.set()

    def submit(self, job: Callable[[], None]) -> None:
        """Run ``job`` on the writer once the previous one is done (its error raised here)."""
        self.wait()
        self._idle.clear()
        self._jobs.put(job)

    def wait(self) -> None:
        """Until nothing is in flight; re-raise the error of a failed job."""
        self._idle.wait()
        error, self._error = self._error, None
        if error is not None:
            raise error

    def close(self, *, raise_errors: bool = True) -> None:
        """Finish what is in flight and stop the thread (errors raised unless told not to)."""
        try:
            self._idle.wait()
            if raise_errors:
                self.wait()
        finally:
            self._jobs.put(None)
            self._thread.join(timeout=60)
            if sys.getswitchinterval() == min(self._switch_before, SWITCH_INTERVAL_S):
                sys.setswitchinterval(self._switch_before)  # as it was, unless changed since
