"""A stored fit that claims no U (dispersion unknown) between two comparable fits must not hide
a change: each comparable value is checked against the previous comparable value of the same
quantity, in ``labrun compare LABEL`` (text, JSON, plot) and ``labrun report --spool``.

Comparison of two results by their expanded uncertainties combined, sqrt(U1^2 + U2^2) (JCGM
100:2008 with k = 2; the En-number criterion |En| > 1 of proficiency testing, from memory).
Values are invented (a spool re-fitted after a repair).
"""

from __future__ import annotations

import json

import pytest

from labrun.cli import main
from labrun.spoolfits import FitRecord, ParameterRecord, store_fit
from labrun.store import open_store

LABEL = "HNLF-R22"


def _store(db: str, gamma: float, u95: float | None, *, no_u: bool = False) -> int:
    """A stored fit of LABEL with gamma and its U (None and no_u_reason: a fit without U)."""
    extra = {"u_combined": u95 / 2} if u95 else {}
    if no_u:
        extra = {"no_u_reason": "dispersion unknown: a power run alone"}
    store = open_store(db)
    try:
        spool_id = store.spool_id(LABEL, length_km=1.0, loss_db_per_km=0.9)
        p = ParameterRecord(value=gamma, stderr=None if no_u else u95 / 2, u95=u95,
                            unit="1/(W km)", model="test", n_points=10, residual_rms=0.0,
                            extra=extra)
        return store_fit(store, spool_id, FitRecord(
            spool=LABEL, run_ids=[1], parameters={"gamma": p},
            spool_snapshot={"length_km": 1.0, "loss_db_per_km": 0.9}))
    finally:
        store.close()


@pytest.fixture()
def db(tmp_path):
    path = str(tmp_path / "h.db")
    # fit 1: 5.387 (U 0.10); fit 2: no U; fit 3: 17.24 (U 5.4): |17.24 - 5.387| = 11.85 >
    # sqrt(0.10^2 + 5.4^2) = 5.40, a change that fit 2 must not hide.
    ids = [_store(path, 5.387, 0.10), _store(path, 9.8, None, no_u=True),
           _store(path, 17.24, 5.4)]
    assert ids == [1, 2, 3]
    return path


def test_a_fit_without_u_between_two_comparable_fits_does_not_hide_a_change(db, capsys):
    assert main(["compare", LABEL, "--db", db, "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert [h["changed"] for h in rep["history"]] == [[], [], ["gamma_per_w_per_km"]]
    assert rep["history"][2]["compared_with"] == {"gamma_per_w_per_km": 1}
    assert rep["history"][1]["compared_with"] == {}  # no U: compared with nothing
    assert rep["changed"] is True
    assert main(["compare", LABEL, "--db", db]) == 0
    text = capsys.readouterr().out
    (line3,) = [ln for ln in text.splitlines() if ln.strip().startswith("fit    3")]
    assert "CHANGED: gamma_per_w_per_km (vs fit 1)" in line3


def test_within_u_of_the_last_comparable_fit_is_not_a_change(tmp_path, capsys):
    """The skipped fit's value is not used: 5.45 is within sqrt(0.1^2 + 0.1^2) = 0.14 of 5.387
    (fit 1), though far from fit 2's 9.8."""
    path = str(tmp_path / "k.db")
    _store(path, 5.387, 0.10)
    _store(path, 9.8, None, no_u=True)
    _store(path, 5.45, 0.10)
    assert main(["compare", LABEL, "--db", path, "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert [h["changed"] for h in rep["history"]] == [[], [], []]


def test_the_history_plot_marks_the_change(db, tmp_path):
    """plot_history's red ring is drawn on fit 3 (the third position) and the plot is written."""
    from labrun.compare import spool_history
    from labrun.plots import changed_marks, plot_history

    store = open_store(db)
    try:
        history = spool_history(store, LABEL)
    finally:
        store.close()
    assert changed_marks(history, "gamma_per_w_per_km") == [2]
    assert plot_history(tmp_path / "h.png", history).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_the_spool_report_names_the_change(db, tmp_path, capsys):
    out = tmp_path / "spool.html"
    assert main(["report", "--spool", LABEL, "--db", db, "--out", str(out)]) == 0
    page = out.read_text()
    assert "fit 3: gamma_per_w_per_km changed" in page and "(vs fit 1)" in page
    assert "no change beyond" not in page
