"""Small-signal FWM (docs/design.md §5.3): mismatch units, Inoue's efficiency and its first null."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import jv

from labrun.physics.fibre import Fibre
from labrun.physics.fwm import (
    first_null_spacing_ghz,
    inoue_efficiency,
    phase_mismatch_per_km,
    process_mismatch_per_km,
    sideband_mismatch_per_km,
    small_signal_sideband_w,
)
from labrun.physics.units import beta2_ps2_per_km, thz_to_nm

C = 299_792_458.0  # m/s, exact (SI definition)
# G.652-like fibre: D about 17 ps/(nm km) and slope about 0.057 ps/(nm^2 km) at 1550 nm
# (ITU-T G.652 fibre, typical values from memory); 0.2 dB/km (common practice).
G652 = Fibre(
    length_km=10.0,
    loss_db_per_km=0.2,
    gamma_per_w_per_km=1.3,
    dispersion_ps_per_nm_km=17.0,
    dispersion_slope_ps_per_nm2_km=0.057,
    reference_wavelength_nm=1550.0,
)


def test_beta2_of_standard_fibre() -> None:
    # beta2 = -D lambda^2/(2 pi c): about -21.7 ps^2/km at 1550 nm for D = 17 ps/(nm km)
    # (Agrawal, Nonlinear Fiber Optics; typical value from memory). Hand SI computation too.
    by_hand = -17e-6 * (1550e-9) ** 2 / (2 * np.pi * C) * 1e27  # s^2/m -> ps^2/km
    assert float(beta2_ps2_per_km(17.0, 1550.0)) == pytest.approx(by_hand, rel=1e-12)
    assert by_hand == pytest.approx(-21.7, abs=0.05)


def test_mismatch_units_per_km() -> None:
    # dbeta = (2 pi lambda^2/c) D delta^2 (docs/design.md §5.3), worked in SI then reported in 1/km:
    # 2 pi (1550e-9)^2 / c * 17e-6 s/m^2 * (100e9 Hz)^2 = 8.56e-3 1/m = 8.56 1/km.
    by_hand = 2 * np.pi * (1550e-9) ** 2 / C * 17e-6 * (100e9) ** 2 * 1e3
    assert phase_mismatch_per_km(1550.0, 100.0, 17.0) == pytest.approx(by_hand, rel=1e-12)
    assert by_hand == pytest.approx(8.56, abs=0.01)
    # Equals -beta2 (2 pi delta)^2 with beta2 in ps^2/km and delta in THz.
    b2 = float(beta2_ps2_per_km(17.0, 1550.0))
    assert process_mismatch_per_km(b2, 0.0, 0.1, 0.1, 0.0) == pytest.approx(by_hand, rel=1e-12)


def test_slope_term_moves_dispersion_to_the_pump() -> None:
    # Inoue's bracket D + (lambda^2/c) delta dD/dlambda is D at the degenerate pump: compare with
    # S = 0 and D evaluated at the pump wavelength from the linear dispersion law.
    lam_a, spacing = 1550.0, 200.0
    lam_b = float(thz_to_nm(C / lam_a * 1e-3 + spacing * 1e-3))
    d_b = G652.dispersion_at(lam_b)
    high = phase_mismatch_per_km(lam_a, -spacing, 17.0, 0.057)  # pump b, D given at tone a
    at_pump = phase_mismatch_per_km(lam_a, spacing, d_b, 0.0)
    assert high == pytest.approx(at_pump, rel=1e-4)  # equal up to (delta/f)^2 terms
    # The exact cubic-dispersion mismatch of the fibre model, -beta2(pump) (2 pi delta)^2, is the
    # same with lambda and D both at the pump; Inoue's form keeps lambda_a^2 as the prefactor, so
    # it agrees to first order only (2 delta/f = 2e-3 here).
    exact = sideband_mismatch_per_km(G652, lam_a, spacing, "high")
    assert exact == pytest.approx(phase_mismatch_per_km(lam_b, spacing, d_b), rel=1e-4)
    assert exact == pytest.approx(high, rel=3e-3)
    assert sideband_mismatch_per_km(G652, lam_a, spacing, "low") == pytest.approx(
        phase_mismatch_per_km(lam_a, spacing, 17.0, 0.0), rel=2e-3
    )


def test_inoue_efficiency_limits_and_literal_formula() -> None:
    # Inoue, J. Lightwave Technol. 10, 1553 (1992): eta = 1 when phase matched, sinc^2 lossless.
    assert inoue_efficiency(0.046, 0.0, 10.0) == pytest.approx(1.0, rel=1e-12)
    assert inoue_efficiency(0.0, 0.0, 10.0) == pytest.approx(1.0, rel=1e-12)
    db = np.linspace(0.0, 3.0, 301)
    np.testing.assert_allclose(
        inoue_efficiency(0.0, db, 10.0), np.sinc(db * 10.0 / 2 / np.pi) ** 2, atol=1e-12
    )
    # The expression as printed in docs/design.md §5.3, evaluated literally.
    a, length = 0.2 * np.log(10) / 10, 10.0
    e = np.exp(-a * length)
    literal = a**2 / (a**2 + db**2) * (1 + 4 * e * np.sin(db * length / 2) ** 2 / (1 - e) ** 2)
    np.testing.assert_allclose(inoue_efficiency(a, db, length), literal, rtol=1e-12)
    assert np.all(inoue_efficiency(a, db, length) <= 1.0 + 1e-12)


def test_first_null_lossless_where_dbeta_l_is_two_pi() -> None:
    # eta = sinc^2(dbeta L/2) is zero first at dbeta L = 2 pi, i.e. delta = sqrt(c/(lambda^2 D L)).
    length = 10.0
    analytic = np.sqrt(C / ((1550e-9) ** 2 * 17e-6 * length * 1e3)) * 1e-9  # GHz, by hand
    assert first_null_spacing_ghz(1550.0, 17.0, length) == pytest.approx(analytic, rel=1e-12)
    assert phase_mismatch_per_km(1550.0, analytic, 17.0) * length == pytest.approx(2 * np.pi)

    def eta(s: float) -> float:
        return inoue_efficiency(0.0, phase_mismatch_per_km(1550.0, s, 17.0), length)

    res = minimize_scalar(
        eta,
        bounds=(0.8 * analytic, 1.2 * analytic),
        method="bounded",
        options={"xatol": 1e-7 * analytic},
    )
    assert res.x == pytest.approx(analytic, rel=1e-5)
    assert res.fun < 1e-12


def test_first_null_g652_with_loss_is_shallow_and_near_analytic() -> None:
    # With loss the null fills in (alpha^2/(alpha^2 + dbeta^2) term) and moves slightly outwards.
    analytic = first_null_spacing_ghz(1550.0, 17.0, G652.length_km)
    assert analytic == pytest.approx(27.09, abs=0.01)

    def side(s: float) -> float:
        return small_signal_sideband_w(G652, 1e-3, 1e-3, 1550.0, s, "high")

    res = minimize_scalar(
        side,
        bounds=(0.8 * analytic, 1.2 * analytic),
        method="bounded",
        options={"xatol": 1e-7 * analytic},
    )
    assert res.x == pytest.approx(analytic, rel=0.01)
    eta_min = inoue_efficiency(
        G652.alpha_per_km, sideband_mismatch_per_km(G652, 1550.0, res.x, "high"), G652.length_km
    )
    assert 1e-3 < eta_min < 0.02  # shallow, not zero
    # ... and it is a local minimum: efficiency higher on both sides.
    assert side(0.9 * res.x) > side(res.x) < side(1.1 * res.x)


def test_phase_matched_sideband_equals_bessel_small_signal() -> None:
    # With D = 0, P_F = gamma^2 L_eff^2 P_b^2 P_a exp(-alpha L) (docs/design.md §5.3) must equal the
    # small-m limit of the Bessel line P_b J_1(m)^2 exp(-alpha L) (scipy.special.jv), m -> 0.
    fibre = Fibre(1.0, 0.8, 10.0)
    p_a, p_b = 2e-5, 5e-5
    m = 2 * 10.0 * fibre.effective_length_km * np.sqrt(p_a * p_b)
    t = np.exp(-fibre.alpha_per_km)
    high = small_signal_sideband_w(fibre, p_a, p_b, 1550.0, 50.0, "high")
    low = small_signal_sideband_w(fibre, p_a, p_b, 1550.0, 50.0, "low")
    assert high == pytest.approx(t * p_b * jv(1, m) ** 2, rel=1e-6)
    assert low == pytest.approx(t * p_a * jv(1, m) ** 2, rel=1e-6)


@pytest.mark.parametrize(("alpha", "length", "dbeta", "nl"), [
    (0.207, 1.0, -0.157, -0.044), (0.046, 10.0, 0.5, 0.01), (0.207, 1.0, 3.0, 0.3),
    (0.046, 10.0, -20.0, -0.02), (0.0, 2.0, 1.0, 0.1), (0.2, 1.0, 0.0, 0.5)])
def test_efficiency_with_nonlinear_mismatch_against_quadrature(alpha, length, dbeta, nl):
    # The defining integral |int_0^L exp(-alpha z + i(dbeta z + nl z_eff(z))) dz|^2 / L_eff^2
    # evaluated by scipy.integrate.quad (adaptive Gauss-Kronrod), independent of the code's
    # piecewise sum; and nl = 0 gives Inoue's closed form.
    from scipy.integrate import quad

    from labrun.physics.fwm import inoue_efficiency_nl

    def z_eff(z):
        return (1 - np.exp(-alpha * z)) / alpha if alpha > 0 else z

    def f(z):
        return np.exp(-alpha * z) * np.exp(1j * (dbeta * z + nl * z_eff(z)))

    re = quad(lambda z: f(z).real, 0, length, limit=500)[0]
    im = quad(lambda z: f(z).imag, 0, length, limit=500)[0]
    ref = (re * re + im * im) / z_eff(length) ** 2
    assert inoue_efficiency_nl(alpha, dbeta, length, nl) == pytest.approx(ref, rel=1e-5)
    assert inoue_efficiency_nl(alpha, dbeta, length, 0.0) == pytest.approx(
        inoue_efficiency(alpha, dbeta, length), rel=1e-12)
