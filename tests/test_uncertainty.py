"""GUM budgets of the fits (JCGM 100:2008): contributions against sensitivities derived by hand
from the models' published forms, root-sum-square combination, k = 2 expansion."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import jv

from labrun.fits import fit_run
from labrun.lines import grid_ks, line_id
from labrun.uncertainty import Uncertainties, spacing_shift_ghz

KEYS = [f"{line_id(k).kind}_{line_id(k).side}_{line_id(k).order}" for k in grid_ks(2)]
LENGTH, LOSS, GAMMA = 1.0, 0.9, 11.0  # invented spool


def _l_eff(length: float, loss_db: float) -> float:
    """Effective length (1 - exp(-alpha L))/alpha, alpha = loss ln(10)/10 (Agrawal)."""
    a = loss_db * math.log(10) / 10
    return (1 - math.exp(-a * length)) / a


def _points() -> list[dict]:
    """Dispersion-free power sweep, lines from scipy.special.jv (Thompson and Roy 1991)."""
    a = LOSS * math.log(10) / 10
    pts = []
    for p_dbm in np.arange(-6.0, 2.0, 0.5):
        p = 10 ** (p_dbm / 10) * 1e-3
        m = 2 * GAMMA * _l_eff(LENGTH, LOSS) * p
        ks = np.array(grid_ks(2), dtype=float)
        w = math.exp(-a * LENGTH) * (p * jv(ks, m) ** 2 + p * jv(ks - 1, m) ** 2)
        row = dict(zip(KEYS, 10 * np.log10(w * 1e3), strict=True))
        row.update(power_a_dbm=p_dbm, power_b_dbm=p_dbm, spacing_ghz=100.0,
                   wavelength_a_nm=1550.0)
        pts.append(row)
    return pts


def test_spacing_shift_of_two_laser_wavelength_errors() -> None:
    # d f = c d lambda / lambda^2: 1 pm at 1550 nm is 124.8 MHz; two independent lasers sqrt(2).
    assert spacing_shift_ghz(1.0, 1550.0) == pytest.approx(
        math.sqrt(2) * 299_792_458.0 * 1e-12 / 1550e-9**2 * 1e-9, rel=1e-12)
    assert spacing_shift_ghz(1.0, 1550.0) == pytest.approx(0.17648, rel=1e-4)


def test_gamma_budget_contributions_match_hand_sensitivities() -> None:
    # Small signal: sideband/tone ratio R ~ gamma^2 L_eff^2 P_a P_b (Inoue 1992), so
    # d gamma/gamma = (ln 10/20) u for u dB on one arm's power or on the OSA's sideband-to-tone
    # amplitude, and d gamma/gamma = -d L_eff/L_eff for the spool length and loss.
    unc = Uncertainties(power_a_db=0.1, power_b_db=0.2, osa_amplitude_db=0.05,
                        wavelength_pm=1.0, length_rel=0.01, loss_db_per_km=0.05)
    res = fit_run(_points(), LENGTH, LOSS, dispersion_ps_per_nm_km=0.0, uncertainties=unc)
    g = res["gamma_small_signal"]
    assert g.value == pytest.approx(GAMMA, rel=2e-3)
    rows = {c["source"]: c["contribution"] for c in g.budget}
    k = math.log(10) / 20
    assert rows["launched power, arm a"] == pytest.approx(g.value * k * 0.1, rel=0.01)
    assert rows["launched power, arm b"] == pytest.approx(g.value * k * 0.2, rel=0.01)
    assert rows["OSA relative amplitude"] == pytest.approx(g.value * k * 0.05, rel=0.01)
    dl = (_l_eff(LENGTH * 1.01, LOSS) - _l_eff(LENGTH * 0.99, LOSS)) / 2 / _l_eff(LENGTH, LOSS)
    assert rows["spool length"] == pytest.approx(g.value * dl, rel=0.01)
    da = (_l_eff(LENGTH, LOSS - 0.05) - _l_eff(LENGTH, LOSS + 0.05)) / 2 / _l_eff(LENGTH, LOSS)
    assert rows["spool loss"] == pytest.approx(g.value * da, rel=0.01)
    assert rows["tone wavelengths"] < 1e-6 * g.value  # no dispersion: spacing does not enter
    # GUM 5.1.2 (uncorrelated inputs) and 6.2 (k = 2).
    rss = math.sqrt(sum(c["contribution"] ** 2 for c in g.budget))
    assert g.u_combined == pytest.approx(rss, rel=1e-12)
    assert g.u95 == pytest.approx(2 * rss, rel=1e-12)
    assert g.budget[0]["source"] == "statistical (fit)"
    assert g.budget[0]["contribution"] == pytest.approx(g.stderr)
    # The Bessel fit uses the same ratios: the same power sensitivity.
    b = {c["source"]: c["contribution"] for c in res["gamma_bessel"].budget}
    assert b["launched power, arm a"] == pytest.approx(res["gamma_bessel"].value * k * 0.1,
                                                       rel=0.01)


def test_without_uncertainties_no_budget_is_claimed() -> None:
    res = fit_run(_points(), LENGTH, LOSS, dispersion_ps_per_nm_km=0.0)
    g = res["gamma_bessel"]
    assert g.budget == [] and math.isnan(g.u95)
    assert g.to_dict()["u95"] is None
