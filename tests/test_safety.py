"""Safety: worst case after calibration, caps and ranges, settings at fixed laser level, hazard."""

from __future__ import annotations

import dataclasses
import math

import pytest
from _plan_support import BASE_PLAN, POWERS, make_bench, make_plan

from labrun import safety
from labrun.errors import SafetyError


def _dbm_sum(*dbm: float) -> float:
    """Sum of powers in dBm via mW (P[mW] = 10^(P[dBm]/10), common practice)."""
    return 10 * math.log10(sum(10 ** (p / 10) for p in dbm))


def test_worst_case_per_path_and_total_after_calibration(tmp_path):
    bench = make_bench(tmp_path, cap_a=10.0, cap_b=8.0, loss_a=3.0, loss_b=3.6)
    plan = make_plan(tmp_path, POWERS)
    wc = safety.worst_case(plan, bench)
    # max laser power - minimum attenuation (generic attenuator: 0 dB) - path loss
    assert wc.path_dbm == pytest.approx({"a": 7.0, "b": 4.4})
    assert wc.total_dbm == pytest.approx(_dbm_sum(7.0, 4.4))
    assert wc.planned_dbm["a"] == 4.0 and wc.planned_dbm["total"] == pytest.approx(7.0103, 1e-4)
    assert wc.max_launched_dbm == {"a": 7.0, "b": 4.4, "total": round(_dbm_sum(7.0, 4.4), 2)}
    assert wc.highest_dbm == 10.0 and not wc.amplifier
    assert "path a 7.00 dBm" in wc.describe()


def test_pinned_laser_level_lowers_the_worst_case(tmp_path):
    bench = make_bench(tmp_path)
    plan = make_plan(tmp_path, "laser_a_dbm = 8.0\nlaser_b_dbm = 8.0\n" + POWERS)
    wc = safety.worst_case(plan, bench)
    assert wc.path_dbm == pytest.approx({"a": 5.0, "b": 4.4})
    assert safety.check_caps(plan, bench) == []


def test_worst_case_with_amplifier(tmp_path):
    bench = make_bench(tmp_path, amplifier=20.0, amp_loss=0.5)
    plan = make_plan(tmp_path, POWERS, head=BASE_PLAN.replace(
        'spool = "HNLF-A17"', 'spool = "HNLF-A17"\namplifier = true'))
    wc = safety.worst_case(plan, bench)
    amp = _dbm_sum(4.0, 4.0) + 0.5  # total launched + amplifier_loss_db
    assert wc.source_dbm["amplifier"] == pytest.approx(amp)
    # the whole amplifier output could sit in one tone
    assert wc.path_dbm == pytest.approx({"a": amp - 0.5, "b": amp - 0.5})
    assert wc.total_dbm == pytest.approx(amp - 0.5)
    assert wc.amplifier


def test_instrument_settings_realise_launched_power_at_fixed_laser(tmp_path):
    bench = make_bench(tmp_path, loss_a=3.0, loss_b=3.6)
    plan = make_plan(tmp_path, POWERS)
    got = [safety.instrument_settings(p.setpoint, bench) for p in plan.points()]
    assert {g.laser_a_dbm for g in got} == {10.0} and {g.laser_b_dbm for g in got} == {10.0}
    for p, g in zip(plan.points(), got, strict=True):
        # launched = laser - attenuation - path loss (DEVELOPERS.md, "Bench files")
        assert g.laser_a_dbm - g.attenuation_a_db - 3.0 == pytest.approx(p.setpoint["power_a_dbm"])
        assert g.laser_b_dbm - g.attenuation_b_db - 3.6 == pytest.approx(p.setpoint["power_b_dbm"])
        assert g.amplifier_dbm is None
    assert [g.attenuation_a_db for g in got] == [7.0, 5.0, 3.0]


def test_instrument_settings_with_amplifier_sets_ratio_and_total(tmp_path):
    bench = make_bench(tmp_path, amplifier=20.0, amp_loss=0.5)
    plan = make_plan(tmp_path, "ratio_db = -2.0\n[axes.total_power_dbm]\nvalues = [10.0, 14.0]\n",
                     head=BASE_PLAN.replace('spool = "HNLF-A17"',
                                            'spool = "HNLF-A17"\namplifier = true'))
    for p in plan.points():
        g = safety.instrument_settings(p.setpoint, bench)
        into_a = g.laser_a_dbm - g.attenuation_a_db - 3.0
        into_b = g.laser_b_dbm - g.attenuation_b_db - 3.6
        assert into_b - into_a == pytest.approx(-2.0, abs=1e-3)  # tone ratio into the amplifier
        assert g.amplifier_dbm == pytest.approx(
            _dbm_sum(p.setpoint["power_a_dbm"], p.setpoint["power_b_dbm"]) + 0.5, abs=1e-3)
    assert safety.check_caps(plan, bench) == []


def test_unreachable_power_is_refused(tmp_path):
    bench = make_bench(tmp_path, cap_a=10.0, loss_a=3.0)
    plan = make_plan(tmp_path, "power_b_dbm = 0.0\n[axes.power_a_dbm]\nvalues = [5.0, 8.0]\n")
    with pytest.raises(SafetyError):
        safety.instrument_settings(plan.points()[1].setpoint, bench)
    violations = safety.check_caps(plan, bench)
    assert len(violations) == 1 and violations[0].point == 1
    assert "needs laser_a at 11.00 dBm" in str(violations[0])


def test_cap_violations(tmp_path):
    # bench total cap below the worst case
    bench = make_bench(tmp_path, total=8.0)
    plan = make_plan(tmp_path, POWERS)
    v = safety.check_caps(plan, bench)
    assert [x.field for x in v] == ["max_total_launched_dbm"]
    assert v[0].kind == "cap" and v[0].limit == 8.0 and v[0].value > 8.0
    # a pinned laser level above the source's cap
    bench = make_bench(tmp_path, name="b2.toml", cap_a=6.0)
    plan = make_plan(tmp_path, "laser_a_dbm = 9.0\n" + POWERS, name="p2.toml")
    v = safety.check_caps(plan, bench)
    assert any(x.kind == "cap" and x.role == "laser_a" and x.limit == 6.0 for x in v)
    with pytest.raises(SafetyError):
        safety.instrument_settings(plan.points()[0].setpoint, bench)


def test_profile_ranges_and_missing_roles(tmp_path):
    bench = make_bench(tmp_path)
    head = BASE_PLAN.replace("1550.0", "1480.0")  # generic laser tunes 1500-1630 nm
    plan = make_plan(tmp_path, "pol_angles_deg = [0.0, 400.0, 0.0]\n" + POWERS, head=head)
    v = safety.check_caps(plan, bench)
    fields = {(x.role, x.field) for x in v}
    assert ("laser_a", "set_wavelength_nm") in fields
    assert ("pol_controller", "set_angle_deg") in fields
    assert all(x.kind == "range" for x in v)
    bench = make_bench(tmp_path, name="b2.toml", drop=("attenuator_b",))
    v = safety.check_caps(make_plan(tmp_path, POWERS, name="p2.toml"), bench)
    assert [(x.kind, x.role) for x in v] == [("bench", "attenuator_b")]


def test_input_capture_needs_a_switch(tmp_path):
    plan = make_plan(tmp_path, POWERS + "[osa]\ncapture_input = true\n")
    assert [x.role for x in safety.check_caps(plan, make_bench(tmp_path))] == ["switch"]
    assert safety.check_caps(plan, make_bench(tmp_path, name="s.toml", switch=True)) == []


@pytest.mark.parametrize(("mw", "expected"), [
    # Limits from memory (advisory only; consult IEC 60825-1 and your laser safety officer):
    # Class 1 <= 10 mW, 3R <= 50 mW (5 x Class 1), 3B <= 500 mW, Class 4 above, CW 1.4-1.7 um.
    (1.0, "Class 1"), (9.99, "Class 1"), (10.0, "Class 1"), (10.01, "Class 3R"),
    (49.9, "Class 3R"), (50.1, "Class 3B"), (499.0, "Class 3B"), (501.0, "Class 4"),
    (2000.0, "Class 4"),
])
def test_hazard_class_boundaries(mw, expected):
    assert safety.hazard_class(10 * math.log10(mw), 1550.0) == expected


def test_hazard_class_outside_band_is_not_assessed():
    assert safety.hazard_class(0.0, 1064.0).startswith("not assessed")
    assert "from memory" in safety.HAZARD_NOTE and "laser safety officer" in safety.HAZARD_NOTE


def test_cautions_text():
    text = safety.CAUTIONS.lower()
    for phrase in ("eye", "skin", "invisible", "never look into a fibre end", "connector",
                   "cap every unused connector", "eyewear", "laser safety officer", "local rules"):
        assert phrase in text


def test_amplifier_set_point_above_its_cap_is_refused(tmp_path, capsys):
    """plan.amplifier = true: the amplifier output (total launched + amplifier_loss_db) is
    checked against the amplifier's bench cap, by check_caps and by ``labrun check`` (exit 1)."""
    from labrun.cli import main

    bench = make_bench(tmp_path, amplifier=10.0, amp_loss=0.5)
    body = POWERS.replace("4.0]", "7.0]")
    plan = make_plan(tmp_path, body, head=BASE_PLAN.replace(
        'spool = "HNLF-A17"', 'spool = "HNLF-A17"\namplifier = true'))
    assert plan.amplifier
    amp = _dbm_sum(7.0, 7.0) + 0.5  # 10.51 dBm > 10 dBm cap (P[mW] = 10^(dBm/10), common practice)
    violations = safety.check_caps(plan, bench)
    assert [(v.role, v.field, v.point) for v in violations] == [("amplifier", "max_power_dbm", 2)]
    assert violations[0].value == pytest.approx(amp, abs=1e-3) and violations[0].limit == 10.0
    rc = main(["check", str(tmp_path / "plan.toml"), "--bench", str(tmp_path / "bench.toml"),
               "--json"])
    import json

    report = json.loads(capsys.readouterr().out)
    assert rc == 1 and report["refused"]
    assert report["violations"][0]["role"] == "amplifier"
    assert report["worst_case"]["source_dbm"]["amplifier"] == pytest.approx(amp, abs=0.01)
    # the same plan with the amplifier cap raised passes
    ok_bench = make_bench(tmp_path, name="ok.toml", amplifier=11.0, amp_loss=0.5)
    assert safety.check_caps(plan, ok_bench) == []


def _narrowed(bench, role: str, op: str, value: float):
    """``bench`` with ``role``'s operation ``op`` allowed only above ``value`` (invented range)."""
    spec = bench.instruments[role]
    ops = dict(spec.profile.operations)
    ops[op] = ops[op].model_copy(update={"range": (value + 1.0, value + 2.0)})
    profile = dataclasses.replace(spec.profile, operations=ops)
    return dataclasses.replace(bench, instruments={
        **bench.instruments, role: dataclasses.replace(spec, profile=profile)})


def _run_refuses(plan, bench) -> bool:
    """True when the run would refuse the plan's first point before sending anything: the
    engine's settings for it (Runner.settings_for) refused by safety or by an adapter."""
    from labrun.engine import RetryPolicy, Runner
    from labrun.errors import InputError
    from labrun.instruments import ADAPTERS
    from labrun.shutdown import SafeOffGuard

    runner = Runner(plan, bench, None, 0, SafeOffGuard(bench), policy=RetryPolicy())
    try:
        for s in runner.settings_for(plan.points()[0].setpoint):
            spec = bench.instruments[s.role]
            ADAPTERS[spec.kind](spec, None).planned(s.method, s.value)  # type: ignore[arg-type]
    except (InputError, SafetyError):
        return True
    return False


@pytest.mark.parametrize("amplifier", [False, True])
def test_the_plan_check_refuses_what_the_run_would_refuse(tmp_path, amplifier):
    """Each profile operation the run commands for a point is narrowed to exclude the value it
    gets: the plan check (check_caps, no instrument opened) refuses the point exactly when the
    run (the engine's settings on that bench, then the adapters' range checks) would, naming
    the role's operation or the launched power it cannot reach. Invented values."""
    from labrun.engine import RetryPolicy, Runner
    from labrun.instruments import ADAPTERS
    from labrun.shutdown import SafeOffGuard

    head = BASE_PLAN + ("pol_angles_deg = [10.0, 20.0, 30.0]\n" if not amplifier else "")
    if amplifier:
        head = head.replace('spool = "HNLF-A17"', 'spool = "HNLF-A17"\namplifier = true')
    bench = make_bench(tmp_path, amplifier=20.0 if amplifier else None)
    plan = make_plan(tmp_path, POWERS, head=head)
    assert safety.check_caps(plan, bench) == [] and not _run_refuses(plan, bench)
    runner = Runner(plan, bench, None, 0, SafeOffGuard(bench), policy=RetryPolicy())
    refused = set()
    for s in runner.settings_for(plan.points()[0].setpoint):
        spec = bench.instruments[s.role]
        for planned in ADAPTERS[spec.kind](spec, None).planned(s.method, s.value):  # type: ignore[arg-type]
            target = planned.target
            op, value = planned.op.name, float(target[0] if isinstance(target, tuple) else target)
            narrow = _narrowed(bench, s.role, op, value)
            found = [(v.role, v.field) for v in safety.check_caps(plan, narrow) if v.point == 0]
            assert bool(found) is _run_refuses(plan, narrow), (s, op, found)
            if found:
                assert (s.role, op) in found or ("attenuator", "launched_power") in found, found
                refused.add((s.role, op))
    # every operation, once narrowed, is refused by both; the amplified attenuations only set
    # the tone ratio (a higher minimum moves both, and the point stays reachable)
    ops = {(r, "set_wavelength_nm") for r in ("laser_a", "laser_b", "attenuator_a",
                                              "attenuator_b")}
    ops |= {("laser_a", "set_power_dbm"), ("laser_b", "set_power_dbm")}
    ops |= {("amplifier", "set_power_dbm")} if amplifier else {
        ("attenuator_a", "set_attenuation_db"), ("attenuator_b", "set_attenuation_db"),
        ("pol_controller", "set_angle_deg")}
    assert refused == ops
