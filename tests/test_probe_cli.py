"""``labrun probe``: JSON and table output, exit codes 0/1/2, read-only behaviour."""

from __future__ import annotations

import json

from labrun.cli import main
from labrun.resources import data_dir
from labrun.trafficlog import TrafficLog

ROLES = {"laser_a", "laser_b", "attenuator_a", "attenuator_b", "pol_controller", "osa",
         "power_meter", "amplifier", "switch"}


def test_probe_sim_bench_json(inst_sim_bench_path, capsys, tmp_path):
    saved = tmp_path / "probe.jsonl"
    code = main(["probe", "--bench", str(inst_sim_bench_path), "--json",
                 "--traffic-log", str(saved)])
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["ok"] is True
    by_role = {i["role"]: i for i in out["instruments"]}
    assert set(by_role) == ROLES
    for item in by_role.values():
        assert item["idn"].startswith("LABRUN-PYSIM,")
        assert item["checks"] and all(c["ok"] for c in item["checks"]), item
        assert set(item) == {"role", "resource", "idn", "checks"}
        assert all(set(c) == {"operation", "ok", "detail"} for c in item["checks"])
    ops = {c["operation"] for c in by_role["osa"]["checks"]}
    assert {"read_trace_x", "read_trace_y", "read_rbw_nm", "read_points"} <= ops
    assert "129 points" in next(c["detail"] for c in by_role["osa"]["checks"]
                                if c["operation"] == "read_trace_y")
    # every read operation of every profile was exercised
    from labrun.bench import load_bench
    bench = load_bench(inst_sim_bench_path)
    for role, spec in bench.instruments.items():
        wanted = {op.name for op in spec.profile.read_operations()}
        assert wanted <= {c["operation"] for c in by_role[role]["checks"]}
    # read-only: nothing but *CLS (profile init) and the OSA transfer format was written
    writes = {e.text for e in TrafficLog.load(saved).writes()}
    assert writes == {"*CLS", "FORM:DATA ASC"}


def test_probe_table(inst_sim_bench_path, capsys):
    assert main(["probe", "--bench", str(inst_sim_bench_path)]) == 0
    out = capsys.readouterr().out
    assert "9 instruments, all checks ok" in out
    assert "read_interlock" in out and "closed" in out


def test_probe_shipped_bench_by_path(capsys):
    bench = data_dir("sim_instruments") / "bench-pyvisa-sim.toml"
    assert main(["probe", "--bench", str(bench), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["ok"] is True


def test_non_answering_instrument_is_one_line_exit_1(tmp_path, capsys, inst_free_port):
    bench = tmp_path / "dead.toml"
    bench.write_text('[bench]\nname = "dead"\nmax_total_launched_dbm = 20.0\n'
                     '[instruments.laser_a]\n'
                     f'resource = "TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"\n'
                     'profile = "generic-laser"\nmax_power_dbm = 10.0\n')
    assert main(["probe", "--bench", str(bench)]) == 1
    captured = capsys.readouterr()
    lines = captured.out.strip().splitlines()
    assert len(lines) == 2  # the instrument's line and the summary
    assert lines[0].startswith("laser_a") and "no answer" in lines[0]
    assert "Traceback" not in captured.out + captured.err
    assert main(["probe", "--bench", str(bench), "--json"]) == 1
    out = json.loads(capsys.readouterr().out)
    item = out["instruments"][0]
    assert item["idn"] == "" and not item["checks"][-1]["ok"]


def test_partial_failure_exit_1(inst_sim_bench_path, capsys, inst_free_port):
    text = inst_sim_bench_path.read_text()
    text = text.replace('resource = "TCPIP0::127.0.0.1::5109::SOCKET"\nbackend = "@sim"',
                        f'resource = "TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"\n'
                        'backend = "@py"')
    inst_sim_bench_path.write_text(text)
    assert main(["probe", "--bench", str(inst_sim_bench_path), "--json"]) == 1
    out = json.loads(capsys.readouterr().out)
    status = {i["role"]: all(c["ok"] for c in i["checks"]) for i in out["instruments"]}
    assert status.pop("switch") is False and all(status.values())


def test_bad_bench_exit_2_names_file_and_field(tmp_path, capsys):
    bench = tmp_path / "bad.toml"
    bench.write_text('[bench]\nname = "bad"\nmax_total_launched_dbm = 20.0\n'
                     '[instruments.laser_a]\nresource = "TCPIP0::127.0.0.1::5101::SOCKET"\n'
                     'profile = "generic-laser"\nmax_power_dbm = "lots"\n')
    assert main(["probe", "--bench", str(bench)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert str(bench) in err and "instruments.laser_a.max_power_dbm" in err


def test_bad_profile_exit_2_names_profile_file_and_field(tmp_path, capsys):
    text = (data_dir("drivers") / "generic-switch.toml").read_text()
    profile = tmp_path / "my-switch.toml"
    profile.write_text(text.replace('name = "generic-switch"', 'name = "my-switch"')
                       .replace("ROUT:PATH {value:d}", "ROUT:PATH {path:d}"))
    bench = tmp_path / "bench.toml"
    bench.write_text('[bench]\nname = "b"\nmax_total_launched_dbm = 20.0\n'
                     '[instruments.switch]\nresource = "TCPIP0::127.0.0.1::5109::SOCKET"\n'
                     'profile = "my-switch.toml"\n')
    assert main(["probe", "--bench", str(bench)]) == 2
    err = capsys.readouterr().err.strip()
    assert str(profile) in err and "operations.set_path" in err
    assert "lacks placeholder {value}" in err


def test_missing_bench_exit_2(tmp_path, capsys):
    assert main(["probe", "--bench", str(tmp_path / "absent.toml")]) == 2
    assert "absent.toml" in capsys.readouterr().err


def test_traffic_log_in_a_missing_folder_exit_2_before_any_instrument(tmp_path, capsys,
                                                                    inst_free_port):
    # The bench points at a closed port: had probe opened anything, it would report exit 1.
    bench = tmp_path / "bench.toml"
    bench.write_text('[bench]\nname = "b"\nmax_total_launched_dbm = 20.0\n'
                     '[instruments.switch]\n'
                     f'resource = "TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"\n'
                     'profile = "generic-switch"\n')
    target = tmp_path / "no-such-folder" / "probe.jsonl"
    assert main(["probe", "--bench", str(bench), "--traffic-log", str(target)]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and len(captured.err.strip().splitlines()) == 1
    assert str(target) in captured.err and "--traffic-log" in captured.err
