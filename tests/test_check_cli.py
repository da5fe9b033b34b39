"""``labrun check``: JSON keys, exit codes (0 ok, 1 cap violated, 2 bad input), nothing opened."""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest
from _no_visa import visa_refused
from _plan_support import BASE_PLAN, POWERS, bench_text, write_plan

from labrun.cli import main
from labrun.plan import load_plan
from labrun.resources import find_file
from labrun.vlab.lab import VirtualLab

SWEEPS = Path(__file__).resolve().parents[1] / "sweeps"


@pytest.fixture
def no_visa():
    """Make any attempt to open an instrument session fail loudly, except on the rehearsal's
    own simulated backend (labrun.rehearse: instruments that record instead of sending)."""
    with visa_refused(AssertionError):
        yield


def _files(tmp_path, plan_body=POWERS, **bench_kw):
    plan = write_plan(tmp_path, BASE_PLAN + plan_body)
    bench = tmp_path / "bench.toml"
    bench.write_text(bench_text(**bench_kw), encoding="utf-8")
    return plan, bench


def test_check_json_keys_and_values(tmp_path, capsys, no_visa):
    plan, bench = _files(tmp_path, settle_scale=1.0)
    assert main(["check", str(plan), "--bench", str(bench), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    for key in ("points", "estimated_s", "max_launched_dbm", "hazard_class", "violations", "osa",
                "first_points", "cautions"):
        assert key in report
    assert report["points"] == 3 and report["violations"] == []
    # laser cap 10 dBm, attenuator minimum 0 dB, losses 3.0 / 3.6 dB (bench_text defaults)
    assert report["max_launched_dbm"]["a"] == 7.0 and report["max_launched_dbm"]["b"] == 6.4
    total = 10 * math.log10(10 ** 0.7 + 10 ** 0.64)  # mW sum (common practice)
    assert report["max_launched_dbm"]["total"] == pytest.approx(total, abs=0.01)
    assert report["hazard_class"] == "Class 1"  # 10 mW on the bench (limits from memory)
    assert report["osa"]["reason"] and report["osa"]["rbw_nm"] > 0
    # duration: settling from the generic profiles (wavelength 0.5 s, then attenuation 0.1 s per
    # later point) plus one OSA sweep estimate per point; all positive and consistent
    est = report["estimate"]
    assert est["settle_s"] > 0.5 and report["estimated_s"] == pytest.approx(
        est["settle_s"] + est["osa_sweeps_s"], abs=0.11)
    first = report["first_points"][0]["commands"]
    texts = [c["text"] for c in first]
    assert "SOUR:POW 10.000" in texts and "INP:ATT 7.000" in texts and "INIT:IMM" in texts
    # the sources go on after their settings, the sweep after them
    on = texts.index("OUTP:STAT ON")
    assert texts.index("SOUR:POW 10.000") < on < texts.index("INIT:IMM")
    # the second point only changes the attenuators
    second = [c["text"] for c in report["first_points"][1]["commands"]]
    assert second == ["INP:ATT 5.000", "INP:ATT 4.400", "INIT:IMM"]


def test_check_axis_settle_times_count(tmp_path, capsys):
    body = POWERS.replace("values = [0.0, 2.0, 4.0]\n\n[axes.power_b",
                          "values = [0.0, 2.0, 4.0]\nsettle_s = 5.0\n\n[axes.power_b")
    plan, bench = _files(tmp_path, body, settle_scale=1.0)
    assert main(["check", str(plan), "--bench", str(bench), "--json"]) == 0
    slow = json.loads(capsys.readouterr().out)["estimate"]["settle_s"]
    plan, bench = _files(tmp_path, POWERS, settle_scale=1.0)
    main(["check", str(plan), "--bench", str(bench), "--json"])
    fast = json.loads(capsys.readouterr().out)["estimate"]["settle_s"]
    # first point: 5 s axis settle instead of the 0.5 s wavelength settle (generic laser profile);
    # the two later points: 5 s instead of the 0.1 s attenuation settle (generic attenuator)
    assert slow - fast == pytest.approx((5.0 - 0.5) + 2 * (5.0 - 0.1), abs=0.05)


def test_check_cap_violation_exits_1(tmp_path, capsys, no_visa):
    plan, bench = _files(tmp_path, total=8.0)
    assert main(["check", str(plan), "--bench", str(bench), "--json"]) == 1
    report = json.loads(capsys.readouterr().out)
    assert report["violations"][0]["field"] == "max_total_launched_dbm"
    assert main(["check", str(plan), "--bench", str(bench)]) == 1
    assert "REFUSED" in capsys.readouterr().out


def test_check_bad_plan_exits_2_with_one_line(tmp_path):
    plan, bench = _files(tmp_path, "[axes.power_a_dbm]\nstart = 0.0\nstep = 1.0\n")
    out = subprocess.run([sys.executable, "-m", "labrun", "check", str(plan), "--bench",
                          str(bench)], capture_output=True, text=True)
    assert out.returncode == 2
    err = out.stderr.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in out.stderr
    assert str(plan) in err and "axes.power_a_dbm.stop" in err


def test_check_bad_bench_exits_2(tmp_path, capsys):
    plan, bench = _files(tmp_path)
    bench.write_text(bench.read_text().replace("max_total_launched_dbm", "max_total_dbm"))
    assert main(["check", str(plan), "--bench", str(bench)]) == 2
    assert str(bench) in capsys.readouterr().err


def test_check_text_report(tmp_path, capsys, no_visa):
    plan, bench = _files(tmp_path)
    assert main(["check", str(plan), "--bench", str(bench)]) == 0
    out = capsys.readouterr().out
    for text in ("points 3", "worst-case launched power", "path a: 7.00 dBm", "Class 1",
                 "advisory", "RBW", "INP:ATT 7.000", "OK: no cap", "laser safety officer"):
        assert text in out


def test_shipped_sweeps_check_on_the_virtual_lab(tmp_path, capsys):
    scenario = find_file("default-scenario.toml", "sim_instruments")
    with VirtualLab(scenario, time_scale=0.0) as lab:
        bench = lab.write_bench(tmp_path / "vlab-bench.toml")
        for name in ("power-sweep.toml", "spacing-sweep.toml", "polarisation-sweep.toml"):
            code = main(["check", str(SWEEPS / name), "--bench", str(bench), "--json"])
            report = json.loads(capsys.readouterr().out)
            assert code == 0, report["violations"]
            assert report["points"] == len(load_plan(SWEEPS / name).points())
    power = load_plan(SWEEPS / "power-sweep.toml")
    assert len(power.points()) <= 50


def test_check_reports_a_rehearsal_that_gives_up_instead_of_a_traceback(tmp_path, capsys,
                                                                        no_visa):
    """Found by benchmarks/fuzz_inputs.py: a laser profile whose wavelength read-back can never
    pass (printed as 1.544801e+03, tolerance 0) made the rehearsal abort and 'check' end in a
    RunAborted traceback; now the report says why (exit 1)."""
    plan, bench = _files(tmp_path)
    laser = (find_file("generic-laser.toml", "drivers")).read_text(encoding="utf-8")
    laser = (laser.replace('name = "generic-laser"', 'name = "strict-laser"')
             .replace('command = "SOUR:WAV {value:.4f}"', 'command = "SOUR:WAV {value:.6e}"')
             .replace("tolerance = 0.002", "tolerance = 0"))
    (tmp_path / "strict-laser.toml").write_text(laser, encoding="utf-8")
    text = bench.read_text(encoding="utf-8")
    bench.write_text(text.replace('profile = "generic-laser"',
                                  f'profile = "{tmp_path / "strict-laser.toml"}"'))
    assert main(["check", str(plan), "--bench", str(bench), "--json"]) == 1
    report = json.loads(capsys.readouterr().out)
    assert report["refused"] and "read-back of set_wavelength_nm" in report["refusal"]
