"""``labrun fit`` says the sign-of-D note once, under dispersion; the slope's line says only that
its sign follows D's, and the JSON keeps both results' warnings whole.

Data: first sidebands from Inoue's small-signal efficiency (Inoue, J. Lightwave Technol. 10,
1553 (1992), through labrun.physics.fwm as tests/test_fits.py uses it) at three pump
wavelengths, fitted by labrun.fits.fit_run, which fits D and its slope jointly and puts the same
sign note in both results.
"""

from __future__ import annotations

from test_fits import _fwm_points

from labrun.cli.fit import SLOPE_FOLLOWS_D, fit_text
from labrun.fits import fit_run
from labrun.physics.fibre import Fibre
from labrun.spoolfits import FitRecord, from_fit


def _record(d: float) -> FitRecord:
    """labrun fit's record of a D and slope fit of an invented 4 km spool with D = ``d``."""
    fib = Fibre(length_km=4.0, loss_db_per_km=0.5, gamma_per_w_per_km=2.0,
                dispersion_ps_per_nm_km=d, dispersion_slope_ps_per_nm2_km=0.07,
                reference_wavelength_nm=1550.0)
    pts = _fwm_points(fib, 0, wavelengths=(1535.0, 1550.0, 1565.0))
    res = fit_run(pts, fib.length_km, fib.loss_db_per_km, reference_wavelength_nm=1550.0)
    return FitRecord(spool="HNLF-A17", run_ids=[1],
                     parameters={k: from_fit(r) for k, r in res.items()})


def test_sign_note_printed_once_under_dispersion() -> None:
    record = _record(-4.0)  # normal dispersion: the sign is not measured at these powers
    note = next(w for w in record.parameters["dispersion"].extra["warnings"]
                if "sign of D" in w)
    # the fit puts the note in both results (the JSON keeps it in both)
    assert note in record.parameters["dispersion_slope"].to_dict()["warnings"]
    text = fit_text(record)
    assert text.count(note) == 1
    lines = text.splitlines()
    at_d = next(i for i, x in enumerate(lines) if x.split()[:1] == ["dispersion"])
    at_s = next(i for i, x in enumerate(lines) if x.split()[:1] == ["dispersion_slope"])
    assert at_d < lines.index(f"    ! {note}") < at_s  # under dispersion
    assert f"    ! {SLOPE_FOLLOWS_D}" in lines[at_s + 1:]
    assert text.count(SLOPE_FOLLOWS_D) == 1
