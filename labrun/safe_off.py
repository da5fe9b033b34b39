"""Owns darkening a bench: every light-carrying role switched off at once, with short timeouts.

``darken`` gives each of the roles in ``OFF_ROLES`` (lasers and amplifier output off, attenuators
to maximum with their shutters closed) its own thread: the run's own connection first (one short
try, never waiting on a busy session), then fresh connections that send only the profile's
``safe_off_init`` commands (a remote enable), unchecked and any failure ignored, then the
switch-off before any error-queue read, retried until ``budget_s``.
An unreachable laser therefore never delays closing its attenuator: every reachable role is
dark within about one round trip of the decision, whatever the others do. Used by the engine's
fault exits and ``SafeOffGuard`` (labrun/shutdown.py) and by
``labrun off`` (labrun/cli/off.py).
"""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any, TypeVar

from labrun.roles import OFF_ROLES

if TYPE_CHECKING:
    from labrun.bench import Bench

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())  # library: shown only when the application configures logging

TIMEOUT_MS = 1000  # per exchange while darkening: a reachable instrument answers in far less
BUDGET_S = 4.0     # a role not confirmed dark by then is reported (the others are long done)
PAUSE_S = 0.2      # between fresh tries of a role that could not be reached
OWN_TRIES = 2      # tries over the run's own connection (a garbled reply must not count)
LOCK_WAIT_S = 0.1  # longest wait for a session another thread is using; then a fresh one
T = TypeVar("T")


def quick_adapter(bench: Bench, role: str, timeout_ms: int = TIMEOUT_MS) -> Any:
    """A fresh connection to one role, with exchanges bounded by ``timeout_ms`` and tried once.
    Only its profile's ``safe_off_init`` commands are sent (a remote enable: an instrument in
    local mode refuses the switch-off until then; never its ``init``, which may set things),
    unchecked and any failure ignored (a refused or unanswered one must not keep a laser on);
    the error queue is read only after the switch-off (``switch_off``). The session is closed
    again if the adapter cannot be made."""
    from labrun.instruments import ADAPTERS, make_session

    spec = bench.instruments[role]
    session = make_session(bench, role)
    session.timeout_ms = max(1, min(session.timeout_ms, int(timeout_ms)))
    session.retries = 0
    session.open()
    try:
        for cmd in spec.profile.safe_off_init:
            try:
                session.write(cmd, check_errors=False)
            except Exception as exc:  # noqa: BLE001 - the switch-off decides, not the init
                log.info("safe-off: %s: safe_off_init %r failed (%s: %s)", role, cmd,
                         type(exc).__name__, exc)
        return ADAPTERS[spec.kind](spec, session, settle_scale=bench.settle_scale)
    except BaseException:
        session.close()
        raise


def confirmed_dark(adapter: Any) -> bool:
    """True when the instrument itself reads back dark: output off and, for an attenuator, at
    its maximum attenuation. False when it does not report its state or reads back lit."""
    if adapter.output_state() is not False:
        return False
    if hasattr(adapter, "max_attenuation_db"):
        return bool(adapter.attenuation_db() >= adapter.max_attenuation_db - 0.05)
    return True


def switch_off(adapter: Any, role: str) -> None:
    """``adapter.safe_off()``, whose switch-off is sent before its error queue is read; when
    that read fails (a reply of another form, no reply) or reports an error, the role still
    counts as dark if the instrument reads back dark (the failure is logged), else it raises."""
    try:
        adapter.safe_off()
    except Exception as exc:
        try:
            dark = confirmed_dark(adapter)
        except Exception:  # noqa: BLE001 - the switch-off's own failure is the one to report
            dark = False
        if not dark:
            raise
        log.warning("safe-off: %s reads back dark; the switch-off's check failed: %s", role,
                    _problem(role, exc))


def _problem(role: str, exc: BaseException) -> str:
    """'role: what went wrong' in one line."""
    text = str(exc) or type(exc).__name__
    return text if text.startswith(role) else f"{role}: {type(exc).__name__}: {text}"


def _off_own(adapter: Any, role: str, timeout_ms: int) -> str | None:
    """Switch one role off over the run's own connection, briefly; the problem, or None."""
    from labrun.scpi import NoAnswerError

    problem: str | None = None
    for _ in range(OWN_TRIES):
        try:
            with adapter.session.quick(timeout_ms, wait_s=LOCK_WAIT_S):
                adapter.safe_off()
            return None
        except NoAnswerError as exc:  # silent or busy: a fresh connection is the next step
            return _problem(role, exc)
        except Exception as exc:  # noqa: BLE001 - a garbled reply: once more
            problem = _problem(role, exc)
    return problem


def _off_fresh(bench: Bench, role: str, timeout_ms: int) -> str | None:
    """Switch one role off over a fresh connection; the problem, or None."""
    adapter = None
    try:
        adapter = quick_adapter(bench, role, timeout_ms)
        switch_off(adapter, role)
        return None
    except Exception as exc:  # noqa: BLE001 - reported; the caller tries again
        return _problem(role, exc)
    finally:
        if adapter is not None:
            with contextlib.suppress(Exception):
                adapter.close()


def darken_role(bench: Bench, role: str, own: Any = None, *, timeout_ms: int = TIMEOUT_MS,
                deadline: float | None = None, pause_s: float = PAUSE_S) -> str | None:
    """One role dark: own connection first, then fresh ones until ``deadline`` (monotonic);
    the last problem, or None once it is confirmed dark."""
    deadline = time.monotonic() + BUDGET_S if deadline is None else deadline
    problem = None
    if own is not None:
        problem = _off_own(own, role, timeout_ms)
        if problem is None:
            return None
    while True:
        left = deadline - time.monotonic()
        if left <= 0:
            return problem or f"{role}: not tried before the deadline"
        problem = _off_fresh(bench, role, min(timeout_ms, max(1, int(left * 1000))))
        if problem is None:
            return None
        log.warning("safe-off: %s", problem)
        if deadline - time.monotonic() <= pause_s:
            return problem
        time.sleep(pause_s)


def in_parallel(roles: list[str], work: Callable[[str], T], budget_s: float,
                late: Callable[[str], T]) -> dict[str, T]:
    """``work(role)`` for every role at once, each in its own daemon thread; after
    ``budget_s`` a role still busy gets ``late(role)`` (its thread is left to finish)."""
    results: dict[str, T] = {}
    lock = threading.Lock()

    def run(role: str) -> None:
        try:
            value = work(role)
        except BaseException as exc:  # noqa: BLE001 - a thread must report, not die silently
            log.error("safe-off of %s raised %s: %s", role, type(exc).__name__, exc)
            return
        with lock:
            results[role] = value

    threads = [threading.Thread(target=run, args=(role,), name=f"safe-off-{role}", daemon=True)
               for role in roles]
    for thread in threads:
        thread.start()
    end = time.monotonic() + budget_s + 0.5  # the workers watch budget_s themselves
    for thread in threads:
        thread.join(max(0.0, end - time.monotonic()))
    with lock:
        return {role: results[role] if role in results else late(role) for role in roles}


def darken(bench: Bench, instruments: Mapping[str, Any] | None = None, *,
           timeout_ms: int = TIMEOUT_MS, budget_s: float = BUDGET_S,
           pause_s: float = PAUSE_S) -> list[str]:
    """Every role of ``OFF_ROLES`` on the bench dark at once; the problems left (none: all
    confirmed). Never raises; returns within about ``budget_s`` + one ``timeout_ms``."""
    roles = [r for r in OFF_ROLES if r in bench.instruments]
    own = dict(instruments or {})
    deadline = time.monotonic() + budget_s

    def work(role: str) -> str | None:
        return darken_role(bench, role, own.get(role), timeout_ms=timeout_ms,
                           deadline=deadline, pause_s=pause_s)

    results = in_parallel(roles, work, budget_s,
                          lambda role: f"{role}: not confirmed dark within {budget_s:g} s")
    return [p for p in (results[r] for r in roles) if p]
