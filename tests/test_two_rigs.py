"""Two rigs, one lab database: two virtual labs and two ``labrun run`` processes write into the same
empty PostgreSQL database at once. Both complete, every point of each plan is stored exactly once,
each run is linked to its own spool, and the read side sees both."""

from __future__ import annotations

import json

from _engine_support import OPERATOR, labrun_process, long_powers, plan_text, scenario
from sqlalchemy import select

from labrun.cli import main
from labrun.plan import load_plan
from labrun.store import Point, Run, open_existing_store
from labrun.vlab.lab import VirtualLab

N_POINTS = 30
SPOOLS = {"HNLF-A17": (1.0, 0.9), "SMF-B02": (10.0, 0.2)}  # default-scenario.toml (invented)


def _plan(folder, spool: str, name: str):
    text = plan_text(long_powers(N_POINTS)).replace('spool = "HNLF-A17"', f'spool = "{spool}"')
    text = text.replace('name = "engine test sweep"', f'name = "{name}"')
    length, loss = SPOOLS[spool]
    text += f"\n[spool]\nlength_km = {length}\nloss_db_per_km = {loss}\n"
    path = folder / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_two_rigs_write_one_postgresql_database(tmp_path, pg_url, capsys):
    rigs = [("HNLF-A17", "rig-1"), ("SMF-B02", "rig-2")]
    with VirtualLab(scenario(connected="HNLF-A17")) as lab1, \
            VirtualLab(scenario(connected="SMF-B02")) as lab2:
        procs = []
        for lab, (spool, name) in zip((lab1, lab2), rigs, strict=True):
            folder = tmp_path / name
            folder.mkdir()
            plan = _plan(folder, spool, name)
            bench = lab.write_bench(folder / "bench.toml")
            procs.append((plan, labrun_process(
                "run", str(plan), "--bench", str(bench), "--db", pg_url, "--unattended",
                "--operator", OPERATOR, "--ack-safety", "--no-progress", "--json",
                cwd=folder)))
        outcomes = []
        for _, proc in procs:
            out, err = proc.communicate(timeout=120)
            assert proc.returncode == 0, err
            outcomes.append(json.loads(out))
        assert lab1.sources_off() and lab2.sources_off()
    assert {o["status"] for o in outcomes} == {"completed"}
    store = open_existing_store(pg_url)
    try:
        with store.session() as s:
            runs = s.scalars(select(Run).order_by(Run.id)).all()
            assert len(runs) == 2
            for (plan, _), outcome in zip(procs, outcomes, strict=True):
                run = s.get(Run, outcome["run_id"])
                keys = s.scalars(select(Point.key).where(Point.run_id == run.id)).all()
                expected = [p.key for p in load_plan(plan).points()]
                assert len(keys) == len(set(keys)) == len(expected)  # each stored once
                assert set(keys) == set(expected)  # none lost
                assert run.spool.label == load_plan(plan).spool
    finally:
        store.close()
    capsys.readouterr()
    assert main(["spools", "--db", pg_url, "--json"]) == 0
    seen = {r["spool"]: r["runs"] for r in json.loads(capsys.readouterr().out)["spools"]}
    assert seen == {"HNLF-A17": 1, "SMF-B02": 1}
    for outcome in outcomes:
        assert main(["fit", str(outcome["run_id"]), "--db", pg_url]) == 0
    capsys.readouterr()
    assert main(["compare", "HNLF-A17", "SMF-B02", "--db", pg_url, "--json"]) == 0
    compared = json.loads(capsys.readouterr().out)["spools"]
    runs = {o["run_id"] for o in outcomes}
    assert {tuple(c["gamma_per_w_per_km"]["runs"])[0] for c in compared} == runs
