"""The fits use the tone spacing the OSA measured, not the set one.

A tunable laser's wavelength is off by a pm or so (the virtual lab draws 1 pm per laser with
realism on); two lasers off in opposite directions move the real spacing by about 0.2 GHz
(d f = c d lambda / lambda^2). On a normal-dispersion spool the phase-matching efficiency has
nulls inside a 20-200 GHz spacing sweep, and near a null a 0.2 % spacing error moves the
first sideband by dB: the exact-model fit on the set spacings was +0.4 % off in gamma and
-0.3 % in D with a 0.04-0.08 dB residual (found on an unknown spool of the review: +0.5 % of
its gamma error). The reduction measures the spacing of the two tones on the trace
(``Point.spacing_ghz``); ``labrun fit`` passes it as ``measured_spacing_ghz``.

The "measured" lines come from tests/_rk4ip.py (fourth-order Runge-Kutta in the interaction
picture, Hult, J. Lightwave Technol. 25(12), 3770 (2007)), which shares no code with the fit's
split-step forward model; the real spacing from the set wavelengths moved by the lasers'
errors, with f = c / lambda (c = 299792.458 nm THz, exact by the SI definition of the metre).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from _engine_support import OPERATOR, plan_text, scenario
from _rk4ip_rows import rk4ip_lines

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.exactfit import fit_spool
from labrun.fits import SET_SPACING, fit_run, points_table
from labrun.physics.fibre import Fibre
from labrun.plan import parse_plan
from labrun.queries import run_points
from labrun.spoolfits import fit_runs
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab

C_NM_THZ = 299792.458  # speed of light, nm THz (SI definition of the metre)
# Invented normal-dispersion spool with efficiency nulls inside the sweep (values in the ranges
# commonly quoted for highly nonlinear fibre, from memory).
FIB = Fibre(2.0, 0.3, 10.0, -5.0, 0.05, 1550.0)
DLAM_A, DLAM_B = -0.5e-3, 1.2e-3  # nm: the lasers' wavelength errors (about 1 pm each)
SPOOL = "\n[spool]\nlength_km = 1.0\nloss_db_per_km = 0.9\n"  # HNLF-A17 of the default scenario


def _row(p_dbm: float, set_ghz: float, lam: float) -> dict:
    """One point: equal tones set at lam and lam's frequency + set_ghz, lines from RK4IP at the
    real wavelengths; ``measured_spacing_ghz`` the real spacing (what the OSA reads)."""
    lam_a = lam + DLAM_A
    lam_b = C_NM_THZ / (C_NM_THZ / lam + set_ghz * 1e-3) + DLAM_B
    real_ghz = (C_NM_THZ / lam_b - C_NM_THZ / lam_a) * 1e3
    return {"power_a_dbm": p_dbm, "power_b_dbm": p_dbm, "spacing_ghz": set_ghz,
            "wavelength_a_nm": lam, "measured_spacing_ghz": real_ghz,
            **rk4ip_lines(FIB, p_dbm, real_ghz, lam_a)}


@pytest.fixture(scope="module")
def runs() -> list[list[dict]]:
    power = [_row(p, 100.0, 1550.0) for p in np.arange(-2.0, 6.1, 2.0)]
    spacing = [_row(5.0, s, lam) for lam in (1545.0, 1550.0, 1555.0)
               for s in np.arange(20.0, 201.0, 30.0)]
    return [power, spacing]


def test_exact_fit_uses_the_measured_spacing(runs) -> None:
    real = runs[0][0]["measured_spacing_ghz"]
    assert real == pytest.approx(100.0 - 0.212, abs=0.002)  # 1.7 pm at 1550 nm: 0.21 GHz
    res = fit_spool(runs, FIB.length_km, FIB.loss_db_per_km)
    assert res["gamma"].value == pytest.approx(10.0, rel=1e-3)
    assert res["dispersion"].value == pytest.approx(-5.0, rel=1e-3)
    assert res["dispersion_slope"].value == pytest.approx(0.05, rel=0.01)
    assert res["gamma"].residual_rms < 0.01  # dB
    # On the set spacings alone the same data fit visibly worse: the effect is real here.
    plain = [[{k: v for k, v in r.items() if k != "measured_spacing_ghz"} for r in run]
             for run in runs]
    off = fit_spool(plain, FIB.length_km, FIB.loss_db_per_km)
    assert abs(off["gamma"].value / 10.0 - 1) > 2e-3
    assert off["gamma"].residual_rms > 0.02


def test_one_set_spacing_stays_one_spacing(runs) -> None:
    # A power sweep at one set spacing whose measured spacing differs by 0.1-0.4 MHz from point
    # to point (the OSA's reading): still one spacing, so no dispersion fit (which needs >= 3
    # spacings; on these readings it fitted D = 17 and gamma 52 for a spool of -0.3 and 7.5 on
    # the virtual lab) and one group of the power-law slopes (3 dB/dB for a first sideband,
    # Inoue 1992: P_F goes as P_a P_b^2).
    power = [dict(r, measured_spacing_ghz=r["measured_spacing_ghz"] + 1e-4 * i)
             for i, r in enumerate(runs[0])]
    res = fit_run(power, FIB.length_km, FIB.loss_db_per_km)
    assert "dispersion" not in res or not math.isfinite(res["dispersion"].value)
    assert res["slope_high_1"].n_points == len(power)
    assert res["slope_high_1"].value == pytest.approx(3.0, abs=0.1)


def test_points_table_keeps_the_set_spacing_and_guards_the_measured_one() -> None:
    t = points_table([
        {"power_a_dbm": 0.0, "power_b_dbm": 0.0, "spacing_ghz": 100.0,
         "measured_spacing_ghz": 99.8},
        {"power_a_dbm": 0.0, "power_b_dbm": 0.0, "spacing_ghz": 100.0,
         "measured_spacing_ghz": None},  # no reading: the set spacing
        {"power_a_dbm": 0.0, "power_b_dbm": 0.0, "spacing_ghz": 100.0,
         "measured_spacing_ghz": 50.0},  # a reading 50 % off is not this point's spacing
    ])
    assert t["spacing_ghz"].tolist() == [99.8, 100.0, 100.0]
    assert t[SET_SPACING].tolist() == [100.0, 100.0, 100.0]
    assert "measured_spacing_ghz" not in t
    again = points_table(t)  # a table passed again is left as it is (budget refits move it)
    assert again["spacing_ghz"].tolist() == [99.8, 100.0, 100.0]


def test_labrun_fit_gets_the_spacing_the_osa_measured(tmp_path) -> None:
    # Laser b 2 pm long of its setting: the real spacing is 0.25 GHz short of the set 100 GHz.
    store = open_store(str(tmp_path / "runs.db"))
    try:
        with VirtualLab(scenario(), time_scale=0.0, seed=3) as lab:
            lab.state.lasers["laser_b"].wavelength_offset_nm = 2e-3
            bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
            text = plan_text([0.0, 2.0], extra=SPOOL)
            plan = parse_plan(text.encode(), "spacing.toml")
            out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True,
                           ack_safety=True, progress=False)
        table = run_points(store, out.run_id, include_reference=False, measured_spacing=True)
        record = fit_runs(store, [out.run_id], save=False)
    finally:
        store.close()
    # labrun fit's exact results were computed on the measured spacing of both points
    assert record.parameters["gamma"].extra["n_spacing_measured"] == 2
    f_a = C_NM_THZ / 1550.0
    real = (C_NM_THZ / (C_NM_THZ / (f_a + 0.1) + 2e-3) - f_a) * 1e3
    assert real == pytest.approx(99.75, abs=0.01)
    assert table["spacing_ghz"].tolist() == [100.0, 100.0]
    assert table["measured_spacing_ghz"].to_numpy() == pytest.approx(real, abs=0.01)
