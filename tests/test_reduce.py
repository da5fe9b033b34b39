"""Spectrum reduction against synthesised OSA traces (labrun.physics.osa) and outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from labrun.lines import grid_ks, line_id
from labrun.physics.osa import synthesize_trace
from labrun.physics.units import nm_to_thz, thz_to_nm
from labrun.reduce import NEB_PER_FWHM_GAUSSIAN, reduce_trace

C_NM_THZ = 299_792.458  # c in nm*THz (SI definition of c)


def _scene(f_a=193.1037, spacing_ghz=50.0, orders=3, powers=None, rbw=0.02, floor=-70.0,
           noise_db=0.0, seed=0, span_pad=0.4, sample=None):
    """Lines on the grid f_a + k delta (off the sample grid), their trace, and the truth."""
    ks = np.array(grid_ks(orders))
    f = f_a + ks * spacing_ghz * 1e-3
    wl = C_NM_THZ / f
    if powers is None:
        powers = np.array([-48.0 + 4 * (orders - abs(k if k <= 0 else k - 1)) for k in ks])
        powers[ks == 0], powers[ks == 1] = 2.0, 1.0
    step = rbw / 5.0 if sample is None else sample
    x = np.arange(wl.min() - span_pad, wl.max() + span_pad, step)
    y = synthesize_trace(x, wl, powers, rbw, floor_dbm=floor, noise_db=noise_db,
                         rng=np.random.default_rng(seed))
    return x, y, ks, f, np.asarray(powers, dtype=float)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_line_powers_recovered_within_0p1_db(seed):
    # Off-grid centres, samples at RBW/5, every line > 20 dB above the floor, noisy floor.
    rng = np.random.default_rng(100 + seed)
    f_a = 193.1 + rng.uniform(0, 0.05)
    powers = np.array([-47.0, -41.0, -22.0, 3.0, 0.0, -24.0, -43.0, -46.5])
    x, y, ks, f, truth = _scene(f_a=f_a, spacing_ghz=40.0 + 5 * seed, powers=powers,
                                floor=-70.0, noise_db=0.3, seed=seed)
    red = reduce_trace(x, y, 0.02, orders=3)
    assert [(ln.kind, ln.side, ln.order) for ln in red.lines] == [
        (line_id(int(k)).kind, line_id(int(k)).side, line_id(int(k)).order) for k in ks]
    got = np.array([ln.power_dbm for ln in red.lines])
    assert np.all(np.abs(got - truth) < 0.1), got - truth
    assert all(ln.detected for ln in red.lines)
    assert red.spacing_ghz == pytest.approx(40.0 + 5 * seed, abs=0.05)
    assert np.allclose([ln.freq_thz for ln in red.lines], f, atol=2e-4)
    assert red.floor_dbm == pytest.approx(-70.0, abs=0.5)
    assert red.flags == []


def test_frequency_axis_and_expected_positions_give_the_same_powers():
    x, y, ks, f, truth = _scene(orders=2)
    fx = C_NM_THZ / x
    red_f = reduce_trace(fx[::-1], y[::-1], float(np.mean(np.abs(np.diff(fx)))) * 5, x_unit="thz",
                         orders=2, expected_thz=(f[2], f[3]))
    got = np.array([ln.power_dbm for ln in red_f.lines])
    assert np.all(np.abs(got - truth) < 0.1)


def test_line_two_db_above_floor_is_an_upper_limit():
    powers = np.array([-80.0, -68.0, -30.0, 0.0, 0.0, -30.0, -40.0, -80.0])
    # high 2 at -68 dBm over a -70 dBm floor reads about 2 dB above the floor (power sum).
    powers[1] = -70.0 + 10 * np.log10(10 ** 0.2 - 1)
    x, y, ks, _, _ = _scene(powers=powers)
    red = reduce_trace(x, y, 0.02, orders=3, threshold_db=3.0)
    low2 = red.line("sideband", "low", 2)
    assert not low2.detected and low2.power_dbm is None
    assert low2.snr_db == pytest.approx(2.0, abs=0.1)
    assert low2.upper_limit_dbm == pytest.approx(-67.0, abs=0.1)  # floor + threshold
    assert red.to_dict()["lines"][1]["power_dbm"] is None
    assert red.line("sideband", "high", 2).detected


def test_osa_convention_peak_reads_total_power():
    # A line narrower than the RBW reads its total power at its peak (common practice); and
    # integrating the trace over the line divided by the Gaussian noise-equivalent bandwidth
    # 1.0645 x FWHM (mathematical fact: sqrt(pi/(4 ln 2))) gives the same power.
    assert abs(NEB_PER_FWHM_GAUSSIAN - 1.0645) < 5e-5
    # The same bandwidth by numerical integration of the unit-FWHM Gaussian (scipy.integrate).
    neb, _ = quad(lambda u: np.exp(-4 * np.log(2) * u * u), -np.inf, np.inf)
    assert abs(neb - NEB_PER_FWHM_GAUSSIAN) < 1e-9
    x, y, _, _, truth = _scene(floor=-90.0)
    for method in ("peak", "integrate"):
        red = reduce_trace(x, y, 0.02, orders=3, power_method=method)
        got = np.array([ln.power_dbm for ln in red.lines])
        assert np.all(np.abs(got - truth) < 0.02), (method, got - truth)
    # The trace maximum near tone a is its total power (within the sample offset loss).
    i = np.argmax(y)
    assert y[i] == pytest.approx(truth.max(), abs=0.5)


def test_saturation_flag_on_clipped_top():
    x, y, _, _, _ = _scene()
    clipped = np.minimum(y, -3.0)  # tones at +2/+1 dBm clip flat at -3 dBm
    red = reduce_trace(x, clipped, 0.02, orders=3)
    assert "saturation" in red.flags
    assert red.line("tone", "low", 0).saturated
    assert not red.line("sideband", "high", 1).saturated
    assert "saturation" not in reduce_trace(x, y, 0.02, orders=3).flags


def test_close_lines_and_narrow_span_flags():
    # 10 GHz = 0.08 nm = 1.6 RBW: still resolved, but closer than 2 x RBW.
    x, y, *_ = _scene(spacing_ghz=10.0, orders=1, rbw=0.05, span_pad=0.5)
    red = reduce_trace(x, y, 0.05, orders=1)
    assert "lines_closer_than_2rbw" in red.flags
    assert red.spacing_ghz == pytest.approx(10.0, abs=0.5)  # biased by overlap: hence the flag
    x, y, *_ = _scene(orders=1, span_pad=0.1)
    red = reduce_trace(x, y, 0.02, orders=4)
    assert "span_too_narrow" in red.flags
    outside = [ln for ln in red.lines if ln.floor_dbm is None]
    assert outside and all(not ln.detected and ln.power_dbm is None for ln in outside)
    assert red.line("sideband", "low", 1).detected


def test_missing_tone_flag():
    powers = np.array([-80.0, -80.0, 0.0, -90.0, -80.0, -80.0])  # tone b absent
    x, y, ks, f, _ = _scene(orders=2, powers=powers)
    red = reduce_trace(x, y, 0.02, orders=2, expected_thz=(f[2], f[3]))
    assert "missing_tone" in red.flags
    assert red.line("tone", "low", 0).detected
    assert not red.line("tone", "high", 0).detected
    red2 = reduce_trace(x, y, 0.02, orders=2)
    assert "missing_tone" in red2.flags and red2.lines == []


def test_itu_grid_anchor():
    # ITU-T G.694.1 table: 193.1 THz <-> 1552.52 nm (anchor of the DWDM grid).
    assert float(thz_to_nm(193.1)) == pytest.approx(1552.52, abs=0.005)
    assert float(nm_to_thz(1552.52)) == pytest.approx(193.1, abs=0.001)
    x, y, _, f, _ = _scene(f_a=193.1, spacing_ghz=100.0, orders=1)
    red = reduce_trace(x, y, 0.02, orders=1)
    tone_a = red.line("tone", "low", 0)
    assert tone_a.freq_thz == pytest.approx(193.1, abs=1e-4)
    assert tone_a.wavelength_nm == pytest.approx(1552.52, abs=0.005)
    # 100 GHz grid: tone b sits on the next ITU channel, 193.2 THz (G.694.1).
    assert red.line("tone", "high", 0).freq_thz == pytest.approx(193.2, abs=1e-4)


def test_bad_input_is_a_value_error():
    x = np.linspace(1550, 1551, 100)
    with pytest.raises(ValueError):
        reduce_trace(x, np.zeros(99), 0.02)
    with pytest.raises(ValueError):
        reduce_trace(x, np.full(100, np.nan), 0.02)
    with pytest.raises(ValueError):
        reduce_trace(x, np.zeros(100), -1.0)


def _weak_low2(snr_db: float) -> np.ndarray:
    """Line powers with low sideband 2 reading ``snr_db`` above a -70 dBm floor at its peak: the
    peak reads line + floor in mW (common practice), so line = floor + 10 log10(10^(snr/10) - 1)."""
    powers = np.array([-80.0, -70.0, -30.0, 0.0, 0.0, -30.0, -40.0, -80.0])
    powers[1] = -70.0 + 10 * np.log10(10 ** (snr_db / 10) - 1)
    return powers


@pytest.mark.parametrize("snr_db", [3.5, 4.0, 5.0, 6.0, 8.0, 10.0])
def test_weak_line_3_to_10_db_above_the_floor_is_recovered(snr_db):
    # The floor is subtracted in linear units, so a line a few dB above the floor comes back at
    # its own power, not at its peak reading (which is up to 3 dB high at 3 dB above the floor).
    powers = _weak_low2(snr_db)
    x, y, _, _, _ = _scene(powers=powers)
    red = reduce_trace(x, y, 0.02, orders=3, threshold_db=3.0)
    low2 = red.line("sideband", "low", 2)
    assert low2.detected and low2.upper_limit_dbm is None
    assert low2.snr_db == pytest.approx(snr_db, abs=0.1)
    assert low2.power_dbm == pytest.approx(powers[1], abs=0.15), low2.power_dbm - powers[1]
    peak_reading = -70.0 + snr_db
    assert abs(low2.power_dbm - peak_reading) > 0.4  # floor taken off: 0.41 dB even at 10 dB


@pytest.mark.parametrize(("offset", "detected"), [(+0.1, True), (-0.1, False)])
def test_detection_threshold_0p1_db_either_side(offset, detected):
    snr = 3.0 + offset  # threshold_db = 3.0
    x, y, _, _, _ = _scene(powers=_weak_low2(snr))
    low2 = reduce_trace(x, y, 0.02, orders=3, threshold_db=3.0).line("sideband", "low", 2)
    assert low2.detected is detected
    assert (low2.power_dbm is not None) is detected
    assert (low2.upper_limit_dbm is None) is detected
