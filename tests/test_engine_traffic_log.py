"""``labrun run/resume --traffic-log FILE``: every instrument exchange streamed to FILE as JSON
lines while the run goes, flushed per point (a SIGKILL keeps it), not kept in memory."""

from __future__ import annotations

import contextlib
import io
import json

import pytest
from _engine_support import (
    OPERATOR,
    count_points,
    dark,
    run_in_process,
    scenario,
    write_bench,
    write_plan,
)

from labrun.cli import main
from labrun.store import open_store
from labrun.trafficlog import TrafficLog, TrafficLogEntry

ACK = ["--unattended", "--operator", OPERATOR, "--ack-safety", "--no-progress"]
SWEEP = "INIT:IMM"


def _lines(path):
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def test_a_streaming_traffic_log_writes_lines_and_keeps_nothing(tmp_path):
    path = tmp_path / "t.jsonl"
    with TrafficLog.stream(path) as tr:
        for i in range(3):
            tr.record(resource="TCPIP0::h::1::SOCKET", role="osa", direction="query",
                      text=f"Q{i}?", started=0.0, reply=str(i))
        assert tr.entries == [] and len(tr) == 3
    rows = _lines(path)
    assert [r["text"] for r in rows] == ["Q0?", "Q1?", "Q2?"]
    assert TrafficLogEntry(**rows[0]).reply == "0"  # round-trips into the dataclass
    kept = TrafficLog.stream(tmp_path / "k.jsonl", retain=True)
    kept.record(resource="r", role=None, direction="write", text="A", started=0.0)
    kept.close()
    assert len(kept.entries) == 1 and len(_lines(tmp_path / "k.jsonl")) == 1


def test_run_and_resume_stream_the_traffic_log(tmp_path, capsys):
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        log = tmp_path / "traffic.jsonl"
        with run_in_process(lab, tmp_path, 200, "--traffic-log", str(log),
                            min_points=5) as (_, _, bench, db):
            pass  # leaving kills it
        stored = count_points(db)
        rows = _lines(log)  # what the killed process had flushed
        sweeps = [r for r in rows if r["role"] == "osa" and r["text"].startswith(SWEEP)]
        assert len(sweeps) >= stored  # every stored point's sweep is on disk
        assert main(["off", "--bench", str(bench)]) == 0
        assert main(["resume", "1", "--db", str(db), "--traffic-log", str(log), *ACK]) == 0
        assert dark(lab)
    rows_after = _lines(log)
    assert rows_after[:len(rows)] == rows  # appended, not overwritten
    assert len([r for r in rows_after if r["text"].startswith(SWEEP)]) >= 200
    fields = set(TrafficLogEntry.__dataclass_fields__)
    assert all(set(r) in (fields, fields - {"data"}) for r in rows_after)
    assert any("data" in r for r in rows_after if r["text"].startswith(SWEEP))  # the blocks
    store = open_store(db)
    events = store.events(1, ["traffic_log"])
    assert len(events) == 2 and all(e.data["path"] == str(log.resolve()) for e in events)


def test_an_unwritable_traffic_log_is_an_input_error(tmp_path, capsys):
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan = write_plan(tmp_path, [0.0])
        bench = write_bench(lab, tmp_path)
        code = main(["run", str(plan), "--bench", str(bench), "--db", str(tmp_path / "r.db"),
                     "--traffic-log", str(tmp_path / "missing" / "t.jsonl"), *ACK])
        assert code == 2
        err = capsys.readouterr().err
        assert "--traffic-log" in err and "t.jsonl" in err and "Traceback" not in err
        assert not (tmp_path / "r.db").exists() and dark(lab)


def test_a_log_written_before_the_rename_still_loads(tmp_path):
    """A file streamed under the old name ('--transcript', before 0.2) has the same JSON lines:
    a line copied from such a file loads, and the old option still streams to a file."""
    old = tmp_path / "old.jsonl"
    old.write_text('{"timestamp": 1.5, "duration_s": 0.01, "resource": "TCPIP::127.0.0.1::5025'
                   '::SOCKET", "role": "laser_a", "direction": "write", "text": "SOUR:POW 3.000;'
                   ':SOUR:POW?", "reply": "3.000", "error": null, "attempt": 1}\n',
                   encoding="utf-8")
    (entry,) = TrafficLog.load(old).entries
    assert (entry.role, entry.reply) == ("laser_a", "3.000")
    assert TrafficLog.load(old).commands("laser_a") == ["SOUR:POW 3.000"]
    from labrun.cli import build_parser
    args = build_parser().parse_args(["probe", "--bench", "b.toml", "--transcript", "t.jsonl"])
    assert args.traffic_log == "t.jsonl"
    shown = io.StringIO()
    with contextlib.redirect_stdout(shown), pytest.raises(SystemExit):
        build_parser().parse_args(["probe", "--help"])
    assert "--traffic-log" in shown.getvalue() and "--transcript" not in shown.getvalue()
