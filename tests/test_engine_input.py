"""Input-spectrum capture through the switch, the recorded hazard class, and the amplifier rule,
on the virtual lab (time scale 0)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from _engine_support import OPERATOR, dark, scenario, write_bench
from sqlalchemy import select

from labrun.bench import load_bench
from labrun.cli import main
from labrun.engine import RetryPolicy, Seams, run_plan
from labrun.errors import InputError
from labrun.plan import load_plan
from labrun.queries import run_points
from labrun.store import Event, Point, open_store
from labrun.trafficlog import TrafficLog
from labrun.vlab.lab import VirtualLab

# Three points, total power 6 dBm split equally; input every 2nd point (invented lab values).
PLAN = """[plan]
name = "input capture test"
spool = "HNLF-A17"
orders = 2
{plan_extra}
[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
ratio_db = 0.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.total_power_dbm]
values = [{powers}]

[osa]
capture_input = {capture}
input_every = 2
"""


def _plan(tmp_path, *, powers=(2.0, 4.0, 6.0), capture="true", plan_extra=""):
    path = tmp_path / "plan.toml"
    path.write_text(PLAN.format(powers=", ".join(f"{p:g}" for p in powers), capture=capture,
                                plan_extra=plan_extra), encoding="utf-8")
    return path


def _run(tmp_path, lab, plan_path, traffic_log=None):
    store = open_store(tmp_path / "runs.db")
    out = run_plan(load_plan(plan_path), load_bench(write_bench(lab, tmp_path)), store,
                   operator=OPERATOR, unattended=True, ack_safety=True, progress=False,
                   policy=RetryPolicy(attempts=2, backoff_s=0.0), traffic_log=traffic_log)
    return store, out


def test_input_spectrum_is_captured_through_switch_path_2(tmp_path, capsys):
    sc = scenario()
    tap_db = sc["bench"]["input_tap_db"]
    traffic_log = TrafficLog()
    with VirtualLab(sc) as lab:
        store, out = _run(tmp_path, lab, _plan(tmp_path), traffic_log)
        assert out.status == "completed" and out.points_done == 3 and dark(lab)
        with lab.state.lock:
            assert lab.state.switch.path == 1  # left on the spool output
    with store.session() as s:
        points = s.scalars(select(Point).order_by(Point.index)).all()
        assert [sorted(t.kind for t in p.traces) for p in points] == [
            ["input", "output"], ["output"], ["input", "output"]]  # every 2nd point
        for p in points:
            out_tr = next(t for t in p.traces if t.kind == "output")
            lines = {(ln.kind, ln.side, ln.order): ln for ln in p.lines
                     if ln.trace_id == out_tr.id}
            assert lines[("sideband", "low", 1)].detected  # FWM in the spool: sidebands
            inp = [t for t in p.traces if t.kind == "input"]
            if not inp:
                assert len(p.lines) == 6
                continue
            (in_tr,) = inp
            assert in_tr.settings["switch_path"] == 2 and in_tr.n == out_tr.n
            in_lines = {(ln.kind, ln.side, ln.order): ln for ln in p.lines
                        if ln.trace_id == in_tr.id}
            assert len(in_lines) == 6  # same line grid, reduced from the input trace
            # Each tone launched at total - 10 log10(2) dBm (equal split; P[mW] = 10^(dBm/10),
            # common practice), seen through the tap input_tap_db lower (losses in dB add).
            per_tone = (2.0, 4.0, 6.0)[p.index] - 10 * math.log10(2.0)
            assert p.setpoint["power_a_dbm"] == pytest.approx(per_tone, abs=1e-6)
            for side in ("low", "high"):
                assert in_lines[("tone", side, 0)].power_dbm == pytest.approx(
                    per_tone - tap_db, abs=0.1)
            # Before the spool there is no four-wave mixing: no sideband above the floor.
            for order in (1, 2):
                for side in ("low", "high"):
                    ln = in_lines[("sideband", side, order)]
                    assert not ln.detected and ln.power_dbm is None
    # The input sweep happens on path 2, then the switch goes back to path 1 for the output.
    texts = [(e.role, e.text.split(";")[0]) for e in traffic_log.writes()]
    sweeps = [i for i, (r, t) in enumerate(texts) if r == "osa" and t == "INIT:IMM"]
    paths = [(i, t) for i, (r, t) in enumerate(texts) if r == "switch" and t != "*CLS"]
    assert [t for _, t in paths][:2] == ["ROUT:PATH 2", "ROUT:PATH 1"]
    assert paths[0][0] < sweeps[0] < paths[1][0] < sweeps[1]
    # The run's table of line powers holds the spool output only.
    table = run_points(store, out.run_id)
    with store.session() as s:
        tone_out = [ln.power_dbm for p in s.scalars(select(Point).order_by(Point.index))
                    for ln in p.lines if ln.kind == "tone" and ln.side == "low"
                    and ln.trace_id == next(t.id for t in p.traces if t.kind == "output")]
    np.testing.assert_allclose(table["tone_low_0"].to_numpy(), tone_out)
    assert main(["status", "--db", str(tmp_path / "runs.db"), "--json"]) == 0
    last = json.loads(capsys.readouterr().out)["last_point"]
    assert len(last["lines"]) == 6  # the output trace's lines, not the input tap's as well


def test_input_capture_without_a_switch_is_refused_before_anything(tmp_path, capsys):
    sc = scenario()
    sc["instruments"]["switch"]["present"] = False
    with VirtualLab(sc) as lab:
        plan_path = _plan(tmp_path)
        traffic_log = TrafficLog()
        with pytest.raises(InputError) as info:
            _run(tmp_path, lab, plan_path, traffic_log)
        assert info.value.field == "osa.capture_input"
        assert str(tmp_path / "bench.toml") in str(info.value) and "switch" in str(info.value)
        assert traffic_log.entries == []
        db = tmp_path / "cli.db"
        rc = main(["run", str(plan_path), "--bench", str(tmp_path / "bench.toml"), "--db",
                   str(db), "--unattended", "--operator", OPERATOR, "--ack-safety"])
        err = capsys.readouterr().err.strip().splitlines()
        assert rc == 2 and len(err) == 1 and "osa.capture_input" in err[0]
        with lab.state.lock:
            assert all(la.power_dbm == 0.0 and not la.output for la in lab.state.lasers.values())
    assert open_store(tmp_path / "runs.db").latest_run_id() is None  # no run was created
    assert not db.exists()


def test_safety_ack_names_the_class_that_check_reports(tmp_path, capsys):
    """One hazard rule everywhere: the run's acknowledgement event and ``labrun check --json``
    name the same advisory class (WorstCase.hazard_class)."""
    with VirtualLab(scenario()) as lab:
        plan_path = _plan(tmp_path, capture="false")
        bench = write_bench(lab, tmp_path)
        assert main(["check", str(plan_path), "--bench", str(bench), "--json"]) == 0
        checked = json.loads(capsys.readouterr().out)["hazard_class"]
        store, out = _run(tmp_path, lab, plan_path)
    assert out.status == "completed"
    with store.session() as s:
        ack = s.scalars(select(Event).where(Event.kind == "safety_ack")).one()
    assert ack.data["hazard_class"] == checked
    assert checked in ack.message and checked in ack.data["text"]
    # laser cap 10 dBm (default scenario) = 10 mW: the Class 1 limit 10 mW at 1.4-4 um that
    # labrun uses (from memory, advisory; IEC 60825-1 and the laser safety officer decide)
    assert checked == "Class 1"


def test_amplifier_on_the_bench_stays_off_for_a_plan_without_it(tmp_path):
    """The worst case of a plan without ``amplifier = true`` assumes no gain, so the engine
    must never switch the amplifier on (and must notice if it comes on). The virtual lab's
    amplifier sits after the combiner and passes no light while off, so no trace shows the
    tones: each try is a fault and the run aborts without storing a dark trace as a point."""
    sc = scenario()
    sc["instruments"]["amplifier"]["present"] = True
    traffic_log = TrafficLog()
    with VirtualLab(sc) as lab:
        store, out = _run(tmp_path, lab, _plan(tmp_path, capture="false"), traffic_log)
        assert out.status == "aborted" and "tones" in out.reason and dark(lab)
        assert out.points_done == 0
    assert not any(c.startswith("OUTP:STAT ON") for c in traffic_log.commands("amplifier"))
    assert traffic_log.commands("amplifier")[-1].startswith("OUTP:STAT OFF")  # the safe-off


def test_amplifier_plan_over_the_amplifier_cap_is_refused_before_any_write(tmp_path):
    """plan.amplifier: output = launched total + amplifier_loss_db (DEVELOPERS.md, "Bench
    files") must stay under the amplifier's bench cap; refused before anything is sent."""
    from labrun.errors import SafetyError

    sc = scenario()
    sc["instruments"]["amplifier"]["present"] = True
    sc["bench"]["caps"]["amplifier"] = 9.0
    plan_path = _plan(tmp_path, powers=(6.0, 9.0), capture="false",
                      plan_extra="amplifier = true")
    traffic_log = TrafficLog()
    with VirtualLab(sc) as lab:
        with pytest.raises(SafetyError, match="amplifier"):
            _run(tmp_path, lab, plan_path, traffic_log)
        assert traffic_log.entries == [] and lab.sources_off()
    # 9 dBm + amplifier_loss_db from the scenario: above 9 dBm; 6 dBm + loss is not
    loss = sc["bench"]["amplifier_loss_db"]
    assert 9.0 + loss > 9.0 >= 6.0 + loss


def test_a_failed_reconnect_is_retried_not_fatal(tmp_path):
    """An instrument that stops answering, then a reconnect that fails once: the next attempt
    opens the bench again (it used to find no connections at all) and the run completes, dark
    at the end."""
    import labrun.instruments
    from labrun.scpi import NoAnswerError

    real_open = labrun.instruments.open_bench
    calls = {"open": 0, "sweep": 0}

    def flaky_open(bench, **kw):
        calls["open"] += 1
        if calls["open"] == 2:  # the first reconnect
            raise NoAnswerError("no answer (injected by the test)", role="osa")
        instruments = real_open(bench, **kw)
        if "osa" not in instruments:
            return instruments
        osa = instruments["osa"]
        real_sweep = osa.sweep_and_read

        def flaky_sweep(**sweep_kw):
            calls["sweep"] += 1
            if calls["sweep"] == 1:
                raise NoAnswerError("sweep timed out (injected by the test)", role="osa")
            return real_sweep(**sweep_kw)

        osa.sweep_and_read = flaky_sweep  # this bench's OSA adapter, not the class
        return instruments

    with VirtualLab(scenario()) as lab:
        store = open_store(tmp_path / "runs.db")
        out = run_plan(load_plan(_plan(tmp_path, capture="false")),
                       load_bench(write_bench(lab, tmp_path)), store, operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False,
                       policy=RetryPolicy(attempts=3, backoff_s=0.0),
                       seams=Seams(open_bench=flaky_open))
        assert out.status == "completed" and out.points_done == 3 and dark(lab)
    faults = [e.message for e in store.events(out.run_id, ["fault"])]
    assert any("sweep timed out" in m for m in faults)
    assert any(m.startswith("reconnect failed") for m in faults)
    assert calls["open"] == 3
