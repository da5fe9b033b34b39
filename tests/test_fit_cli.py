"""``labrun fit``, ``labrun spools`` and ``labrun spool set`` on stored virtual-lab runs, on SQLite
and PostgreSQL: the fit recovers the scenario's gamma, the expanded uncertainty uses Student's t
(GUM), the fit is stored (or not), bad input is one line with exit 2."""

from __future__ import annotations

import json

import pytest
from _store_support import HNLF_D, HNLF_GAMMA, record_dispersion, run_plan_file
from sqlalchemy import func, select

from labrun.cli import main
from labrun.spoolfits import GUM_K2, U_LEGEND
from labrun.store import open_store
from labrun.store.models import Fit, FitParameter, Run, Spool

D_U = 0.05  # ps/(nm km): the lab's stated uncertainty of the spool's D (invented)


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def power_db(request, tmp_path_factory):
    """A store holding one shipped power sweep of HNLF-A17 (run 1), the spool's dispersion on
    record as a lab knows it from the data sheet (without it a power run alone claims no U:
    tests/test_fit_dispersion.py)."""
    folder = tmp_path_factory.mktemp("fitdb")
    if request.param == "sqlite":
        db = str(folder / "runs.db")
        run_plan_file(db, "power-sweep.toml", folder)
        record_dispersion(db, "HNLF-A17", HNLF_D, D_U)
        yield db
        return
    from conftest import pg_schema

    with pg_schema() as db:
        run_plan_file(db, "power-sweep.toml", folder)
        record_dispersion(db, "HNLF-A17", HNLF_D, D_U)
        yield db


def _fit_json(capsys, db, *args):
    capsys.readouterr()
    assert main(["fit", *args, "--db", db, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def _count(db, model) -> int:
    store = open_store(db)
    try:
        with store.session() as s:
            return int(s.scalar(select(func.count()).select_from(model)))
    finally:
        store.close()


def test_fit_recovers_gamma_and_stores_it(power_db, capsys):
    before = _count(power_db, Fit)
    rep = _fit_json(capsys, power_db, "1")
    assert rep["spool"] == "HNLF-A17" and rep["runs"] == [1] and rep["fit_id"] is not None
    g = rep["parameters"]["gamma_bessel"]
    assert set(g) >= {"value", "stderr", "u95", "unit", "model"}
    assert g["unit"] == "1/(W km)"
    # the virtual lab's spool (realism off): gamma = 11.0 /(W km) in default-scenario.toml
    assert g["value"] == pytest.approx(HNLF_GAMMA, rel=0.01)
    # the GUM budget (JCGM 100:2008): u_c is the root sum of squares of the contributions
    # (eq. 10 with uncorrelated inputs), one of which is the fit's statistical error, and the
    # expanded uncertainty is U = k u_c with k = 2 (6.2.1, 6.3.3; fails with k = 1.96 or t_95)
    assert g["n_points"] == 21
    rows = {r["source"]: r["contribution"] for r in g["budget"]}
    assert rows["statistical (fit)"] == pytest.approx(g["stderr"], rel=1e-9)
    assert g["u_combined"] == pytest.approx(
        sum(c * c for c in rows.values() if c is not None) ** 0.5, rel=1e-6)
    assert g["u95"] == pytest.approx(2.0 * g["u_combined"], rel=1e-9)
    # the exact-model (split-step) gamma is fitted and reported beside the closed forms
    exact = rep["parameters"]["gamma"]
    assert exact["model"].startswith("split-step") and exact["budget"]
    assert exact["value"] == pytest.approx(HNLF_GAMMA, rel=0.01)
    assert _count(power_db, Fit) == before + 1
    store = open_store(power_db)
    try:
        with store.session() as s:
            row = s.scalars(select(FitParameter).where(FitParameter.fit_id == rep["fit_id"],
                                                       FitParameter.name == "gamma_bessel")).one()
            assert row.value == g["value"] and row.u95 == g["u95"]
            fit = s.get(Fit, rep["fit_id"])
            assert fit.run_ids == [1] and fit.spool.label == "HNLF-A17"
            assert fit.spool_snapshot["length_km"] == 1.0
    finally:
        store.close()


def test_no_store_leaves_the_fits_table_alone(power_db, capsys):
    before = _count(power_db, Fit)
    rep = _fit_json(capsys, power_db, "1", "--no-store")
    assert rep["fit_id"] is None and "gamma_bessel" in rep["parameters"]
    assert _count(power_db, Fit) == before


def test_monte_carlo_interval_beside_the_gum_one(power_db, capsys):
    rep = _fit_json(capsys, power_db, "1", "--no-store", "--monte-carlo", "4")
    g = rep["parameters"]["gamma"]
    assert g["u95_kind"].startswith("GUM expanded uncertainty U = 2 u_c")
    mc = g["monte_carlo"]
    assert mc["n"] == 4 and mc["p"] == 0.95 and mc["method"].startswith("JCGM 101:2008")
    # 4 trials: the interval is their extremes (JCGM 101 7.7.1), which need not hold the value
    # (1 chance in 8 that all 4 fall on one side); their mean lies within the GUM's U of it
    assert mc["low"] < mc["high"] and abs(mc["mean"] - g["value"]) < g["u95"]
    capsys.readouterr()
    assert main(["fit", "1", "--db", power_db, "--no-store", "--monte-carlo", "3"]) == 0
    text = capsys.readouterr().out
    assert "Monte Carlo (JCGM 101, M = 3" in text and "(U k=2 " in text
    assert "(U95 t " not in text  # every parameter here has a budget
    # the run read the tap power meter: the offsets' common part comes from it (issue 9)
    assert "launched power (tap meter)" in text and "input-tap power meter" in text
    with pytest.raises(SystemExit) as exc:  # a usage error: argparse's one line, exit 2
        main(["fit", "1", "--db", power_db, "--monte-carlo", "1"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--monte-carlo" in err[0] and ">= 2" in err[0]


def test_spools_lists_latest_fit(power_db, capsys):
    rep = _fit_json(capsys, power_db, "1")
    assert main(["spools", "--db", power_db, "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["spools"]
    (row,) = [r for r in rows if r["spool"] == "HNLF-A17"]
    assert row["latest_fit"] == rep["fit_id"] and row["runs"] >= 1
    assert row["length_km"] == 1.0 and row["fibre_type"] == "highly nonlinear fibre"
    gamma = row["gamma_per_w_per_km"]
    assert gamma["value"] == rep["parameters"]["gamma"]["value"]  # the exact model first
    assert gamma["runs"] == [1] and gamma["u95"] is not None
    assert gamma["u95_kind"] == GUM_K2  # the exact fit carries the GUM budget
    assert main(["spools", "--db", power_db]) == 0
    out = capsys.readouterr().out
    (line,) = [ln for ln in out.splitlines() if ln.startswith("HNLF-A17")]
    # the same labelled U as labrun fit and labrun compare show (was the bare statistical error)
    assert f"{gamma['value']:.4g} (U k=2 {gamma['u95']:.2g})" in line, line
    assert U_LEGEND in out


def _one_line_error(capsys, argv, *words):
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    for w in words:
        assert w in err[0]


def test_bad_fit_requests(power_db, capsys):
    _one_line_error(capsys, ["fit", "99", "--db", power_db], "no run 99", f"{power_db}: RUN_ID")
    store = open_store(power_db)
    try:  # a run of another spool, recorded directly
        other = store.spool_id("SMF-B02")
        run2 = store.create_run(plan_text="", plan_sha256="0", bench_text="",
                                software_version="t", spool_id=other)
        bare = store.spool_id("BARE-01")
        run3 = store.create_run(plan_text="", plan_sha256="0", bench_text="",
                                software_version="t", spool_id=bare)
    finally:
        store.close()
    _one_line_error(capsys, ["fit", "1", str(run2), "--db", power_db], "different spools")
    _one_line_error(capsys, ["fit", str(run3), "--db", power_db], "labrun spool set BARE-01")
    _one_line_error(capsys, ["spool", "set", "BARE-01", "--length-km", "-1", "--db", power_db],
                    "--length-km")
    _one_line_error(capsys, ["spool", "set", "BARE-01", "--db", power_db], "nothing to set")
    assert main(["spool", "set", "BARE-01", "--length-km", "2.5", "--loss-db-per-km", "0.4",
                 "--fibre-type", "dispersion-shifted", "--note", "invented", "--db",
                 power_db]) == 0
    _one_line_error(capsys, ["fit", str(run3), "--db", power_db], "no stored points")
    store = open_store(power_db)
    try:
        with store.session() as s:
            sp = s.scalar(select(Spool).where(Spool.label == "BARE-01"))
            assert (sp.length_km, sp.loss_db_per_km, sp.fibre_type, sp.note) == (
                2.5, 0.4, "dispersion-shifted", "invented")
            assert sp.updated_at is not None
            s.execute(Run.__table__.delete().where(Run.id.in_([run2, run3])))
    finally:
        store.close()
