"""The run engine end to end on the virtual lab (time scale 0): store contents, physics of the
stored lines against published formulas, refusals, stop conditions, status and off commands."""

from __future__ import annotations

import hashlib
import json
import math

import numpy as np
import pytest
from _engine_support import (
    DIALECTS,
    OPERATOR,
    attenuators_at_max,
    dark,
    scenario,
    write_bench,
    write_plan,
)
from scipy.special import jv
from sqlalchemy import select

from labrun.bench import load_bench
from labrun.cli import main
from labrun.engine import RetryPolicy, Seams, run_plan
from labrun.errors import InputError, SafetyError
from labrun.plan import load_plan
from labrun.store import Event, Line, Point, Trace, open_store
from labrun.trafficlog import TrafficLog
from labrun.vlab.lab import VirtualLab

POWERS = [0.0, 2.0, 4.0]


@pytest.fixture()
def lab():
    with VirtualLab(scenario()) as vl:
        yield vl


def _run(tmp_path, lab, powers=POWERS, **kw):
    plan = load_plan(write_plan(tmp_path, powers, **kw))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                   progress=False, policy=RetryPolicy(attempts=2, backoff_s=0.0))
    return plan, store, out


@pytest.mark.parametrize("dialect", DIALECTS)
def test_run_stores_every_point_and_leaves_the_bench_dark(tmp_path, dialect):
    with VirtualLab(scenario(dialect=dialect)) as lab:
        plan, store, out = _run(tmp_path, lab)
        assert out.status == "completed" and out.exit_code == 0
        assert out.points_done == out.points_total == len(plan.points()) == 3
        assert dark(lab)
    with store.session() as s:
        points = s.scalars(select(Point).order_by(Point.index)).all()
        assert [p.key for p in points] == [p.key for p in plan.points()]
        osa = plan.osa_settings(load_bench(tmp_path / "bench.toml"))
        for p in points:
            (tr,) = p.traces
            assert tr.n == osa.points and tr.y().shape == (osa.points,)
            # tones + orders 1..2 each side: grid_ks(2) has 2*2+2 lines (docs/design.md §2.1)
            assert len(p.lines) == 6
        run = store.get_run(out.run_id)
        raw = (tmp_path / "plan.toml").read_bytes()
        assert run.plan_sha256 == hashlib.sha256(raw).hexdigest()  # FIPS 180-4 via hashlib
        assert run.plan_text == raw.decode() and run.operator == OPERATOR
        assert run.identities["laser_a"].startswith("LABRUN-VLAB")  # *IDN? (IEEE 488.2)
        ack = s.scalars(select(Event).where(Event.kind == "safety_ack")).one()
        assert OPERATOR in ack.message and ack.data["unattended"] is True
        assert s.scalars(select(Event).where(Event.kind == "safe_off")).one().data == \
            {"problems": []}


def test_stored_lines_follow_loss_and_the_bessel_model(tmp_path):
    """Tone power = launched - spool loss - OSA path; sideband/tone ratio from Bessel functions.

    Loss: P_out = P_in exp(-alpha L) (Agrawal, Nonlinear Fiber Optics). Equal-power two-tone
    ratio (J1^2 + J2^2)/(J0^2 + J1^2) with m = 2 gamma L_eff P (Boskovic et al., Opt. Lett. 21,
    1966 (1996)); Bessel values from scipy.special.jv. Spool HNLF-A17 of the default scenario.
    """
    sc = scenario()
    spool = sc["spools"][0]
    # dispersion-free, so the Bessel model holds exactly (docs/design.md §5.2)
    spool["dispersion_ps_per_nm_km"] = spool["dispersion_slope_ps_per_nm2_km"] = 0.0
    with VirtualLab(sc) as lab0:
        _, store, out = _run(tmp_path, lab0)
    alpha = spool["loss_db_per_km"] * math.log(10) / 10
    l_eff = (1 - math.exp(-alpha * spool["length_km"])) / alpha
    osa_loss = sc["bench"]["output_to_osa_db"]
    with store.session() as s:
        for p in s.scalars(select(Point)):
            lines = {(ln.kind, ln.side, ln.order): ln for ln in p.lines}
            p_dbm = p.setpoint["power_a_dbm"]
            tone = lines[("tone", "low", 0)].power_dbm
            expected_tone = p_dbm - spool["loss_db_per_km"] * spool["length_km"] - osa_loss
            assert tone == pytest.approx(expected_tone, abs=0.15)
            m = 2 * spool["gamma_per_w_per_km"] * l_eff * 10 ** (p_dbm / 10) * 1e-3
            ratio_db = 10 * np.log10((jv(1, m) ** 2 + jv(2, m) ** 2) /
                                     (jv(0, m) ** 2 + jv(1, m) ** 2))
            side = lines[("sideband", "low", 1)].power_dbm
            assert side - tone == pytest.approx(ratio_db, abs=0.3)


def test_cap_violation_refused_before_any_write(tmp_path, lab):
    plan = load_plan(write_plan(tmp_path, [0.0, 9.5]))  # 9.5 dBm launched > 10 - 3 dB path
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    traffic_log = TrafficLog()
    with pytest.raises(SafetyError, match="cap"):
        run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                 progress=False, traffic_log=traffic_log)
    assert traffic_log.writes() == [] and traffic_log.entries == []
    assert store.latest_run_id() is None
    with lab.state.lock:  # untouched: the lab's power-on defaults
        assert all(not la.output and la.power_dbm == 0.0 for la in lab.state.lasers.values())
    assert attenuators_at_max(lab)


def test_cap_violation_from_the_command_line(tmp_path, lab, capsys):
    plan = write_plan(tmp_path, [0.0, 9.5])
    bench = write_bench(lab, tmp_path)
    rc = main(["run", str(plan), "--bench", str(bench), "--db", str(tmp_path / "r.db"),
               "--unattended", "--operator", OPERATOR, "--ack-safety"])
    assert rc == 1
    err = capsys.readouterr().err
    assert "cap" in err and "Traceback" not in err
    assert lab.sources_off()


@pytest.mark.parametrize("flags", [["--operator", OPERATOR], ["--ack-safety"]])
def test_unattended_needs_ack_and_operator(tmp_path, lab, capsys, flags):
    plan = write_plan(tmp_path, POWERS)
    bench = write_bench(lab, tmp_path)
    rc = main(["run", str(plan), "--bench", str(bench), "--db", str(tmp_path / "r.db"),
               "--unattended", *flags])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and ("--ack-safety" in err[0] or "--operator" in err[0])
    assert not (tmp_path / "r.db").exists()  # nothing created, nothing touched
    with lab.state.lock:
        assert all(la.power_dbm == 0.0 for la in lab.state.lasers.values())


def test_interactive_run_needs_the_typed_word(tmp_path, lab):
    plan = load_plan(write_plan(tmp_path, POWERS))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    shown: list[str] = []
    traffic_log = TrafficLog()

    def decline(text: str) -> bool:
        shown.append(text)
        return False

    with pytest.raises(SafetyError, match="not confirmed"):
        run_plan(plan, bench, store, confirm=decline, progress=False, traffic_log=traffic_log)
    assert "Worst case" in shown[0] and "laser safety officer" in shown[0]
    assert traffic_log.entries == [] and store.latest_run_id() is None
    out = run_plan(plan, bench, store, operator="bench user", confirm=lambda text: True,
                   progress=False)
    assert out.status == "completed" and dark(lab)
    assert store.events(out.run_id, ["safety_ack"])[0].data["unattended"] is False


def test_stop_condition_ends_the_run_early_and_dark(tmp_path, lab):
    # low 1 reaches about -42 dBm at 0 dBm and -29 dBm at 4 dBm launched per tone
    stop = '\n[[stop]]\nwhen = "sideband_above"\ndbm = -35.0\norder = 1\n'
    plan, store, out = _run(tmp_path, lab, powers=[0.0, 2.0, 4.0, 5.0], extra=stop)
    assert out.status == "stopped" and out.exit_code == 0
    assert "stop condition 1" in out.reason
    assert 1 <= out.points_done < 4 and dark(lab)


@pytest.mark.parametrize("dialect", DIALECTS)
def test_transient_connection_drop_is_survived(tmp_path, dialect):
    """Connections to the OSA and to laser_b dropped mid-run (after the first and second
    reductions): each loss is a fault event, the exchange is retried on a fresh connection, and
    the run completes with every point, dark at the end. In the si dialect the fresh
    connection is refused everything until the profile's init enables remote again."""
    import labrun.reduce

    real = labrun.reduce.reduce_trace
    dropped: list[int] = []

    with VirtualLab(scenario(dialect=dialect)) as vl:
        def dropping(*args, **kwargs):
            if len(dropped) < 2:
                dropped.append(vl.drop_connections(("osa", "laser_b")[len(dropped)]))
            return real(*args, **kwargs)

        # a dropped link shows as a read timeout: the OSA's is cut from 20 s to keep this quick
        store = open_store(tmp_path / "runs.db")
        out = run_plan(load_plan(write_plan(tmp_path, POWERS)),
                       load_bench(write_bench(vl, tmp_path, osa_timeout_ms=300)), store,
                       operator=OPERATOR, unattended=True, ack_safety=True, progress=False,
                       policy=RetryPolicy(attempts=2, backoff_s=0.0),
                       seams=Seams(reduce_trace=dropping))
        assert out.status == "completed" and out.points_done == 3 and dark(vl)
    assert dropped == [1, 1]  # one live connection each was cut
    roles = {e.role for e in store.events(out.run_id, ["fault"])}
    assert {"osa", "laser_b"} <= roles, roles


def test_status_json_and_stale_heartbeat(tmp_path, lab, capsys):
    _, store, out = _run(tmp_path, lab)
    db = str(tmp_path / "runs.db")
    assert main(["status", "--db", db, "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["run_id"] == out.run_id and rep["status"] == "completed"
    assert rep["points_done"] == rep["points_total"] == 3 and rep["faults"] == 0
    assert {ln["kind"] for ln in rep["last_point"]["lines"]} == {"tone", "sideband"}
    # A run left "running" with an old heartbeat (a killed process) is reported stale.
    from datetime import timedelta

    from labrun.store.models import utcnow

    store.update_run(out.run_id, status="running", heartbeat_at=utcnow() - timedelta(hours=1))
    assert main(["status", str(out.run_id), "--db", db]) == 0
    cap = capsys.readouterr()
    assert "stale" in cap.out and "stale" in cap.err


def test_status_refuses_a_missing_store(tmp_path, capsys):
    assert main(["status", "--db", str(tmp_path / "none.db")]) == 2
    assert "none.db" in capsys.readouterr().err


def test_off_switches_everything_off(tmp_path, lab, capsys):
    with lab.state.lock:
        for laser in lab.state.lasers.values():
            laser.output = True
        for att in lab.state.attenuators.values():
            att.output, att.attenuation_db = True, 0.0
    assert main(["off", "--bench", str(write_bench(lab, tmp_path)), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["all_off"] and {r["role"] for r in rep["roles"]} == {
        "laser_a", "laser_b", "attenuator_a", "attenuator_b"}
    assert dark(lab)


def test_input_errors_are_one_line(tmp_path, lab, capsys):
    bench = write_bench(lab, tmp_path)
    assert main(["run", str(tmp_path / "missing.toml"), "--bench", str(bench),
                 "--db", str(tmp_path / "r.db")]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1
    with pytest.raises(InputError):
        open_store(tmp_path / "no" / "such" / "folder.db")


def test_trace_bytes_match_what_the_osa_sent(tmp_path, lab):
    """The stored y is the OSA's REAL,32 data (IEEE 488.2 block of IEEE 754 binary32), kept
    within the store's 0.001 dB quantum."""
    _, store, out = _run(tmp_path, lab, powers=[1.0])
    with store.session() as s:
        tr = s.scalars(select(Trace)).one()
        y32 = tr.y()
        assert np.isfinite(y32).all() and y32.max() > -10.0  # a tone is in the trace
        tone = s.scalars(select(Line).where(Line.kind == "tone", Line.side == "low")).one()
        # The reduced tone power sits within 0.1 dB of the trace maximum near it (common
        # practice: a line narrower than the RBW reads its total power at its peak).
        near = np.abs(tr.x() - tone.wavelength_nm) < 0.05
        assert float(y32[near].max()) == pytest.approx(tone.power_dbm, abs=0.1)


@pytest.mark.parametrize("args", [
    ["status"], ["status", "--json"], ["status", "4"], ["resume", "4"],
    ["status", "--db", "sqlite:///elsewhere.db"],
])
def test_status_and_resume_in_an_empty_folder(tmp_path, monkeypatch, capsys, args):
    """No labrun.db here: one clear line, exit 2, and no database created to say so."""
    monkeypatch.chdir(tmp_path)
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no run store here" in err[0] and "--db" in err[0]
    assert list(tmp_path.iterdir()) == []


def test_status_refuses_a_file_that_is_not_a_run_store(tmp_path, capsys):
    junk = tmp_path / "notes.db"
    junk.write_text("not a database\n")
    assert main(["status", "--db", str(junk)]) == 2
    assert "not a labrun run store" in capsys.readouterr().err
    assert junk.read_text() == "not a database\n"


def test_off_without_a_bench_file_is_one_line(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["off", "--bench", "bench.toml"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bench.toml" in err[0]
    assert list(tmp_path.iterdir()) == []


def test_plan_settle_times_go_to_the_settings_their_axes_drive(tmp_path, lab):
    """A settle_s on the power axes waits after the power settings (lasers, attenuators), not
    after the wavelengths, which no settled axis drives (invented values)."""
    from labrun.engine import Runner
    from labrun.shutdown import SafeOffGuard

    path = write_plan(tmp_path, [0.0, 1.0])
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace("[axes.power_a_dbm]\n", "[axes.power_a_dbm]\nsettle_s = 2.5\n")
                    .replace("[axes.power_b_dbm]\n", "[axes.power_b_dbm]\nsettle_s = 1.5\n"),
                    encoding="utf-8")
    plan = load_plan(path)
    bench = load_bench(write_bench(lab, tmp_path))
    runner = Runner(plan, bench, None, 0, SafeOffGuard(bench), policy=RetryPolicy())
    settings = runner.settings_for(plan.points()[0].setpoint)
    settle = {(s.role, s.method): s.settle_s for s in settings}
    for role in ("laser_a", "laser_b"):
        assert settle[(role, "set_power_dbm")] == 2.5
        assert settle[(role, "set_wavelength_nm")] == 0.0
    for role in ("attenuator_a", "attenuator_b"):
        assert settle[(role, "set_attenuation_db")] == 2.5


def test_a_laser_level_axis_settles_the_power_settings(tmp_path, lab):
    """A settle_s on a laser_a_dbm axis waits after the power settings, as `labrun check`
    estimates it (both read plan.POWER_SETPOINTS; invented values)."""
    from labrun.engine import Runner
    from labrun.shutdown import SafeOffGuard

    path = write_plan(tmp_path, [0.0], extra="")
    text = path.read_text(encoding="utf-8")
    path.write_text(text + "\n[axes.laser_a_dbm]\nvalues = [8.0, 9.0]\nsettle_s = 3.0\n",
                    encoding="utf-8")
    plan = load_plan(path)
    bench = load_bench(write_bench(lab, tmp_path))
    runner = Runner(plan, bench, None, 0, SafeOffGuard(bench), policy=RetryPolicy())
    settle = {(s.role, s.method): s.settle_s
              for s in runner.settings_for(plan.points()[0].setpoint)}
    assert settle[("laser_a", "set_power_dbm")] == 3.0
    assert settle[("attenuator_a", "set_attenuation_db")] == 3.0
