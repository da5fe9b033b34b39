"""Fibre-parameter fits against simulated spools (labrun.physics models plus seeded noise) and
published formulas / reference values."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import jv

from labrun.fits import (
    bessel_ratio,
    fit_power_slope,
    fit_run,
    invert_ratio,
    points_table,
    unique_limit,
)
from labrun.lines import grid_ks, line_id
from labrun.physics.bessel import first_sideband_ratio_equal, modulation_index, two_tone_powers
from labrun.physics.fibre import Fibre
from labrun.physics.fwm import inoue_efficiency, small_signal_sideband_w

KEYS = [f"{line_id(k).kind}_{line_id(k).side}_{line_id(k).order}" for k in grid_ks(3)]


def _bessel_points(fib: Fibre, seed: int, *, ratio_db=1.5, p_dbm=None,
                   noise_db=0.1, copolar=1.0):
    """Points from the dual-frequency model (physics.bessel) with seeded dB noise per line."""
    p_dbm = np.linspace(8, 24, 17) if p_dbm is None else p_dbm
    rng = np.random.default_rng(seed)
    t = np.exp(-fib.alpha_per_km * fib.length_km)
    pts = []
    for p in p_dbm:
        pa_w, pb_w = 10 ** (p / 10) * 1e-3, 10 ** ((p + ratio_db) / 10) * 1e-3
        m = modulation_index(fib.gamma_per_w_per_km, fib.effective_length_km, pa_w, pb_w)
        lines = two_tone_powers(pa_w, pb_w, m * np.sqrt(copolar), 3, t)
        dbm = 10 * np.log10(lines * 1e3) + rng.normal(0.0, noise_db, lines.size)
        row = dict(zip(KEYS, dbm, strict=True))
        row.update(power_a_dbm=p, power_b_dbm=p + ratio_db, spacing_ghz=25.0,
                   wavelength_a_nm=1550.0, copolar=copolar)
        pts.append(row)
    return pts


def _fwm_points(fib: Fibre, seed: int, wavelengths=(1550.0,), spacings=None,
                p_dbm=-4.0, noise_db=0.1):
    """Points from the small-signal model (physics.fwm, Inoue 1992) with seeded dB noise; low
    power by default, where the SPM/XPM mismatch the fits include (gamma P ~ 1e-3 /km) is
    below the noise."""
    spacings = np.linspace(10, 160, 24) if spacings is None else spacings
    rng = np.random.default_rng(seed)
    t = np.exp(-fib.alpha_per_km * fib.length_km)
    pw = 10 ** (p_dbm / 10) * 1e-3
    pts = []
    for lam in wavelengths:
        hi = np.asarray(small_signal_sideband_w(fib, pw, pw, lam, spacings, "high"))
        lo = np.asarray(small_signal_sideband_w(fib, pw, pw, lam, spacings, "low"))
        for sp, h, low in zip(spacings, hi, lo, strict=True):
            n = rng.normal(0.0, noise_db, 4)
            pts.append(dict(power_a_dbm=p_dbm, power_b_dbm=p_dbm, spacing_ghz=float(sp),
                            wavelength_a_nm=lam,
                            tone_low_0=10 * np.log10(pw * t * 1e3) + n[0],
                            tone_high_0=10 * np.log10(pw * t * 1e3) + n[1],
                            sideband_low_1=10 * np.log10(low * 1e3) + n[2],
                            sideband_high_1=10 * np.log10(h * 1e3) + n[3]))
    return pts


def test_boskovic_ratio_numerical_example():
    # Boskovic et al., Opt. Lett. 21, 1966 (1996): equal tones, first sideband / tone =
    # (J1^2 + J2^2)/(J0^2 + J1^2). Bessel values from Abramowitz and Stegun, table 9.1:
    # J0(1) = 0.7651976866, J1(1) = 0.4400505857, J2(1) = 0.1149034849.
    j0, j1, j2 = 0.7651976866, 0.4400505857, 0.1149034849
    expected = (j1**2 + j2**2) / (j0**2 + j1**2)
    assert expected == pytest.approx(0.26547, abs=1e-5)
    assert bessel_ratio(np.array(1.0), 1.0, True, True) == pytest.approx(expected, rel=1e-9)
    assert first_sideband_ratio_equal(1.0) == pytest.approx(expected, rel=1e-9)
    # Summing both sides makes the ratio independent of the power ratio (both tones scale
    # by P_a + P_b): the same 0.2655 at P_b/P_a = 3.
    assert bessel_ratio(np.array(1.0), 3.0, True, True) == pytest.approx(expected, rel=1e-9)
    # And the inversion gives m = 1 back.
    m = invert_ratio(np.array([expected]), np.array([3.0]), np.array([True]), np.array([True]),
                     np.array([2.5]))
    assert m[0] == pytest.approx(1.0, abs=1e-9)


def test_one_side_ratio_with_unequal_powers_matches_bessel_functions():
    # One-side ratios P_2/P_1 and P_-1/P_0 from P_k = P_a J_k^2 + P_b J_(k-1)^2 (Thompson and
    # Roy 1991), evaluated with scipy.special.jv as the reference library.
    m, pa, pb = 0.8, 1.0, 2.5
    p = {k: pa * jv(k, m) ** 2 + pb * jv(k - 1, m) ** 2 for k in (-1, 0, 1, 2)}
    rho = pb / pa
    assert bessel_ratio(np.array(m), rho, True, False) == pytest.approx(p[-1] / p[0], rel=1e-9)
    assert bessel_ratio(np.array(m), rho, False, True) == pytest.approx(p[2] / p[1], rel=1e-9)
    # Same powers from the physics module's two_tone_powers.
    lines = two_tone_powers(pa, pb, m, 1)  # k = -1, 0, 1, 2
    assert lines[3] / lines[2] == pytest.approx(p[2] / p[1], rel=1e-12)


def test_unique_range_is_the_first_turning_point():
    # The ratio is monotonic in m only up to its first maximum: find it independently with
    # scipy.special.jv and scipy.optimize.
    def neg_ratio(m):
        return -(jv(1, m) ** 2 + jv(2, m) ** 2) / (jv(0, m) ** 2 + jv(1, m) ** 2)

    ref = minimize_scalar(neg_ratio, bounds=(1.0, 3.5), method="bounded").x
    got = unique_limit(np.array([1.0]), np.array([True]), np.array([True]))[0]
    assert got == pytest.approx(ref, abs=0.01)


@pytest.mark.parametrize("seed", range(5))
def test_bessel_gamma_recovered_within_uncertainty(seed):
    # A dispersionless spool (Bessel regime); unequal tones (P_b = P_a + 1.5 dB).
    fib = Fibre(length_km=1.0, loss_db_per_km=0.9, gamma_per_w_per_km=10.5)
    res = fit_run(_bessel_points(fib, seed), fib.length_km, fib.loss_db_per_km)
    g = res["gamma_bessel"]
    # ~12 points used: the error over its standard error follows Student t with ~11 degrees of
    # freedom, for which 3.5 is the two-sided 99.5 % point (scipy.stats.t).
    assert abs(g.value - 10.5) < 3.5 * g.stderr, (g.value, g.stderr)
    assert g.stderr < 0.02 * 10.5
    assert g.unit == "1/(W km)" and g.n_points >= 8
    # Points past the first turning point of the ratio are left out and reported.
    assert g.extra["n_beyond_unique"] >= 1
    assert g.extra["m_max"] <= g.extra["m_unique_max"]


@pytest.mark.parametrize("seed", range(4))
def test_dispersion_recovered_within_uncertainty(seed):
    fib = Fibre(length_km=5.0, loss_db_per_km=0.6, gamma_per_w_per_km=2.2,
                dispersion_ps_per_nm_km=6.0)
    res = fit_run(_fwm_points(fib, seed), fib.length_km, fib.loss_db_per_km)
    d = res["dispersion"]
    assert abs(d.value - 6.0) < 3 * d.stderr, (d.value, d.stderr)
    assert d.stderr < 0.05 * 6.0
    assert d.residual_rms < 0.3  # noise was 0.1 dB per line
    g = d.extra["gamma_per_w_per_km"]
    assert abs(g - 2.2) < 3 * d.extra["gamma_stderr"]
    # The small-signal gamma with the efficiency correction from the fitted D agrees.
    gs = res["gamma_small_signal"]
    assert gs.extra["efficiency_corrected"]
    assert abs(gs.value - 2.2) < 3 * gs.stderr


@pytest.mark.parametrize("seed", range(3))
def test_dispersion_slope_from_several_pump_wavelengths(seed):
    fib = Fibre(length_km=4.0, loss_db_per_km=0.5, gamma_per_w_per_km=2.0,
                dispersion_ps_per_nm_km=4.0, dispersion_slope_ps_per_nm2_km=0.07,
                reference_wavelength_nm=1550.0)
    pts = _fwm_points(fib, seed, wavelengths=(1535.0, 1550.0, 1565.0))
    res = fit_run(pts, fib.length_km, fib.loss_db_per_km, reference_wavelength_nm=1550.0)
    d, s = res["dispersion"], res["dispersion_slope"]
    assert abs(d.value - 4.0) < 3 * d.stderr, (d.value, d.stderr)
    assert abs(s.value - 0.07) < 3 * s.stderr, (s.value, s.stderr)
    assert s.unit == "ps/(nm^2 km)"
    # Every result serialises to strict JSON (NaN becomes null), as the store keeps it.
    text = json.dumps({k: v.to_dict() for k, v in res.items()}, allow_nan=False)
    assert json.loads(text)["dispersion"]["unit"] == "ps/(nm km)"


@pytest.mark.parametrize("seed", range(2))
def test_normal_dispersion_reports_abs_d_and_the_slope_of_abs_d(seed):
    # D = -4 ps/(nm km), S = +0.07: the data fix only dbeta^2, so D and -D (with -S) fit
    # alike. The fit reports |D| = 4 and d|D|/dlambda = -S = -0.07, and says so.
    fib = Fibre(length_km=4.0, loss_db_per_km=0.5, gamma_per_w_per_km=2.0,
                dispersion_ps_per_nm_km=-4.0, dispersion_slope_ps_per_nm2_km=0.07,
                reference_wavelength_nm=1550.0)
    pts = _fwm_points(fib, seed, wavelengths=(1535.0, 1550.0, 1565.0))
    res = fit_run(pts, fib.length_km, fib.loss_db_per_km, reference_wavelength_nm=1550.0)
    d, s = res["dispersion"], res["dispersion_slope"]
    assert abs(d.value - 4.0) < 3 * d.stderr, (d.value, d.stderr)
    assert abs(s.value + 0.07) < 3 * s.stderr, (s.value, s.stderr)
    assert "|D|" in d.conventions and "d|D|/d(lambda)" in s.conventions
    assert any("sign of D is not measured" in w for w in d.warnings)


def test_gamma_without_dispersion_says_it_is_uncorrected():
    fib = Fibre(length_km=2.0, loss_db_per_km=0.7, gamma_per_w_per_km=9.0,
                dispersion_ps_per_nm_km=3.0)
    pts = _fwm_points(fib, 7, spacings=np.array([60.0]), p_dbm=3.0)
    res = fit_run(pts, 2.0, 0.7)
    assert "dispersion" not in res  # one spacing: nothing to fit, nothing claimed
    assert any("no phase-mismatch correction" in w for w in res["gamma_small_signal"].warnings)
    two = _fwm_points(fib, 7, spacings=np.array([20.0, 60.0]), p_dbm=3.0)
    refusal = fit_run(two, 2.0, 0.7)["dispersion"]
    assert math.isnan(refusal.value) and refusal.warnings[0].startswith("refused:")


def test_small_signal_gamma_with_known_dispersion():
    fib = Fibre(length_km=2.0, loss_db_per_km=0.7, gamma_per_w_per_km=9.0,
                dispersion_ps_per_nm_km=3.0)
    pts = _fwm_points(fib, 7, spacings=np.array([20.0, 60.0, 100.0, 140.0]), p_dbm=3.0)
    with_d = fit_run(pts, 2.0, 0.7, dispersion_ps_per_nm_km=3.0)["gamma_small_signal"]
    assert abs(with_d.value - 9.0) < 3 * with_d.stderr
    # Without the efficiency correction the mismatched points pull gamma low.
    raw = fit_run(pts, 2.0, 0.7, dispersion_ps_per_nm_km=0.0)
    assert raw["gamma_small_signal"].value < with_d.value - 3 * with_d.stderr


def test_inoue_efficiency_limits():
    # Inoue, J. Lightwave Technol. 10, 1553 (1992): eta -> 1 as dbeta -> 0, and for large
    # dbeta it follows the envelope alpha^2/(alpha^2 + dbeta^2), touching it where
    # sin^2(dbeta L/2) = 0 and never exceeding it by more than the bracket's maximum.
    alpha, length = 0.2 * np.log(10) / 10, 10.0
    assert inoue_efficiency(alpha, 1e-9, length) == pytest.approx(1.0, abs=1e-9)
    db = 2 * np.pi * np.arange(5, 50) / length
    env = alpha**2 / (alpha**2 + db**2)
    assert np.allclose(inoue_efficiency(alpha, db, length), env, rtol=1e-9)
    db = np.linspace(3.0, 30.0, 500)
    env = alpha**2 / (alpha**2 + db**2)
    e = np.exp(-alpha * length)
    eta = inoue_efficiency(alpha, db, length)
    assert np.all(eta >= env * (1 - 1e-12))
    assert np.all(eta <= env * (1 + 4 * e / (1 - e) ** 2) * (1 + 1e-12))


def test_power_slopes_per_order():
    # Small signal: sideband n grows as P^(2n+1) (J_n(m) ~ (m/2)^n / n!, docs/design.md §5.2; the
    # limiting form from Abramowitz and Stegun 9.1.7).
    fib = Fibre(length_km=1.0, loss_db_per_km=0.5, gamma_per_w_per_km=3.0)
    pts = _bessel_points(fib, 11, ratio_db=0.0, p_dbm=np.linspace(-2, 8, 11), noise_db=0.05)
    res = fit_run(pts, 1.0, 0.5)
    for n in (1, 2):
        for side in ("low", "high"):
            s = res[f"slope_{side}_{n}"]
            assert abs(s.value - (2 * n + 1)) < 0.1, (side, n, s.value)
            assert s.extra["ci_low"] < s.value < s.extra["ci_high"]
            assert s.extra["ci_high"] - s.extra["ci_low"] < 0.2


def test_power_slope_with_group_offsets():
    # Two spacing groups with different efficiency share one slope (common practice).
    x = np.tile(np.arange(0.0, 10.0, 1.0), 2)
    grp = np.repeat(["a", "b"], 10)
    y = 3.0 * x + np.where(grp == "a", -40.0, -52.0)
    r = fit_power_slope(x, y, grp, 1, "sideband_high_1")
    assert r.value == pytest.approx(3.0, abs=1e-9) and r.extra["n_groups"] == 2


def test_polarisation_visibility_and_extinction():
    # Scalar projection model (docs/design.md §5.5): small-signal sideband power proportional to the
    # copolar fraction (1 + s_a . s_b)/2, plus a residual b0; visibility (max - min)/(max + min).
    rng = np.random.default_rng(5)
    c = np.linspace(0.0, 1.0, 11)
    b0 = 0.02  # residual floor: model visibility 1/(1 + 2 b0)
    p_w = 1e-6 * (c + b0) * 10 ** (rng.normal(0, 0.05, c.size) / 10)
    pts = [dict(power_a_dbm=5.0, power_b_dbm=5.0, spacing_ghz=25.0, copolar=float(ci),
                tone_low_0=0.0, tone_high_0=0.0, sideband_high_1=10 * np.log10(p * 1e3))
           for ci, p in zip(c, p_w, strict=True)]
    res = fit_run(pts, 1.0, 0.5)
    vis = res["pol_visibility"]
    assert abs(vis.value - 1 / (1 + 2 * b0)) < 3 * vis.stderr
    ext = res["pol_extinction_db"]
    assert ext.value == pytest.approx(10 * np.log10((1 + b0) / b0), abs=0.3)


def test_points_as_dataframe_or_nested_lines_agree():
    fib = Fibre(length_km=1.0, loss_db_per_km=0.9, gamma_per_w_per_km=10.5)
    pts = _bessel_points(fib, 3)
    nested = []
    for p in pts:
        q = {k: v for k, v in p.items() if k not in KEYS}
        q["lines"] = [dict(kind=line_id(k).kind, side=line_id(k).side, order=line_id(k).order,
                           power_dbm=p[key], detected=True)
                      for k, key in zip(grid_ks(3), KEYS, strict=True)]
        nested.append(q)
    a = fit_run(pts, 1.0, 0.9)["gamma_bessel"]
    b = fit_run(nested, 1.0, 0.9)["gamma_bessel"]
    c = fit_run(pd.DataFrame(pts), 1.0, 0.9)["gamma_bessel"]
    assert a.value == b.value == c.value
    t = points_table([{"power_a_dbm": 1.0, "power_b_dbm": 2.0,
                       "lines": [{"kind": "sideband", "side": "low", "order": 1,
                                  "power_dbm": None, "detected": False}]}])
    assert np.isnan(t["sideband_low_1"][0])
    with pytest.raises(ValueError):
        fit_run([{"spacing_ghz": 10.0}], 1.0, 0.5)


def test_slope_plot_is_written(tmp_path):
    from labrun.plots import plot_power_slopes

    fib = Fibre(length_km=1.0, loss_db_per_km=0.5, gamma_per_w_per_km=3.0)
    pts = _bessel_points(fib, 2, ratio_db=0.0, p_dbm=np.linspace(-2, 8, 6))
    out = plot_power_slopes(tmp_path / "slopes.png", pts, fit_run(pts, 1.0, 0.5))
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    # Decoded by matplotlib's PNG reader: 7 x 4.5 in at 110 dpi, and one series per sideband
    # (low and high, orders 1 and 2) in the first four colours of matplotlib's default cycle.
    import matplotlib.colors
    import matplotlib.image

    img = matplotlib.image.imread(out)
    assert img.shape[:2] == (495, 770)
    for colour in ("C0", "C1", "C2", "C3"):
        rgb = np.array(matplotlib.colors.to_rgb(colour))
        assert np.sum(np.all(np.abs(img[..., :3] - rgb) <= 2 / 255, axis=-1)) > 10, colour
