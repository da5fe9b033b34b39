"""Split-step Fourier NLSE (docs/design.md §5.4) vs the Bessel model, Inoue, parametric gain."""

from __future__ import annotations

import numpy as np
import pytest

from labrun.lines import grid_ks
from labrun.physics.bessel import modulation_index, two_tone_powers
from labrun.physics.fibre import Fibre
from labrun.physics.fwm import small_signal_product_w, small_signal_sideband_w
from labrun.physics.nlse import propagate_spectrum, propagate_tones

# Invented dispersion-free highly nonlinear spool; G.652-like spool (D 17 ps/(nm km), slope
# 0.057 ps/(nm^2 km) at 1550 nm: ITU-T G.652 fibre, typical values from memory).
HNLF_FLAT = Fibre(1.0, 0.8, 10.0, 0.0, 0.0, 1550.0)
G652 = Fibre(10.0, 0.2, 1.3, 17.0, 0.057, 1550.0)


@pytest.mark.parametrize(("p_a", "p_b"), [(0.1, 0.1), (0.15, 0.04)])
def test_split_step_without_dispersion_reproduces_bessel_model(p_a: float, p_b: float) -> None:
    # docs/design.md §5.4: with beta2 = beta3 = 0 the split-step must reproduce §5.2
    # (Thompson and Roy; line powers from scipy.special.jv). The stepping itself is run, not the
    # SPM short cut.
    res = propagate_tones(HNLF_FLAT, 1550.0, 50.0, p_a, p_b, orders=5, method="split-step")
    assert res.method == "split-step" and res.n_steps > 1
    fibre = HNLF_FLAT
    m = modulation_index(fibre.gamma_per_w_per_km, fibre.effective_length_km, p_a, p_b)
    assert m > 1.0  # well beyond small signal
    model = two_tone_powers(p_a, p_b, m, 5, np.exp(-fibre.alpha_per_km * fibre.length_km))
    above = model > model.max() * 1e-6  # lines above -60 dBc
    assert above.sum() >= 8
    np.testing.assert_allclose(res.powers_w[above], model[above], rtol=1e-6)


def test_spm_short_cut_equals_split_step() -> None:
    stepped = propagate_tones(HNLF_FLAT, 1550.0, 80.0, 0.08, 0.05, 4, method="split-step")
    short = propagate_tones(HNLF_FLAT, 1550.0, 80.0, 0.08, 0.05, 4)
    assert short.method == "spm" and short.n_steps == 0
    np.testing.assert_allclose(short.powers_w, stepped.powers_w, rtol=1e-9, atol=1e-18)


def test_low_power_split_step_matches_inoue_over_spacing() -> None:
    # docs/design.md §5.4: at low power the split-step must reproduce Inoue's efficiency (Inoue,
    # J. Lightwave Technol. 10, 1553 (1992)) for both first sidebands, within 2 %, across the
    # spacing range of the first two efficiency nulls of a 10 km G.652-like spool.
    p = 1e-4
    ks = grid_ks(1)
    for spacing in np.linspace(10.0, 60.0, 11):
        res = propagate_tones(G652, 1550.0, spacing, p, p, 1)
        high = small_signal_sideband_w(G652, p, p, 1550.0, spacing, "high")
        low = small_signal_sideband_w(G652, p, p, 1550.0, spacing, "low")
        assert res.powers_w[ks.index(2)] == pytest.approx(high, rel=0.02)
        assert res.powers_w[ks.index(-1)] == pytest.approx(low, rel=0.02)


def test_non_degenerate_product_carries_degeneracy_factor_four() -> None:
    # Inoue (1992): degeneracy factor d = 6 for f_i != f_j against 3 for the degenerate case,
    # i.e. (6/3)^2 = 4 in power. Three weak tones at k = 0, 1, 4: only f_0 + f_4 - f_1 lands
    # on k = 3 at first order.
    fibre = Fibre(2.0, 0.5, 10.0, 3.0, 0.03, 1550.0)
    d, (p0, p1, p4) = 0.05, (1e-4, 2e-4, 1.5e-4)
    c0 = np.zeros(64, complex)
    c0[[0, 1, 4]] = np.sqrt([p0, p1, p4])
    b2, b3 = fibre.beta2_at(1550.0), fibre.beta3_at(1550.0)
    out = propagate_spectrum(c0, d, fibre.length_km, fibre.alpha_per_km, b2, b3, 10.0, rtol=1e-6)
    predicted = small_signal_product_w(fibre, 1550.0, (0.0, 4 * d, d), (p0, p4, p1))
    assert abs(out.spectrum[3]) ** 2 == pytest.approx(predicted, rel=0.02)


@pytest.mark.parametrize("beta2", [-2.55, 2.55])
def test_parametric_gain_of_weak_probe(beta2: float) -> None:
    # Undepleted-pump parametric gain (Stolen and Bjorkholm 1982; Agrawal, Nonlinear Fiber
    # Optics, from memory): G = 1 + (gamma P sinh(g L)/g)^2, g^2 = (gamma P)^2 - (kappa/2)^2,
    # kappa = beta2 Omega^2 + 2 gamma P. Anomalous dispersion gives gain near
    # Omega^2 = 2 gamma P/|beta2|, normal dispersion none: checks the signs of the solver.
    p, gamma, length, d = 0.2, 10.0, 1.0, 0.199
    c0 = np.zeros(64, complex)
    c0[0], c0[1] = np.sqrt(p), np.sqrt(1e-9)
    out = propagate_spectrum(c0, d, length, 0.0, beta2, 0.0, gamma, rtol=1e-6)
    kappa = beta2 * (2 * np.pi * d) ** 2 + 2 * gamma * p
    g = np.sqrt(complex((gamma * p) ** 2 - (kappa / 2) ** 2))
    expected = 1 + abs(gamma * p * np.sinh(g * length) / g) ** 2
    assert abs(out.spectrum[1]) ** 2 / 1e-9 == pytest.approx(expected, rel=1e-4)
    assert (expected > 10) == (beta2 < 0)


def test_power_conservation_and_loss() -> None:
    # The NLSE conserves power without loss and loses exp(-alpha L) with it (Agrawal).
    lossless = Fibre(10.0, 0.0, 1.3, 17.0, 0.057, 1550.0)
    for fibre in (lossless, G652):
        res = propagate_tones(fibre, 1550.0, 40.0, 0.1, 0.05, 3)
        total = float(np.sum(np.abs(res.spectrum) ** 2))
        assert total == pytest.approx(0.15 * np.exp(-fibre.alpha_per_km * 10.0), rel=1e-9)


def test_step_error_estimate_tracks_tolerance() -> None:
    # Step doubling: tighter rtol -> more steps, smaller error estimate, converging lines.
    loose = propagate_tones(G652, 1550.0, 50.0, 0.05, 0.05, 2, rtol=1e-3)
    tight = propagate_tones(G652, 1550.0, 50.0, 0.05, 0.05, 2, rtol=1e-6)
    assert tight.n_steps > loose.n_steps
    assert tight.step_error < loose.step_error
    db = 10 * np.log10(loose.powers_w / tight.powers_w)
    assert np.max(np.abs(db)) < 0.01
    assert loose.alias_fraction < 1e-12


def test_orthogonal_part_of_tone_b_only_loses_power() -> None:
    # Scalar projection (docs/design.md §5.5): orthogonal tone b does not beat with tone a.
    res = propagate_tones(G652, 1550.0, 50.0, 0.05, 0.05, 2, copolar=0.0)
    t = np.exp(-G652.alpha_per_km * G652.length_km)
    ks = grid_ks(2)
    assert res.powers_w[ks.index(1)] == pytest.approx(0.05 * t, rel=1e-9)
    assert res.powers_w[ks.index(0)] == pytest.approx(0.05 * t, rel=1e-9)
    assert res.powers_w[ks.index(-1)] < 1e-25


def test_partly_copolar_tones_split_step_against_bessel_with_scaled_index() -> None:
    # docs/design.md §5.5: the modulation index scales with sqrt(copolar); with the Kerr phase
    # of the total intensity on both components the Bessel lines keep the full tone powers (§5.2).
    c, p_a, p_b = 0.3, 0.1, 0.08
    res = propagate_tones(HNLF_FLAT, 1550.0, 50.0, p_a, p_b, 4, copolar=c, method="split-step")
    f = HNLF_FLAT
    m = modulation_index(f.gamma_per_w_per_km, f.effective_length_km, p_a, c * p_b)
    model = two_tone_powers(p_a, p_b, m, 4, np.exp(-f.alpha_per_km * f.length_km))
    above = model > model.max() * 1e-6
    np.testing.assert_allclose(res.powers_w[above], model[above], rtol=1e-6)


def test_small_signal_sidebands_scale_with_copolar_fraction() -> None:
    # docs/design.md §5.5: small-signal sideband power scales with (1 + s_a . s_b)/2, on both sides.
    ks = grid_ks(1)
    full = propagate_tones(G652, 1550.0, 20.0, 1e-3, 1e-3, 1, copolar=1.0)
    half = propagate_tones(G652, 1550.0, 20.0, 1e-3, 1e-3, 1, copolar=0.5)
    for k in (-1, 2):
        i = ks.index(k)
        assert half.powers_w[i] / full.powers_w[i] == pytest.approx(0.5, rel=0.01)


def test_small_signal_slopes_in_dispersive_fibre() -> None:
    # Sideband n grows as power^(2n+1) at small signal (docs/design.md §5.2: 3 dB/dB first order,
    # 5 dB/dB second), also with phase mismatch: the split-step on a G.652-like spool.
    p_dbm = np.array([-20.0, -15.0, -10.0])
    ks = grid_ks(2)
    first, second = [], []
    for p in 1e-3 * 10 ** (p_dbm / 10):
        res = propagate_tones(G652, 1550.0, 20.0, p, p, 2)
        first.append(10 * np.log10(res.powers_w[ks.index(-1)]))
        second.append(10 * np.log10(res.powers_w[ks.index(-2)]))
    assert np.polyfit(p_dbm, first, 1)[0] == pytest.approx(3.0, abs=0.01)
    assert np.polyfit(p_dbm, second, 1)[0] == pytest.approx(5.0, abs=0.02)
