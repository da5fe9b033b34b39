"""A lost PostgreSQL connection mid-run (issue 8 item 7, with issue 13's store-fault path): the
server drops the run's connection (``pg_terminate_backend``). Once, it is retried like an
instrument fault and the run completes, every point stored once; for good (the run's role may no
longer log in), the run stops with every source off and a clear status — the record beside the
database, shown by ``labrun status`` and written in by ``labrun resume`` — never ``running``."""

from __future__ import annotations

import json
import uuid

from _engine_support import count_points, dark, run_in_process, scenario, wait_for
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from labrun.cli import main
from labrun.plan import load_plan
from labrun.runstore import apply_fallback
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab

N_POINTS = 300


class _Role:
    """A login role of its own for the run, so the test can cut exactly its connections."""

    def __init__(self, pg_url: str):
        self.admin = create_engine(pg_url)
        self.name = f"rig_{uuid.uuid4().hex[:8]}"
        url = make_url(pg_url)
        schema = url.query["options"].split("=", 1)[1]
        with self.admin.begin() as conn:
            conn.execute(text(f'CREATE ROLE "{self.name}" LOGIN'))
            conn.execute(text(f'GRANT USAGE, CREATE ON SCHEMA "{schema}" TO "{self.name}"'))
        self.url = url.set(username=self.name).render_as_string(hide_password=False)

    def cut(self, *, for_good: bool) -> int:
        """Terminate the role's server connections (and refuse new ones when ``for_good``)."""
        with self.admin.begin() as conn:
            if for_good:
                conn.execute(text(f'ALTER ROLE "{self.name}" NOLOGIN'))
            return len(conn.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE usename = :u"),
                {"u": self.name}).all())

    def restore(self) -> None:
        with self.admin.begin() as conn:
            conn.execute(text(f'ALTER ROLE "{self.name}" LOGIN'))

    def drop(self) -> None:
        with self.admin.begin() as conn:
            conn.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE usename = :u"),
                {"u": self.name})
            conn.execute(text(f'DROP OWNED BY "{self.name}" CASCADE'))
            conn.execute(text(f'DROP ROLE "{self.name}"'))
        self.admin.dispose()


def test_a_dropped_connection_is_retried_and_the_run_completes(tmp_path, pg_url):
    role = _Role(pg_url)
    try:
        with VirtualLab(scenario()) as lab:
            with run_in_process(lab, tmp_path, N_POINTS, "--json", min_points=5,
                                db=role.url) as (proc, plan, _bench, _db):
                # the run's connections: one cut that hit at least one of them
                assert wait_for(lambda: role.cut(for_good=False) >= 1, 10) is not None
                out, err = proc.communicate(timeout=300)
            assert proc.returncode == 0, err
            assert dark(lab)
        rep = json.loads(out)
        assert rep["status"] == "completed" and rep["points_done"] == N_POINTS
        store = open_store(pg_url)
        try:
            with store.engine.connect() as conn:
                keys = conn.execute(text("SELECT key FROM points")).scalars().all()
                kinds = conn.execute(text("SELECT kind FROM events")).scalars().all()
        finally:
            store.close()
        expected = [p.key for p in load_plan(plan).points()]
        assert len(keys) == len(set(keys)) == len(expected) and set(keys) == set(expected)
        # the lost connection went dark at once, then the light came back the full way
        assert "dark" in kinds and "relight" in kinds, kinds
    finally:
        role.drop()


def test_a_lost_server_stops_the_run_dark_with_a_clear_status(tmp_path, pg_url, capsys,
                                                              monkeypatch):
    role = _Role(pg_url)
    monkeypatch.chdir(tmp_path)  # a server database's fallback record lives in the folder
    try:
        with VirtualLab(scenario()) as lab:
            with run_in_process(lab, tmp_path, N_POINTS, min_points=5,
                                db=role.url) as (proc, _plan, _bench, _db):
                assert wait_for(lambda: role.cut(for_good=True) >= 1, 10) is not None
                _, err = proc.communicate(timeout=300)
            assert proc.returncode == 1, err
            assert "Traceback" not in err
            assert dark(lab)
        done = count_points(pg_url)
        assert 5 <= done < N_POINTS
        # the database (reachable again for others) still says running; the record beside it
        # says why the run ended, and status shows that instead
        capsys.readouterr()
        assert main(["status", "--db", pg_url, "--json"]) == 0
        shown = json.loads(capsys.readouterr().out)
        assert shown["status"] == "aborted" and "database" in (shown["reason"] or "")
        role.restore()
        store = open_store(pg_url)
        try:
            (run_id,) = apply_fallback(store)
            run = store.get_run(run_id)
            assert run.status == "aborted" and "database" in run.reason
        finally:
            store.close()
    finally:
        role.drop()
