"""A power run fitted alone (issue 9, "no silent fallbacks"): the phase-mismatch correction of
gamma needs the spool's dispersion D (Inoue, IEEE J. Quantum Electron. 28(4), 883 (1992): the
first-sideband efficiency eta falls with (dbeta L)^2; docs/design.md §5.3). Without a spacing run
and without a D on record, the fit must claim no expanded uncertainty, and every display must
say so; with the D a lab knows (labrun spool set --dispersion) gamma comes back within its U, and
the GUM budget (JCGM 100:2008) gains a row for that D's uncertainty.

The spool (invented, realistic for a dispersion-shifted highly nonlinear fibre): 3.19 km,
0.5 dB/km, gamma 8.87 /(W km), D +2.69 ps/(nm km), slope 0.05 ps/(nm^2 km); equal tones 100 GHz
apart: |dbeta| L is about 4 rad, so eta is far from 1 and D = 0 gives gamma 58 % low.
"""

from __future__ import annotations

import json

import pytest
from _store_support import record_dispersion, run_plan_file

from labrun.cli import main
from labrun.fits import FitResult
from labrun.spoolfits import D_SOURCE, GivenDispersion, _checked_against

SPOOL = {"name": "DSF-C31", "length_km": 3.19, "loss_db_per_km": 0.5,
         "gamma_per_w_per_km": 8.87, "dispersion_ps_per_nm_km": 2.69,
         "dispersion_slope_ps_per_nm2_km": 0.05, "reference_wavelength_nm": 1550.0}
PLAN = """[plan]
name = "DSF-C31 power sweep, 100 GHz"
spool = "DSF-C31"
orders = 2

[spool]
length_km = 3.19
loss_db_per_km = 0.5

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.power_a_dbm]
values = [-2.0, 0.0, 2.0, 4.0, 6.0]

[axes.power_b_dbm]
values = [-2.0, 0.0, 2.0, 4.0, 6.0]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
"""


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    """A store with one power run of DSF-C31 and no dispersion on record."""
    folder = tmp_path_factory.mktemp("nod")
    path = str(folder / "runs.db")
    run_plan_file(path, "plan", folder, text=PLAN, spools=[SPOOL])
    return path


def _out(capsys, *argv) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0
    return capsys.readouterr().out


def _fit(capsys, db, *args) -> dict:
    return json.loads(_out(capsys, "fit", "1", "--db", db, "--json", *args))["parameters"]


def test_no_dispersion_claims_no_u_anywhere(db, capsys):
    gamma_true = SPOOL["gamma_per_w_per_km"]
    p = _fit(capsys, db, "--no-store")
    for name in ("gamma", "gamma_small_signal", "gamma_bessel"):
        g = p[name]
        assert g["value"] is not None, name  # the value is still printed ...
        assert g["u95"] is None and g["u_combined"] is None and "budget" not in g, name
        assert g["comparable"] is False and g["no_u_reason"].startswith("dispersion unknown")
        assert "--dispersion" in g["no_u_hint"]
    # ... and it is far off (eta = 1 where |dbeta| L ~ 4 rad; Inoue 1992): no U may be claimed
    assert p["gamma"]["value"] < 0.6 * gamma_true
    assert p["slope_high_1"]["u95"] is not None  # the dB/dB slopes do not depend on eta

    text = _out(capsys, "fit", "1", "--db", db)  # stores fit 1
    assert "no U: dispersion unknown" in text and "labrun spool set DSF-C31 --dispersion" in text
    assert "nan" not in text.lower() and "U k=2" not in text.split("slope_")[0]
    mc = _out(capsys, "fit", "1", "--db", db, "--no-store", "--monte-carlo", "3")
    assert "nan" not in mc.lower() and "Monte Carlo (JCGM 101" not in mc

    rows = json.loads(_out(capsys, "spools", "--db", db, "--json"))["spools"]
    (row,) = [r for r in rows if r["spool"] == "DSF-C31"]
    g = row["gamma_per_w_per_km"]
    assert g["u95"] is None and g["comparable"] is False and g["no_u_reason"]
    text = _out(capsys, "spools", "--db", db)
    (line,) = [ln for ln in text.splitlines() if ln.startswith("DSF-C31")]
    assert "[no U]" in line and "(U k=2" not in line and "u stat" not in line
    assert "not comparable" in text and "nan" not in text.lower()

    _out(capsys, "spool", "set", "HNLF-A17", "--length-km", "1", "--db", db)  # no fit: "-"
    rep = json.loads(_out(capsys, "compare", "DSF-C31", "HNLF-A17", "--db", db, "--json"))
    sp = rep["spools"][0]
    assert sp["gamma_per_w_per_km"]["comparable"] is False
    assert sp["first_sideband_efficiency_db"]["comparable"] is False  # computed from gamma
    text = _out(capsys, "compare", "DSF-C31", "HNLF-A17", "--db", db)
    assert "[no U]" in text and "not comparable" in text and "nan" not in text.lower()
    text = _out(capsys, "compare", "DSF-C31", "--db", db)
    assert "[no U]" in text and "CHANGED" not in text.split("(U k=2")[0]


def test_no_u_in_the_html_report(db, capsys, tmp_path):
    _out(capsys, "fit", "1", "--db", db)
    for args in (["1"], ["--spool", "DSF-C31"]):
        out = tmp_path / "r.html"
        _out(capsys, "report", *args, "--out", str(out), "--db", db)
        page = out.read_text(encoding="utf-8")
        assert "no U (dispersion unknown" in page and "not comparable" in page
        assert ">nan<" not in page.lower()


def test_given_dispersion_brings_gamma_within_u(db, capsys, tmp_path):
    """The lab's D (here the spool's own, u 0.05 ps/(nm km)) is used and budgeted."""
    import shutil

    gamma_true = SPOOL["gamma_per_w_per_km"]
    dbs = {}
    for u in (0.05, 0.1):
        dbs[u] = str(tmp_path / f"u{u}.db")
        shutil.copy(db, dbs[u])
        record_dispersion(dbs[u], "DSF-C31", 2.69, u, "--dispersion-slope", "0.05")
    p = _fit(capsys, dbs[0.05], "--no-store")
    g = p["gamma"]
    # within its expanded uncertainty of the scenario's gamma; the D = 0 fit (0.42 of it)
    # was not: a fit that ignored the given D fails here
    assert abs(g["value"] - gamma_true) <= g["u95"]
    assert abs(g["value"] - gamma_true) < 0.02 * gamma_true
    # the figures docs/models.md quotes for this case (gamma 8.870, U 0.755, D row 0.369)
    assert g["value"] == pytest.approx(8.870, abs=0.005)
    assert g["u95"] == pytest.approx(0.755, rel=0.02)
    assert g["dispersion_used"] == {"source": "spool record (labrun spool set)",
                                    "d_ps_per_nm_km": 2.69, "u_ps_per_nm_km": 0.05,
                                    "slope_ps_per_nm2_km": 0.05, "reference_wavelength_nm": 1550.0}
    rows = {r["source"]: r for r in g["budget"]}
    row = rows[D_SOURCE]
    assert row["u_input"] == 0.05 and row["contribution"] > 0.05 * g["value"] * 0.1
    assert row["contribution"] == pytest.approx(0.369, rel=0.02)
    # GUM 5.1.2 / 6.2.1: u_c is the root sum of squares with the new row, U = 2 u_c
    assert g["u_combined"] == pytest.approx(
        sum(r["contribution"] ** 2 for r in g["budget"] if r["contribution"] is not None) ** 0.5,
        rel=1e-9)
    assert g["u95"] == pytest.approx(2 * g["u_combined"], rel=1e-12)
    assert g.get("comparable", True) is True and g["u95_kind"].startswith("GUM")
    # a factor 2 in the given u doubles the row (a sensitivity coefficient times u, GUM 5.1.3;
    # linear here to a few %)
    g2 = _fit(capsys, dbs[0.1], "--no-store")["gamma"]
    row2 = {r["source"]: r for r in g2["budget"]}[D_SOURCE]
    assert row2["contribution"] / row["contribution"] == pytest.approx(2.0, rel=0.05)
    # the row is |c| u with c found numerically (GUM 5.1.3): half the change of gamma between
    # fits with D + u and D - u on record (u tiny there), computed here apart from the budget
    moved = []
    for d in (2.69 + 0.05, 2.69 - 0.05):
        record_dispersion(dbs[0.1], "DSF-C31", d, 1e-6, "--dispersion-slope", "0.05")
        moved.append(_fit(capsys, dbs[0.1], "--no-store")["gamma"]["value"])
    assert row["contribution"] == pytest.approx(abs(moved[0] - moved[1]) / 2, rel=1e-6)
    rows = json.loads(_out(capsys, "spools", "--db", dbs[0.05], "--json"))["spools"]
    (rec,) = [r["dispersion_record"] for r in rows if r["spool"] == "DSF-C31"]
    assert rec["d_ps_per_nm_km"] == 2.69 and rec["u_ps_per_nm_km"] == 0.05
    assert "2.69 (record, u 0.05)" in _out(capsys, "spools", "--db", dbs[0.05])
    text = _out(capsys, "fit", "1", "--db", dbs[0.05])  # stored: the twin below models it
    assert "D used: D = 2.69 +/- 0.05 ps/(nm km), slope 0.05 ps/(nm^2 km) at 1550 nm" in text
    assert "spool record" in text and D_SOURCE in text and "no U" not in text
    # the replay twin (labrun replay --twin) models the spool with the D the fit used: its
    # split-step lines match the run (with D = 0 and this gamma the sidebands are dB off)
    capsys.readouterr()
    assert main(["replay", "1", "--db", dbs[0.05], "--twin"]) == 0
    out = capsys.readouterr().out
    assert "dispersion from the spool record" in out and "verdict: consistent" in out


def test_spool_set_dispersion_input(db, capsys):
    def one_line(*argv, words=()):
        capsys.readouterr()
        assert main([*argv, "--db", db]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1, err
        for w in words:
            assert w in err[0]

    one_line("spool", "set", "DSF-C31", "--dispersion", "2.7", words=("--dispersion-u",))
    one_line("spool", "set", "DSF-C31", "--dispersion", "2.7", "--dispersion-u", "0",
             words=("--dispersion-u", "not 0"))
    one_line("spool", "set", "DSF-C31", "--dispersion", "2000", "--dispersion-u", "1",
             words=("--dispersion:",))
    one_line("spool", "set", "DSF-C31", "--dispersion-slope", "0.05",
             words=("--dispersion-slope", "needs --dispersion"))
    out = json.loads(_out(capsys, "spool", "set", "DSF-C31", "--dispersion", "-1.5",
                          "--dispersion-u", "0.2", "--dispersion-at-nm", "1560", "--db", db,
                          "--json"))
    assert out["dispersion"] == {"d_ps_per_nm_km": -1.5, "u_ps_per_nm_km": 0.2,
                                 "slope_ps_per_nm2_km": 0.0, "slope_u_ps_per_nm2_km": 0.0,
                                 "reference_wavelength_nm": 1560.0}
    out = json.loads(_out(capsys, "spool", "set", "DSF-C31", "--forget-dispersion", "--db", db,
                          "--json"))
    assert out["dispersion"] is None
    with pytest.raises(SystemExit):
        main(["spool", "set", "--help"])
    assert "phase-mismatch correction" in capsys.readouterr().out


def test_spacing_run_wins_and_a_disagreeing_record_is_warned():
    """Pure: the fitted D is kept; the record is warned when beyond sqrt(U1^2 + U2^2)."""
    def res(d, u95, signed):
        disp = FitResult(d, u95 / 2, 30, 0.1, "m", "ps/(nm km)",
                         extra={"sign_determined": signed}, u95=u95)
        return {"dispersion": disp, "gamma": FitResult(9.0, 0.1, 30, 0.1, "m", "1/(W km)")}

    rec = GivenDispersion(2.69, 0.05)
    # |2.80 - 2.69| = 0.11 < sqrt(0.1^2 + 0.1^2) = 0.141: agrees, no warning
    out = _checked_against(res(2.80, 0.1, True), rec)
    assert out["dispersion"].value == 2.80 and not out["dispersion"].warnings
    # 0.13 < 0.141 (the record's U is 2 u, GUM 6.2.1; with U = u the limit would be 0.112)
    assert not _checked_against(res(2.82, 0.1, True), rec)["dispersion"].warnings
    # 0.16 > 0.141: warned, on D and gamma, and the fitted value kept
    out = _checked_against(res(2.85, 0.1, True), rec)
    assert out["dispersion"].value == 2.85 and "disagrees" in out["dispersion"].warnings[0]
    assert "disagrees" in out["gamma"].warnings[0]
    # sign not determined: |D| compared (-2.69 on record agrees with |D| = 2.70)
    out = _checked_against(res(2.70, 0.1, False), GivenDispersion(-2.69, 0.05))
    assert not out["dispersion"].warnings


def test_plan_spool_table_carries_the_dispersion(tmp_path):
    """The plan's [spool] table may give the D too; it fills a row that has none."""
    from labrun.errors import InputError
    from labrun.plan import parse_plan
    from labrun.spoolfits import GivenDispersion
    from labrun.store import open_store
    from labrun.store.models import Spool

    extra = ("dispersion_ps_per_nm_km = 2.69\ndispersion_u_ps_per_nm_km = 0.05\n"
             "dispersion_slope_ps_per_nm2_km = 0.05\n")
    plan = parse_plan(PLAN.replace("[fixed]", extra + "\n[fixed]").encode(), "p.toml")
    assert plan.spool_info["length_km"] == 3.19
    store = open_store(str(tmp_path / "s.db"))
    try:
        sid = store.spool_id(plan.spool, **plan.spool_info)
        with store.session() as s:
            rec = GivenDispersion.of(s.get(Spool, sid))
        assert rec == GivenDispersion(2.69, 0.05, 0.05, 0.0, 1550.0)
        other = parse_plan(PLAN.replace("[fixed]", extra.replace("2.69", "9.9") + "\n[fixed]")
                           .encode(), "q.toml")
        store.spool_id(other.spool, **other.spool_info)  # the row's own record wins
        with store.session() as s:
            assert GivenDispersion.of(s.get(Spool, sid)).d == 2.69
    finally:
        store.close()
    with pytest.raises(InputError) as exc:
        parse_plan(PLAN.replace("[fixed]", "dispersion_ps_per_nm_km = 2.69\n\n[fixed]").encode(),
                   "p.toml")
    assert exc.value.field == "spool.dispersion_u_ps_per_nm_km"


def test_no_u_hint_names_a_spacing_run_of_the_spool(db, capsys, tmp_path):
    """A spacing run of the spool in the store: the no-U hint says to fit it jointly."""
    import shutil

    path = str(tmp_path / "two.db")
    shutil.copy(db, path)
    spacing = (PLAN.replace('name = "DSF-C31 power sweep, 100 GHz"', 'name = "spacing"')
               .replace("spacing_ghz = 100.0\n", "")
               .replace("[axes.power_a_dbm]\nvalues = [-2.0, 0.0, 2.0, 4.0, 6.0]\n\n"
                        "[axes.power_b_dbm]\nvalues = [-2.0, 0.0, 2.0, 4.0, 6.0]\n\n"
                        '[order]\nzip = [["power_a_dbm", "power_b_dbm"]]\n',
                        "power_a_dbm = 4.0\npower_b_dbm = 4.0\n\n[axes.spacing_ghz]\n"
                        "values = [50.0, 100.0]\n"))
    run = run_plan_file(path, "plan", tmp_path, text=spacing, spools=[SPOOL])
    g = _fit(capsys, path, "--no-store")["gamma"]
    assert g["u95"] is None and f"labrun fit 1 {run} fits them jointly" in g["no_u_hint"]
