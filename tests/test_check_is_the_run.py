"""`labrun check` rehearses the run with the engine itself (labrun.rehearse): the messages it
sends its simulated instruments are the messages a real run sends the virtual lab, and its
duration is the time the instruments impose (the run cannot be faster)."""

from __future__ import annotations

import time

from _engine_support import OPERATOR, dark, scenario, write_bench, write_plan

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.plan import load_plan
from labrun.rehearse import rehearse, settings_sent
from labrun.store import open_store
from labrun.trafficlog import TrafficLog, split_units
from labrun.vlab.lab import VirtualLab


def _per_role(entries, role):
    return [e.text for e in entries if e.role == role]


def test_the_rehearsal_sends_what_the_run_sends(tmp_path):
    """Per instrument, the rehearsal's messages are exactly the run's, in order; the run then
    only adds its safe-off (outputs off, attenuators to their maximum, and their read-backs)."""
    plan = load_plan(write_plan(tmp_path, [0.0, 1.0, 2.0]))
    log = TrafficLog()
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        out = run_plan(plan, bench, open_store(tmp_path / "r.db"), operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False, traffic_log=log)
        assert out.status == "completed", out.reason
        assert dark(lab)
    rehearsal = rehearse(plan, bench)
    assert len(rehearsal.points) == 3
    for role in bench.instruments:
        ran, rehearsed = _per_role(log.entries, role), _per_role(rehearsal.traffic_log.entries,
                                                                role)
        assert rehearsed and ran == rehearsed, role
    # the rehearsal ends as the run does: its safe-off (outputs off, attenuators to maximum)
    finish = [unit.lstrip(":") for e in rehearsal.finish for unit in split_units(e.text)
              if not unit.endswith("?")]
    assert "INP:ATT 60.000" in finish and "OUTP:STAT OFF" in finish
    assert all(u == "OUTP:STAT OFF" or u == "INP:ATT 60.000" for u in finish), finish
    # what check shows per point: the setting units, e.g. only the attenuators after the first
    second = settings_sent(rehearsal.points[1].entries)
    assert [r for r, _ in second] == ["attenuator_a", "attenuator_b", "osa"]


def test_the_estimate_is_the_whole_run(tmp_path):
    """At time scale 1 (about a second of instrument time): the rehearsal's total is the whole
    run as the instruments impose it (opening, per point the longest settle of what moved plus
    the OSA profile's sweep time, then the safe-off's attenuators to maximum); the real run,
    start to exit, takes at least that and not much more (a generous bound: the machine may be
    busy; benchmarks/bench_engine.py prints the figure)."""
    plan = load_plan(write_plan(tmp_path, [0.0, 1.0, 2.0]))
    with VirtualLab(scenario(), time_scale=1.0) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        estimate = rehearse(plan, bench)
        osa = plan.osa_settings(bench)
        # generic OSA profile: 0.05 s + 2e-5 s per sample + 5e-4 s per span/RBW (its own figures)
        sweep = 0.05 + osa.points * 2e-5 + osa.span_nm / osa.rbw_nm * 5e-4
        # first point: the laser wavelength's 0.5 s, then the attenuators' 0.1 s (generic
        # laser and attenuator profiles; the plan asks for no settle time)
        loop = 0.5 + 2 * 0.1 + 3 * sweep
        assert abs(estimate.points_s - loop) <= 0.005 * loop
        # opening: no stated wait; safe-off: the attenuators to maximum settle 0.1 s each, in
        # parallel (generic attenuator profile; the lasers' output_off states none)
        assert estimate.opening_s == 0.0
        assert abs(estimate.finish_s - 0.1) <= 1e-9
        assert estimate.total_s == estimate.opening_s + estimate.points_s + estimate.finish_s
        t0 = time.perf_counter()
        out = run_plan(plan, bench, open_store(tmp_path / "r.db"), operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False)
        real = time.perf_counter() - t0
        assert out.status == "completed", out.reason
    assert estimate.total_s <= real <= 3.0 * estimate.total_s + 3.0
