"""The Bessel (dual-frequency) two-tone model, docs/design.md §5.2, against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.special import jv

from labrun.lines import grid_ks
from labrun.physics.bessel import (
    first_sideband_ratio_equal,
    modulation_index,
    two_tone_powers,
    two_tone_powers_dispersionless,
)

# Abramowitz and Stegun, Handbook of Mathematical Functions, table 9.1 (J0, J1, J2 at x = 1, 2, 5),
# ten decimals; values recalled from memory and cross-checked against scipy.special.jv below.
AS_TABLE_9_1 = {
    (0, 1.0): 0.7651976866,
    (1, 1.0): 0.4400505857,
    (2, 1.0): 0.1149034849,
    (0, 2.0): 0.2238907791,
    (1, 2.0): 0.5767248078,
    (2, 2.0): 0.3528340286,
    (0, 5.0): -0.1775967713,
    (1, 5.0): -0.3275791376,
    (2, 5.0): 0.0465651163,
}


@pytest.mark.parametrize(("n", "x"), sorted(AS_TABLE_9_1))
def test_single_tone_lines_are_bessel_squares_as_table_9_1(n: int, x: float) -> None:
    # With P_b = 0 the model reduces to P_k = P_a J_k(m)^2: compare |J_n| with the table.
    powers = two_tone_powers(1.0, 0.0, x, orders=3)
    k_index = grid_ks(3).index(n)
    assert np.sqrt(powers[k_index]) == pytest.approx(abs(AS_TABLE_9_1[(n, x)]), abs=2e-10)
    # Same value from scipy.special.jv (general-purpose reference library).
    assert AS_TABLE_9_1[(n, x)] == pytest.approx(float(jv(n, x)), abs=1e-10)


def _bessel_integral(n: int, x: float) -> float:
    """J_n(x) = (1/pi) integral_0^pi cos(n tau - x sin tau) d tau (Abramowitz and Stegun 9.1.21),
    by scipy.integrate.quad: independent of scipy.special.jv, which the model uses."""
    value, _ = quad(lambda tau: np.cos(n * tau - x * np.sin(tau)), 0.0, np.pi,
                    epsabs=1e-13, epsrel=1e-13, limit=200)
    return value / np.pi


def test_model_against_the_bessel_integral_any_powers_and_orders() -> None:
    # P_k = T [P_a J_k(m)^2 + P_b J_(k-1)(m)^2] (Thompson and Roy 1991), with J_n from its
    # integral representation; negative orders included (J_-n = (-1)^n J_n follows from it).
    p_a, p_b, m, t = 0.031, 0.012, 2.7, 0.63
    powers = two_tone_powers(p_a, p_b, m, orders=6, transmission=t)
    for k, p in zip(grid_ks(6), powers, strict=True):
        expected = t * (p_a * _bessel_integral(k, m) ** 2 + p_b * _bessel_integral(k - 1, m) ** 2)
        assert p == pytest.approx(expected, rel=1e-9, abs=1e-16)


def test_power_is_conserved_over_all_orders() -> None:
    # sum_k J_k(m)^2 = 1 (Abramowitz and Stegun 9.1.76): the Kerr phase moves power, never adds it.
    p_a, p_b, t = 0.05, 0.02, 0.8
    for m in (0.1, 1.0, 3.0, 7.0):
        assert two_tone_powers(p_a, p_b, m, orders=40, transmission=t).sum() == pytest.approx(
            t * (p_a + p_b), rel=1e-12
        )


@pytest.mark.parametrize(("p_a", "p_b", "loss_db"), [(0.05, 0.05, 0.0), (0.08, 0.02, 3.5)])
def test_model_against_direct_fft_of_phase_modulated_field(
    p_a: float, p_b: float, loss_db: float
) -> None:
    # Independent computation with numpy.fft: sample one beat period of the two-tone field,
    # apply the Kerr phase gamma L_eff |E|^2 and the loss pointwise, read the line powers.
    gamma, l_eff, n = 10.0, 0.9, 1024
    t = np.arange(n) / n  # time in units of the beat period 1/delta
    field = np.sqrt(p_a) + np.sqrt(p_b) * np.exp(2j * np.pi * t)
    field = field * np.exp(1j * gamma * l_eff * np.abs(field) ** 2) * 10 ** (-loss_db / 20)
    coeffs = np.fft.fft(field) / n  # coefficient of exp(+2 pi i k t) at bin k
    m = modulation_index(gamma, l_eff, p_a, p_b)
    model = two_tone_powers(p_a, p_b, m, orders=5, transmission=10 ** (-loss_db / 10))
    direct = np.abs(coeffs[np.asarray(grid_ks(5)) % n]) ** 2
    np.testing.assert_allclose(model, direct, rtol=1e-9, atol=1e-15)


def test_modulation_index_formula() -> None:
    # m = 2 gamma L_eff sqrt(P_a P_b) (docs/design.md §5.2), worked by hand:
    # 2 * 10 * 0.5 * 0.02 = 0.2.
    assert modulation_index(10.0, 0.5, 0.01, 0.04) == pytest.approx(0.2, rel=1e-12)
    powers = two_tone_powers_dispersionless(10.0, 0.5, 0.01, 0.04, orders=2)
    # J0(0.2) and J1(0.2) from the power series (Abramowitz and Stegun 9.1.10), summed here:
    # J_n(x) = sum_j (-1)^j (x/2)^(2j+n) / (j! (j+n)!); J_-1 = -J_1.
    j0 = sum((-1) ** j * 0.1 ** (2 * j) / math.factorial(j) ** 2 for j in range(8))
    j1 = sum((-1) ** j * 0.1 ** (2 * j + 1) / (math.factorial(j) * math.factorial(j + 1))
             for j in range(8))
    assert (j0, j1) == pytest.approx((0.9900249722, 0.0995008326), abs=1e-10)
    assert powers[grid_ks(2).index(0)] == pytest.approx(0.01 * j0**2 + 0.04 * j1**2, rel=1e-12)


def test_equal_power_first_sideband_ratio_boskovic() -> None:
    # Boskovic et al., Opt. Lett. 21, 1966 (1996): (J1^2 + J2^2)/(J0^2 + J1^2) for equal powers.
    ks = grid_ks(2)
    for m in (0.05, 0.5, 1.2, 2.0):
        expected = (jv(1, m) ** 2 + jv(2, m) ** 2) / (jv(0, m) ** 2 + jv(1, m) ** 2)
        assert first_sideband_ratio_equal(m) == pytest.approx(expected, rel=1e-12)
        p = two_tone_powers(0.02, 0.02, m, orders=2)
        assert p[ks.index(-1)] / p[ks.index(0)] == pytest.approx(expected, rel=1e-12)
        assert p[ks.index(2)] / p[ks.index(1)] == pytest.approx(expected, rel=1e-12)


def test_small_signal_slopes_3_and_5_db_per_db() -> None:
    # J_n(m) ~ (m/2)^n/n! for small m (Abramowitz and Stegun 9.1.7) makes sideband n grow as
    # power^(2n+1) when both tones change together: 3 dB/dB first order, 5 dB/dB second.
    p_dbm = np.linspace(-20.0, -10.0, 11)
    p_w = 1e-3 * 10 ** (p_dbm / 10)
    ks = grid_ks(2)
    first, second = [], []
    for p in p_w:
        m = modulation_index(10.0, 0.9, p, p)
        assert m < 0.02  # small modulation index
        lines = two_tone_powers(p, p, m, orders=2)
        first.append(10 * np.log10(lines[ks.index(-1)]))
        second.append(10 * np.log10(lines[ks.index(-2)]))
    assert np.polyfit(p_dbm, first, 1)[0] == pytest.approx(3.0, abs=1e-3)
    assert np.polyfit(p_dbm, second, 1)[0] == pytest.approx(5.0, abs=1e-3)
