"""The input-tap power meter as a row of the exact fit's launched-power offsets.

Line ratios cannot tell a common launched-power offset of both arms from gamma (the NLSE is
unchanged under P -> c P, gamma -> gamma / c; G. P. Agrawal, Nonlinear Fiber Optics); the
output tone ratio gives only the arms' difference. The total launched power read on the input
tap gives the rest. These tests build point tables by hand: the "measured" total is computed
here from the true offsets as the sum of the arms in mW (P[mW] = 10^(P[dBm]/10)), with numpy
alone, and the expected uncertainties from the GUM's combination (JCGM 100:2008 5.1.2: Type A
scatter of a mean, u^2 = s^2 / n, plus a Type B term that does not average down).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from labrun.exactfit import TAP_COLUMN, fit_power_offsets

OFF_A, OFF_B = 0.3, -0.1  # dB, what the arms really launch above the recorded powers
PRIOR_U = 0.2  # dB per arm, the bench's launched-power calibration uncertainty
OSA_U = 0.001  # dB, a precise tone ratio: the difference of the offsets is known


def _table(n: int = 9, noise_db: float = 0.0, seed: int = 3) -> dict[str, np.ndarray]:
    """Unequal arms (b 6 dB under a, then moving), tones and tap consistent with OFF_A/OFF_B."""
    pa = np.linspace(-2.0, 4.0, n)
    pb = pa - 6.0 + np.linspace(0.0, 3.0, n)
    total_mw = 10 ** ((pa + OFF_A) / 10) + 10 ** ((pb + OFF_B) / 10)
    tap = 10 * np.log10(total_mw) + np.random.default_rng(seed).normal(0.0, noise_db, n) \
        if noise_db else 10 * np.log10(total_mw)
    loss = 0.9  # the tones' output ratio keeps the launched one (no depletion here)
    return {"power_a_dbm": pa, "power_b_dbm": pb,
            "tone_low_0": pa + OFF_A - loss, "tone_high_0": pb + OFF_B - loss,
            TAP_COLUMN: tap}


def test_tap_fixes_the_common_offset() -> None:
    t = _table()
    fit = fit_power_offsets(t, np.zeros(9), PRIOR_U, PRIOR_U, OSA_U, u_tap_db=1e-3)
    # The difference from the tone ratio, the sum from the tap: both offsets recovered (the
    # tap row is relinearised, so the first-order weights leave no bias).
    assert fit.value == pytest.approx([OFF_A, OFF_B], abs=2e-4)
    assert fit.n_tap == 9
    # What the tap reads above the recorded total, at the recorded shares (independent sum).
    pa, pb = t["power_a_dbm"], t["power_b_dbm"]
    rec = 10 * np.log10(10 ** (pa / 10) + 10 ** (pb / 10))
    assert fit.tap_db == pytest.approx(float(np.mean(t[TAP_COLUMN] - rec)), abs=1e-12)


def test_without_the_tap_the_prior_holds_the_common_offset() -> None:
    # Mutation guard for the row: without it (the fit before the tap) the common part of the
    # offsets stays at the prior's zero: each arm is off by the truth's mean (0.1 dB).
    t = _table()
    fit = fit_power_offsets(t, np.zeros(9), PRIOR_U, PRIOR_U, OSA_U)
    assert fit.n_tap == 0
    assert fit.value == pytest.approx([0.2, -0.2], abs=2e-3)
    assert abs(fit.value[0] - OFF_A) > 0.09


def test_equal_weights_on_unequal_arms_would_miss() -> None:
    # The arms' shares of the total are unequal here (a carries 60-80 %): weights of 1/2 each
    # would put the sum 0.1 dB off. Recomputed in the test from the table alone.
    t = _table()
    share_a = 10 ** (t["power_a_dbm"] / 10) / (10 ** (t["power_a_dbm"] / 10)
                                               + 10 ** (t["power_b_dbm"] / 10))
    assert share_a.min() > 0.6
    fit = fit_power_offsets(t, np.zeros(9), PRIOR_U, PRIOR_U, OSA_U, u_tap_db=1e-3)
    d_rec = float(np.mean(t[TAP_COLUMN] - 10 * np.log10(10 ** (t["power_a_dbm"] / 10)
                                                          + 10 ** (t["power_b_dbm"] / 10))))
    diff = OFF_B - OFF_A
    equal = (d_rec - diff / 2, d_rec + diff / 2)  # 0.5 o_a + 0.5 o_b = d, o_b - o_a = diff
    assert abs(equal[0] - OFF_A) > 0.03  # the wrong weights would be caught ...
    assert fit.value[0] == pytest.approx(OFF_A, abs=2e-4)  # ... the right ones are exact


def test_tap_uncertainty_does_not_average_down() -> None:
    # Noiseless readings, a weak prior: the common part's uncertainty is the stated tap
    # uncertainty itself (Type B, one calibration for every point), however many points.
    u_tap = 0.02
    for n in (4, 30):
        t = _table(n)
        fit = fit_power_offsets(t, np.zeros(n), 10.0, 10.0, OSA_U, u_tap_db=u_tap)
        # the row's weights: the arms' mean linear shares (recomputed here)
        w = np.mean([r / r.sum() for r in 10 ** (np.stack(
            [t["power_a_dbm"] + OFF_A, t["power_b_dbm"] + OFF_B], 1) / 10)], axis=0)
        u_row = math.sqrt(float(w @ fit.cov @ w))
        assert u_row == pytest.approx(u_tap, rel=0.02)
        assert fit.tap_u_db == pytest.approx(u_tap, rel=1e-3)


def test_scatter_is_a_type_a_term() -> None:
    # Noisy readings (0.05 dB per point), no stated tap uncertainty: the row's u is the
    # standard error of the mean of the residuals, s / sqrt(n) (ddof = 1).
    n, noise = 25, 0.05
    t = _table(n, noise_db=noise)
    fit = fit_power_offsets(t, np.zeros(n), PRIOR_U, PRIOR_U, OSA_U, u_tap_db=0.0)
    shares = 10 ** (np.stack([t["power_a_dbm"] + fit.value[0],
                              t["power_b_dbm"] + fit.value[1]], 1) / 10)
    model = 10 * np.log10(shares.sum(axis=1))
    resid = t[TAP_COLUMN] - model
    assert fit.tap_u_db == pytest.approx(float(np.std(resid, ddof=1)) / math.sqrt(n), rel=0.02)
    assert abs(fit.value[0] - OFF_A) < 3 * fit.tap_u_db + 1e-3


def test_without_a_tone_ratio_the_tap_excess_goes_by_the_arms_shares() -> None:
    # No output tone ratio: the tap alone tells how far the total is off, and the prior (equal
    # per arm) splits that between the arms in proportion to their linear shares of the total
    # (least squares under the constraint; reference: scipy.optimize.minimize, SLSQP, on the
    # exact dB sum). Equal weights on these unequal arms would split it evenly (about 0.1 dB
    # off on arm a), a factor error in the weights moves both offsets.
    from scipy.optimize import minimize

    t = {k: v for k, v in _table().items() if not k.startswith("tone_")}
    fit = fit_power_offsets(t, np.zeros(9), PRIOR_U, PRIOR_U, OSA_U, u_tap_db=1e-5)

    def excess(o: np.ndarray) -> float:
        total = 10 * np.log10(10 ** ((t["power_a_dbm"] + o[0]) / 10)
                              + 10 ** ((t["power_b_dbm"] + o[1]) / 10))
        return float(np.mean(t[TAP_COLUMN] - total))

    ref = minimize(lambda o: float(o @ o) / PRIOR_U**2, np.zeros(2), method="SLSQP",
                   constraints=[{"type": "eq", "fun": excess}], tol=1e-12).x
    # (1e-3: the fit weighs the row by its Type A scatter, which the arms' changing shares
    # give it here, so it is nearly but not exactly the hard constraint of the reference)
    assert fit.value == pytest.approx(ref, abs=1e-3)
    assert fit.value[0] - fit.value[1] > 0.1  # arm a (the larger share) takes more
