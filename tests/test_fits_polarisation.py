"""Polarisation in the fits: copolar fraction from pol_stokes and pol_angles_deg, visibility,
extinction, co-polar-corrected gamma; and the shipped polarisation sweep end to end."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy.special import jv

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.fits import PolFrame, fit_run
from labrun.lines import grid_ks, line_id
from labrun.plan import load_plan
from labrun.queries import run_points
from labrun.store import open_store
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import load_scenario

KEYS = [f"{line_id(k).kind}_{line_id(k).side}_{line_id(k).order}" for k in grid_ks(2)]
# Invented spool in realistic ranges, no dispersion (the Bessel model is then exact).
LENGTH, LOSS, GAMMA = 1.0, 0.9, 11.0


def _points(thetas_deg, p_dbm: float = 4.0, angles=None) -> list[dict]:
    """Two equal tones; tone b at angle theta from tone a on the Poincare sphere (s1-s2 plane).

    Line powers straight from scipy.special.jv (Thompson and Roy 1991: P_k = T [P_a J_k(m)^2 +
    P_b J_(k-1)(m)^2]) with m = 2 gamma L_eff sqrt(P_a P_b c), c = cos^2(theta/2): the fraction
    of b along a (E. Collett, Polarized Light: the angle on the sphere is twice the angle
    between the fields). Written here, not taken from labrun.physics.
    """
    alpha = LOSS * math.log(10) / 10
    l_eff = (1 - math.exp(-alpha * LENGTH)) / alpha
    t = math.exp(-alpha * LENGTH)
    p = 10 ** (p_dbm / 10) * 1e-3
    pts = []
    for i, th in enumerate(thetas_deg):
        c = math.cos(math.radians(th) / 2) ** 2
        m = 2 * GAMMA * l_eff * math.sqrt(p * p * c)
        ks = np.array(grid_ks(2), dtype=float)
        w = t * (p * jv(ks, m) ** 2 + p * jv(ks - 1, m) ** 2)
        with np.errstate(divide="ignore"):
            dbm = 10 * np.log10(w * 1e3)
        row = {k: (float(v) if v > -150 else None) for k, v in zip(KEYS, dbm, strict=True)}
        row.update(power_a_dbm=p_dbm, power_b_dbm=p_dbm, spacing_ghz=100.0,
                   wavelength_a_nm=1550.0)
        if angles is None:
            row["pol_stokes"] = [math.cos(math.radians(th)), math.sin(math.radians(th)), 0.0]
        else:
            row["pol_angles_deg"] = list(angles[i])
        pts.append(row)
    return pts


def test_gamma_and_visibility_from_pol_stokes() -> None:
    # Every state from 0 to 165 degrees: gamma exact when each point's copolar fraction is
    # cos^2(theta/2); the ideal projection has visibility 1. A copolar fraction without its
    # factor 1/2 (1 + s_a.s_b, clipped) takes the 15-90 degree points as co-polar: gamma off
    # by percents, visibility far from 1.
    res = fit_run(_points(np.arange(0.0, 180.0, 15.0)), LENGTH, LOSS,
                  dispersion_ps_per_nm_km=0.0)
    for name in ("gamma_bessel", "gamma_small_signal"):
        assert res[name].n_points >= 7  # co-polar-corrected: not only the 0 and 15 degree points
    assert res["gamma_bessel"].value == pytest.approx(GAMMA, rel=1e-4)
    assert res["gamma_small_signal"].value == pytest.approx(GAMMA, rel=5e-3)  # small-signal cut
    assert res["pol_visibility"].value == pytest.approx(1.0, abs=1e-3)
    # extinction of the first sideband between 0 and 165 degrees: in the small-signal limit the
    # sideband follows c = cos^2(theta/2), so about 10 log10(1/cos^2(82.5 deg)) = 17.7 dB
    expected = 10 * math.log10(1 / math.cos(math.radians(82.5)) ** 2)
    assert res["pol_extinction_db"].value == pytest.approx(expected, abs=0.1)
    assert math.isfinite(res["pol_extinction_db"].stderr)
    assert any("pol_stokes" in w for w in res["gamma_bessel"].warnings)


def test_visibility_below_one_is_measured_and_corrects_gamma() -> None:
    # Sideband power following A (c + b) with b = 0.05: visibility 1/(1 + 2b) = 0.909. Built
    # by scaling the small-signal sidebands of _points by (c + b)/(c (1 + b)).
    pts = _points(np.arange(0.0, 180.0, 15.0), p_dbm=-6.0)
    b = 0.05
    for row, th in zip(pts, np.arange(0.0, 180.0, 15.0), strict=True):
        c = math.cos(math.radians(th) / 2) ** 2
        for key in ("sideband_low_1", "sideband_high_1"):
            row[key] += 10 * math.log10((c + b) / (c * (1 + b)))
    res = fit_run(pts, LENGTH, LOSS, dispersion_ps_per_nm_km=0.0)
    assert res["pol_visibility"].value == pytest.approx(1 / (1 + 2 * b), abs=2e-3)
    assert res["gamma_small_signal"].value == pytest.approx(GAMMA, rel=5e-3)


def test_paddle_angles_through_the_declared_controller() -> None:
    # Quarter-half-quarter paddles fed with +s1: the half-wave paddle at angle q (the others at
    # 0) puts the output at 4q on the s1-s2 great circle (a half-wave plate turns linear light
    # by twice its angle: Collett), so q = theta/4 reproduces the pol_stokes case above.
    thetas = np.arange(0.0, 180.0, 15.0)
    angles = [(0.0, th / 4.0, 0.0) for th in thetas]
    pts = _points(thetas, angles=angles)
    frame = PolFrame(controller="quarter-half-quarter")
    res = fit_run(pts, LENGTH, LOSS, dispersion_ps_per_nm_km=0.0, polarisation=frame)
    assert res["gamma_bessel"].value == pytest.approx(GAMMA, rel=1e-4)
    assert res["pol_visibility"].value == pytest.approx(1.0, abs=1e-3)


def test_varying_paddle_angles_without_a_controller_model_are_refused() -> None:
    thetas = np.arange(0.0, 180.0, 15.0)
    pts = _points(thetas, angles=[(0.0, th / 4.0, 0.0) for th in thetas])
    res = fit_run(pts, LENGTH, LOSS, dispersion_ps_per_nm_km=0.0)
    for name in ("gamma_bessel", "gamma_small_signal", "pol_visibility", "pol_extinction_db"):
        assert math.isnan(res[name].value)
        assert res[name].warnings[0].startswith("refused:")
        assert "[polarisation].controller" in " ".join(res[name].warnings)


def test_constant_paddle_angles_without_a_model_say_they_are_taken_as_copolar() -> None:
    pts = _points([0.0] * 6, angles=[(0.0, 0.0, 0.0)] * 6)
    for i, row in enumerate(pts):
        row["power_a_dbm"] = row["power_b_dbm"] = 4.0  # same point; small noise not needed
        row["index"] = i
    res = fit_run(pts, LENGTH, LOSS, dispersion_ps_per_nm_km=0.0)
    assert res["gamma_bessel"].value == pytest.approx(GAMMA, rel=1e-4)
    assert any("taken as co-polarised" in w for w in res["gamma_bessel"].warnings)


def test_shipped_polarisation_sweep_on_the_virtual_lab(tmp_path: Path) -> None:
    # Issue 9: run end to end, the shipped sweep must give gamma within 2 % of the scenario's
    # spool and the scalar projection's visibility (1; the virtual lab implements
    # docs/design.md §5.5), with its realism on (power and wavelength offsets, drifts, noise).
    scenario = load_scenario("default-scenario.toml")
    plan = load_plan("polarisation-sweep.toml")
    store = open_store(str(tmp_path / "pol.db"))
    try:
        with VirtualLab(scenario, time_scale=0.0, seed=3) as lab:
            bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
            out = run_plan(plan, bench, store, operator="test", unattended=True,
                           ack_safety=True, progress=False)
        assert out.status == "completed"
        table = run_points(store, out.run_id, include_reference=False)
    finally:
        store.close()
    spool = scenario.spool(plan.spool)
    res = fit_run(table, spool.length_km, spool.loss_db_per_km,
                  dispersion_ps_per_nm_km=spool.dispersion_ps_per_nm_km,
                  slope_ps_per_nm2_km=spool.dispersion_slope_ps_per_nm2_km,
                  polarisation=PolFrame.from_bench(bench.polarisation))
    for name in ("gamma_bessel", "gamma_small_signal"):
        assert res[name].value == pytest.approx(spool.gamma_per_w_per_km, rel=0.02)
    assert res["pol_visibility"].value == pytest.approx(1.0, abs=0.01)
    assert res["pol_extinction_db"].value > 15.0


@pytest.mark.parametrize(("line", "field"), [
    ('controller = "half-wave"', "polarisation.controller"),
    ("tone_a_stokes = [0.0, 0.0, 0.0]", "polarisation.tone_a_stokes"),
    ("input_stokes = [1.0, 0.0]", "polarisation.input_stokes"),
])
def test_bench_polarisation_table_is_checked(tmp_path: Path, line: str, field: str) -> None:
    from labrun.errors import InputError

    path = tmp_path / "bench.toml"
    path.write_text('[bench]\nname = "b"\nmax_total_launched_dbm = 20.0\n[polarisation]\n'
                    f'{line}\n[instruments.osa]\nresource = "TCPIP0::127.0.0.1::5025::SOCKET"\n'
                    'profile = "generic-osa"\n', encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_bench(path)
    assert field in str(err.value)


def test_pooled_runs_read_stokes_and_paddle_angles_each_where_recorded() -> None:
    # Runs pooled for one spool: one recorded pol_stokes, the other paddle angles; each point's
    # copolar fraction must come from what it recorded (angles through the declared model).
    thetas = np.arange(0.0, 180.0, 15.0)
    stokes_run = _points(thetas)
    angle_run = _points(thetas, angles=[(0.0, th / 4.0, 0.0) for th in thetas])
    frame = PolFrame(controller="quarter-half-quarter")
    res = fit_run(stokes_run + angle_run, LENGTH, LOSS, dispersion_ps_per_nm_km=0.0,
                  polarisation=frame)
    assert res["gamma_bessel"].n_points >= 14
    assert res["gamma_bessel"].value == pytest.approx(GAMMA, rel=1e-4)
