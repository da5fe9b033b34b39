"""The engine reads the input-tap power meter once per point and stores the launched total.

On the virtual lab, the stored total (reading + the bench's input_tap_db) must equal the total
the lab really launched: each laser's setting plus its drawn offset, summed in mW
(P[mW] = 10^(P[dBm]/10), common practice), computed here from the lab's own state, within the
power meter's noise; the meter's calibration wavelength is set midway between the tones. A
power meter that fails is a fault like any other: retried, and when it stays away the run
ends dark with the points stored before.
"""

from __future__ import annotations

import numpy as np
import pytest
from _engine_support import DIALECTS, OPERATOR, dark, scenario, write_bench, write_plan
from scipy import constants

import labrun.reduce
from labrun.bench import load_bench
from labrun.engine import RetryPolicy, Seams, run_plan
from labrun.plan import load_plan
from labrun.queries import run_points
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab

POWERS = [-1.0, 1.5, 3.0]  # dBm per tone at the spool input (invented sweep)
NOISE_DB = 0.005  # the virtual power meter's reading noise (standard deviation)
REALISM = {"enabled": True, "laser_power_offset_db": 0.3, "power_meter_noise_db": NOISE_DB,
           "command_time_s": 0.0}


def _run(tmp_path, lab, seams=None):
    plan = load_plan(write_plan(tmp_path, POWERS))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                   progress=False, policy=RetryPolicy(attempts=2, backoff_s=0.0),
                   seams=seams)
    return store, out


@pytest.mark.parametrize("dialect", DIALECTS)
def test_stored_launched_total_is_the_labs_true_total(tmp_path, dialect):
    with VirtualLab(scenario(dialect=dialect, realism=REALISM), seed=5) as lab:
        offsets = [lab.state.lasers[r].power_offset_db for r in ("laser_a", "laser_b")]
        tap_db = lab.scenario.bench.input_tap_db
        store, out = _run(tmp_path, lab)
        assert out.status == "completed" and dark(lab)
        meter_nm = lab.state.power_meter.wavelength_nm
    # the meter is calibrated midway between the tones: 1550 nm and 100 GHz above it
    # (f = c / lambda, c from scipy.constants (CODATA))
    tone_b_nm = constants.c / (constants.c / 1550e-9 + 100e9) * 1e9
    assert meter_nm == pytest.approx((1550.0 + tone_b_nm) / 2, abs=1e-3)
    points = run_points(store, out.run_id)
    p = np.asarray(POWERS)
    true_total = 10 * np.log10(10 ** ((p + offsets[0]) / 10) + 10 ** ((p + offsets[1]) / 10))
    assert abs(sum(offsets)) > 0.1  # the drawn offsets are large enough to matter
    got = points["tap_launched_total_dbm"].to_numpy()
    assert got == pytest.approx(true_total, abs=4 * NOISE_DB)
    # what the recorded (set) powers alone would say is off by the drawn offsets
    recorded = 10 * np.log10(2 * 10 ** (p / 10))
    assert np.abs(got - recorded).min() > 4 * NOISE_DB
    # the reading itself is stored too, input_tap_db below the launched total
    assert points["tap_power_meter_dbm"].to_numpy() == pytest.approx(got - tap_db, abs=1e-9)


def test_plan_switch_turns_the_reading_off(tmp_path):
    with VirtualLab(scenario()) as lab:
        store, out = _run(tmp_path, lab)
        assert out.status == "completed"
        on = run_points(store, out.run_id)
        store.close()
        (tmp_path / "runs.db").unlink()
        plan = load_plan(write_plan(tmp_path, POWERS))
        plan.tap_power = False
        bench = load_bench(write_bench(lab, tmp_path))
        store = open_store(tmp_path / "runs.db")
        out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                       progress=False)
        off = run_points(store, out.run_id)
    assert on["tap_launched_total_dbm"].notna().all()
    assert "tap_launched_total_dbm" not in off


def test_a_dropped_power_meter_is_a_fault_and_the_point_still_gets_its_reading(tmp_path):
    calls = {"n": 0}
    with VirtualLab(scenario()) as lab:
        def reduce_then_drop(*args, **kwargs):
            calls["n"] += 1
            if calls["n"] == 1:  # after the first point: the meter's connection is lost
                lab.drop_connections("power_meter")
            return labrun.reduce.reduce_trace(*args, **kwargs)

        store, out = _run(tmp_path, lab, seams=Seams(reduce_trace=reduce_then_drop))
        assert out.status == "completed" and dark(lab)
    faults = store.events(out.run_id, ["fault"])
    assert any(e.role == "power_meter" for e in faults), [e.message for e in faults]
    assert run_points(store, out.run_id)["tap_launched_total_dbm"].notna().all()


def test_a_power_meter_gone_for_good_ends_the_run_dark_keeping_the_points(tmp_path):
    calls = {"n": 0}
    with VirtualLab(scenario()) as lab:
        def reduce_then_refuse(*args, **kwargs):
            calls["n"] += 1
            if calls["n"] == 1:
                lab.refuse("power_meter")
            return labrun.reduce.reduce_trace(*args, **kwargs)

        store, out = _run(tmp_path, lab, seams=Seams(reduce_trace=reduce_then_refuse))
        assert out.status != "completed" and out.exit_code != 0
        assert dark(lab)
    assert out.points_done == 1
    assert run_points(store, out.run_id)["tap_launched_total_dbm"].notna().all()
