"""The HTML report and the plots label an expanded uncertainty as ``labrun fit`` does: 'U k=2'
for the GUM budget's U = 2 u_c (JCGM 100:2008, 6.2.1 with k = 2), 'U95 t' for a Student-t 95 %
half-width of the statistical error alone (GUM G.3); never a bare 'U95' that could be either.
Values are invented.
"""

from __future__ import annotations

import re

from labrun.cli import main
from labrun.plots import u_kinds
from labrun.spoolfits import FitRecord, ParameterRecord, store_fit
from labrun.store import open_store

LABEL = "SMF-K40"
BARE = re.compile(r"U95(?! t)")  # 'U95' not followed by ' t'


def _store(db: str) -> None:
    params = {"gamma": ParameterRecord(1.31, 0.02, 0.04, "1/(W km)", "test", 25, 0.0,
                                       {"u_combined": 0.02}),
              "slope_high_1": ParameterRecord(3.01, 0.004, 0.0083, "dB/dB", "linear in dB",
                                              25, 0.0, {})}
    store = open_store(db)
    try:
        spool_id = store.spool_id(LABEL, length_km=10.0, loss_db_per_km=0.2)
        store_fit(store, spool_id, FitRecord(spool=LABEL, run_ids=[1], parameters=params,
                                             spool_snapshot={"length_km": 10.0,
                                                             "loss_db_per_km": 0.2}))
    finally:
        store.close()


def test_the_spool_report_labels_u_as_labrun_fit_does(tmp_path, capsys):
    db, out = str(tmp_path / "r.db"), tmp_path / "r.html"
    _store(db)
    assert main(["report", "--spool", LABEL, "--db", db, "--out", str(out)]) == 0
    page = out.read_text()
    assert "U k=2 0.04" in page  # gamma: GUM budget
    assert "U95 t 0.0083" in page  # slope: Student t, no budget
    assert not BARE.search(page), BARE.search(page)


def test_plot_error_bars_are_labelled_by_kind():
    gum = {"value": 1.0, "u95": 0.1, "u95_kind": "GUM expanded uncertainty U = 2 u_c (k = 2)"}
    stat = {"value": 1.0, "u95": 0.1, "u95_kind": "Student t 95 % half-width"}
    no_u = {"value": 1.0, "u95": None, "comparable": False}
    assert u_kinds([gum, no_u]) == "U k=2"
    assert u_kinds([stat]) == "U95 t"
    assert u_kinds([gum, stat, None]) == "U k=2 / U95 t"
    assert u_kinds([no_u]) == "-"
