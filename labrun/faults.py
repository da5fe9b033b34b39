"""What happens when an instrument (the OSA, a laser) hangs or fails during a run: the fault policy.

Owns how often a point is tried, when a fault darkens the bench, how long retries go on with the
light off, and the watchdog bounding one attempt at a point.

No light without progress. A fault darkens every source at once (labrun/safe_off.py) when
``darkens`` says so: an instrument that stopped answering (``NoAnswerError``: hung or gone, it
already cost its timeout), a fault not cleared by the retry right after it (the second failure
of a point in a row), or an attempt that outlived its bound (``PointWatchdog``). The retries then
go on with the light off; the run aborts after ``attempts`` attempts in all, or when it has been
dark for ``dark_limit_s`` without completing the point, whichever comes first. Light comes back
only through the engine's full switch-on sequence (``Runner.prepare``: power set and read back,
caps and interlock checked by ``output_on``, emission confirmed), never by re-sending an
``OUTP ON``.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

from labrun.deadlines import MONITOR
from labrun.errors import InstrumentError
from labrun.scpi import NoAnswerError

if TYPE_CHECKING:
    from labrun.bench import Bench

MARGIN_S = 1.0  # slack of every bound below for the host's own scheduling (common practice)


class PointOverrun(InstrumentError):
    """An attempt at a point outlived its bound (``point_bound_s``); the light is already off."""


@dataclass(frozen=True)
class RetryPolicy:
    """How hard to try a point before aborting: attempts in all (also for opening the bench), and
    the pause before retry n: ``backoff_s * backoff_factor**(n-1)``, at most ``max_backoff_s``
    (all x the bench's settle_scale, so 0 in the virtual lab at time scale 0). ``reconnect``:
    an instrument that stopped answering gets fresh connections before the retry.
    ``dark_limit_s``: once a fault has darkened the bench, no new attempt starts after this many
    seconds without the point completing (the run aborts)."""

    attempts: int = 5
    backoff_s: float = 1.0
    reconnect: bool = True
    backoff_factor: float = 2.0
    max_backoff_s: float = 30.0
    dark_limit_s: float = 60.0

    def delay_s(self, attempt: int) -> float:
        """Seconds to wait after failed attempt ``attempt`` (1-based), before the next one."""
        return min(self.backoff_s * self.backoff_factor ** max(0, attempt - 1),
                   self.max_backoff_s)

    def give_up_s(self, attempt_bound_s: float, scale: float = 1.0) -> float:
        """The stated total: the longest from the first fault of a point to the run's end,
        aborted, when the point never completes. Each attempt lasts at most ``attempt_bound_s``
        (``attempt_bound``); the retries with the light off stop starting after
        ``dark_limit_s``; then the final safe-off (its budget and one exchange)."""
        from labrun.safe_off import BUDGET_S, TIMEOUT_MS

        tries = max(1, self.attempts)
        backoffs = sum(self.delay_s(n) for n in range(1, tries)) * scale
        by_attempts = tries * attempt_bound_s + backoffs
        # before the light goes off: at most one attempt and its backoff; after: attempts start
        # until dark_limit_s, each after a backoff, and the last one runs to its end
        one = attempt_bound_s + self.max_backoff_s * scale
        by_time = self.dark_limit_s + 2.0 * one
        safe_off = BUDGET_S + TIMEOUT_MS / 1000.0
        return min(by_attempts, by_time) + safe_off + MARGIN_S


def darkens(exc: BaseException, failures_in_a_row: int, overran: bool = False) -> bool:
    """True when this fault must switch the light off before anything else: the instrument
    stopped answering, the point overran its bound, or the retry right after a fault failed."""
    return overran or isinstance(exc, NoAnswerError) or failures_in_a_row >= 2


def timeouts_s(bench: Bench) -> dict[str, float]:
    """Each role's exchange timeout (its profile's timeout_ms), in seconds."""
    return {role: spec.profile.timeout_ms / 1000.0 for role, spec in bench.instruments.items()}


def point_bound_s(settle_s: float, traces: int, bench: Bench) -> float:
    """How long one attempt at a point may take before it counts as making no progress: its
    settle time, one OSA timeout per trace (a sweep and its read-out answer within it), two of
    the slowest other role's timeouts (a slow reply anywhere else) and ``MARGIN_S``."""
    t = timeouts_s(bench)
    osa = t.get("osa", 0.0)
    others = max([v for r, v in t.items() if r != "osa"] + [0.0])
    return max(0.0, settle_s) + max(1, traces) * osa + 2.0 * others + MARGIN_S


def attempt_bound_s(point_s: float, bench: Bench) -> float:
    """The longest one attempt can last, its reconnect included: the watchdog's bound (after
    which the light is off), one exchange still running then and the reconnect's first failing
    exchange (a session gives up within two of its timeouts each)."""
    return point_s + 4.0 * max(timeouts_s(bench).values(), default=0.0)


class PointWatchdog:
    """Calls ``on_overrun`` once (in its own thread) when an attempt outlives ``bound_s``;
    ``fired`` tells the run loop, which treats it as a fault at its next step."""

    def __init__(self, bound_s: float, on_overrun: Callable[[], None]):
        self.bound_s = bound_s
        self.on_overrun = on_overrun
        self.fired = threading.Event()
        self.started = time.monotonic()
        self.deadline = self.started + bound_s

    def __enter__(self) -> PointWatchdog:
        MONITOR.arm(self)
        return self

    def __exit__(self, *exc_info: object) -> None:
        MONITOR.disarm(self)

    def overrun(self) -> PointOverrun:
        """The fault the run loop raises once this watchdog fired (the light is off)."""
        return PointOverrun(f"point took longer than its bound of {self.bound_s:.1f} s; "
                            "sources switched off")

    def overdue(self) -> bool:
        """True once the bound has passed: fired by the monitor thread, or now by the caller
        (``on_overrun`` then runs in the caller's thread before this returns)."""
        return MONITOR.fire_if_due(self)
