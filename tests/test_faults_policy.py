"""The fault policy's numbers (labrun/faults.py), each checked against a value worked out by hand
from its stated rule, so a factor or a term missing fails."""

from __future__ import annotations

import time
from types import SimpleNamespace

from labrun.errors import InstrumentError
from labrun.faults import (
    MARGIN_S,
    PointOverrun,
    PointWatchdog,
    RetryPolicy,
    attempt_bound_s,
    darkens,
    point_bound_s,
)
from labrun.safe_off import BUDGET_S, TIMEOUT_MS
from labrun.scpi import NoAnswerError


def _bench(**timeouts_ms: int) -> SimpleNamespace:
    """A stand-in bench: roles with only the profile timeout the bounds read."""
    return SimpleNamespace(instruments={
        role: SimpleNamespace(profile=SimpleNamespace(timeout_ms=ms))
        for role, ms in timeouts_ms.items()})


def test_what_darkens_the_bench():
    assert darkens(NoAnswerError("osa: no answer"), 1)  # hung or gone: at once
    assert not darkens(InstrumentError("osa: short trace"), 1)  # one retry with the light on
    assert darkens(InstrumentError("osa: short trace"), 2)  # not cleared by that retry
    assert darkens(PointOverrun("too long"), 1, overran=True)


def test_point_bound_by_hand():
    bench = _bench(osa=20000, laser_a=3000, laser_b=3000, attenuator_a=5000)
    # settle 2 s + 2 traces x 20 s (OSA) + 2 x 5 s (slowest other) + 1 s
    assert point_bound_s(2.0, 2, bench) == 2.0 + 40.0 + 10.0 + MARGIN_S
    # its attempt: + 4 x the slowest timeout of all (20 s)
    assert attempt_bound_s(53.0, bench) == 53.0 + 80.0


def test_stated_total_by_hand():
    p = RetryPolicy(attempts=3, backoff_s=1.0, backoff_factor=2.0, max_backoff_s=30.0,
                    dark_limit_s=60.0)
    safe_off = BUDGET_S + TIMEOUT_MS / 1000.0
    # by attempts: 3 x 10 s + backoffs 1 + 2 s = 33 s; by time: 60 + 2 x (10 + 30) = 140 s
    assert p.give_up_s(10.0) == 33.0 + safe_off + MARGIN_S
    long = RetryPolicy(attempts=100, backoff_s=1.0, max_backoff_s=2.0, dark_limit_s=60.0)
    assert long.give_up_s(10.0) == 60.0 + 2 * (10.0 + 2.0) + safe_off + MARGIN_S
    # settle_scale 0 (virtual lab): no backoff time counts
    assert long.give_up_s(10.0, scale=0.0) == 60.0 + 2 * 10.0 + safe_off + MARGIN_S


def test_watchdog_fires_after_its_bound_and_only_then():
    calls = []
    with PointWatchdog(0.3, lambda: calls.append(time.monotonic())) as dog:
        time.sleep(0.15)
        assert not dog.fired.is_set() and not calls
        time.sleep(0.4)
        assert dog.fired.is_set() and len(calls) == 1
        assert calls[0] - dog.started >= 0.3
    with PointWatchdog(0.2, lambda: calls.append(0.0)) as quiet:
        pass  # the attempt ended in time
    time.sleep(0.3)
    assert not quiet.fired.is_set() and len(calls) == 1
