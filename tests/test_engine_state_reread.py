"""A single corrupted output-state reply must not end a night; a real surprise still does.

The first read of a surprising state is confirmed by a second read: the run goes on when the
second read shows the expected state (recorded as a fault), and aborts with every source off
when the surprise is real. Checked on the virtual lab's own state.
"""

from __future__ import annotations

from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan

import labrun.instruments
from labrun.bench import load_bench
from labrun.engine import Seams, run_plan
from labrun.plan import load_plan
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab


def _run(tmp_path, lab, seams):
    plan = load_plan(write_plan(tmp_path, long_powers(8)))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    outcome = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                       progress=False, seams=seams)
    return outcome, store


def test_one_corrupted_state_reply_is_a_fault_not_an_abort(tmp_path):
    real = labrun.instruments.source_readings
    flipped = {"done": False}

    def one_bad_reply(adapters):
        readings = list(real(adapters))
        if not flipped["done"] and readings and readings[0].state is True:
            readings[0] = readings[0]._replace(state=False)  # as if "1" had arrived as "0" once
            flipped["done"] = True
        return readings

    with VirtualLab(scenario()) as lab:
        outcome, store = _run(tmp_path, lab, Seams(source_readings=one_bad_reply))
        assert flipped["done"]
        assert outcome.status == "completed" and outcome.points_done == 8
        faults = [e.message for e in store.events(outcome.run_id, ["fault"])]
        assert any("disagreed" in m and "re-read says on" in m for m in faults)
        assert dark(lab)


def test_a_confirmed_surprise_aborts_with_sources_off(tmp_path):
    real = labrun.instruments.source_readings
    lab_ref = {}

    def laser_switched_off_behind_our_back(adapters):
        readings = list(real(adapters))
        if readings and readings[0].state is True and lab_ref["n"] >= 3:
            lab_ref["lab"].state.all_sources_off()  # someone pressed the front-panel button
            readings = list(real(adapters))
        lab_ref["n"] += 1
        return readings

    with VirtualLab(scenario()) as lab:
        lab_ref.update(lab=lab, n=0)
        seams = Seams(source_readings=laser_switched_off_behind_our_back)
        outcome, store = _run(tmp_path, lab, seams)
        assert outcome.status == "aborted"
        assert "found off unexpectedly" in (outcome.reason or "")
        assert dark(lab)
