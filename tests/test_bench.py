"""Bench loading: the shipped pyvisa-sim bench, and one-line errors naming file and field."""

from __future__ import annotations

from pathlib import Path

import pytest

from labrun.bench import load_bench
from labrun.errors import InputError
from labrun.resources import data_dir
from labrun.roles import ROLE_KINDS, SWEEP_ROLES

SIM_BENCH = data_dir("sim_instruments") / "bench-pyvisa-sim.toml"
SIM_TEXT = SIM_BENCH.read_text()


def test_sim_bench_loads():
    bench = load_bench(SIM_BENCH)
    assert set(bench.instruments) == set(ROLE_KINDS)
    assert bench.missing_sweep_roles() == []
    assert bench.settle_scale == 0.0 and bench.max_total_launched_dbm == 20.0
    assert bench.sim_file is not None and bench.sim_file.name == "fwm-devices.yaml"
    assert bench.calibration.path_loss_b_db == 3.2 and bench.calibration.input_tap_db == 20.0
    assert bench.instruments["laser_a"].max_power_dbm == 10.0
    assert bench.instruments["osa"].profile.name == "generic-osa-ascii"
    assert bench.instruments["attenuator_b"].kind == "attenuator"
    assert bench.sources() == ["laser_a", "laser_b", "amplifier"]
    assert bench.text == SIM_TEXT


def test_bench_by_shipped_name():
    assert load_bench("bench-pyvisa-sim.toml").name == "pyvisa-sim bench"


def test_partial_bench_and_defaults(tmp_path):
    path = tmp_path / "small.toml"
    path.write_text('[bench]\nname = "osa only"\nmax_total_launched_dbm = 18\n'
                    '[instruments.osa]\nresource = "TCPIP0::127.0.0.1::5106::SOCKET"\n'
                    'profile = "generic-osa"\n')
    bench = load_bench(path)
    assert bench.settle_scale == 1.0 and bench.calibration.path_loss_a_db == 0.0
    assert bench.calibration.tap_power_u_db == 0.1  # documented default (common practice)
    assert bench.calibration.osa_reading_noise_db == 0.1  # documented default (common practice)
    assert bench.instruments["osa"].backend == "@py"
    assert "laser_a" in bench.missing_sweep_roles()


def _edit(tmp_path: Path, old: str, new: str) -> Path:
    assert old in SIM_TEXT, old
    (tmp_path / "fwm-devices.yaml").write_text("spec: '1.1'\n")
    path = tmp_path / "bench.toml"
    path.write_text(SIM_TEXT.replace(old, new, 1))
    return path


BAD = [
    ("unknown role", "[instruments.switch]", "[instruments.switcher]", "instruments.switcher"),
    ("missing resource", 'resource = "TCPIP0::127.0.0.1::5101::SOCKET"\n', "",
     "instruments.laser_a.resource"),
    ("malformed resource", "TCPIP0::127.0.0.1::5101::SOCKET", "TCPIP0::127.0.0.1::SOCKET",
     "instruments.laser_a.resource"),
    ("unknown profile", 'profile = "generic-laser"', 'profile = "acme-laser"',
     "instruments.laser_a.profile"),
    ("profile of the wrong kind", 'profile = "generic-laser"', 'profile = "generic-switch"',
     "instruments.laser_a.profile"),
    ("cap not a number", "max_power_dbm = 10.0", 'max_power_dbm = "high"',
     "instruments.laser_a.max_power_dbm"),
    ("source without cap", "max_power_dbm = 10.0\n", "", "instruments.laser_a.max_power_dbm"),
    ("cap on a non-source", 'profile = "generic-switch"\n',
     'profile = "generic-switch"\nmax_power_dbm = 3.0\n', "instruments.switch.max_power_dbm"),
    ("misspelt field", "max_power_dbm = 10.0", "max_power_dbn = 10.0", "max_power_dbn"),
    ("total cap missing", "max_total_launched_dbm = 20.0\n", "", "bench.max_total_launched_dbm"),
    ("total cap not a number", "max_total_launched_dbm = 20.0", "max_total_launched_dbm = nan",
     "bench.max_total_launched_dbm"),
    ("sim_file missing", 'sim_file = "fwm-devices.yaml"', 'sim_file = "absent.yaml"',
     "bench.sim_file"),
    ("@sim without sim_file", 'sim_file = "fwm-devices.yaml"\n', "", "bench.sim_file"),
    ("unknown backend", 'backend = "@sim"', 'backend = "@gpib"', "instruments.laser_a.backend"),
    ("negative settle_scale", "settle_scale = 0.0", "settle_scale = -1.0", "bench.settle_scale"),
    ("tap missing with a power meter", "input_tap_db = 20.0\n", "", "calibration.input_tap_db"),
    ("bad calibration", "path_loss_a_db = 3.0", 'path_loss_a_db = "3 dB"',
     "calibration.path_loss_a_db"),
    # issue 13: finite numbers within physical ranges, booleans are not numbers
    ("infinite total cap", "max_total_launched_dbm = 20.0", "max_total_launched_dbm = inf",
     "bench.max_total_launched_dbm"),
    ("total cap of 1e308 dBm", "max_total_launched_dbm = 20.0",
     "max_total_launched_dbm = 1e308", "bench.max_total_launched_dbm"),
    ("total cap above 10 W", "max_total_launched_dbm = 20.0", "max_total_launched_dbm = 40.5",
     "bench.max_total_launched_dbm"),
    ("total cap a boolean", "max_total_launched_dbm = 20.0", "max_total_launched_dbm = true",
     "bench.max_total_launched_dbm"),
    ("nan settle_scale", "settle_scale = 0.0", "settle_scale = nan", "bench.settle_scale"),
    ("infinite settle_scale", "settle_scale = 0.0", "settle_scale = inf", "bench.settle_scale"),
    ("huge settle_scale", "settle_scale = 0.0", "settle_scale = 1e6", "bench.settle_scale"),
    ("infinite path loss", "path_loss_a_db = 3.0", "path_loss_a_db = inf",
     "calibration.path_loss_a_db"),
    ("nan path loss", "path_loss_b_db = 3.2", "path_loss_b_db = nan",
     "calibration.path_loss_b_db"),
    ("negative path loss", "path_loss_a_db = 3.0", "path_loss_a_db = -3.0",
     "calibration.path_loss_a_db"),
    ("path loss a boolean", "path_loss_a_db = 3.0", "path_loss_a_db = true",
     "calibration.path_loss_a_db"),
    ("infinite cap", "max_power_dbm = 10.0", "max_power_dbm = inf",
     "instruments.laser_a.max_power_dbm"),
    ("cap a boolean", "max_power_dbm = 10.0", "max_power_dbm = false",
     "instruments.laser_a.max_power_dbm"),
    # the tap power measurement's stated standard uncertainty (exact fit, issue 9)
    ("negative tap uncertainty", "input_tap_db = 20.0",
     "input_tap_db = 20.0\ntap_power_u_db = -0.1", "calibration.tap_power_u_db"),
    ("nan tap uncertainty", "input_tap_db = 20.0",
     "input_tap_db = 20.0\ntap_power_u_db = nan", "calibration.tap_power_u_db"),
    ("tap uncertainty as text", "input_tap_db = 20.0",
     'input_tap_db = 20.0\ntap_power_u_db = "0.1 dB"', "calibration.tap_power_u_db"),
    # the OSA's per-point reading noise of the Birge-ratio check (above 0: it divides by it)
    ("zero reading noise", "input_tap_db = 20.0",
     "input_tap_db = 20.0\nosa_reading_noise_db = 0", "calibration.osa_reading_noise_db"),
    ("negative reading noise", "input_tap_db = 20.0",
     "input_tap_db = 20.0\nosa_reading_noise_db = -0.1", "calibration.osa_reading_noise_db"),
    ("nan reading noise", "input_tap_db = 20.0",
     "input_tap_db = 20.0\nosa_reading_noise_db = nan", "calibration.osa_reading_noise_db"),
    ("reading noise as text", "input_tap_db = 20.0",
     'input_tap_db = 20.0\nosa_reading_noise_db = "0.1 dB"',
     "calibration.osa_reading_noise_db"),
]


@pytest.mark.parametrize("case", BAD, ids=[c[0] for c in BAD])
def test_bad_bench_names_file_and_field(tmp_path, case):
    _, old, new, field = case
    path = _edit(tmp_path, old, new)
    with pytest.raises(InputError) as info:
        load_bench(path)
    message = str(info.value)
    assert "\n" not in message
    assert str(path) in message and field in message, message


def test_missing_and_malformed_file(tmp_path):
    with pytest.raises(InputError, match="no such bench file"):
        load_bench(tmp_path / "absent.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[bench\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_bench(bad)


def test_unreadable_files_are_one_line(tmp_path):
    """Non-UTF-8, deeply nested and oversized bench files: one line naming the file."""
    from labrun.inputfile import MAX_TOML_BYTES

    cases = {
        "latin1.toml": SIM_TEXT.replace('name = "pyvisa-sim bench"', 'name = "b\u00e9nch"')
                               .encode("latin-1"),
        "deep.toml": b"x = " + b"[" * 5000 + b"]" * 5000 + b"\n",
        "nested.toml": b"x = " + b"[" * 40 + b"]" * 40 + b"\n",
        "big.toml": b"# " + b"x" * (MAX_TOML_BYTES - 2) + b"\n",  # one byte over the limit
    }
    expect = {"latin1.toml": "not UTF-8", "deep.toml": "nested deeper",
              "nested.toml": "nested deeper", "big.toml": "larger than"}
    for name, raw in cases.items():
        path = tmp_path / name
        path.write_bytes(raw)
        with pytest.raises(InputError) as info:
            load_bench(path)
        message = str(info.value)
        assert "\n" not in message and str(path) in message and expect[name] in message, message


def test_bad_profile_named_by_bench_reports_profile_file(tmp_path):
    profile = tmp_path / "my-laser.toml"
    text = (data_dir("drivers") / "generic-laser.toml").read_text()
    profile.write_text(text.replace('name = "generic-laser"', 'name = "my-laser"')
                       .replace("range = [-10.0, 13.0]", "range = [13.0, -10.0]"))
    path = _edit(tmp_path, 'profile = "generic-laser"', 'profile = "my-laser"')
    with pytest.raises(InputError) as info:
        load_bench(path)
    assert str(profile) in str(info.value)
    assert "operations.set_power_dbm.range" in str(info.value)


def test_sweep_roles_are_roles():
    assert set(SWEEP_ROLES) <= set(ROLE_KINDS)
