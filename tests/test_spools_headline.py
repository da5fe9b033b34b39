"""``labrun spools`` (and ``labrun compare A B``) headline a spool by its best recent fit, not
by whatever was fitted last: a newer power-only fit (no U, or with a D given on the spool
record) must not displace an older joint fit whose gamma claims a U and whose D was measured,
and a newer fit that is not shown is named. Values are invented (realistic for a highly
nonlinear fibre); the rule is labrun's own (docs/design.md, ``labrun spools --help``).
"""

from __future__ import annotations

import json

from labrun.cli import main
from labrun.spoolfits import GIVEN_SOURCE, FitRecord, ParameterRecord, store_fit
from labrun.store import open_store

LABEL = "HNLF-Q08"


def _gamma(value: float, u95: float | None, extra: dict) -> ParameterRecord:
    return ParameterRecord(value=value, stderr=None if u95 is None else u95 / 2, u95=u95,
                           unit="1/(W km)", model="test", n_points=25, residual_rms=0.0,
                           extra=extra)


def _store(db: str, kind: str) -> int:
    """A stored fit of LABEL: 'joint' (gamma with U, D measured), 'given' (gamma with U from a
    D on the spool record, no D fitted), 'no_u' (gamma claiming no U)."""
    params = {"joint": {"gamma": _gamma(10.9, 0.09, {"u_combined": 0.045}),
                        "dispersion": ParameterRecord(-0.31, 0.002, 0.004, "ps/(nm km)", "test",
                                                      30, 0.0, {"u_combined": 0.002,
                                                                "sign_determined": True})},
              "given": {"gamma": _gamma(10.7, 0.4, {"u_combined": 0.2,
                                                    "dispersion_source": GIVEN_SOURCE,
                                                    "dispersion_used_ps_per_nm_km": -0.3,
                                                    "dispersion_used_u_ps_per_nm_km": 0.1})},
              "no_u": {"gamma": _gamma(8.1, None, {"no_u_reason": "dispersion unknown: x"})}}
    store = open_store(db)
    try:
        spool_id = store.spool_id(LABEL, length_km=1.0, loss_db_per_km=0.9)
        return store_fit(store, spool_id, FitRecord(
            spool=LABEL, run_ids=[1], parameters=params[kind],
            spool_snapshot={"length_km": 1.0, "loss_db_per_km": 0.9}))
    finally:
        store.close()


def _row(db: str, capsys) -> dict:
    assert main(["spools", "--db", db, "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)["spools"]
    return row


def test_a_newer_power_only_fit_does_not_displace_a_joint_fit(tmp_path, capsys):
    db = str(tmp_path / "s.db")
    ids = [_store(db, k) for k in ("joint", "given", "no_u")]
    row = _row(db, capsys)
    assert row["headline_fit"] == ids[0] and row["latest_fit"] == ids[2]  # both kept, named
    assert row["gamma_per_w_per_km"]["value"] == 10.9
    assert row["gamma_per_w_per_km"]["fit_id"] == ids[0]
    assert row["dispersion_ps_per_nm_km"]["value"] == -0.31
    assert [n["fit_id"] for n in row["newer_fits_not_shown"]] == ids[1:]
    assert row["newer_fits_not_shown"][1]["why"] == "without U"
    assert main(["spools", "--db", db]) == 0
    text = capsys.readouterr().out
    assert f"newer fit {ids[1]} with a given D" in text
    assert f"fit {ids[2]} without U not shown" in text and f"labrun compare {LABEL}" in text
    assert "10.9 (U k=2 0.09)" in text


def test_a_given_d_fit_outranks_a_newer_fit_without_u(tmp_path, capsys):
    db = str(tmp_path / "g.db")
    ids = [_store(db, k) for k in ("given", "no_u")]
    row = _row(db, capsys)
    assert row["headline_fit"] == ids[0] and row["gamma_per_w_per_km"]["value"] == 10.7
    assert row["newer_fits_not_shown"] == [{"fit_id": ids[1], "why": "without U"}]
    assert main(["spools", "--db", db]) == 0  # the D column: the D that fit used, and whence
    assert "-0.3 (given, u 0.1)" in capsys.readouterr().out


def test_the_newest_comparable_fit_is_the_headline(tmp_path, capsys):
    """Two joint fits: the newer one is shown and nothing is said about the older."""
    db = str(tmp_path / "n.db")
    ids = [_store(db, "joint"), _store(db, "joint")]
    row = _row(db, capsys)
    assert row["headline_fit"] == row["latest_fit"] == ids[1]
    assert row["newer_fits_not_shown"] == []


def test_a_spool_with_only_a_fit_without_u_shows_it_marked(tmp_path, capsys):
    db = str(tmp_path / "o.db")
    (fid,) = [_store(db, "no_u")]
    row = _row(db, capsys)
    assert row["headline_fit"] == fid and row["gamma_per_w_per_km"]["comparable"] is False


def test_compare_side_by_side_uses_the_same_headline(tmp_path, capsys):
    db = str(tmp_path / "c.db")
    ids = [_store(db, k) for k in ("joint", "no_u")]
    assert main(["compare", LABEL, LABEL + "X", "--db", db]) == 2  # unknown spool: exit 2
    capsys.readouterr()
    store = open_store(db)
    try:
        store.spool_id(LABEL + "X", length_km=1.0, loss_db_per_km=0.9)
    finally:
        store.close()
    assert main(["compare", LABEL, LABEL + "X", "--db", db, "--json"]) == 0
    sp = json.loads(capsys.readouterr().out)["spools"][0]
    assert sp["fit_id"] == ids[0] and sp["gamma_per_w_per_km"]["value"] == 10.9
    assert sp["newer_fits_not_shown"] == [{"fit_id": ids[1], "why": "without U"}]
    assert main(["compare", LABEL, LABEL + "X", "--db", db]) == 0
    assert f"newer fit {ids[1]} without U not shown" in capsys.readouterr().out


def test_spools_lists_the_gamma_fits_of_compare():
    """labrun spools writes compare.GAMMA out (its --help must not import the store): the same
    names in the same order of preference."""
    from labrun.cli.spools import HEADLINE
    from labrun.compare import GAMMA

    assert dict(HEADLINE)["gamma_per_w_per_km"] == GAMMA
