"""spool.output_lines: model choice, labels, and agreement with independent calculations."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import jv

from labrun.lines import LineId, grid_ks
from labrun.physics.fibre import Fibre
from labrun.physics.nlse import propagate_tones
from labrun.physics.spool import (
    MIN_POWER_DBM,
    choose_model,
    dispersion_figure,
    output_lines,
    output_powers_w,
)

C = 299_792_458.0  # m/s, exact (SI)
# Invented spools in realistic ranges: a dispersion-flattened highly nonlinear one and a
# G.652-like one (D 17 ps/(nm km), slope 0.057 ps/(nm^2 km): ITU-T G.652, typical, from memory).
HNLF_FLAT = Fibre(1.0, 0.8, 10.5, 0.0, 0.0, 1550.0)
HNLF = Fibre(1.0, 0.8, 10.5, 0.4, 0.02, 1550.0)
G652 = Fibre(10.0, 0.2, 1.3, 17.0, 0.057, 1550.0)


def test_dispersion_free_spool_matches_independent_bessel_within_0_01_db() -> None:
    # Issue 3 "done when": a dispersion-free spool matches an independent Bessel calculation
    # (here written out from docs/design.md §5.2 with scipy.special.jv) within 0.01 dB.
    p_a_dbm, p_b_dbm, lam, spacing = 18.0, 16.0, 1551.0, 75.0
    lines = output_lines(HNLF_FLAT, lam, spacing, p_a_dbm, p_b_dbm, orders=3)
    pa, pb = 1e-3 * 10 ** (p_a_dbm / 10), 1e-3 * 10 ** (p_b_dbm / 10)
    alpha = 0.8 * np.log(10) / 10
    l_eff = (1 - np.exp(-alpha)) / alpha
    m = 2 * 10.5 * l_eff * np.sqrt(pa * pb)
    for line in lines:
        k = line.line.k
        expected_w = np.exp(-alpha) * (pa * jv(k, m) ** 2 + pb * jv(k - 1, m) ** 2)
        assert line.power_dbm == pytest.approx(10 * np.log10(expected_w * 1e3), abs=0.01)


def test_lines_are_labelled_and_placed_on_the_grid() -> None:
    lines = output_lines(HNLF, 1550.0, 100.0, 15.0, 15.0, orders=2)
    assert [x.line for x in lines] == [
        LineId("sideband", "low", 2),
        LineId("sideband", "low", 1),
        LineId("tone", "low", 0),
        LineId("tone", "high", 0),
        LineId("sideband", "high", 1),
        LineId("sideband", "high", 2),
    ]
    f_a = C / 1550e-9 * 1e-12
    for line in lines:
        assert line.freq_thz == pytest.approx(f_a + line.line.k * 0.1, abs=1e-9)
        assert line.wavelength_nm == pytest.approx(C / (line.freq_thz * 1e12) * 1e9, rel=1e-12)
    d = lines[0].to_dict()
    assert set(d) == {"kind", "side", "order", "freq_thz", "wavelength_nm", "power_dbm"}
    assert (d["kind"], d["side"], d["order"]) == ("sideband", "low", 2)


def test_model_choice_follows_dispersion_figure() -> None:
    # docs/design.md §5.2: Bessel valid while |beta2| (2 pi delta)^2 L << 1.
    assert dispersion_figure(HNLF_FLAT, 1550.0, 100.0) == 0.0
    assert choose_model(HNLF_FLAT, 1550.0, 100.0) == "bessel"
    assert choose_model(G652, 1550.0, 50.0) == "nlse"
    # G.652-like: 21.7 ps^2/km * (2 pi 0.05 THz)^2 * 10 km ~ 21 >> 1.
    assert dispersion_figure(G652, 1550.0, 50.0) == pytest.approx(21.4, rel=0.02)
    assert output_powers_w(G652, 1550.0, 50.0, 0.01, 0.01)[1] == "nlse"


def test_dispersive_spool_uses_converged_split_step() -> None:
    lines = output_lines(G652, 1550.0, 50.0, 17.0, 17.0, orders=3)
    ref = propagate_tones(G652, 1550.0, 50.0, 0.05012, 0.05012, 3, rtol=1e-6)
    ref_dbm = 10 * np.log10(ref.powers_w * 1e3)
    got = np.array([x.power_dbm for x in lines])
    strong = ref_dbm > ref_dbm.max() - 60
    np.testing.assert_allclose(got[strong], ref_dbm[strong], atol=0.01)
    # Phase mismatch suppresses the sidebands far below the dispersion-free (Bessel) values.
    bessel = output_lines(G652, 1550.0, 50.0, 17.0, 17.0, orders=3, model="bessel")
    assert bessel[2].power_dbm > lines[2].power_dbm + 10  # low 1


def test_orthogonal_tone_b_passes_with_loss_only() -> None:
    for model in ("bessel", "nlse"):
        lines = output_lines(HNLF, 1550.0, 50.0, 15.0, 14.0, 2, copolar=0.0, model=model)
        by_k = {x.line.k: x.power_dbm for x in lines}
        assert by_k[1] == pytest.approx(14.0 - 0.8, abs=1e-9)
        assert by_k[0] == pytest.approx(15.0 - 0.8, abs=1e-9)
        assert by_k[-1] < -150 and by_k[2] < -150
        assert min(by_k.values()) >= MIN_POWER_DBM


def test_loss_only_at_vanishing_power() -> None:
    # Tiny launched powers: tones leave attenuated by the spool loss, 0.2 dB/km x 10 km = 2 dB.
    lines = output_lines(G652, 1550.0, 50.0, -40.0, -40.0, orders=1)
    tones = [x.power_dbm for x in lines if x.line.kind == "tone"]
    assert tones == pytest.approx([-42.0, -42.0], abs=1e-6)


def test_bad_arguments_raise() -> None:
    with pytest.raises(ValueError):
        output_lines(G652, 1550.0, -50.0, 10.0, 10.0)
    with pytest.raises(ValueError):
        output_lines(G652, 1550.0, 50.0, 10.0, 10.0, model="magic")
    with pytest.raises(ValueError):
        output_lines(G652, 1550.0, 50.0, 10.0, 10.0, copolar=1.5)
    assert len(output_lines(G652, 1550.0, 50.0, 10.0, 10.0, orders=0)) == len(grid_ks(0))
