"""Fault paths of a run, short form (the full table: benchmarks/bench_faults.py): each fault of
issue 13's table forced on the virtual lab mid-run, timed from the fault against the lab's own
state (labrun.faultdrill). Targets from issue 13: every reachable source off and every
reachable shutter closed within (the faulted instrument's timeout + 1 s); the run ends, aborted
with a reason and nothing left ``running``, within the retry policy's stated total time.

The timeouts are 1 s (not the profiles' seconds, to stay fast, and not shorter: a session that
re-sent a timed-out exchange would still make 3 x 0.3 s look like one timeout + 1 s).
"""

from __future__ import annotations

import pytest

from labrun.faultdrill import ROWS, measure
from labrun.faults import RetryPolicy

TIMEOUTS_MS = {name: 1000 for name in (
    "generic-osa", "generic-laser", "generic-attenuator", "generic-pol-controller",
    "generic-switch", "generic-power-meter", "generic-amplifier")}
# Many attempts, a short dark limit: the run must end by the limit, not by running out of tries.
POLICY = RetryPolicy(attempts=50, backoff_s=0.05, max_backoff_s=0.2, dark_limit_s=2.0)
LOST = [name for name, row in ROWS.items() if row.lost_role]


def _within(m, bound: float) -> bool:
    """Every reachable source off and shutter closed within ``bound`` seconds of the fault."""
    return all(t is not None and t <= bound for t in (m.sources_off_s, m.shutters_closed_s))


@pytest.mark.parametrize("name", LOST)
def test_an_instrument_hung_or_gone_ends_the_run_dark_in_time(tmp_path, name):
    m = measure(ROWS[name], tmp_path, timeouts_ms=TIMEOUTS_MS, policy=POLICY)
    bound = m.timeout_s + 1.0
    if not _within(m, bound):  # the machine is shared: a load spike gets one more measurement,
        (tmp_path / "again").mkdir()  # a real overrun shows in both
        m = measure(ROWS[name], tmp_path / "again", timeouts_ms=TIMEOUTS_MS, policy=POLICY)
    assert m.sources_off_s is not None and m.sources_off_s <= bound, m
    assert m.shutters_closed_s is not None and m.shutters_closed_s <= bound, m
    assert m.status == "aborted" and m.stored_status == "aborted", m
    assert ROWS[name].lost_role in (m.reason or "") and "dark for" in (m.reason or ""), m
    assert m.run_end_s <= m.give_up_s, m
    assert m.extra["dark"] >= 1


def test_a_trace_that_cannot_be_reduced_goes_dark_then_recovers(tmp_path):
    """The OSA re-centred from its front panel: the retry right after the first failed
    reduction fails too, so the sources go off; everything is set again (the OSA re-centred by
    labrun) and the light returns through the full switch-on sequence.

    The watchdog's bound is taken out of play (10 min): with 1 s timeouts it is 4 s, which the
    first point (bench opening, scipy loading) outlived on a loaded machine, adding a dark and
    relight of its own; the watchdog is checked by the tests below."""
    from labrun.engine import Seams

    m = measure(ROWS["osa-recentred"], tmp_path, timeouts_ms=TIMEOUTS_MS, policy=POLICY,
                n_points=40, seams=Seams(point_bound_s=lambda *_a: 600.0))
    assert m.sources_off_s is not None and m.sources_off_s <= 1.0, m
    assert m.shutters_closed_s is not None and m.shutters_closed_s <= 1.0, m
    assert m.status == "completed" and m.points_done == 40, m
    assert (m.extra["dark"], m.extra["relight"]) == (1, 1), m


def test_an_attempt_that_outlives_its_bound_goes_dark(tmp_path):
    """The watchdog: every attempt is given 1 ms (the bound cut down from seconds), so
    each overruns; the watchdog darkens the bench from its own thread, the loop treats it as a
    fault, and the run aborts dark with the reason."""
    import labrun.engine
    from labrun.bench import load_bench
    from labrun.faultdrill import plan_text, scenario, write_bench
    from labrun.plan import load_plan
    from labrun.store import open_store
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path, {}))
        (tmp_path / "plan.toml").write_text(plan_text(5), encoding="utf-8")
        store = open_store(tmp_path / "runs.db")
        out = labrun.engine.run_plan(load_plan(tmp_path / "plan.toml"), bench, store,
                                     operator="T. Varga", unattended=True, ack_safety=True,
                                     progress=False, policy=RetryPolicy(attempts=3, backoff_s=0),
                                     seams=labrun.engine.Seams(point_bound_s=lambda *a: 0.001))
        assert lab.sources_off() and all(lab.role_dark(r) for r in ("attenuator_a",
                                                                    "attenuator_b"))
    assert out.status == "aborted" and "longer than its bound" in out.reason
    assert store.events(out.run_id, ["dark"])


def test_a_watchdog_that_fires_after_the_attempts_last_check_still_counts(tmp_path):
    """The watchdog fires after the attempt's last look at it (here: while the trace is reduced,
    after the sources' watch passed); its thread darkens the bench all the same. The loop must
    count it as a fault (a ``dark`` event, the point taken again through the switch-on
    sequence), not carry on as if lit and abort at the next point on a laser found off."""
    import labrun.engine
    from labrun.bench import load_bench
    from labrun.deadlines import MONITOR
    from labrun.faultdrill import plan_text, scenario, write_bench
    from labrun.faults import PointWatchdog
    from labrun.instruments import source_readings
    from labrun.plan import load_plan
    from labrun.store import open_store
    from labrun.vlab.lab import VirtualLab

    dogs: list[PointWatchdog] = []

    def watchdog(bound_s, on_overrun):
        dogs.append(PointWatchdog(bound_s, on_overrun))
        return dogs[-1]

    fired_late: list[bool] = []

    with VirtualLab(scenario()) as lab:
        real_reduce = labrun.engine.Seams().reduce_trace

        def reduce_trace(*args, **kwargs):
            """The first point's reduction: its watchdog comes due now and darkens the bench
            (waited for on the lab's state, not on a clock)."""
            if not fired_late:
                fired_late.append(True)
                dog = dogs[-1]
                dog.deadline = 0.0
                MONITOR.arm(dog)  # wakes the monitor thread: it fires the overdue dog
                assert dog.fired.wait(30.0)
                for _ in range(30000):  # the overrun thread darkens: poll the lab, 30 s at most
                    if lab.sources_off():
                        break
                    dog.fired.wait(0.001)
                assert lab.sources_off()
            return real_reduce(*args, **kwargs)

        def readings(adapters):  # no ``between``: the reduction runs after the watch passed
            return source_readings(adapters)

        bench = load_bench(write_bench(lab, tmp_path, {}))
        (tmp_path / "plan.toml").write_text(plan_text(3), encoding="utf-8")
        store = open_store(tmp_path / "runs.db")
        out = labrun.engine.run_plan(load_plan(tmp_path / "plan.toml"), bench, store,
                                     operator="T. Varga", unattended=True, ack_safety=True,
                                     progress=False, policy=RetryPolicy(attempts=3, backoff_s=0),
                                     seams=labrun.engine.Seams(reduce_trace=reduce_trace,
                                                               source_readings=readings,
                                                               watchdog=watchdog))
        assert lab.sources_off()
    assert fired_late
    assert out.status == "completed" and out.points_done == 3, out
    dark = store.events(out.run_id, ["dark"])
    assert len(dark) == 1 and "longer than its bound" in dark[0].message, dark
    assert len(store.events(out.run_id, ["relight"])) == 1
