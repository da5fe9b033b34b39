"""Every way out leaves the light off: signal handlers, an atexit hook and the safe-off call.

``SafeOffGuard`` is armed around a run. SIGINT, SIGTERM and SIGHUP raise ``RunInterrupted`` in the
main thread (so the current point is abandoned at once, never half-stored), at most once; once
the run is on its way out (``defer()``: safe-off and bookkeeping) a signal is only recorded, so
no Ctrl-C or SIGTERM can cut the way out short. ``safe_off`` darkens every role at once
(labrun/safe_off.py): the run's own connection first, briefly, then fresh connections that send
only the profile's ``safe_off_init`` (a remote enable; never ``init``) before switching off, so
an unreachable laser never delays closing its attenuator.
"""

from __future__ import annotations

import atexit
import logging
import signal
import threading
from types import FrameType
from typing import TYPE_CHECKING, Any

from labrun.roles import OFF_ROLES
from labrun.safe_off import BUDGET_S, PAUSE_S, darken

if TYPE_CHECKING:
    from labrun.bench import Bench

__all__ = ["OFF_ROLES", "RunInterrupted", "SafeOffGuard", "safe_off", "safe_off_fresh"]

log = logging.getLogger(__name__)

HANDLED_SIGNALS = tuple(
    s for s in (getattr(signal, n, None) for n in ("SIGINT", "SIGTERM", "SIGHUP")) if s is not None
)


class RunInterrupted(BaseException):  # noqa: N818 - a control-flow signal, like KeyboardInterrupt
    """Raised in the run loop when the operator or the system asks labrun to stop.

    A BaseException so that ``except Exception`` retry logic never swallows it.
    """

    def __init__(self, signum: int):
        self.signum = signum
        super().__init__(f"interrupted by {signal.Signals(signum).name}")


def safe_off_fresh(bench: Bench, *, pause_s: float = PAUSE_S,
                   budget_s: float = BUDGET_S) -> list[str]:
    """Fresh connections only (``safe_off_init``, never ``init``), every role at once; the
    problems left."""
    return darken(bench, None, pause_s=pause_s, budget_s=budget_s)


def safe_off(instruments: Any, bench: Bench) -> list[str]:
    """Everything off at once: each role over the run's own connection first, a fresh one if
    that fails (labrun/safe_off.py); the problems left."""
    try:
        return darken(bench, instruments)
    except Exception as exc:  # noqa: BLE001 - darken never raises; be sure anyway
        return [f"safe-off raised {type(exc).__name__}: {exc}"]


class SafeOffGuard:
    """Arms signal handlers and an atexit hook that switch every source off.

    ``install`` before the run, ``uninstall`` after; ``set_instruments`` keeps it pointing at the
    current connections (they change on reconnect). ``shutdown()`` does the safe-off exactly once.
    """

    def __init__(self, bench: Bench):
        self.bench = bench
        self.instruments: Any = None
        self.signum: int | None = None
        self.problems: list[str] | None = None
        self._critical = False
        self._deferred = False
        self._done = False
        self._lock = threading.Lock()
        self._previous: dict[int, Any] = {}

    # ---- arming ------------------------------------------------------------------------------
    def install(self) -> None:
        """Register the atexit hook and, in the main thread, the signal handlers."""
        atexit.register(self._atexit)
        if threading.current_thread() is threading.main_thread():
            for sig in HANDLED_SIGNALS:
                self._previous[sig] = signal.signal(sig, self._handle)

    def uninstall(self) -> None:
        """Put back the previous signal handlers and drop the atexit hook."""
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)
        self._previous.clear()
        atexit.unregister(self._atexit)

    def set_instruments(self, instruments: Any) -> None:
        """The connections the first safe-off pass uses."""
        self.instruments = instruments

    # ---- events ------------------------------------------------------------------------------
    def _handle(self, signum: int, _frame: FrameType | None) -> None:
        """Signal handler: remember the signal; outside the safe-off, stop the run loop now."""
        first = self.signum is None
        if first:
            self.signum = signum
        if not self._critical and not self._deferred and not self._done and first:
            raise RunInterrupted(signum)

    def _atexit(self) -> None:
        """Interpreter exit without a clean shutdown (an unexpected path): switch off anyway."""
        self.shutdown()

    def defer(self) -> None:
        """From now on a signal is only recorded (``signum``), never raised: the run is on its
        way out (safe-off, bookkeeping), which nothing may cut short."""
        self._deferred = True

    def check(self) -> None:
        """Raise RunInterrupted if a signal arrived while it could not be raised."""
        if self.signum is not None and not self._done:
            raise RunInterrupted(self.signum)

    def shutdown(self) -> list[str]:
        """Switch every source off once (signals deferred meanwhile); the problems left."""
        with self._lock:
            if self._done:
                return self.problems or []
            self._critical = True
            try:
                self.problems = safe_off(self.instruments, self.bench)
            finally:
                self._done = True
                self._critical = False
        return self.problems
