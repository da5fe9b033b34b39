"""``labrun replay RUN_ID --traffic-log FILE``: a run's recorded traffic played back through a
simulated VISA backend (no instrument, no physics) gives the original's lines bit for bit; a
command that differs from the recording stops the replay with a clear error."""

from __future__ import annotations

import json

import numpy as np
import pytest
from _engine_support import OPERATOR, scenario, write_bench, write_plan
from pyvisa.util import from_ieee_block

from labrun.cli import main
from labrun.queries import point_trace, run_points
from labrun.store import open_store
from labrun.trafficlog import TrafficLog

ACK = ["--unattended", "--operator", OPERATOR, "--ack-safety", "--no-progress"]


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """A 4-point run on the virtual lab (realism on, seeded) with its traffic log."""
    from labrun.vlab.lab import VirtualLab

    folder = tmp_path_factory.mktemp("recorded")
    data = scenario()
    data["realism"]["enabled"] = True
    with VirtualLab(data, seed=3) as lab:
        plan = write_plan(folder, [-2.0, 0.0, 2.0, 4.0])
        bench = write_bench(lab, folder)
        db, log = folder / "runs.db", folder / "traffic.jsonl"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db),
                     "--traffic-log", str(log), *ACK]) == 0
    return folder, db, log


def _traces(db, run_id):
    """The stored output traces (y in dBm) of a run, in point order."""
    store = open_store(db)
    table = run_points(store, run_id)
    return [point_trace(store, int(pid))[1] for pid in table["point_id"]]


def test_a_replayed_log_gives_the_same_lines_bit_for_bit(recorded, capsys):
    folder, db, log = recorded
    capsys.readouterr()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", str(log), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["identical"] is True and out["status"] == "completed" and out["replay_of"] == 1
    assert out["unused_exchanges"] == 0
    store = open_store(db)
    a = run_points(store, 1).drop(columns=["point_id"])
    b = run_points(store, out["run_id"]).drop(columns=["point_id"])
    assert a.equals(b)  # every line power, every setpoint column, NaN where undetected
    for ya, yb in zip(_traces(db, 1), _traces(db, out["run_id"]), strict=True):
        assert np.array_equal(ya, yb)  # the stored traces too
    assert store.get_run(out["run_id"]).replay_of == 1
    replay_events = store.events(out["run_id"], ["replay"])
    assert replay_events[0].data == {"replay_of": 1, "mode": "traffic log"}


def test_the_log_keeps_each_block_as_received(recorded):
    """The ``data`` of a sweep's exchange is the IEEE 488.2 definite-length block: decoded with
    pyvisa's own parser it has the size the summary states, and each stored trace is one of the
    sweeps (the store keeps whole milli-dB: within 0.0005 dB)."""
    import base64

    from labrun.profiles import load_profile
    from labrun.resources import find_file

    _, db, log = recorded
    y_query = load_profile(find_file("generic-osa.toml", "drivers")).op("read_trace_y").query
    blocks = []
    for e in TrafficLog.load(log).entries:
        if e.data and e.role == "osa" and y_query in e.text:
            raw = base64.b64decode(e.data)
            values = from_ieee_block(raw, datatype="f", is_big_endian=False, container=np.array)
            assert f"<block {4 * values.size} bytes>" in e.reply
            blocks.append(values)
    stored = _traces(db, 1)
    assert len(blocks) == len(stored) == 4
    for y in stored:
        assert any(v.size == y.size and np.max(np.abs(v - y)) <= 0.0005 + 1e-6 for v in blocks)


def test_a_changed_command_stops_the_replay_naming_point_instrument_and_commands(
        recorded, tmp_path, capsys):
    _, db, log = recorded
    text = log.read_text(encoding="utf-8")
    target = "INP:ATT 5.000"  # attenuator a at the third point (laser 10 dBm, path loss 3 dB)
    assert text.count(target) == 1
    bad = tmp_path / "changed.jsonl"
    bad.write_text(text.replace(target, "INP:ATT 5.500"), encoding="utf-8")
    capsys.readouterr()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", str(bad), "--no-progress"]) == 1
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "power_a_dbm=2|" in err and "attenuator_a" in err
    assert "expected 'INP:ATT 5.500" in err and "got 'INP:ATT 5.000" in err
    store = open_store(db)
    failed = store.get_run(store.latest_run_id())
    assert failed.status == "failed" and "attenuator_a" in failed.reason
    assert store.count_points(failed.id) == 2  # the points before the difference


def test_a_log_without_block_bytes_is_refused_before_anything_runs(recorded, tmp_path, capsys):
    _, db, log = recorded
    rows = [json.loads(line) for line in log.read_text(encoding="utf-8").splitlines()]
    for row in rows:
        row.pop("data", None)  # what a log written before 0.2 holds
    old = tmp_path / "old.jsonl"
    old.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    before = open_store(db).latest_run_id()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", str(old)]) == 2
    err = capsys.readouterr().err
    assert "old.jsonl" in err and "--traffic-log" in err and "block" in err
    assert open_store(db).latest_run_id() == before


def test_a_recorded_fault_is_played_back_and_retried_as_it_was(tmp_path, capsys):
    """Garbled replies and stray error-queue entries injected by the virtual lab are in the log;
    played back, they make the same faults, retried as they were, and the lines agree."""
    from labrun.vlab.lab import VirtualLab

    data = scenario()
    data["faults"] = {"enabled": True, "garble_probability": 0.1,
                      "spurious_error_probability": 0.05,
                      "roles": ["laser_b", "attenuator_b"]}
    with VirtualLab(data, seed=5) as lab:
        plan = write_plan(tmp_path, [-2.0, 0.0, 2.0, 4.0, 5.0])
        bench = write_bench(lab, tmp_path)
        db, log = tmp_path / "runs.db", tmp_path / "traffic.jsonl"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db),
                     "--traffic-log", str(log), *ACK]) == 0
    store = open_store(db)
    faults = [e.message for e in store.events(1, ["fault"])]
    assert faults  # the seeded faults happened
    capsys.readouterr()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", str(log), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["identical"] is True
    assert [e.message for e in store.events(out["run_id"], ["fault"])] == faults


def test_a_night_that_waited_replays_with_its_polls(tmp_path, capsys):
    """A run that waited settle times (virtual lab in real time, settle_s 0.6 s on a power axis)
    polled the sources while waiting, as often as time allowed; the replay waits the same settle
    times and is judged on the settings and sweeps: identical lines."""
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario(), time_scale=1.0) as lab:
        plan = write_plan(tmp_path, [0.0, 3.0])
        plan.write_text(plan.read_text(encoding="utf-8").replace(
            "[axes.power_a_dbm]\n", "[axes.power_a_dbm]\nsettle_s = 0.6\n"), encoding="utf-8")
        bench = write_bench(lab, tmp_path)
        db, log = tmp_path / "runs.db", tmp_path / "traffic.jsonl"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db),
                     "--traffic-log", str(log), *ACK]) == 0
    polls = [e for e in TrafficLog.load(log).entries if e.text.startswith("OUTP:STAT?")]
    assert len(polls) > 8  # more than the per-sweep checks: the waits polled too
    capsys.readouterr()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", str(log), "--json",
                 "--no-progress"]) == 0
    assert json.loads(capsys.readouterr().out)["identical"] is True


def _entry(text, reply=None, *, error=None, direction="write"):
    from labrun.trafficlog import TrafficLogEntry
    return TrafficLogEntry(timestamp=0.0, duration_s=0.0, resource="TCPIP0::10.0.0.9::5025::SOCKET",
                           role="laser_a", direction=direction, text=text, reply=reply,
                           error=error)


def test_the_backend_passes_over_fewer_polls_answers_extra_ones_and_never_a_setting():
    """Through pyvisa's own ResourceManager and message-based resource (no labrun session):
    a recorded poll the replay leaves out is passed over, an extra poll gets the reply last
    served to it, a recorded failure is a VISA timeout, and a different setting stops."""
    import pyvisa
    from pyvisa.errors import VisaIOError

    from labrun.visareplay import TrafficMismatch, TrafficReplayLibrary

    entries = [_entry("OUTP:STAT?", "1", direction="query"),
               _entry("SOUR:POW 3.000;:SYST:ERR?", '0,"No error"'),
               _entry("OUTP:STAT?", "1", direction="query"),  # left out by the replay
               _entry("SOUR:POW 4.000"),
               _entry("OUTP:STAT?", None, error="timeout", direction="query"),
               _entry("SOUR:POW 5.000")]
    lib = TrafficReplayLibrary.from_entries(entries)
    try:
        res = pyvisa.ResourceManager(lib).open_resource(
            entries[0].resource, read_termination="\n", write_termination="\n", timeout=100)
        assert res.query("OUTP:STAT?") == "1"
        assert res.query("OUTP:STAT?") == "1"  # an extra poll: the last reply again
        assert res.query("SOUR:POW 3.000;:SYST:ERR?") == '0,"No error"'
        res.write("SOUR:POW 4.000")  # the recorded poll before it is passed over
        with pytest.raises(VisaIOError):  # the recorded failure
            res.query("OUTP:STAT?")
        with pytest.raises(TrafficMismatch, match=r"expected 'SOUR:POW 5.000'.*got 'SOUR:POW "
                                                  r"5.500'"):
            res.write("SOUR:POW 5.500")
        assert not lib.remaining()[1:]  # only the differing setting is left
    finally:
        lib.forget()


def test_without_a_file_the_runs_own_log_is_replayed_also_under_the_old_event_name(
        recorded, tmp_path, capsys):
    """``--traffic-log`` alone takes the file the run's ``traffic_log`` event names; a run
    stored before 0.2 names it in a ``transcript`` event, which is read the same way."""
    folder, db, log = recorded
    capsys.readouterr()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["identical"] is True
    import sqlite3
    con = sqlite3.connect(db)
    with con:
        con.execute("UPDATE events SET kind = 'transcript' WHERE run_id = 1 AND kind = "
                    "'traffic_log'")
    con.close()
    assert main(["replay", "1", "--db", str(db), "--traffic-log", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["identical"] is True
    con = sqlite3.connect(db)
    with con:
        con.execute("DELETE FROM events WHERE run_id = 1 AND kind = 'transcript'")
    con.close()
    assert main(["replay", "1", "--db", str(db), "--traffic-log"]) == 2
    assert "recorded no traffic log" in capsys.readouterr().err
