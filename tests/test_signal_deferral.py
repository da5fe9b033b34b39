"""A first SIGINT or SIGTERM that arrives while a run is already on its way out (its exception
being classified, the safe-off, the store bookkeeping) is recorded, never raised: no traceback
escapes, the run is not left marked "running", and the lab ends dark.

The signal is raised in this process at a chosen moment of the way out (deterministic), with
test handlers installed as the "previous" ones, so a signal that reached them would show up as
``Escaped`` instead of killing the test process. Checked on the virtual lab's own state.
"""

from __future__ import annotations

import signal
from dataclasses import replace

import pytest
from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan

import labrun.reduce
from labrun.bench import load_bench
from labrun.engine import Seams, run_plan
from labrun.plan import load_plan
from labrun.shutdown import SafeOffGuard
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab

N_POINTS = 6


class Escaped(Exception):  # noqa: N818 - what a signal that got past the guard raises here
    """A signal reached the handler that was installed before the run."""


@pytest.fixture
def outer_handlers():
    """Handlers for SIGINT/SIGTERM that raise Escaped (restored afterwards)."""
    def escaped(signum, _frame):
        raise Escaped(signal.Signals(signum).name)

    saved = {s: signal.signal(s, escaped) for s in (signal.SIGINT, signal.SIGTERM)}
    yield
    for s, handler in saved.items():
        signal.signal(s, handler)


def _failing_reduction(at_call: int) -> Seams:
    """The run's seams with a reduction that raises at call ``at_call``."""
    real = labrun.reduce.reduce_trace
    calls = {"n": 0}

    def failing(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == at_call:
            raise RuntimeError("reduction blew up")
        return real(*args, **kwargs)

    return Seams(reduce_trace=failing)


def _run(tmp_path, lab, seams=None, wrap=lambda store: store):
    """The store, and the run to start (on ``wrap(store)``)."""
    plan = load_plan(write_plan(tmp_path, long_powers(N_POINTS)))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    return store, lambda: run_plan(plan, bench, wrap(store), operator=OPERATOR,
                                   unattended=True, ack_safety=True, progress=False,
                                   seams=seams)


class _SignalAtSafeOffEvent:
    """A store that raises ``sig`` in this process as the run's ``safe_off`` event is written;
    every call goes to the real store."""

    def __init__(self, store, sig):
        self.store, self.sig = store, sig

    def __getattr__(self, name):
        return getattr(self.store, name)

    def add_event(self, run_id, kind, *args, **kwargs):
        if kind == "safe_off":
            signal.raise_signal(self.sig)
        return self.store.add_event(run_id, kind, *args, **kwargs)


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_signal_during_the_bookkeeping(tmp_path, outer_handlers, sig):
    """The reduction fails; while the run's end is being written to the store a signal comes."""
    seams = _failing_reduction(at_call=3)
    with VirtualLab(scenario()) as lab:
        store, run = _run(tmp_path, lab, seams, wrap=lambda s: _SignalAtSafeOffEvent(s, sig))
        with pytest.raises(RuntimeError, match="blew up"):  # the run's own error, not Escaped
            run()
        run_row = store.get_run(store.latest_run_id())
        assert run_row.status == "failed" and "blew up" in run_row.reason
        assert run_row.finished_at is not None
        (note,) = store.events(run_row.id, ["signal"])
        assert signal.Signals(sig).name in note.message
        assert dark(lab)


class _LateDeferral(SafeOffGuard):
    """The run's guard, with SIGTERM arriving just before it defers signals."""

    def defer(self):
        signal.raise_signal(signal.SIGTERM)  # arrives before the deferral takes effect
        super().defer()


@pytest.mark.parametrize("fail", [True, False], ids=["after-an-error", "after-the-last-point"])
def test_signal_between_the_end_of_the_run_and_the_deferral(tmp_path, outer_handlers, fail):
    """The narrowest window: the run loop has ended (by an error, or by measuring every point)
    and the signal lands just before signals are deferred. The run keeps its real outcome."""
    seams = replace(_failing_reduction(at_call=3) if fail else Seams(), guard=_LateDeferral)
    with VirtualLab(scenario()) as lab:
        store, run = _run(tmp_path, lab, seams)
        if fail:
            with pytest.raises(RuntimeError, match="blew up"):
                run()
        else:
            out = run()
            assert out.status == "completed" and out.points_done == N_POINTS
            assert out.exit_code == 0
        run_row = store.get_run(store.latest_run_id())
        assert run_row.status == ("failed" if fail else "completed")
        assert store.events(run_row.id, ["signal"])
        assert dark(lab)


def test_signal_during_the_safe_off(tmp_path, outer_handlers):
    """SIGTERM sent by another thread while the safe-off switches laser_a off: the safe-off
    finishes, the run is recorded as it ended."""
    import os

    seams = _failing_reduction(at_call=3)
    with VirtualLab(scenario()) as lab:
        laser = lab.instruments["laser_a"]
        real_execute = laser.execute
        sent = {"n": 0}

        def execute(message):
            if "OUTP:STAT OFF" in message and sent["n"] == 0:
                sent["n"] += 1
                os.kill(os.getpid(), signal.SIGTERM)
            return real_execute(message)

        laser.execute = execute
        store, run = _run(tmp_path, lab, seams)
        with pytest.raises(RuntimeError, match="blew up"):
            run()
        assert sent["n"] == 1
        run_row = store.get_run(store.latest_run_id())
        assert run_row.status == "failed"
        assert store.events(run_row.id, ["signal"])
        assert dark(lab)
