"""Units and the fibre record (docs/design.md §5.1) against standards and textbook values."""

from __future__ import annotations

import numpy as np
import pytest

from labrun.physics.fibre import Fibre
from labrun.physics.units import (
    beta2_ps2_per_km,
    beta3_ps3_per_km,
    dbm_to_mw,
    effective_length_km,
    ghz_to_nm_at,
    nm_to_thz,
    thz_to_nm,
    w_to_dbm,
)


def test_itu_grid_anchor() -> None:
    # ITU-T G.694.1: the DWDM grid anchor 193.1 THz is 1552.52 nm (vacuum).
    assert float(thz_to_nm(193.1)) == pytest.approx(1552.52, abs=0.005)
    assert float(nm_to_thz(1552.52)) == pytest.approx(193.1, abs=1e-3)  # 1552.52 is rounded
    # 100 GHz grid spacing is about 0.8 nm there (ITU-T G.694.1 tables).
    assert float(ghz_to_nm_at(100.0, 1552.52)) == pytest.approx(0.80, abs=0.005)


def test_dbm_and_effective_length() -> None:
    # 0 dBm = 1 mW, 30 dBm = 1 W (common practice).
    assert float(dbm_to_mw(0.0)) == 1.0
    assert float(w_to_dbm(1.0)) == pytest.approx(30.0)
    # L_eff = (1 - exp(-alpha L))/alpha (Agrawal): 0.2 dB/km over 10 km by hand.
    a = 0.2 * np.log(10) / 10
    assert effective_length_km(10.0, 0.2) == pytest.approx((1 - np.exp(-10 * a)) / a)
    assert effective_length_km(10.0, 0.0) == 10.0


def test_beta3_is_derivative_of_beta2() -> None:
    # beta3 = d beta2/d omega (Agrawal): finite difference of beta2(omega) with D(lambda) linear.
    fibre = Fibre(10.0, 0.2, 1.3, 17.0, 0.057, 1550.0)
    f0, df = float(nm_to_thz(1550.0)), 1e-3  # THz
    b2 = [fibre.beta2_at(float(thz_to_nm(f))) for f in (f0 - df, f0 + df)]
    fd = (b2[1] - b2[0]) / (2 * np.pi * 2 * df)  # ps^2/km per rad/ps
    assert fibre.beta3_at(1550.0) == pytest.approx(fd, rel=1e-5)
    assert float(beta3_ps3_per_km(17.0, 0.057, 1550.0)) == pytest.approx(fd, rel=1e-5)
    # Standard fibre near 1550 nm: beta3 about 0.1 ps^3/km (Agrawal, from memory).
    assert 0.05 < fibre.beta3_at(1550.0) < 0.2
    assert float(beta2_ps2_per_km(0.0, 1550.0)) == 0.0
