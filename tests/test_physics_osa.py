"""OSA trace synthesis (docs/design.md §5.6): RBW shape, ENBW, floor, ASE, sensitivity, noise."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from labrun.physics.osa import (
    gaussian_enbw,
    rbw_response,
    sample_grid_nm,
    synthesize_trace,
)


def test_gaussian_enbw_is_1_0645_fwhm_by_integration() -> None:
    # Mathematics: the integral of a unit-peak Gaussian of FWHM w is sqrt(pi/(4 ln 2)) w
    # = 1.0645 w; checked by numerical integration (scipy.integrate.quad).
    for fwhm in (0.01, 0.1, 2.0):
        area, _ = quad(lambda x, w=fwhm: float(rbw_response(x, w)), -20 * fwhm, 20 * fwhm)
        assert gaussian_enbw(fwhm) == pytest.approx(area, rel=1e-9)
        assert gaussian_enbw(fwhm) == pytest.approx(1.0645 * fwhm, rel=1e-4)
    # FWHM by construction: half power at +-w/2.
    assert float(rbw_response(0.05, 0.1)) == pytest.approx(0.5, rel=1e-12)


def test_line_peak_reads_total_power_and_shape_is_gaussian() -> None:
    # A line narrower than the RBW reads its total power at its peak (common practice).
    x = sample_grid_nm(1550.0, 2.0, 20001)
    y = synthesize_trace(x, [1550.0], [3.0], 0.1, floor_dbm=None, sensitivity_dbm=-300.0)
    assert y.max() == pytest.approx(3.0, abs=1e-9)
    i = int(np.argmin(np.abs(x - 1550.05)))  # half the RBW away: -3.01 dB
    assert y[i] == pytest.approx(3.0 + 10 * np.log10(0.5), abs=1e-6)


def test_floor_ase_and_sensitivity_levels() -> None:
    x = sample_grid_nm(1550.0, 10.0, 2001)
    y = synthesize_trace(x, [], [], 0.1, floor_dbm=-70.0)
    np.testing.assert_allclose(y, -70.0)
    # Flat ASE of -30 dBm/nm reads -30 + 10 log10(1.0645 x 0.1 nm) per RBW, over the floor.
    y = synthesize_trace(x, [], [], 0.1, floor_dbm=None, ase_dbm_per_nm=-30.0)
    np.testing.assert_allclose(y, -30.0 + 10 * np.log10(1.0645 * 0.1), atol=5e-4)  # 1.0645 rounded
    # Nothing below the sensitivity limit.
    y = synthesize_trace(x, [1550.0], [-20.0], 0.05, floor_dbm=None, sensitivity_dbm=-85.0)
    assert y.min() == pytest.approx(-85.0)
    assert y.max() == pytest.approx(-20.0, abs=1e-6)


def test_lines_add_in_linear_power() -> None:
    # Incoherent lines in one RBW add in mW, not in dBm: 0 dBm + 0 dBm reads 3.01 dBm
    # (common practice: how an OSA reads unrelated sources).
    x = np.array([1550.0])
    y = synthesize_trace(x, [1550.0, 1550.0], [0.0, 0.0], 0.1, floor_dbm=None)
    assert y[0] == pytest.approx(10 * np.log10(2.0), abs=1e-9)


def test_seeded_noise_is_reproducible_and_has_the_asked_spread() -> None:
    x = sample_grid_nm(1550.0, 10.0, 20001)
    kw = {"floor_dbm": -70.0, "noise_db": 2.0}
    y1 = synthesize_trace(x, [1550.0], [0.0], 0.05, rng=np.random.default_rng(5), **kw)
    y2 = synthesize_trace(x, [1550.0], [0.0], 0.05, rng=np.random.default_rng(5), **kw)
    y3 = synthesize_trace(x, [1550.0], [0.0], 0.05, rng=np.random.default_rng(6), **kw)
    np.testing.assert_array_equal(y1, y2)
    assert not np.array_equal(y1, y3)
    far = np.abs(x - 1550.0) > 1.0
    assert np.std(y1[far]) == pytest.approx(2.0, rel=0.05)
    assert np.mean(y1[far]) == pytest.approx(-70.0, abs=0.1)
    assert y1.max() == pytest.approx(0.0, abs=1e-6)


def test_windowed_sum_equals_full_sum() -> None:
    # The fast path (only samples near each line) must equal the direct broadcast sum.
    rng = np.random.default_rng(1)
    x = sample_grid_nm(1550.0, 8.0, 4001)
    lw = rng.uniform(1546.0, 1554.0, 10)
    lp = rng.uniform(-60.0, 20.0, 10)
    fast = synthesize_trace(x, lw, lp, 0.2)
    direct = 10 * np.log10(rbw_response(x[:, None] - lw, 0.2) @ 10 ** (lp / 10) + 1e-7)
    np.testing.assert_allclose(fast, np.maximum(direct, -90.0), atol=1e-8)
    # An unsorted grid takes the direct path and gives the same readings.
    perm = rng.permutation(x.size)
    np.testing.assert_allclose(synthesize_trace(x[perm], lw, lp, 0.2), fast[perm], atol=1e-12)
