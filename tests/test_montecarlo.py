"""Monte Carlo propagation (JCGM 101:2008) of a fit's inputs, against known distributions.

The nonlinear case with a known answer: the small-signal gamma of a power sweep goes as
1/sqrt(P_a P_b) (R = gamma^2 L_eff^2 P_a P_b, Inoue 1992), so with only the launched powers
uncertain, ln gamma = ln gamma_0 - (ln 10 / 20)(x_a + x_b)
with x_a, x_b normal in dB: gamma is lognormal. Its 2.5 % and 97.5 % points come from
scipy.stats.lognorm, outside the project; with 1.5 dB per arm the interval is visibly
asymmetric, and the GUM's symmetric gamma +- 2 u misses both ends by more than the Monte Carlo
error.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from labrun.fits import fit_gamma_small_signal, fit_run, points_table
from labrun.montecarlo import coverage_interval, propagate
from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.units import dbm_to_w, effective_length_km
from labrun.uncertainty import Uncertainties

FIB = Fibre(1.0, 0.9, 11.0, -0.3, 0.0, 1550.0)  # invented HNLF in realistic ranges
U_DB = 1.5  # dB per arm: large, so the nonlinearity of 10^(-x/20) shows
M = 5000
L_EFF = effective_length_km(FIB.length_km, FIB.loss_db_per_km)


def _small_signal(tt: dict, length: float, loss: float) -> dict:
    """The small-signal gamma (labrun.fits) of a point table, without the mismatch factor."""
    ratio = 10 ** ((tt["sideband_high_1"] - tt["tone_high_0"]) / 10)
    return {"gamma_small_signal": fit_gamma_small_signal(
        dbm_to_w(tt["power_a_dbm"]), dbm_to_w(tt["power_b_dbm"]), ratio, L_EFF)}


def _rows() -> list[dict]:
    rows = []
    for p in (-4.0, -2.0, 0.0, 2.0):
        w = propagate_tones(FIB, 1550.0, 100.0, float(dbm_to_w(p)), float(dbm_to_w(p)), 1,
                            rtol=1e-4).powers_w
        rows.append({"power_a_dbm": p, "power_b_dbm": p, "spacing_ghz": 100.0,
                     "wavelength_a_nm": 1550.0, "tone_low_0": 10 * math.log10(w[1] * 1e3),
                     "tone_high_0": 10 * math.log10(w[2] * 1e3),
                     "sideband_low_1": 10 * math.log10(w[0] * 1e3),
                     "sideband_high_1": 10 * math.log10(w[3] * 1e3)})
    return rows


def test_coverage_interval_is_probabilistically_symmetric() -> None:
    # 1..1000: the 2.5 % and 97.5 % points of the empirical distribution (JCGM 101 7.7.1:
    # y_(r) and y_(r + q) with q = pM, r = (M - q)/2 when an integer).
    lo, hi = coverage_interval(np.arange(1.0, 1001.0))
    assert (lo, hi) == (25.0, 975.0)


def test_gamma_interval_matches_the_lognormal_of_scipy() -> None:
    t = points_table(_rows())
    g0 = _small_signal(t, 0, 0)["gamma_small_signal"].value
    unc = Uncertainties(U_DB, U_DB, 0.0, 0.0, 0.0, 0.0)
    mc = propagate(_small_signal, t, FIB.length_km, FIB.loss_db_per_km, unc,
                   {"gamma": "gamma_small_signal"}, M, seed=3)["gamma"]
    s = math.log(10) / 20 * math.sqrt(2) * U_DB
    ref = stats.lognorm(s=s, scale=g0)  # scipy.stats: the exact distribution of gamma
    lo, hi = ref.ppf(0.025), ref.ppf(0.975)
    # Monte Carlo error of a quantile: sqrt(q (1 - q) / M) / pdf(x_q): 0.07 and 0.16 here
    se_lo = math.sqrt(0.025 * 0.975 / M) / ref.pdf(lo)
    se_hi = math.sqrt(0.025 * 0.975 / M) / ref.pdf(hi)
    assert mc.n == M
    assert mc.low == pytest.approx(lo, abs=4 * se_lo)
    assert mc.high == pytest.approx(hi, abs=4 * se_hi)
    assert mc.std == pytest.approx(ref.std(), rel=0.03)
    # The interval is skewed as the lognormal is (its upper arm longer by more than four Monte
    # Carlo errors), which the GUM's linear propagation, gamma +- 2 u, cannot show.
    assert (mc.high - g0) - (g0 - mc.low) > 4 * (se_lo + se_hi)


def test_same_seed_same_interval_and_too_few_trials_refused() -> None:
    t = points_table(_rows())
    unc = Uncertainties(0.1, 0.1, 0.0, 0.0, 0.0, 0.0)

    def fit(tt, ln, ls):
        return fit_run(tt, ln, ls, dispersion_ps_per_nm_km=-0.3)

    a = propagate(fit, t, 1.0, 0.9, unc, {"g": "gamma_small_signal"}, 20, seed=5)["g"]
    b = propagate(fit, t, 1.0, 0.9, unc, {"g": "gamma_small_signal"}, 20, seed=5)["g"]
    assert (a.low, a.high) == (b.low, b.high)
    with pytest.raises(ValueError):
        propagate(fit, t, 1.0, 0.9, unc, {"g": "gamma_small_signal"}, 1)
