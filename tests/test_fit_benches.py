"""Runs of one spool from different benches or days, fitted together: said, not assumed.

The exact fit carries one pair of launched-power offsets for all the runs and the first run's
bench calibration as their prior. Runs measured on another bench, or on another day, have
launched-power errors of their own, so ``fit_runs`` warns in every exact result (and on
screen, where ``labrun fit`` prints the warnings) instead of assuming them shared in silence.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from _engine_support import plan_text
from _store_support import run_plan_file

from labrun.cli import main
from labrun.spoolfits import FAR_APART_H, RunOrigin, fit_runs, shared_offset_warnings
from labrun.store import open_store
from labrun.store.models import Run

T0 = datetime(2026, 3, 2, 9, 0, tzinfo=UTC)  # invented measurement day


def _origin(run_id: int, name: str = "bench 1", text: str = "[bench]", hours: float = 0.0):
    return RunOrigin(run_id, name, text, T0 + timedelta(hours=hours))


def test_same_bench_same_day_warns_nothing() -> None:
    assert shared_offset_warnings([_origin(1), _origin(2, hours=FAR_APART_H - 1)]) == []
    assert shared_offset_warnings([_origin(1)]) == []


def test_other_bench_name_or_file_warns() -> None:
    (w,) = shared_offset_warnings([_origin(1), _origin(2, name="bench 2")])
    assert "runs 1, 2" in w and "'bench 1', 'bench 2'" in w and "launched-power" in w
    (w,) = shared_offset_warnings([_origin(1), _origin(2, text="[bench]\n# recalibrated")])
    assert "different bench files" in w


def test_runs_far_apart_in_time_warn() -> None:
    assert shared_offset_warnings([_origin(1), _origin(2, hours=FAR_APART_H - 0.1)]) == []
    (w,) = shared_offset_warnings([_origin(1), _origin(2, hours=FAR_APART_H + 0.1)])
    assert "runs 1 and 2" in w and "1.0 days apart" in w


def test_fit_runs_puts_the_warning_in_the_results(tmp_path, capsys) -> None:
    db = str(tmp_path / "runs.db")
    text = plan_text([-2.0, 0.0, 2.0]) + "\n[spool]\nlength_km = 1.0\nloss_db_per_km = 0.9\n"
    ids = [run_plan_file(db, "x", tmp_path, text=text) for _ in range(2)]
    store = open_store(db)
    try:
        with store.session() as s:  # the same bench file, same day: no warning
            first = s.get(Run, ids[0])
            second = s.get(Run, ids[1])
            second.bench_name, second.bench_text = first.bench_name, first.bench_text
            s.commit()
        same = fit_runs(store, ids, save=False)
        assert not any("launched-power offsets is fitted" in w
                       for p in same.parameters.values() for w in p.extra.get("warnings", []))
        with store.session() as s:  # now another bench, three days later
            second = s.get(Run, ids[1])
            second.bench_name = "bench in room 2"
            second.started_at = (s.get(Run, ids[0]).started_at or T0) + timedelta(days=3)
            s.commit()
        other = fit_runs(store, ids, save=False)
    finally:
        store.close()
    fitted = {k: p for k, p in other.parameters.items() if p.value is not None}
    assert fitted
    warned = {k for k, p in fitted.items()
              if any("'bench in room 2'" in w for w in p.extra.get("warnings", []))}
    assert warned and warned == {k for k, p in fitted.items()
                                 if any("days apart" in w for w in p.extra.get("warnings", []))}
    gamma = next(k for k in ("gamma", "gamma_small_signal", "gamma_bessel") if k in fitted)
    assert gamma in warned
    capsys.readouterr()
    assert main(["fit", *map(str, ids), "--db", db, "--no-store"]) == 0  # and on screen
    assert "! runs 1, 2 come from benches" in capsys.readouterr().out
