"""``labrun compare`` labels each expanded uncertainty by what it is, as ``labrun fit`` does.

A stored parameter with a GUM budget (u_combined in its extras) carries U = 2 u_c (JCGM
100:2008, 6.2.1 with k = 2); one without carries a Student-t 95 % half-width of its statistical
standard error. The screen must say which, not print a bare "+/- U95".
"""

from __future__ import annotations

from labrun.cli.compare import _value
from labrun.compare import headline_values
from labrun.spoolfits import GUM_K2, STUDENT_T95, FitRecord, ParameterRecord

SPOOL = {"length_km": 1.0, "loss_db_per_km": 0.9}  # invented spool (as default-scenario.toml)


def _record(extra: dict) -> FitRecord:
    p = ParameterRecord(value=11.0, stderr=0.1, u95=0.2, unit="1/(W km)", model="test",
                        n_points=10, residual_rms=0.0, extra=extra)
    return FitRecord(spool="HNLF-A17", run_ids=[1], parameters={"gamma": p})


def test_gum_and_student_t_expanded_uncertainties_are_labelled() -> None:
    gum = headline_values(_record({"u_combined": 0.1}), SPOOL)
    stat = headline_values(_record({}), SPOOL)
    assert gum["gamma_per_w_per_km"]["u95_kind"] == GUM_K2
    assert stat["gamma_per_w_per_km"]["u95_kind"] == STUDENT_T95
    assert _value(gum["gamma_per_w_per_km"]) == "11 (U k=2 0.2) 1/(W km)"
    assert _value(stat["gamma_per_w_per_km"]) == "11 (U95 t 0.2) 1/(W km)"
    # the efficiency's U is gamma's scaled, so it is of gamma's kind
    assert "(U k=2 " in _value(gum["first_sideband_efficiency_db"])
    assert "(U95 t " in _value(stat["first_sideband_efficiency_db"])
