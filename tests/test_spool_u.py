"""The spool record's standard uncertainties of length and loss (labrun spool set --length-u-km
/ --loss-u-db-per-km, the plan's [spool] length_u_km / loss_u_db_per_km) in gamma's GUM budget.

GUM (JCGM 100:2008) 5.1.2-5.1.3: a row of the budget is |c_i| u(x_i), c_i the sensitivity of the
result to the input x_i; for the small changes here c_i is constant, so a stated u twice the
default doubles the row and a quarter of it quarters it. Without a stated u the fit uses the
defaults (0.5 % of the length, 0.02 dB/km; common practice) and the row says "(default)".
The spool is the invented DSF-C31 of tests/test_fit_dispersion.py (3.19 km, 0.5 dB/km).
"""

from __future__ import annotations

import json
import shutil

import pytest
from _store_support import record_dispersion, run_plan_file
from test_fit_dispersion import PLAN, SPOOL

from labrun.cli import main
from labrun.uncertainty import DEFAULT_LENGTH_REL, DEFAULT_LOSS_U_DB_PER_KM

LENGTH = SPOOL["length_km"]


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    """One power run of DSF-C31 with its D on record (so gamma has a full budget)."""
    folder = tmp_path_factory.mktemp("spoolu")
    path = str(folder / "runs.db")
    run_plan_file(path, "plan", folder, text=PLAN, spools=[SPOOL])
    record_dispersion(path, "DSF-C31", 2.69, 0.05, "--dispersion-slope", "0.05")
    return path


def _out(capsys, *argv) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


def _gamma(capsys, db) -> dict:
    return json.loads(_out(capsys, "fit", "1", "--db", db, "--json", "--no-store")
                      )["parameters"]["gamma"]


def _rows(g: dict) -> dict[str, dict]:
    return {r["source"]: r for r in g["budget"]}


def _one_line(capsys, db, *argv, words=()) -> None:
    capsys.readouterr()
    assert main([*argv, "--db", db]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    for w in words:
        assert w in err[0], err[0]


def test_stated_u_scales_the_budget_rows(db, capsys, tmp_path):
    stated = str(tmp_path / "stated.db")
    shutil.copy(db, stated)
    g0 = _gamma(capsys, db)
    rows0 = _rows(g0)
    length0, loss0 = rows0["spool length (default)"], rows0["spool loss (default)"]
    assert length0["u_input"] == DEFAULT_LENGTH_REL and length0["unit"] == "relative"
    assert loss0["u_input"] == DEFAULT_LOSS_U_DB_PER_KM and loss0["contribution"] > 0
    # twice the default length u (absolute km), a quarter of the default loss u
    _out(capsys, "spool", "set", "DSF-C31", "--length-u-km", repr(2 * DEFAULT_LENGTH_REL * LENGTH),
         "--loss-u-db-per-km", repr(DEFAULT_LOSS_U_DB_PER_KM / 4), "--db", stated)
    g1 = _gamma(capsys, stated)
    rows1 = _rows(g1)
    assert not {"spool length (default)", "spool loss (default)"} & rows1.keys()
    length1, loss1 = rows1["spool length (spool record)"], rows1["spool loss (spool record)"]
    assert length1["u_input"] == pytest.approx(2 * DEFAULT_LENGTH_REL, rel=1e-12)
    assert loss1["u_input"] == pytest.approx(DEFAULT_LOSS_U_DB_PER_KM / 4, rel=1e-12)
    # GUM 5.1.3: |c| u with c unchanged; a fit that ignored the stated u keeps ratio 1
    assert length1["contribution"] / length0["contribution"] == pytest.approx(2.0, rel=0.03)
    assert loss1["contribution"] / loss0["contribution"] == pytest.approx(0.25, rel=0.03)
    assert g1["value"] == g0["value"]  # the u's move the budget, not the value
    # GUM 5.1.2: u_c is the root sum of squares with the new rows
    assert g1["u_combined"] == pytest.approx(
        sum(r["contribution"] ** 2 for r in g1["budget"] if r["contribution"] is not None)
        ** 0.5, rel=1e-9)
    # the length row is |c| u with c found numerically (GUM 5.1.3), computed here apart from
    # the budget: half the change of gamma between fits with L (1 +- u_rel) on record (the
    # budget moves the closed-form refit, these move the whole exact-model fit: a few % apart)
    u_km = 2 * DEFAULT_LENGTH_REL * LENGTH
    moved = []
    for length in (LENGTH + u_km, LENGTH - u_km):
        _out(capsys, "spool", "set", "DSF-C31", "--length-km", repr(length), "--db", stated)
        moved.append(_gamma(capsys, stated)["value"])
    assert length1["contribution"] == pytest.approx(abs(moved[0] - moved[1]) / 2, rel=0.05)
    _out(capsys, "spool", "set", "DSF-C31", "--length-km", repr(LENGTH), "--db", stated)
    text = _out(capsys, "fit", "1", "--db", stated, "--no-store")
    assert "spool length (spool record)" in text and "spool loss (spool record)" in text
    assert "spool length (default)" in _out(capsys, "fit", "1", "--db", db, "--no-store")


def test_spool_set_length_and_loss_u(db, capsys, tmp_path):
    path = str(tmp_path / "set.db")
    shutil.copy(db, path)
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--length-u-km", "0",
              words=("--length-u-km", "above 0"))
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--length-u-km", "nan",
              words=("--length-u-km",))
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--loss-u-db-per-km", "-0.01",
              words=("--loss-u-db-per-km",))
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--loss-u-db-per-km", "0",
              words=("--loss-u-db-per-km",))
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--length-u-km", "3.19",
              words=("--length-u-km", "below the length"))
    _one_line(capsys, path, "spool", "set", "NEW-01", "--length-u-km", "0.01",
              words=("--length-u-km", "no length"))
    out = json.loads(_out(capsys, "spool", "set", "DSF-C31", "--json", "--db", path,
                          "--length-u-km", "0.002", "--loss-u-db-per-km", "0.004"))
    assert (out["length_u_km"], out["loss_u_db_per_km"]) == (0.002, 0.004)
    assert out["length_u_from"] == out["loss_u_from"] == "spool record"
    assert out["dispersion"]["d_ps_per_nm_km"] == 2.69  # the other params entry kept
    # a new length not above the stated u is refused, the record unchanged
    _one_line(capsys, path, "spool", "set", "DSF-C31", "--length-km", "0.002",
              words=("--length-km", "below the length"))
    (row,) = [r for r in json.loads(_out(capsys, "spools", "--json", "--db", path))["spools"]
              if r["spool"] == "DSF-C31"]
    assert row["length_km"] == LENGTH
    assert row["stated_u"] == {"length_u_km": 0.002, "loss_u_db_per_km": 0.004}
    out = json.loads(_out(capsys, "spool", "set", "DSF-C31", "--forget-spool-u", "--json",
                          "--db", path))
    assert out["length_u_km"] is None and out["length_u_from"].startswith("default")
    assert out["dispersion"] is not None
    # a record whose length u is not below its length (written by hand, or a plan's u on a
    # record of a shorter length) is refused by the fit, naming the record's field
    from labrun.store import open_store
    from labrun.store.models import Spool

    store = open_store(path)
    try:
        with store.session() as s:
            sp = s.query(Spool).filter(Spool.label == "DSF-C31").one()
            sp.params = {**sp.params, "length_u_km": 5.0}
    finally:
        store.close()
    _one_line(capsys, path, "fit", "1", "--no-store", words=("DSF-C31", "length_u_km",
                                                             "--length-u-km"))


def test_plan_spool_table_carries_the_u(tmp_path):
    """The plan's [spool] u's reach the spool record; they fill a row that has none."""
    from labrun.errors import InputError
    from labrun.plan import parse_plan
    from labrun.spoolfits import stated_spool_u
    from labrun.store import open_store
    from labrun.store.models import Spool

    extra = "length_u_km = 0.01\nloss_u_db_per_km = 0.003\ndispersion_ps_per_nm_km = 2.69\n" \
            "dispersion_u_ps_per_nm_km = 0.05\n"
    plan = parse_plan(PLAN.replace("[fixed]", extra + "\n[fixed]").encode(), "p.toml")
    store = open_store(str(tmp_path / "s.db"))
    try:
        sid = store.spool_id(plan.spool, **plan.spool_info)
        with store.session() as s:
            sp = s.get(Spool, sid)
            assert stated_spool_u(sp) == {"length_u_km": 0.01, "loss_u_db_per_km": 0.003}
            assert sp.params["dispersion"]["d_ps_per_nm_km"] == 2.69
            sp.params = {k: v for k, v in sp.params.items() if k != "loss_u_db_per_km"}
        other = parse_plan(PLAN.replace("[fixed]", extra.replace("0.0", "0.00") + "\n[fixed]")
                           .encode(), "q.toml")
        store.spool_id(other.spool, **other.spool_info)  # the row's own u wins, a gap is filled
        with store.session() as s:
            assert stated_spool_u(s.get(Spool, sid)) == {"length_u_km": 0.01,
                                                         "loss_u_db_per_km": 0.0003}
    finally:
        store.close()
    for line, field in (("length_u_km = 3.19", "spool.length_u_km"),
                        ("length_u_km = 0", "spool.length_u_km"),
                        ("loss_u_db_per_km = nan", "spool.loss_u_db_per_km")):
        with pytest.raises(InputError) as exc:
            parse_plan(PLAN.replace("[fixed]", line + "\n\n[fixed]").encode(), "p.toml")
        assert exc.value.field == field and exc.value.file == "p.toml"
