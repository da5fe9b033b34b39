"""Every safety comparison tested 0.1 dB on either side of its limit, at plan time (before any
instrument is opened) and at run time (adapters before writing, the emission watch after each
sweep), and the advisory hazard class at its limits and at 1310 nm.

The expected limits are worked out here from the bench numbers (launched = laser - attenuation -
path loss, DEVELOPERS.md "Bench files"; powers summed in mW, P[mW] = 10^(P[dBm]/10), common
practice), not taken from labrun. A comparison made 0.5 dB (or even 0.1 dB) lenient fails here.
Hazard-class limits: IEC 60825-1 accessible emission limits for CW sources, recalled from memory
(advisory only; the standard and the site's laser safety officer decide).
"""

from __future__ import annotations

import math

import pytest
from _engine_support import OPERATOR, dark, long_powers, scenario, write_plan
from _plan_support import BASE_PLAN, POWERS, make_bench, make_plan

from labrun import safety
from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.errors import SafetyError
from labrun.instruments import open_bench
from labrun.plan import load_plan
from labrun.store import open_store
from labrun.vlab.lab import DEFAULT_CAPS_DBM, VirtualLab

STEP = 0.1  # dB either side of each limit


def _dbm_sum(*dbm: float) -> float:
    """Total of powers given in dBm, summed in mW (common practice)."""
    return 10.0 * math.log10(sum(10.0 ** (p / 10.0) for p in dbm))


def _caps(violations, field: str, role: str | None = None) -> list:
    return [v for v in violations if v.kind == "cap" and v.field == field
            and (role is None or v.role == role)]


# ------------------------------------------------------------------------------- plan time


@pytest.mark.parametrize(("offset", "refused"), [(+STEP, True), (0.0, False), (-STEP, False)])
def test_laser_level_against_its_bench_cap(tmp_path, offset, refused):
    cap = 8.0
    bench = make_bench(tmp_path, cap_a=cap)
    plan = make_plan(tmp_path, f"laser_a_dbm = {cap + offset!r}\n" + POWERS)
    found = _caps(safety.check_caps(plan, bench), "max_power_dbm", "laser_a")
    assert bool(found) is refused
    if refused:
        assert found[0].limit == cap and found[0].value == pytest.approx(cap + STEP)
        with pytest.raises(SafetyError, match="above the bench cap"):
            safety.instrument_settings(plan.points()[0].setpoint, bench)
    else:
        got = safety.instrument_settings(plan.points()[0].setpoint, bench)
        assert got.laser_a_dbm == pytest.approx(cap + offset)


@pytest.mark.parametrize(("offset", "refused"), [(+STEP, False), (-STEP, True)])
def test_worst_case_total_against_the_bench_total_cap(tmp_path, offset, refused):
    # Lasers at their caps (10 and 8 dBm), attenuators at their minimum (0 dB), path losses
    # 3.0 and 3.6 dB: paths 7.0 and 4.4 dBm, total worked out in mW.
    total = _dbm_sum(10.0 - 3.0, 8.0 - 3.6)
    bench = make_bench(tmp_path, cap_a=10.0, cap_b=8.0, loss_a=3.0, loss_b=3.6,
                       total=total + offset)
    found = _caps(safety.check_caps(make_plan(tmp_path, POWERS), bench),
                  "max_total_launched_dbm")
    assert bool(found) is refused
    if refused:
        assert found[0].value == pytest.approx(total, abs=1e-3)


@pytest.mark.parametrize(("offset", "refused"), [(+STEP, False), (0.0, False), (-STEP, True)])
def test_amplifier_output_against_its_bench_cap(tmp_path, offset, refused):
    # Highest total launched 14 dBm + amplifier_loss_db 0.5 dB = 14.5 dBm at the amplifier.
    need = 14.0 + 0.5
    bench = make_bench(tmp_path, amplifier=need + offset, amp_loss=0.5)
    plan = make_plan(tmp_path, "ratio_db = 0.0\n[axes.total_power_dbm]\nvalues = [10.0, 14.0]\n",
                     head=BASE_PLAN.replace('spool = "HNLF-A17"',
                                            'spool = "HNLF-A17"\namplifier = true'))
    found = _caps(safety.check_caps(plan, bench), "max_power_dbm", "amplifier")
    assert bool(found) is refused
    last = plan.points()[-1].setpoint
    if refused:
        assert found[0].value == pytest.approx(need, abs=1e-3)
        with pytest.raises(SafetyError):
            safety.instrument_settings({**last, "amplifier": True}, bench)
    else:
        got = safety.instrument_settings({**last, "amplifier": True}, bench)
        assert got.amplifier_dbm == pytest.approx(need, abs=1e-3)


# -------------------------------------------------------------------------------- run time


@pytest.mark.parametrize("role", ["laser_a", "amplifier"])
def test_source_adapter_refuses_a_setting_just_above_its_cap(tmp_path, role):
    data = scenario()
    data["instruments"]["amplifier"] = {"present": True}
    with VirtualLab(data) as lab:
        bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
        cap = bench.instruments[role].max_power_dbm
        assert cap == DEFAULT_CAPS_DBM[role]
        state = lab.state.lasers[role] if role.startswith("laser") else lab.state.amplifier
        with open_bench(bench, roles=[role]) as ins:
            before = state.power_dbm
            with pytest.raises(SafetyError, match="nothing was sent"):
                ins[role].set_power_dbm(cap + STEP)
            assert state.power_dbm == before  # refused before writing
            ins[role].set_power_dbm(cap - STEP)
            assert state.power_dbm == pytest.approx(cap - STEP)
            ins[role].set_power_dbm(cap)  # the cap itself is allowed
            assert state.power_dbm == pytest.approx(cap)
        assert lab.sources_off()


@pytest.mark.parametrize(("offset", "refused"), [(+STEP, True), (-STEP, False)])
def test_switch_on_refused_when_the_set_power_is_just_above_the_cap(tmp_path, offset, refused):
    with VirtualLab(scenario()) as lab:
        bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
        cap = bench.instruments["laser_a"].max_power_dbm
        with open_bench(bench, roles=["laser_a"]) as ins:
            with lab.state.lock:  # someone set the power on the front panel
                lab.state.lasers["laser_a"].power_dbm = cap + offset
            if refused:
                with pytest.raises(SafetyError, match="emission not enabled"):
                    ins["laser_a"].output_on()
                assert lab.sources_off()
            else:
                ins["laser_a"].output_on()
                assert lab.state.lasers["laser_a"].output
                ins["laser_a"].output_off()
        assert lab.sources_off()


N_POINTS = 6
AT_SWEEP = 3


@pytest.mark.parametrize(("offset", "cap_abort"), [(+STEP, True), (-STEP, False)])
def test_emission_watch_at_the_cap(tmp_path, offset, cap_abort):
    """Mid-run the laser (set at its cap, the level labrun uses when a plan pins none) is moved
    0.1 dB above or below the cap: above aborts at once as a cap breach, never re-read; below is
    a change behind labrun's back, confirmed by a re-read, and no cap breach."""
    with VirtualLab(scenario()) as lab:
        cap = DEFAULT_CAPS_DBM["laser_a"]
        osa, real = lab.instruments["osa"], lab.instruments["osa"].execute
        seen = {"sweeps": 0}

        def execute(message: str):
            if "INIT" in message.upper():
                seen["sweeps"] += 1
                if seen["sweeps"] == AT_SWEEP:
                    with lab.state.lock:
                        lab.state.lasers["laser_a"].power_dbm = cap + offset
            return real(message)

        osa.execute = execute
        plan = load_plan(write_plan(tmp_path, long_powers(N_POINTS)))
        bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
        store = open_store(tmp_path / "runs.db")
        out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                       progress=False)
        assert out.status == "aborted", out.reason
        assert ("above the bench cap" in out.reason) is cap_abort, out.reason
        faults = [e.message for e in store.events(out.run_id, ["fault"])]
        assert any("re-read" in m for m in faults) is not cap_abort, faults
        assert out.points_done == AT_SWEEP - 1
        assert dark(lab)


# ---------------------------------------------------------------------------- hazard class


@pytest.mark.parametrize(("mw", "expected"), [
    # IEC 60825-1, CW, 1400-1700 nm, long exposure (from memory): Class 1 up to 10 mW, Class 3R
    # up to 5 x the Class 1 limit (50 mW), Class 3B up to 0.5 W, Class 4 above. A class holds
    # powers that do not exceed its limit, so each limit itself belongs to the lower class.
    (10.0, "Class 1"), (10.0 * 10 ** (STEP / 10), "Class 3R"),
    (50.0, "Class 3R"), (50.0 * 10 ** (STEP / 10), "Class 3B"),
    (500.0, "Class 3B"), (500.0 * 10 ** (STEP / 10), "Class 4"),
])
def test_hazard_class_at_its_limits(mw, expected):
    assert safety.hazard_class(10.0 * math.log10(mw), 1550.0) == expected


def test_hazard_class_at_1310_nm_is_on_the_safe_side():
    # IEC 60825-1 (2007 edition, from memory): Class 1 AEL for 1200-1400 nm, long exposure,
    # 3.9e-4 * C4 * C7 W with C4 = 5 and C7 = 8, i.e. 15.6 mW; the Class 3B limit for CW is
    # 0.5 W at any wavelength from 315 nm up. labrun applies its 1400-1700 nm limits (10 mW)
    # from 1300 nm on, which classes a 1310 nm source no lower than the standard would.
    class1_1310_mw = 3.9e-4 * 5 * 8 * 1e3
    assert class1_1310_mw >= safety.CLASS_1_MW
    at = 1310.0
    assert safety.hazard_class(10.0 * math.log10(safety.CLASS_1_MW), at) == "Class 1"
    assert safety.hazard_class(10.0 * math.log10(safety.CLASS_1_MW) + STEP, at) != "Class 1"
    assert safety.hazard_class(10.0 * math.log10(500.0), at) == "Class 3B"
    assert safety.hazard_class(10.0 * math.log10(500.0) + STEP, at) == "Class 4"
    assert safety.hazard_class(10.0, 1299.0).startswith("not assessed")
