"""The virtual lab's split-step lines against an independent RK4IP solver (tests/_rk4ip.py).

Reference: fourth-order Runge-Kutta in the interaction picture, Hult, J. Lightwave Technol.
25(12), 3770 (2007), written apart from labrun.physics.nlse. Target of issue 9: every line down
to 90 dB below the tones within 0.01 dB of a converged solution, at the spool's default tolerance
(spool.SPOOL_RTOL) and the virtual lab's default spools (sim_instruments/default-scenario.toml).
"""

from __future__ import annotations

import numpy as np
import pytest
from _rk4ip import rk4ip_tones

from labrun.lines import grid_ks
from labrun.physics.spool import output_lines
from labrun.physics.units import dbm_to_w
from labrun.vlab.scenario import load_scenario

SCENARIO = load_scenario("default-scenario.toml")
ORDERS = SCENARIO.instruments.osa.orders  # lines the virtual OSA is given (5 a side)
BELOW_DB = 90.0
TOL_DB = 0.01


def _reference_dbc(spool: str, p_dbm: float, spacing_ghz: float, lam: float,
                   n_steps: int = 1500) -> np.ndarray:
    """RK4IP line powers (dB relative to the strongest line) for k in grid_ks(ORDERS)."""
    fib = SCENARIO.spool(spool).fibre()
    p = float(dbm_to_w(p_dbm))
    ref = rk4ip_tones(p, p, spacing_ghz * 1e-3, fib.length_km, fib.alpha_per_km,
                      fib.beta2_at(lam), fib.beta3_at(lam), fib.gamma_per_w_per_km,
                      n_steps=n_steps)
    w = np.array([ref[k] for k in grid_ks(ORDERS)])
    return 10.0 * np.log10(w / w.max())


def _model_dbc(spool: str, p_dbm: float, spacing_ghz: float, lam: float) -> np.ndarray:
    """Virtual-lab lines (spool.output_lines at its defaults), dB relative to the strongest."""
    fib = SCENARIO.spool(spool).fibre()
    got = np.array([x.power_dbm for x in output_lines(fib, lam, spacing_ghz, p_dbm, p_dbm,
                                                      ORDERS)])
    return got - got.max()


def test_reference_is_converged() -> None:
    # The reference itself: halving its step moves no line above -90 dBc by 1e-3 dB (RK4IP's
    # global error falls as h^4, Hult 2007), so it is a converged solution to compare with.
    a = _reference_dbc("SMF-B02", 5.0, 141.4, 1550.0, n_steps=750)
    b = _reference_dbc("SMF-B02", 5.0, 141.4, 1550.0, n_steps=1500)
    m = b >= -BELOW_DB
    assert np.max(np.abs(a[m] - b[m])) < 1e-3


def test_issue_example_high_first_sideband_near_minus_77_dbc() -> None:
    # Issue 9's example: SMF-B02, 5 dBm per tone, 141.4 GHz. The whole-field error norm gave
    # the high first sideband at -44.7 dBc; the reference puts it at about -77.2 dBc.
    ref = _reference_dbc("SMF-B02", 5.0, 141.4, 1550.0)
    got = _model_dbc("SMF-B02", 5.0, 141.4, 1550.0)
    high1 = grid_ks(ORDERS).index(2)
    assert ref[high1] == pytest.approx(-77.2, abs=0.05)
    assert got[high1] == pytest.approx(ref[high1], abs=TOL_DB)


@pytest.mark.parametrize(
    ("spool", "p_dbm", "spacing_ghz", "lam"),
    [
        ("SMF-B02", 5.0, 141.4, 1550.0),    # spacing of the shipped spacing sweep
        ("SMF-B02", 10.0, 400.0, 1555.0),   # far beyond the efficiency nulls, other pump
        ("SMF-B02", 14.0, 25.0, 1545.0),    # strong tones (with an amplifier)
        ("HNLF-A17", 7.0, 100.0, 1550.12),  # power sweep's top point (10 dBm - 3 dB path)
        ("HNLF-A17", 14.0, 200.0, 1550.0),  # strong: many orders above -90 dBc
    ],
)
def test_every_line_down_to_90_db_within_0_01_db(spool: str, p_dbm: float, spacing_ghz: float,
                                                 lam: float) -> None:
    ref = _reference_dbc(spool, p_dbm, spacing_ghz, lam)
    got = _model_dbc(spool, p_dbm, spacing_ghz, lam)
    m = ref >= -BELOW_DB
    assert m.sum() >= 4
    assert np.max(np.abs(got[m] - ref[m])) <= TOL_DB
