"""The run's ETA: the rehearsal's estimate per point (stored with the run when it starts) until
points are measured, then the measured pace (labrun status)."""

from __future__ import annotations

from types import SimpleNamespace

import pytest
from _engine_support import OPERATOR, scenario, write_bench, write_plan

from labrun.bench import load_bench
from labrun.cli import main
from labrun.cli.status import status_report
from labrun.plan import load_plan
from labrun.rehearse import rehearse
from labrun.store import open_store
from labrun.store.models import utcnow
from labrun.vlab.lab import VirtualLab


def _summary(*, done: int, pace: float | None, estimate: float | None) -> dict:
    now = utcnow()
    run = SimpleNamespace(id=1, status="running", reason=None, points_total=10, heartbeat_at=now,
                          plan_name="p", operator=OPERATOR, bench_name="b", replay_of=None,
                          started_at=now, finished_at=None,
                          settings={"estimate_s_per_point": estimate})
    return {"run": run, "points_done": done, "seconds_per_point": pace, "last_point": None,
            "last_lines": [], "faults": 0, "last_fault": None}


def test_eta_from_the_estimate_until_points_are_measured():
    before = status_report(_summary(done=0, pace=None, estimate=2.5))
    assert before["eta_s"] == pytest.approx(25.0) and before["pace_source"] == "estimate"
    measured = status_report(_summary(done=4, pace=3.0, estimate=2.5))
    assert measured["eta_s"] == pytest.approx(18.0) and measured["pace_source"] == "measured"
    unknown = status_report(_summary(done=0, pace=None, estimate=None))
    assert unknown["eta_s"] is None


def test_labrun_run_stores_the_rehearsed_pace(tmp_path):
    plan_path = write_plan(tmp_path, [0.0, 1.0, 2.0])
    with VirtualLab(scenario()) as lab:
        bench_path = write_bench(lab, tmp_path)
        db = tmp_path / "r.db"
        assert main(["run", str(plan_path), "--bench", str(bench_path), "--db", str(db),
                     "--unattended", "--operator", OPERATOR, "--ack-safety",
                     "--no-progress"]) == 0
    later = rehearse(load_plan(plan_path), load_bench(bench_path)).points[1:]
    expected = sum(p.seconds for p in later) / len(later)
    stored = open_store(db).get_run(1).settings["estimate_s_per_point"]
    assert stored == pytest.approx(expected, abs=1e-4) and stored > 0
