"""``labrun sim spectrum`` and ``labrun sim serve``, and the shipped scenario.

External references: scipy.special.jv for the Bessel two-tone model (docs/design.md §5.2,
Thompson and Roy, Phys. Rev. A 43, 4987 (1991)); ITU-T G.652 for the standard-fibre-like spool.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy.special import jv

from labrun.bench import load_bench
from labrun.cli import main
from labrun.errors import InputError
from labrun.tracefile import read_trace_csv
from labrun.vlab.scenario import load_scenario

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"

FLAT_SCENARIO = """
connected = "FLAT-Z1"
[[spools]]
name = "FLAT-Z1"             # invented dispersion-free spool
length_km = 2.0
loss_db_per_km = 0.5
gamma_per_w_per_km = 10.0
dispersion_ps_per_nm_km = 0.0
dispersion_slope_ps_per_nm2_km = 0.0
reference_wavelength_nm = 1550.0
"""


def run_cli(capsys, *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("pol_deg", [0.0, 40.0])
def test_spectrum_json_matches_independent_bessel_calculation(tmp_path, capsys, pol_deg):
    scenario = tmp_path / "flat.toml"
    scenario.write_text(FLAT_SCENARIO)
    pa_dbm, pb_dbm = 17.0, 15.0
    code, out, _ = run_cli(capsys, "sim", "spectrum", "--scenario", str(scenario), "--spool",
                           "FLAT-Z1", "--power-a-dbm", str(pa_dbm), "--power-b-dbm", str(pb_dbm),
                           "--wavelength-a-nm", "1550", "--spacing-ghz", "50", "--orders", "3",
                           "--pol-angle-deg", str(pol_deg), "--json")
    assert code == 0
    lines = json.loads(out)["lines"]
    assert len(lines) == 8
    # Independent: P_k = T [Pa J_k(m)^2 + Pb J_(k-1)(m)^2] (docs/design.md §5.2) with
    # scipy.special.jv, m = 2 gamma L_eff sqrt(Pa Pb) cos(Theta/2) (§5.5: the index scales with
    # cos(Theta/2), Theta = 2 x the angle between linear polarisations, so
    # cos^2(Theta/2) = cos^2(angle)).
    alpha = 0.5 * np.log(10) / 10
    l_eff = (1 - np.exp(-alpha * 2.0)) / alpha          # Agrawal, Nonlinear Fiber Optics
    t = np.exp(-alpha * 2.0)
    pa, pb = 10 ** (pa_dbm / 10) * 1e-3, 10 ** (pb_dbm / 10) * 1e-3
    c2 = np.cos(np.radians(pol_deg)) ** 2
    m = 2 * 10.0 * l_eff * np.sqrt(pa * pb) * np.sqrt(c2)
    c = 299_792_458.0
    f_a = c / 1550e-9 * 1e-12
    for line in lines:
        k = {("tone", "low"): 0, ("tone", "high"): 1}.get((line["kind"], line["side"]))
        if k is None:
            k = -line["order"] if line["side"] == "low" else line["order"] + 1
        p_k = t * (pa * jv(k, m) ** 2 + pb * jv(k - 1, m) ** 2)
        expect = 10 * np.log10(p_k * 1e3)
        assert abs(line["power_dbm"] - expect) < 0.01, (line, expect)
        assert abs(line["freq_thz"] - (f_a + k * 0.05)) < 1e-9
        assert abs(line["wavelength_nm"] - c / (line["freq_thz"] * 1e12) * 1e9) < 1e-9
        assert set(line) == {"kind", "side", "order", "freq_thz", "wavelength_nm", "power_dbm"}


def test_spectrum_out_writes_a_readable_trace(tmp_path, capsys):
    out = tmp_path / "trace.csv"
    code, text, _ = run_cli(capsys, "sim", "spectrum", "--scenario", str(DEFAULT), "--spool",
                            "HNLF-A17", "--power-a-dbm", "10", "--power-b-dbm", "10",
                            "--wavelength-a-nm", "1550", "--spacing-ghz", "100", "--out",
                            str(out), "--rbw-nm", "0.02")
    assert code == 0 and "high 1" in text
    assert out.read_text().splitlines()[0].startswith("# ")
    trace = read_trace_csv(out)
    assert trace.x_unit == "nm" and trace.rbw_nm == 0.02
    assert trace.metadata["spool"] == "HNLF-A17"
    # tone a at 1550 nm: 10 dBm launched - 0.9 dB spool - 0.5 dB to the OSA, at the peak
    near = np.abs(trace.x - 1550.0) < 0.05
    assert abs(trace.y_dbm[near].max() - 8.6) < 0.3


@pytest.mark.parametrize("argv, field", [
    (["--spool", "NOPE"], "--spool"),
    (["--spacing-ghz", "-5"], "--spacing-ghz"),
    (["--wavelength-a-nm", "900"], "--wavelength-a-nm"),
    (["--scenario", "missing.toml"], "missing.toml"),
])
def test_spectrum_bad_input_is_one_line_exit_2(capsys, argv, field):
    base = {"--scenario": str(DEFAULT), "--spool": "SMF-B02", "--power-a-dbm": "5",
            "--power-b-dbm": "5", "--wavelength-a-nm": "1550", "--spacing-ghz": "50"}
    base.update(dict(zip(argv[::2], argv[1::2], strict=True)))
    args = ["sim", "spectrum", *[x for kv in base.items() for x in kv]]
    code, out, err = run_cli(capsys, *args)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and field in err


def test_scenario_errors_name_file_and_field(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(FLAT_SCENARIO.replace("length_km = 2.0", "length_km = -2.0"))
    with pytest.raises(InputError) as err:
        load_scenario(bad)
    assert str(bad) in str(err.value) and "spools[0].length_km" in str(err.value)
    bad.write_text(FLAT_SCENARIO.replace('connected = "FLAT-Z1"', 'connected = "FLAT-Z9"'))
    with pytest.raises(InputError, match="connected"):
        load_scenario(bad)
    bad.write_text(FLAT_SCENARIO + "\n[instruments.laser_c]\nport = 5\n")
    with pytest.raises(InputError, match="instruments.laser_c"):
        load_scenario(bad)
    bad.write_text(FLAT_SCENARIO + "\n[faults]\ntimeout_probability = 1.5\n")
    with pytest.raises(InputError, match="faults.timeout_probability"):
        load_scenario(bad)


SCENARIO_BAD = [
    # issue 13: NaN, infinity and booleans refused; ranges physical
    ("length_km = 2.0", "length_km = nan", "spools[0].length_km"),
    ("gamma_per_w_per_km = 10.0", "gamma_per_w_per_km = inf", "spools[0].gamma_per_w_per_km"),
    ("gamma_per_w_per_km = 10.0", "gamma_per_w_per_km = true", "spools[0].gamma_per_w_per_km"),
    ("loss_db_per_km = 0.5", "loss_db_per_km = 1e308", "spools[0].loss_db_per_km"),
]
SCENARIO_EXTRA_BAD = [
    ("[bench]\ncaps = { laser_a = nan }", "bench.caps.laser_a"),
    ("[bench]\ncaps = { laser_b = inf }", "bench.caps.laser_b"),
    ("[bench]\ncaps = { amplifier = 1e308 }", "bench.caps.amplifier"),
    ("[bench]\npath_loss_a_db = inf", "bench.path_loss_a_db"),
    ("[bench]\nmax_total_launched_dbm = -inf", "bench.max_total_launched_dbm"),
    ("[instruments.laser_a]\nport = true", "instruments.laser_a.port"),
    ("[instruments.laser_a]\npresent = 1", "instruments.laser_a.present"),
    ("[instruments.osa]\nfloor_dbm = nan", "instruments.osa.floor_dbm"),
    ("[realism]\nosa_noise_db = inf", "realism.osa_noise_db"),
    ("[faults]\nenabled = true\ndrop_probability = nan", "faults.drop_probability"),
    ("[[events]]\nat_s = inf\naction = 'open_interlock'", "events[0].at_s"),
]


@pytest.mark.parametrize("old, new, field", SCENARIO_BAD, ids=[c[1] for c in SCENARIO_BAD])
def test_scenario_refuses_non_finite_and_boolean_numbers(tmp_path, old, new, field):
    bad = tmp_path / "bad.toml"
    bad.write_text(FLAT_SCENARIO.replace(old, new))
    with pytest.raises(InputError) as err:
        load_scenario(bad)
    assert str(bad) in str(err.value) and field in str(err.value), str(err.value)


@pytest.mark.parametrize("extra, field", SCENARIO_EXTRA_BAD, ids=[c[1] for c in SCENARIO_EXTRA_BAD])
def test_scenario_refuses_bad_tables(tmp_path, extra, field):
    bad = tmp_path / "bad.toml"
    bad.write_text(FLAT_SCENARIO + "\n" + extra + "\n")
    with pytest.raises(InputError) as err:
        load_scenario(bad)
    assert str(bad) in str(err.value) and field in str(err.value), str(err.value)


def test_scenario_not_utf8_is_one_line(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_bytes(FLAT_SCENARIO.replace("FLAT-Z1", "FLAT-\u00c51").encode("latin-1"))
    with pytest.raises(InputError, match="not UTF-8") as err:
        load_scenario(bad)
    assert str(bad) in str(err.value)


def test_scenario_spool_beyond_the_models_reach_is_refused_up_front(tmp_path, capsys):
    """gamma = 1e5 /(W km) on 2 km at the 20 dBm bench cap: peak nonlinear phase
    gamma L_eff 2 P = 1e5 * 1.79 * 0.2 ~ 3.6e4 rad (L_eff = (1 - e^-aL)/a, Agrawal, Nonlinear Fiber
    Optics, ch. 4): refused when read, before any model runs (it once took 160 s of CPU)."""
    bad = tmp_path / "bad.toml"
    bad.write_text(FLAT_SCENARIO.replace("gamma_per_w_per_km = 10.0",
                                         "gamma_per_w_per_km = 100000.0"))
    start = time.process_time()
    code, out, err = run_cli(capsys, "sim", "spectrum", "--scenario", str(bad), "--spool",
                             "FLAT-Z1", "--power-a-dbm", "10", "--power-b-dbm", "10",
                             "--wavelength-a-nm", "1550", "--spacing-ghz", "50")
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1
    assert "spools[0].gamma_per_w_per_km" in err and "nonlinear phase" in err
    assert time.process_time() - start < 5.0
    # 2 km at 0.5 dB/km: L_eff = 1.786 km; gamma 279 gives 99.7 rad (accepted), 280 gives 100.04
    ok = FLAT_SCENARIO.replace("gamma_per_w_per_km = 10.0", "gamma_per_w_per_km = 279.0")
    bad.write_text(ok)
    assert load_scenario(bad).spools[0].gamma_per_w_per_km == 279.0
    bad.write_text(ok.replace("279.0", "280.0"))
    with pytest.raises(InputError, match="nonlinear phase"):
        load_scenario(bad)


def test_spectrum_launch_beyond_the_models_reach_is_one_line(capsys):
    """HNLF-A17 (11 /(W km), L_eff ~ 0.91 km) at 30 dBm per tone: 11 * 0.91 * 4 W ~ 40 rad is
    computed; at 36 dBm per tone ~ 160 rad exceeds the 100 rad bound and is refused at once."""
    base = ["sim", "spectrum", "--scenario", str(DEFAULT), "--spool", "HNLF-A17",
            "--wavelength-a-nm", "1550", "--spacing-ghz", "50"]
    start = time.process_time()
    code, out, err = run_cli(capsys, *base, "--power-a-dbm", "36", "--power-b-dbm", "36")
    assert code == 2 and out == "" and "nonlinear phase" in err
    assert len(err.strip().splitlines()) == 1
    assert time.process_time() - start < 5.0


def test_shipped_scenario_standard_fibre_follows_g652():
    """SMF-B02 against ITU-T G.652 (limits from memory): loss <= 0.3 dB/km at 1550 nm; the
    dispersion D(l) = S0 l/4 [1 - (l0/l)^4] of G.652 fitted through D and dD/dl at 1550 nm gives
    a zero-dispersion wavelength l0 in 1300-1324 nm and a zero slope S0 <= 0.092 ps/(nm^2 km)."""
    scenario = load_scenario(DEFAULT)
    smf = scenario.spool("SMF-B02")
    assert smf.loss_db_per_km <= 0.3
    lam = smf.reference_wavelength_nm
    q = smf.dispersion_ps_per_nm_km / (smf.dispersion_slope_ps_per_nm2_km * lam)
    r = (1 - q) / (1 + 3 * q)                        # r = (l0/l)^4 from D/(S l) = (1-r)/(1+3r)
    l0 = lam * r ** 0.25
    s0 = 4 * smf.dispersion_slope_ps_per_nm2_km / (1 + 3 * r)
    assert 1300 <= l0 <= 1324 and s0 <= 0.092
    hnlf = scenario.spool("HNLF-A17")
    assert hnlf.gamma_per_w_per_km > 5 * smf.gamma_per_w_per_km
    assert scenario.realism.enabled and not scenario.faults.enabled


def test_serve_writes_bench_and_exits_cleanly_on_sigterm(tmp_path):
    bench_path = tmp_path / "bench.toml"
    proc = subprocess.Popen(
        [sys.executable, "-m", "labrun", "sim", "serve", "--scenario", str(DEFAULT),
         "--bench-out", str(bench_path), "--time-scale", "0"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**os.environ, "PYTHONUNBUFFERED": "1"})
    try:
        lines = []
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            line = proc.stdout.readline()
            lines.append(line)
            if line.startswith("virtual lab running") or not line:
                break
        assert any(x.startswith("laser_a ") and "TCPIP0::127.0.0.1::" in x for x in lines)
        bench = load_bench(bench_path)
        assert bench.settle_scale == 0.0 and "osa" in bench.instruments
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert "sources is off" in out or "source is off" in out


def test_serve_with_a_port_clash_is_one_line_exit_2(tmp_path, capsys):
    import socket
    import threading

    with socket.socket() as sock:
        # The port stays taken by this socket for the whole test: a port released first could
        # be bound by another process before serve asks for it (a clash on the wrong role).
        sock.bind(("127.0.0.1", 0))
        sock.listen()
        port = sock.getsockname()[1]
        scenario = tmp_path / "clash.toml"
        scenario.write_text(FLAT_SCENARIO + f"[instruments.laser_b]\nport = {port}\n")
        before = set(threading.enumerate())
        code, out, err = run_cli(capsys, "sim", "serve", "--scenario", str(scenario))
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "instruments.laser_b.port" in err
    assert set(threading.enumerate()) <= before


def test_serve_with_an_unwritable_bench_out_is_one_line_exit_2(tmp_path, capsys):
    import threading

    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    before = set(threading.enumerate())
    code, out, err = run_cli(capsys, "sim", "serve", "--scenario", "default-scenario.toml",
                             "--bench-out", str(blocker / "bench.toml"))
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "--bench-out" in err
    assert set(threading.enumerate()) <= before  # nothing was started
