"""``labrun compare`` labels each expanded uncertainty by what it is, as ``labrun fit`` does.

A stored parameter with a GUM budget (u_combined in its extras) carries U = 2 u_c (JCGM
100:2008, 6.2.1 with k = 2); one without carries a Student-t 95 % half-width of its statistical
standard error. The screen must say which, not print a bare "+/- U95".
"""

from __future__ import annotations

from labrun.cli.compare import _value
from labrun.cli.fit import fit_text
from labrun.cli.spools import _short, headline
from labrun.compare import changed, headline_values
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


def _dispersion_record(d: float, s: float, signed: bool) -> FitRecord:
    """A fit with gamma, D and slope as labrun.fits.fit_dispersion leaves them: the extra
    ``sign_determined`` says whether the SPM/XPM mismatch fixed the sign of D."""
    extra = {"u_combined": 0.025, "sign_determined": signed}
    params = {
        "gamma": ParameterRecord(11.0, 0.1, 0.2, "1/(W km)", "test", 10, 0.0,
                                 {"u_combined": 0.1}),
        "dispersion": ParameterRecord(d, 0.001, 0.05, "ps/(nm km)", "test", 10, 0.0, extra),
        "dispersion_slope": ParameterRecord(s, 1e-4, 6e-4, "ps/(nm^2 km)", "test", 10, 0.0,
                                            dict(extra))}
    return FitRecord(spool="HNLF-A17", run_ids=[1, 2], parameters=params)


def _fit_shows(record: FitRecord, name: str) -> str:
    """The value ``labrun fit`` prints for one parameter (its table's second column)."""
    line = next(x for x in fit_text(record).splitlines() if x.split()[:1] == [name])
    return line.split()[1]


def test_compare_and_spools_show_signed_d_where_the_fit_determined_its_sign() -> None:
    record = _dispersion_record(-4.6, 0.0595, signed=True)
    rep = headline_values(record, SPOOL)
    d = rep["dispersion_ps_per_nm_km"]
    assert d["value"] == -4.6 and d["sign_determined"] is True
    assert _value(d, "dispersion_ps_per_nm_km") == "-4.6 (U k=2 0.05) ps/(nm km)"
    assert _value(rep["dispersion_slope_ps_per_nm2_km"], "dispersion_slope_ps_per_nm2_km") == \
        "0.0595 (U k=2 0.0006) ps/(nm^2 km)"
    assert float(_fit_shows(record, "dispersion")) == d["value"]  # what labrun fit shows
    row = headline(record)["dispersion_ps_per_nm_km"]
    assert row["value"] == -4.6 and row["sign_determined"] is True
    assert _short(row) == "-4.6 (U k=2 0.05)"


def test_compare_and_spools_label_d_as_a_magnitude_where_its_sign_is_not_determined() -> None:
    record = _dispersion_record(4.6, 0.0595, signed=False)
    rep = headline_values(record, SPOOL)
    d = rep["dispersion_ps_per_nm_km"]
    assert d["value"] == 4.6 and d["sign_determined"] is False
    assert _value(d, "dispersion_ps_per_nm_km") == "|D| 4.6 (U k=2 0.05) ps/(nm km)"
    assert _value(rep["dispersion_slope_ps_per_nm2_km"], "dispersion_slope_ps_per_nm2_km") == \
        "d|D|/dlambda 0.0595 (U k=2 0.0006) ps/(nm^2 km)"
    assert float(_fit_shows(record, "dispersion")) == d["value"]
    assert _short(headline(record)["dispersion_ps_per_nm_km"]) == "|D| 4.6 (U k=2 0.05)"
    # a stored negative value whose sign was not determined is still shown as a magnitude
    neg = headline_values(_dispersion_record(-4.6, 0.0595, signed=False), SPOOL)
    assert neg["dispersion_ps_per_nm_km"]["value"] == 4.6
    assert headline(_dispersion_record(-4.6, 0.0595, signed=False))[
        "dispersion_ps_per_nm_km"]["value"] == 4.6


def test_history_compares_magnitudes_when_one_fit_did_not_determine_the_sign() -> None:
    signed = headline_values(_dispersion_record(-4.6, 0.0595, signed=True), SPOOL)
    unsigned = headline_values(_dispersion_record(4.62, 0.0595, signed=False), SPOOL)
    key = "dispersion_ps_per_nm_km"
    assert not changed(signed[key], unsigned[key])  # |-4.6| and 4.62 agree within U
    moved = headline_values(_dispersion_record(4.9, 0.0595, signed=False), SPOOL)
    assert changed(signed[key], moved[key])  # 0.3 > sqrt(0.05^2 + 0.05^2)
    flipped = headline_values(_dispersion_record(4.6, 0.0595, signed=True), SPOOL)
    assert changed(signed[key], flipped[key])  # both signed, opposite signs: a change
