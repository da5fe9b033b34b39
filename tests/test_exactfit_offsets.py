"""Launched-power offsets of each arm as nuisance parameters of the exact-model spool fit.

A seeded virtual-lab power sweep whose laser a really launches 0.4 dB more than recorded (the
lab's per-laser realism offset, set by hand here; laser b's at 0) and whose bench states a
launched-power calibration uncertainty of 0.2 dB per arm. The offsets' difference is measured
by the output tone ratio; their sum cannot be told apart from gamma (the NLSE is unchanged
under P -> c P, gamma -> gamma / c), so the prior holds it at 0 and the fitted offsets are
+-half the truth's difference (a +0.2 dB, b -0.2 dB), each within its uncertainty of the
truth. The expected numbers are worked from the weighted least-squares solution of the two
prior rows and the tone-ratio row (a linear Gaussian problem: posterior mean and covariance in
closed form, checked here by hand). Those checks fit without the input-tap power meter
(``tap_power=False``); with it, the measured total launched power fixes the common part too
(last tests: both offsets and gamma recovered, within the tap-limited uncertainty).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from _engine_support import OPERATOR, plan_text, scenario

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.exactfit import OFFSET_SOURCE, OFFSET_SOURCE_TAP, fit_power_offsets, fit_spool
from labrun.plan import parse_plan
from labrun.queries import run_points
from labrun.store import open_store
from labrun.uncertainty import Uncertainties
from labrun.vlab.lab import VirtualLab

U_ARM = 0.2  # dB, the bench's stated launched-power calibration uncertainty per arm
U_TAP = 0.02  # dB, the tap power meter's calibration (the lab draws it, the bench states it)
OFFSET_A = 0.4  # dB, what laser a really launches above its setting (2 u: a plausible draw)
GAMMA, LENGTH, LOSS, D, S = 11.0, 1.0, 0.9, -0.3, 0.019  # HNLF-A17 of default-scenario.toml


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    """Points of a 7-point equal-tone power sweep with laser a 0.4 dB high, and the bench."""
    folder = tmp_path_factory.mktemp("offsets")
    sc = scenario()
    sc["realism"] = {"enabled": True, "laser_power_offset_db": U_ARM, "osa_noise_db": 0.05,
                     "power_meter_offset_db": U_TAP, "power_meter_noise_db": 0.01}
    store = open_store(str(folder / "runs.db"))
    try:
        with VirtualLab(sc, time_scale=0.0, seed=11) as lab:
            lab.state.lasers["laser_a"].power_offset_db = OFFSET_A
            lab.state.lasers["laser_b"].power_offset_db = 0.0
            bench = load_bench(lab.write_bench(folder / "bench.toml"))
            plan = parse_plan(
                plan_text([-2.0, -1.0, 0.0, 1.0, 2.0, 3.0, 4.0]).encode(), "offsets.toml")
            out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True,
                           ack_safety=True, progress=False)
            points = run_points(store, out.run_id, include_reference=False)
    finally:
        store.close()
    return points, bench


def _fit(sweep, **kw):
    points, bench = sweep
    unc = Uncertainties.from_calibration(bench.calibration, length_rel=0.0, loss_db_per_km=0.0)
    return fit_spool([points], LENGTH, LOSS, dispersion_ps_per_nm_km=D, slope_ps_per_nm2_km=S,
                     uncertainties=unc, **kw)


def test_bench_states_the_calibration_uncertainty(sweep) -> None:
    _, bench = sweep
    assert bench.calibration.power_a_u_db == U_ARM and bench.calibration.power_b_u_db == U_ARM
    assert bench.calibration.tap_power_u_db == U_TAP  # the meter's drawn offset, stated


def test_offset_on_arm_a_is_recovered_within_its_uncertainty(sweep) -> None:
    res = _fit(sweep, tap_power=False)
    a, b = res["power_offset_a"], res["power_offset_b"]
    # Difference measured by the tone ratio (OSA noise 0.05 dB per line, 7 points).
    assert b.value - a.value == pytest.approx(-OFFSET_A, abs=0.05)
    # The moved powers reproduce the measured output tone ratio (fails when an offset is
    # applied to the wrong arm: 0.8 dB).
    assert a.residual_rms < 0.05
    # Sum held by the prior: each arm gets half of the difference, posterior u = U_ARM/sqrt(2)
    # (equal priors; the tone-ratio row's own u adds a little).
    assert a.value == pytest.approx(OFFSET_A / 2, abs=0.03)
    assert a.stderr == pytest.approx(U_ARM / math.sqrt(2), rel=0.05)
    assert abs(a.value - OFFSET_A) <= a.u95  # the truth inside U (k = 2) ...
    assert abs(b.value - 0.0) <= b.u95
    assert a.extra["correlation_ab"] > 0.9  # ... and the two strongly correlated (sum free)
    # gamma stays within its expanded uncertainty of the truth (the unrecovered sum of the
    # offsets, 0.4 dB, i.e. a common 0.2 dB on each arm, moves it by 10^(0.4/20) - 1 =
    # 10^(0.2/10) - 1 = +4.7 %, as the formula below) ...
    g = res["gamma"]
    assert abs(g.value - GAMMA) <= g.u95
    # ... and its budget carries the offsets as one row, sqrt(c^T V c): gamma goes as
    # 10^(-(offset a + offset b)/20), var(sum) = V_aa + V_bb + 2 V_ab, so the row is
    # gamma ln(10)/20 sqrt(var(sum)) (GUM 5.2.2, correlated inputs).
    rows = {r["source"]: r["contribution"] for r in g.budget}
    assert "launched power, arm a" not in rows and "launched power, arm b" not in rows
    var_sum = a.stderr**2 + b.stderr**2 + 2 * a.extra["correlation_ab"] * a.stderr * b.stderr
    assert rows[OFFSET_SOURCE] == pytest.approx(
        g.value * math.log(10) / 20 * math.sqrt(var_sum), rel=0.05)
    assert g.u_combined == pytest.approx(
        math.sqrt(sum(c * c for c in rows.values() if math.isfinite(c))), rel=1e-9)


def test_offsets_without_the_prior_are_not_determined() -> None:
    # Mutation guard: the common offset is fixed by the prior rows only; without them the
    # normal matrix of the offsets is singular.
    t = {"tone_low_0": np.array([-3.0, -2.0]), "tone_high_0": np.array([-3.4, -2.4]),
         "power_a_dbm": np.array([0.0, 1.0]), "power_b_dbm": np.array([0.0, 1.0])}
    fine = fit_power_offsets(t, np.zeros(2), U_ARM, U_ARM, 0.01)
    assert fine.value[1] - fine.value[0] == pytest.approx(-0.4, abs=1e-3)
    with pytest.raises(np.linalg.LinAlgError):
        fit_power_offsets(t, np.zeros(2), U_ARM, U_ARM, 0.01, prior=False)


def test_the_tap_power_meter_fixes_the_common_offset_and_gamma(sweep) -> None:
    # The lab's common offset here is 0.2 dB per arm (0.4 dB on a, 0 on b), ten times the tap
    # meter's calibration (U_TAP). With the tap row both offsets come back, and gamma with
    # them, within the tap-limited uncertainty; without it gamma is 10^(0.2/10) - 1 = +4.7 %
    # off (the NLSE's scaling P -> c P, gamma -> gamma / c; Agrawal, Nonlinear Fiber Optics).
    res = _fit(sweep)
    a, b = res["power_offset_a"], res["power_offset_b"]
    assert a.extra["tap_used"] and a.extra["tap_points"] == 7
    assert abs(a.value - OFFSET_A) <= a.u95 and abs(b.value - 0.0) <= b.u95
    assert a.stderr < 1.5 * U_TAP  # the tap's calibration, not the 0.14 dB of the prior
    g = res["gamma"]
    assert abs(g.value - GAMMA) <= g.u95
    assert abs(g.value / GAMMA - 1) < 0.01  # the 1 %
    assert g.u95 / GAMMA < 0.015  # tap-limited: 2 x ln(10)/10 x ~0.02 dB, about 0.9 %
    rows = {r["source"] for r in g.budget}
    assert OFFSET_SOURCE_TAP in rows and OFFSET_SOURCE not in rows
    without = _fit(sweep, tap_power=False)
    assert without["gamma"].value / GAMMA - 1 == pytest.approx(10 ** (0.2 / 10) - 1, abs=0.012)
    assert not without["power_offset_a"].extra["tap_used"]


def test_without_offsets_the_per_arm_rows_stay(sweep) -> None:
    res = _fit(sweep, power_offsets=False)
    assert "power_offset_a" not in res
    rows = {r["source"] for r in res["gamma"].budget}
    assert {"launched power, arm a", "launched power, arm b"} <= rows
