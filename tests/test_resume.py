"""Crash and resume: SIGKILL a ``labrun run`` process mid-sweep, then ``labrun resume``.

The resumed run must hold exactly the plan's point set (Plan.points() keys), each once, with
every point complete; resume refuses a changed plan file or different instruments unless forced.
"""

from __future__ import annotations

import json
import signal

import pytest
from _engine_support import (
    DIALECTS,
    OPERATOR,
    count_points,
    dark,
    long_powers,
    run_in_process,
    scenario,
    wait_for,
    write_bench,
    write_plan,
)
from sqlalchemy import func, select

from labrun.cli import main
from labrun.plan import load_plan
from labrun.store import Point, open_store

N_POINTS = 300
RESUMER = "T. Lindqvist"  # invented: someone else resumes, hours later
ACK = ["--unattended", "--operator", RESUMER, "--ack-safety"]


def _kill_mid_run(tmp_path, lab, db=None):
    """Start a run in another process, SIGKILL it after a few points; (plan, bench, db, id)."""
    with run_in_process(lab, tmp_path, N_POINTS, min_points=5, db=db) as (proc, plan, bench,
                                                                           db):
        pass  # leaving kills it
    assert proc.returncode == -signal.SIGKILL
    store = open_store(db)
    run_id = store.latest_run_id()
    run = store.get_run(run_id)
    assert run.status == "running"  # nobody could record the crash
    done = store.count_points(run_id)
    assert 5 <= done < N_POINTS
    store.close()
    return plan, bench, db, run_id


def test_sigkill_then_resume_gives_the_full_point_set(tmp_path, capsys, db_url):
    """On SQLite and on PostgreSQL."""
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan, bench, db, run_id = _kill_mid_run(tmp_path, lab, db_url)
        # The guardian watcher darkened the bench; `labrun off` is harmless on top of it.
        assert main(["off", "--bench", str(bench)]) == 0 and dark(lab)
        capsys.readouterr()
        assert main(["resume", str(run_id), "--db", str(db), "--json", "--no-progress",
                     *ACK]) == 0
        rep = json.loads(capsys.readouterr().out)
        assert rep["status"] == "completed" and rep["points_done"] == N_POINTS
        assert dark(lab)
    store = open_store(db)
    with store.session() as s:
        keys = s.scalars(select(Point.key).where(Point.run_id == run_id)).all()
        n_rows = s.scalar(select(func.count(Point.id)))
        incomplete = [p.key for p in s.scalars(select(Point))
                      if len(p.traces) != 1 or len(p.lines) != 6]
    expected = [p.key for p in load_plan(plan).points()]
    assert n_rows == len(keys) == len(set(keys)) == len(expected)  # no duplicates
    assert set(keys) == set(expected)  # nothing lost
    assert incomplete == []
    kinds = [e.kind for e in store.events(run_id)]
    assert "resume" in kinds and kinds[-1] == "completed"
    first, again = store.events(run_id, ["safety_ack"])  # the run's, then the resume's own
    assert first.data["operator"] == OPERATOR and not first.data["resume"]
    assert again.data["operator"] == RESUMER and again.data["resume"] is True
    assert RESUMER in again.message and again.at >= first.at


def test_resume_refuses_a_changed_plan_and_other_instruments(tmp_path, capsys):
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan, bench, db, run_id = _kill_mid_run(tmp_path, lab)
        done = count_points(db)
        original = plan.read_text()
        plan.write_text(original.replace("engine test sweep", "edited sweep"))
        assert main(["resume", str(run_id), "--db", str(db), "--no-progress", *ACK]) == 1
        assert "changed" in capsys.readouterr().err
        plan.write_text(original)
    other = scenario()
    other["instruments"]["osa"]["idn"] = "LABRUN-VLAB,VOSA-2000,VL0399,1.0"  # another OSA
    with VirtualLab(other) as lab2:
        (tmp_path / "b2").mkdir()
        bench2 = write_bench(lab2, tmp_path / "b2")
        assert main(["resume", str(run_id), "--db", str(db), "--bench", str(bench2),
                     "--no-progress", *ACK]) == 1
        err = capsys.readouterr().err
        assert "instruments differ" in err and "VL0399" in err
        assert count_points(db) == done and dark(lab2)
        assert main(["resume", str(run_id), "--db", str(db), "--bench", str(bench2),
                     "--force", "--no-progress", *ACK]) == 0
        assert count_points(db) == N_POINTS and dark(lab2)
    store = open_store(db)
    assert store.events(run_id, ["forced"])


def test_resume_of_a_finished_run_is_an_input_error(tmp_path, capsys):
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan = write_plan(tmp_path, [0.0, 1.0])
        bench = write_bench(lab, tmp_path)
        db = tmp_path / "r.db"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db), "--unattended",
                     "--operator", OPERATOR, "--ack-safety", "--no-progress"]) == 0
        assert main(["resume", "1", "--db", str(db), *ACK]) == 2
        assert "already completed" in capsys.readouterr().err
        with pytest.raises(SystemExit):
            main(["resume", "x", "--db", str(db)])


def test_resume_asks_for_the_safety_acknowledgement_again(tmp_path, capsys):
    """Resuming switches the light on again: unattended without --ack-safety or --operator is
    refused (exit 2) and an unconfirmed interactive resume is refused (exit 1), both before any
    instrument is touched; a typed confirmation is recorded with the operator."""
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan, bench, db, run_id = _kill_mid_run(tmp_path, lab)
        assert main(["off", "--bench", str(bench)]) == 0 and dark(lab)
        done = count_points(db)
        capsys.readouterr()
        for flags in (["--unattended", "--operator", RESUMER], ["--unattended", "--ack-safety"]):
            assert main(["resume", str(run_id), "--db", str(db), "--no-progress", *flags]) == 2
            err = capsys.readouterr().err
            assert "--ack-safety" in err or "--operator" in err
        assert main(["resume", str(run_id), "--db", str(db), "--no-progress"],
                    overrides={"confirm": lambda text: False}) == 1
        assert "not confirmed" in capsys.readouterr().err
        store = open_store(db)
        assert count_points(db) == done and not store.events(run_id, ["resume"])
        assert len(store.events(run_id, ["safety_ack"])) == 1  # only the run's own
        assert dark(lab)
        shown = {}

        def typed(text):
            shown["text"] = text
            return True

        assert main(["resume", str(run_id), "--db", str(db), "--no-progress", "--operator",
                     RESUMER], overrides={"confirm": typed}) == 0
        assert "Worst case" in shown["text"] and "laser safety officer" in shown["text"]
        assert count_points(db) == N_POINTS and dark(lab)
    ack = store.events(run_id, ["safety_ack"])[-1]
    assert ack.data == {**ack.data, "operator": RESUMER, "unattended": False, "resume": True}


def test_force_never_resumes_a_run_whose_process_is_alive(tmp_path, capsys):
    """--force overrides a changed plan or other instruments, never a live original process:
    two processes must not drive the same lasers."""
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        with run_in_process(lab, tmp_path, N_POINTS, min_points=2,
                            stop=signal.SIGTERM) as (proc, _, _, db):
            store = open_store(db)
            run_id = store.latest_run_id()
            assert main(["resume", str(run_id), "--db", str(db), "--force", "--no-progress",
                         *ACK]) == 1
            err = capsys.readouterr().err
            assert "still running" in err and str(proc.pid) in err
            assert proc.poll() is None  # the original run goes on, alone
            assert not store.events(run_id, ["resume", "forced"])
            assert len(store.events(run_id, ["safety_ack"])) == 1
            store.close()
        assert wait_for(lambda: dark(lab), 5) is not None


def test_resume_on_a_bench_with_a_lower_cap_is_refused(tmp_path, capsys):
    """The caps are checked again against the bench a run resumes on: a laser cap below what the
    plan needs is a SafetyError (exit 1) before any acknowledgement or instrument."""
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan = write_plan(tmp_path, [0.0, 1.0])
        bench = write_bench(lab, tmp_path)
        db = tmp_path / "r.db"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db), "--unattended",
                     "--operator", OPERATOR, "--ack-safety", "--no-progress"]) == 0
        store = open_store(db)
        store.set_status(1, "aborted", "invented: the operator stopped it", finished=True)
        low = tmp_path / "low-cap.toml"  # invented: a bench whose laser_a may give 0 dBm
        low.write_text(bench.read_text(encoding="utf-8").replace("max_power_dbm = 10.0",
                                                                 "max_power_dbm = 0.0", 1),
                       encoding="utf-8")
        capsys.readouterr()
        assert main(["resume", "1", "--db", str(db), "--bench", str(low), "--no-progress",
                     *ACK]) == 1
        assert "power cap" in capsys.readouterr().err
        assert not store.events(1, ["resume"]) and len(store.events(1, ["safety_ack"])) == 1
        assert store.count_points(1) == 2 and dark(lab)
        store.close()


class _DiesAfterCreate:
    """A store whose process dies at the first write after the run row exists (the write raises
    once); every other call goes to the real store."""

    def __init__(self, store):
        self.store, self.created, self.died = store, False, False

    def __getattr__(self, name):
        return getattr(self.store, name)

    def create_run(self, **fields):
        run_id = self.store.create_run(**fields)
        self.created = True
        return run_id

    def add_event(self, *args, **kwargs):
        if self.created and not self.died:
            self.died = True
            raise RuntimeError("process killed (simulated)")
        return self.store.add_event(*args, **kwargs)


def test_a_run_that_dies_right_after_its_row_is_created_resumes_without_force(tmp_path):
    """The identities go into the transaction that creates the run: a process that dies just
    after (here: in the next write) leaves a run that resumes on the same instruments without
    --force (the row used to get them later, and a run killed before that needed --force)."""
    from labrun.bench import load_bench
    from labrun.engine import resume_run, run_plan
    from labrun.vlab.lab import VirtualLab

    with VirtualLab(scenario()) as lab:
        plan = load_plan(write_plan(tmp_path, long_powers(4)))
        bench = load_bench(write_bench(lab, tmp_path))
        store = open_store(tmp_path / "runs.db")
        dying = _DiesAfterCreate(store)
        with pytest.raises(RuntimeError, match="killed"):
            run_plan(plan, bench, dying, operator=RESUMER, unattended=True, ack_safety=True,
                     progress=False)
        assert dying.died
        run = store.get_run(store.latest_run_id())
        assert set(run.identities) == set(bench.instruments) and lab.sources_off()
        assert store.count_points(run.id) == 0
        out = resume_run(run.id, store, operator=RESUMER, unattended=True, ack_safety=True,
                         progress=False)
        assert out.status == "completed" and out.points_done == 4
        assert not store.events(run.id, ["forced"])


@pytest.mark.parametrize("dialect", DIALECTS)
def test_a_run_that_failed_mid_sweep_resumes_to_the_full_point_set(tmp_path, dialect):
    """In-process and on both command dialects of the virtual lab: a run whose reduction
    failed at its third point (status failed, two points stored, bench dark) resumes on the
    same bench to the plan's whole point set, each point once."""
    import labrun.reduce
    from labrun.bench import load_bench
    from labrun.engine import Seams, resume_run, run_plan
    from labrun.vlab.lab import VirtualLab

    real = labrun.reduce.reduce_trace
    calls = {"n": 0}

    def fails_once(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("reduction blew up")
        return real(*args, **kwargs)

    with VirtualLab(scenario(dialect=dialect)) as lab:
        plan_path = write_plan(tmp_path, long_powers(5))
        bench = load_bench(write_bench(lab, tmp_path))
        store = open_store(tmp_path / "runs.db")
        with pytest.raises(RuntimeError, match="blew up"):
            run_plan(load_plan(plan_path), bench, store, operator=OPERATOR, unattended=True,
                     ack_safety=True, progress=False, seams=Seams(reduce_trace=fails_once))
        run_id = store.latest_run_id()
        assert store.get_run(run_id).status == "failed"
        assert store.count_points(run_id) == 2 and dark(lab)
        out = resume_run(run_id, store, operator=RESUMER, unattended=True, ack_safety=True,
                         progress=False)
        assert out.status == "completed" and out.points_done == 5 and dark(lab)
    with store.session() as s:
        keys = s.scalars(select(Point.key).where(Point.run_id == run_id)).all()
    expected = [p.key for p in load_plan(plan_path).points()]
    assert len(keys) == len(set(keys)) == len(expected) and set(keys) == set(expected)


def test_resume_waits_for_the_killed_runs_watcher_to_finish(tmp_path):
    """A killed run's guardian watcher (labrun/guardian.py) may still be darkening the bench
    when someone resumes at once: the resume waits for it before it opens the bench, else the
    watcher would switch off the resumed run's light mid-point. A stand-in watcher process for
    a dead run process lives 2 s; the resume's first event must come after it ended."""
    import subprocess
    import sys
    import threading
    from datetime import UTC, datetime

    from labrun.bench import load_bench
    from labrun.engine import Seams, resume_run, run_plan
    from labrun.guardian import wait_for_watchers_of, watchers_of
    from labrun.vlab.lab import VirtualLab

    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # a pid no process has any more: the killed run's
    ended: dict[str, datetime] = {}

    def stop(*args, **kwargs):
        raise RuntimeError("stop")

    def note_end() -> None:
        stand_in.wait()
        ended["at"] = datetime.now(UTC)

    with VirtualLab(scenario()) as lab:
        plan_path = write_plan(tmp_path, long_powers(2))
        bench = load_bench(write_bench(lab, tmp_path))
        store = open_store(tmp_path / "runs.db")
        with pytest.raises(RuntimeError, match="stop"):
            run_plan(load_plan(plan_path), bench, store, operator=OPERATOR, unattended=True,
                     ack_safety=True, progress=False,
                     seams=Seams(reduce_trace=stop))
        run_id = store.latest_run_id()
        store.update_run(run_id, status="running", pid=dead.pid)  # as a SIGKILL leaves it
        stand_in = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(2.0)",
                                     "labrun.guardian", "--parent", str(dead.pid)])
        # its command line shows once its exec is complete (Linux sets it after the exec's
        # close-on-exec step that lets Popen return), so look until it does
        assert wait_for(lambda: watchers_of(dead.pid) == [stand_in.pid], 1.5) is not None
        assert wait_for_watchers_of(dead.pid, 0.05) == [stand_in.pid]  # still there
        waiter = threading.Thread(target=note_end)
        waiter.start()
        out = resume_run(run_id, store, operator=RESUMER, unattended=True, ack_safety=True,
                         progress=False)
        waiter.join()
        assert out.status == "completed" and dark(lab)
    events = store.events(run_id, ["resume"])
    assert events and events[0].at >= ended["at"], (events[0].at, ended["at"])
    assert watchers_of(dead.pid) == []
