"""Every way out leaves the light off: signal handlers, an atexit hook and a two-pass safe-off.

``SafeOffGuard`` is armed around a run. SIGINT, SIGTERM and SIGHUP raise ``RunInterrupted`` in the
main thread (so the current point is abandoned at once, never half-stored), at most once; once
the run is on its way out (``defer()``: safe-off and bookkeeping) a signal is only recorded, so
no Ctrl-C or SIGTERM can cut the way out short. ``safe_off`` first uses
the run's own connections, then, if anything is left unconfirmed (a dropped link, a reply cut in
half by the signal), opens fresh connections to every source and attenuator (no init commands,
a few short rounds, every role tried in each) and switches them off.
"""

from __future__ import annotations

import atexit
import contextlib
import logging
import signal
import threading
import time
from types import FrameType
from typing import Any

log = logging.getLogger(__name__)

# Roles that carry light to the spool, switched off (or closed) on every exit.
OFF_ROLES = ("laser_a", "laser_b", "amplifier", "attenuator_a", "attenuator_b")
FRESH_ORDER = ("amplifier", "laser_a", "laser_b", "attenuator_a", "attenuator_b")  # strongest first
FRESH_TRIES = 3      # rounds of the fresh-connection pass (a link may come back within a second)
FRESH_PAUSE_S = 0.2  # between rounds: short, the light may be on meanwhile
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


def safe_off_instruments(instruments: Any) -> list[str]:
    """Pass 1: sources off and attenuators to maximum over the open connections; problems found."""
    if instruments is None:
        return ["no open connections"]
    try:
        return list(instruments.safe_off_all())
    except Exception as exc:  # noqa: BLE001 - safe_off_all should never raise; be sure anyway
        return [f"safe_off_all raised {type(exc).__name__}: {exc}"]


def safe_off_fresh(bench: Any, *, tries: int = FRESH_TRIES,
                   pause_s: float = FRESH_PAUSE_S) -> list[str]:
    """Pass 2: new connections to every source/attenuator role, each switched off; the problems
    left. No init commands (a refused ``*CLS`` must not keep a laser on); a role that cannot be
    opened or switched off is tried again, up to ``tries`` rounds ``pause_s`` apart, while the
    other roles go on being darkened."""
    pending = [role for role in FRESH_ORDER if role in bench.instruments]
    last: dict[str, str] = {}
    for attempt in range(1, max(1, tries) + 1):
        if attempt > 1:
            time.sleep(pause_s)
        left = []
        for role in pending:
            problem = _fresh_off_role(bench, role)
            if problem is not None:
                last[role] = problem
                left.append(role)
        pending = left
        if not pending:
            break
        log.warning("fresh safe-off, round %d of %d, left: %s", attempt, tries,
                    "; ".join(last[r] for r in pending))
    return [last[role] for role in pending]


def _fresh_off_role(bench: Any, role: str) -> str | None:
    """Open one role without its init commands and switch it off; the problem, or None."""
    from labrun.instruments import Instruments, open_instrument

    adapter = None
    try:
        adapter = open_instrument(bench, role, initialise=False)
        problems = Instruments(bench, {role: adapter}).safe_off_all()
    except Exception as exc:  # noqa: BLE001 - report; the caller tries again and goes on
        return f"{role}: {type(exc).__name__}: {exc}"
    finally:
        if adapter is not None:
            with contextlib.suppress(Exception):  # closing is best effort
                adapter.close()
    return "; ".join(problems) or None


def safe_off(instruments: Any, bench: Any) -> list[str]:
    """Everything off: own connections first, fresh ones if anything stayed unconfirmed."""
    problems = safe_off_instruments(instruments)
    if not problems:
        return []
    log.warning("safe-off over the run's connections left: %s; retrying on fresh ones",
                "; ".join(problems))
    return safe_off_fresh(bench)


class SafeOffGuard:
    """Arms signal handlers and an atexit hook that switch every source off.

    ``install`` before the run, ``uninstall`` after; ``set_instruments`` keeps it pointing at the
    current connections (they change on reconnect). ``shutdown()`` does the safe-off exactly once.
    """

    def __init__(self, bench: Any):
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
