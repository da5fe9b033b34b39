"""Set, wait once, read back: a point's settings are all checked before any is written, written
together, waited for once (the longest settle of what moved, not the sum) and read back together.

Settle rule (docs/design.md, "the path of one point"): per setting the larger of the profile's
``settle_s`` and the plan's, the point waits for the longest; the values below are the shipped
generic profiles' (drivers/generic-*.toml: laser wavelength 0.5 s, laser power 0.2 s,
attenuation 0.1 s, paddles 0.05 s, switch path 0.05 s, laser output_on 0.1 s).
"""

from __future__ import annotations

import pytest
from _engine_support import OPERATOR, dark, scenario, write_bench, write_plan

from labrun.bench import load_bench
from labrun.engine import RetryPolicy, Runner, Setting, _run_fields, run_plan
from labrun.errors import SafetyError
from labrun.plan import load_plan
from labrun.settle import group_settles, setting_s, wait_s
from labrun.shutdown import SafeOffGuard
from labrun.store import open_store
from labrun.trafficlog import TrafficLog, split_units
from labrun.vlab.lab import VirtualLab


def test_the_settle_rule():
    # the larger of profile and plan per setting; the longest of all per point; x settle_scale
    assert setting_s([0.1], 0.3) == 0.3 and setting_s([0.5], 0.3) == 0.5
    assert setting_s([0.05, 0.05, 0.05], 0.0) == 0.05  # three paddles overlap
    assert wait_s([0.3, 0.5, 0.1], 2.0) == pytest.approx(1.0)  # not the sum (1.8)
    assert wait_s([], 1.0) == 0.0
    groups = group_settles({"power_a_dbm": 0.3, "power_b_dbm": 0.7, "spacing_ghz": 0.2})
    assert groups["power"] == 0.7 and groups["wavelength_b"] == 0.2
    assert groups["wavelength_a"] == 0.0


def _bench(lab: VirtualLab, tmp_path, settle_scale: float):
    """The lab's bench with another settle_scale (the lab itself runs at time scale 0)."""
    bench_path = write_bench(lab, tmp_path)
    text = bench_path.read_text(encoding="utf-8")
    bench_path.write_text(text.replace("settle_scale = 0.0", f"settle_scale = {settle_scale}"),
                          encoding="utf-8")
    return load_bench(bench_path)


def _runner(lab: VirtualLab, tmp_path, log: TrafficLog, *, settle_scale: float) -> Runner:
    """A Runner on the lab's bench (settle_scale changed), its instruments open."""
    bench = _bench(lab, tmp_path, settle_scale)
    plan = load_plan(write_plan(tmp_path, [0.0, 1.0]))
    store = open_store(tmp_path / "runs.db")
    run_id = store.create_run(**_run_fields(plan, bench, operator=OPERATOR, unattended=True,
                                            total=2))
    runner = Runner(plan, bench, store, run_id, SafeOffGuard(bench), policy=RetryPolicy(),
                    progress=False, traffic_log=log)
    runner.open()
    return runner


def test_one_wait_for_the_longest_settle_of_what_moved(tmp_path):
    """Wavelengths (0.5 s), powers (0.2 s), attenuations (0.1 s), paddles and switch (0.05 s)
    written together wait 0.5 s x settle_scale, not their sum; then only the attenuations move
    and the wait is the attenuator's 0.1 s (the plan here asks for none)."""
    log = TrafficLog()
    with VirtualLab(scenario()) as lab:
        runner = _runner(lab, tmp_path, log, settle_scale=0.01)
        try:
            spec = next(iter(runner.plan.points()))
            settings = runner.settings_for(spec.setpoint) + runner.path_settings("output")
            pending = runner.write(settings)
            assert pending.wait_s == pytest.approx(0.5 * 0.01)
            runner.wait_until(pending.deadline)
            runner.confirm(pending)
            moved = [Setting("attenuator_a", "set_attenuation_db", 20.0),
                     Setting("attenuator_b", "set_attenuation_db", 21.0)]
            pending = runner.write(settings + moved)
            assert pending.wait_s == pytest.approx(0.1 * 0.01)
            assert [s.method for s in pending.settings] == ["set_attenuation_db"] * 2
        finally:
            runner.close()
    # one message per instrument carries all of its settings and the error query
    (laser_a,) = [e for e in log.writes("laser_a") if "SOUR:WAV" in e.text]
    assert split_units(laser_a.text) == ["SOUR:WAV 1550.0000", ":SOUR:POW 10.000", ":SYST:ERR?"]
    # and after the wait one message carries its read-backs
    assert any(e.text == "SOUR:WAV?;:SOUR:POW?;:SYST:ERR?" for e in log.entries
               if e.role == "laser_a")


def test_every_cap_is_checked_before_any_write(tmp_path):
    """One setting over its bench cap: the point writes nothing at all (the attenuator setting
    before it in the list included)."""
    log = TrafficLog()
    with VirtualLab(scenario()) as lab:
        runner = _runner(lab, tmp_path, log, settle_scale=0.0)
        try:
            cap = runner.role("laser_b").cap_dbm
            before = len(log.writes())
            with pytest.raises(SafetyError, match="cap"):
                runner.write([Setting("attenuator_a", "set_attenuation_db", 20.0),
                              Setting("laser_b", "set_power_dbm", cap + 0.1)])
            assert len(log.writes()) == before
            assert ("attenuator_a", "set_attenuation_db") not in runner.applied
        finally:
            runner.close()


def test_a_source_goes_on_only_after_its_power_is_confirmed(tmp_path):
    """On the first point each laser's power is written and read back before OUTP:STAT ON."""
    log = TrafficLog()
    with VirtualLab(scenario()) as lab:
        plan = load_plan(write_plan(tmp_path, [0.0, 1.0]))
        out = run_plan(plan, load_bench(write_bench(lab, tmp_path)),
                       open_store(tmp_path / "r.db"), operator=OPERATOR, unattended=True,
                       ack_safety=True, progress=False, traffic_log=log)
        assert out.status == "completed", out.reason
        assert dark(lab)
    for role in ("laser_a", "laser_b"):
        texts = [e.text for e in log.entries if e.role == role]
        on = next(i for i, t in enumerate(texts) if t.startswith("OUTP:STAT ON"))
        power_set = next(i for i, t in enumerate(texts) if "SOUR:POW " in t)
        power_read = next(i for i, t in enumerate(texts)
                          if i > power_set and "SOUR:POW?" in split_units(t))
        assert power_set < power_read < on, texts[:on + 1]


def test_a_source_whose_power_is_not_confirmed_is_never_switched_on(tmp_path):
    """laser_a sets 1 dB less than asked (under its cap): its read-back disagrees, so the run
    never sends it OUTP:STAT ON and aborts after the retries, dark. With settle times to wait
    (settle_scale > 0) the power is confirmed on its own before the switch-on, the rest after
    the wait; without, every read-back comes with the writes."""
    sent_on: list[str] = []
    with VirtualLab(scenario()) as lab:
        inst = lab.instruments["laser_a"]
        real = inst.execute

        def execute(message: str):
            units = []
            for unit in split_units(message):
                head, _, value = unit.partition(" ")
                if head.lstrip(":").upper() == "SOUR:POW" and value:
                    unit = f"{head} {float(value) - 1.0:.3f}"
                units.append(unit)
            if any(u.lstrip(":").upper().startswith("OUTP:STAT ON") for u in units):
                sent_on.append(message)
            return real(";".join(units))

        inst.execute = execute
        plan = load_plan(write_plan(tmp_path, [0.0, 1.0]))
        for n, scale in enumerate((0.001, 0.0)):
            out = run_plan(plan, _bench(lab, tmp_path, scale),
                           open_store(tmp_path / f"r{n}.db"), operator=OPERATOR,
                           unattended=True, ack_safety=True, progress=False,
                           policy=RetryPolicy(attempts=2))
            assert out.status == "aborted" and "read-back" in str(out.reason), out.reason
            assert sent_on == []
            assert dark(lab)
