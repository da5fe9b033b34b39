"""Undetected lines as upper limits in the dispersion fit (one-sided residuals).

The detected first sidebands of a spacing sweep come from the split-step model of the lab
(labrun.physics.nlse); an undetected line carries the limit the reduction stated. A limit is a
censored observation: it may only push the model down where the model exceeds it and must do
nothing where the model lies below it (a one-sided least-squares penalty, an approximation to
the censored-data likelihood of J. Tobin, Econometrica 26, 24 (1958), which it matches only
where the model is far above the limit). Treating a limit as a measurement breaks the second.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labrun.fits import fit_dispersion, fit_run, points_table
from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w

# Invented highly nonlinear spool in realistic ranges (as in default-scenario.toml).
FIB = Fibre(1.0, 0.9, 11.0, -0.3, 0.0, 1550.0)
P_DBM = 0.0
SPACINGS = np.arange(50.0, 401.0, 50.0)
EXTRA = np.array([450.0, 500.0, 550.0])  # spacings whose first sideband is "not detected"


def _ratio(spacing: float) -> float:
    """High first sideband over tone b at the output, split-step model."""
    w = propagate_tones(FIB, 1550.0, float(spacing), float(dbm_to_w(P_DBM)),
                        float(dbm_to_w(P_DBM)), 1, rtol=1e-4).powers_w
    return float(w[-1] / w[-2])  # k = 2 over k = 1 (grid k = -1 .. 2)


@pytest.fixture(scope="module")
def sweep() -> dict[str, np.ndarray]:
    r = np.array([_ratio(s) for s in SPACINGS])
    r_extra = np.array([_ratio(s) for s in EXTRA])
    return {"r": r, "r_extra": r_extra}


def _fit(ratio: np.ndarray, spacing: np.ndarray, censored: np.ndarray | None):
    n = ratio.size
    p = np.full(n, float(dbm_to_w(P_DBM)))
    return fit_dispersion(p, p, spacing, np.full(n, 1550.0), np.full(n, "high"), ratio,
                          length_km=FIB.length_km, loss_db_per_km=FIB.loss_db_per_km,
                          reference_wavelength_nm=1550.0, censored=censored)["dispersion"]


def _model_db(res, spacing: np.ndarray) -> np.ndarray:
    """The fitted closed-form model's ratio (dB) at the given spacings."""
    from labrun.fits import first_sideband_efficiency, nl_power_w

    g = res.extra["gamma_per_w_per_km"]
    flip = not res.extra["sign_determined"] and res.extra["sign_preferred"] == "negative"
    d = -res.value if flip else res.value  # the solution's own sign
    p = float(dbm_to_w(P_DBM))
    eta = first_sideband_efficiency(spacing, np.full(spacing.size, 1550.0),
                                     np.full(spacing.size, "high"), FIB.length_km,
                                     FIB.loss_db_per_km, d, 0.0, 1550.0,
                                     g * nl_power_w(np.full(spacing.size, p),
                                                    np.full(spacing.size, p), "high"))
    from labrun.physics.units import effective_length_km

    l_eff = effective_length_km(FIB.length_km, FIB.loss_db_per_km)
    return 10 * np.log10(eta * g**2 * l_eff**2 * p * p)


def test_limits_above_the_model_change_nothing(sweep) -> None:
    base = _fit(sweep["r"], SPACINGS, None)
    assert abs(base.value) == pytest.approx(0.3, rel=0.02)  # the spool's |D|
    high = sweep["r_extra"] * 10 ** (20 / 10)  # limits 20 dB above the true lines
    res = _fit(np.r_[sweep["r"], high], np.r_[SPACINGS, EXTRA],
               np.r_[np.zeros(SPACINGS.size, bool), np.ones(EXTRA.size, bool)])
    assert res.value == pytest.approx(base.value, rel=1e-9, abs=1e-12)
    assert res.extra["n_upper_limits"] == 3 and res.extra["n_upper_limits_exceeded"] == 0
    assert res.n_points == SPACINGS.size  # a limit is not a measured point


def test_limits_below_the_model_push_it_down(sweep) -> None:
    base = _fit(sweep["r"], SPACINGS, None)
    before = _model_db(base, EXTRA)
    low = 10 ** ((before - 15.0) / 10)  # each limit 15 dB below what the model predicts
    res = _fit(np.r_[sweep["r"], low], np.r_[SPACINGS, EXTRA],
               np.r_[np.zeros(SPACINGS.size, bool), np.ones(EXTRA.size, bool)])
    after = _model_db(res, EXTRA)
    assert res.extra["n_upper_limits_exceeded"] >= 1
    # pushed down by several dB towards the limits (not all the way: the detected points
    # hold the model), never pulled up
    assert np.all(after <= before + 1e-6)
    assert float(np.max(before - after)) > 3.0


def test_points_table_carries_the_reduction_limits() -> None:
    rec = {"power_a_dbm": 0.0, "power_b_dbm": 0.0, "spacing_ghz": 100.0, "lines": [
        {"kind": "tone", "side": "low", "order": 0, "power_dbm": -1.0, "detected": True},
        {"kind": "sideband", "side": "high", "order": 1, "power_dbm": None, "detected": False,
         "upper_limit_dbm": -62.5}]}
    t = points_table([rec])
    assert math.isnan(t["sideband_high_1"][0])
    assert t["limit_sideband_high_1"][0] == -62.5


def test_fit_run_uses_limits_of_undetected_first_sidebands(sweep) -> None:
    p = P_DBM
    rows = [{"power_a_dbm": p, "power_b_dbm": p, "spacing_ghz": s, "wavelength_a_nm": 1550.0,
             "tone_high_0": 0.0, "tone_low_0": 0.0, "sideband_high_1": 10 * math.log10(r)}
            for s, r in zip(SPACINGS, sweep["r"], strict=True)]
    base = fit_run(rows, FIB.length_km, FIB.loss_db_per_km)["dispersion"]
    before = _model_db(base, EXTRA)
    rows += [{"power_a_dbm": p, "power_b_dbm": p, "spacing_ghz": s, "wavelength_a_nm": 1550.0,
              "tone_high_0": 0.0, "tone_low_0": 0.0, "sideband_high_1": None,
              "limit_sideband_high_1": float(b - 15.0)}
             for s, b in zip(EXTRA, before, strict=True)]
    res = fit_run(rows, FIB.length_km, FIB.loss_db_per_km)["dispersion"]
    assert res.extra["n_upper_limits"] == 3
    assert float(np.max(before - _model_db(res, EXTRA))) > 3.0


def test_stored_limits_reach_the_point_table(tmp_path) -> None:
    # A virtual-lab run at -8 dBm per tone: the third-order sidebands (about -90 dBc below
    # the tones by the Bessel model, J3(m)^2 with m ~ 0.01) sit under the OSA's -75 dBm floor.
    from _engine_support import OPERATOR, plan_text, scenario
    from sqlalchemy import select

    from labrun.bench import load_bench
    from labrun.engine import run_plan
    from labrun.plan import parse_plan
    from labrun.queries import run_points
    from labrun.store import open_store
    from labrun.store.models import Line
    from labrun.vlab.lab import VirtualLab

    store = open_store(str(tmp_path / "runs.db"))
    try:
        with VirtualLab(scenario(), time_scale=0.0) as lab:
            bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
            plan = parse_plan(plan_text([-8.0, -7.0], orders=3).encode(), "limits.toml")
            run_id = run_plan(plan, bench, store, operator=OPERATOR, unattended=True,
                              ack_safety=True, progress=False).run_id
        plain = run_points(store, run_id, include_reference=False)
        t = run_points(store, run_id, include_reference=False, limits=True)
        with store.session() as s:
            stored = sorted(s.scalars(select(Line.upper_limit_dbm).where(
                Line.kind == "sideband", Line.side == "high", Line.order == 3,
                Line.detected.is_(False))).all())
    finally:
        store.close()
    assert not any(c.startswith("limit_") for c in plain.columns)  # opt-in: callers unchanged
    assert t["sideband_high_3"].isna().all()
    assert sorted(t["limit_sideband_high_3"].tolist()) == pytest.approx(stored)
    assert len(stored) == 2
    assert t["limit_tone_high_0"].isna().all()  # detected lines carry no limit


def test_dispersion_refusal_counts_detected_points_only(sweep) -> None:
    # Three detected first sidebands and three limits: fit_dispersion needs >= 4 detected
    # points (a limit is not a measured point), so the fit refuses and its message must count
    # the 3 it has, not the 6 rows it was given.
    p = P_DBM
    rows = [{"power_a_dbm": p, "power_b_dbm": p, "spacing_ghz": s, "wavelength_a_nm": 1550.0,
             "tone_high_0": 0.0, "tone_low_0": 0.0, "sideband_high_1": 10 * math.log10(r)}
            for s, r in zip(SPACINGS[:3], sweep["r"][:3], strict=True)]
    rows += [{"power_a_dbm": p, "power_b_dbm": p, "spacing_ghz": s, "wavelength_a_nm": 1550.0,
              "tone_high_0": 0.0, "tone_low_0": 0.0, "sideband_high_1": None,
              "limit_sideband_high_1": float(10 * math.log10(r)) + 10.0}
             for s, r in zip(EXTRA, sweep["r_extra"], strict=True)]
    res = fit_run(rows, FIB.length_km, FIB.loss_db_per_km)["dispersion"]
    assert math.isnan(res.value)
    msg = res.warnings[0]
    assert "the run has 3 on 3 spacing(s)" in msg
    assert "3 upper limit(s)" in msg
