"""The virtual lab over the real wire: pyvisa + pyvisa-py (@py) against VirtualLab at time scale 0.

External references named beside the checks: SCPI-1999 (error codes and queue), IEEE 488.2
(common commands, definite-length blocks), pyvisa's own block codec, scipy.special.jv for the
Bessel line powers (docs/design.md §5.2), scipy.signal.find_peaks for locating lines.
"""

from __future__ import annotations

import copy
import socket
import threading
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest
import pyvisa
from pyvisa.errors import VisaIOError
from scipy.signal import find_peaks
from scipy.special import jv

from labrun.bench import load_bench
from labrun.physics.units import effective_length_km
from labrun.profiles import load_profile
from labrun.roles import ROLE_KINDS
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import parse_scenario

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"


def scenario_data(**changes) -> dict:
    """The shipped scenario as a mapping, realism off (exact numbers), with top-level changes."""
    data = tomllib.loads(DEFAULT.read_text())
    data["realism"] = {"enabled": False}
    data.update(copy.deepcopy(changes))
    return data


@pytest.fixture(scope="module")
def rm():
    # pyvisa keeps one ResourceManager per VISA library, shared with labrun.scpi: never close it
    # here, only the sessions opened from it.
    return pyvisa.ResourceManager("@py")


@pytest.fixture
def lab():
    with VirtualLab(parse_scenario(scenario_data()), time_scale=0.0, seed=1) as running:
        yield running


def open_role(rm, lab, role, timeout_ms=2000):
    inst = rm.open_resource(lab.resources[role], read_termination="\n", write_termination="\n",
                            timeout=timeout_ms)
    return inst


def error(inst) -> int:
    """Code of the next error-queue entry."""
    return int(inst.query("SYST:ERR?").split(",")[0])


def light_up(rm, lab, *, pa=5.0, pb=5.0, wl_a=1550.0, wl_b=1549.2):
    """Both lasers on at full transmission; returns open sessions by role."""
    s = {r: open_role(rm, lab, r) for r in lab.resources}
    for role, wl, p in (("laser_a", wl_a, pa), ("laser_b", wl_b, pb)):
        s[role].write(f"SOUR:WAV {wl:.4f}")
        s[role].write(f"SOUR:POW {p:.3f}")
        s[role].write("OUTP:STAT ON")
    for role in ("attenuator_a", "attenuator_b"):
        s[role].write("INP:ATT 0")
        s[role].write("OUTP:STAT ON")
    for inst in s.values():
        assert inst.query("*OPC?") == "1"
    return s


def close_all(sessions):
    for inst in sessions.values():
        inst.close()


def test_identity_of_every_role(rm, lab):
    # IEEE 488.2 *IDN?: four comma-separated fields
    for role in lab.resources:
        inst = open_role(rm, lab, role)
        idn = inst.query("*IDN?")
        assert idn == lab.scenario.idn(role)
        assert len(idn.split(",")) == 4
        inst.close()


def _value_for(op) -> dict:
    """Mid-range values for a profile operation's placeholders."""
    lo, hi = op.range if op.range else (0.0, 1.0)
    values: dict = {}
    for name in op.placeholders:
        if name == "index":
            values["index"] = op.index_range[0] if op.index_range else 1
        elif name in ("s1", "s2", "s3"):
            values.update(s1=0.0, s2=1.0, s3=0.0)
        elif name == "value":
            mid = (lo + hi) / 2
            values["value"] = int(round(mid)) if op.integer else mid
    return values


@pytest.fixture(scope="module")
def full_lab():
    """Every role present, amplifier included."""
    data = scenario_data()
    data["instruments"]["amplifier"]["present"] = True
    with VirtualLab(parse_scenario(data)) as running:
        yield running


@pytest.mark.parametrize("role", list(ROLE_KINDS))
def test_every_profile_operation_answers(rm, full_lab, role):
    """Every operation of the generic profile is accepted and leaves the error queue empty."""
    lab = full_lab
    profile = load_profile(f"generic-{ROLE_KINDS[role].replace('_', '-')}")
    inst = open_role(rm, lab, role)
    for op in profile.operations.values():
        text = op.render(**_value_for(op))
        if op.is_query:
            if op.parse == "trace":
                inst.write("INIT:IMM")
                assert inst.query("*OPC?") == "1"
                reply = inst.query(text)
                assert len(reply.split(",")) == lab.state.osa.points
            else:
                reply = inst.query(text)
                assert reply != ""
                if op.parse in ("float", "int"):
                    float(reply)
                elif op.parse == "bool":
                    assert reply in ("0", "1")
                elif op.parse == "floats":
                    assert len(reply.split(",")) == 3
        else:
            inst.write(text)
        assert inst.query("SYST:ERR?") == '0,"No error"', (op.name, text)  # SCPI-1999 empty queue
        if op.readback and op.tolerance is not None and "value" in op.placeholders:
            back = profile.op(op.readback)
            got = float(inst.query(back.render(**_value_for(back))))
            assert abs(got - _value_for(op)["value"]) <= op.tolerance
    inst.close()


def test_scpi_errors_use_standard_codes(rm, lab):
    laser = open_role(rm, lab, "laser_a")
    laser.write("SOUR:FROB 1")          # SCPI-1999: -113 Undefined header
    assert error(laser) == -113
    laser.write("SOUR:POW 99")          # -222 Data out of range (laser range -10..13 dBm)
    assert error(laser) == -222
    laser.write("SOUR:POW bright")      # -104 Data type error
    assert error(laser) == -104
    laser.write("OUTP:STAT MAYBE")      # -224 Illegal parameter value
    assert error(laser) == -224
    laser.write("SOUR:POW")             # -109 Missing parameter
    assert error(laser) == -109
    assert laser.query("SYST:ERR?") == '0,"No error"'
    for _ in range(15):                 # SCPI-1999 21.8: overflow makes the last entry -350
        laser.write("NOPE")
    codes = [error(laser) for _ in range(11)]
    assert codes[:9] == [-113] * 9 and codes[9] == -350 and codes[10] == 0
    laser.write("NOPE")
    assert int(laser.query("*ESR?")) & 32   # IEEE 488.2: command error bit 5
    laser.write("*CLS")
    assert error(laser) == 0
    laser.close()


def test_short_long_forms_case_and_compound_messages(rm, lab):
    laser = open_role(rm, lab, "laser_a")
    laser.write(":source1:wavelength 1551.5;POWer:LEVel:IMMediate:AMPLitude 2.5;:outp:stat on")
    assert laser.query("SOUR:WAV?;POW?;:OUTPut:STATe?") == "1551.5;2.5;1"
    assert laser.query("sour:pow?") == "2.5"
    assert error(laser) == 0
    assert lab.state.lasers["laser_a"].output
    laser.write("OUTP OFF")
    assert laser.query("*OPC?") == "1"                 # IEEE 488.2: commands before it are done
    assert lab.sources_off()
    laser.close()


def test_real32_block_matches_ascii_read_of_the_same_sweep(rm, lab):
    s = light_up(rm, lab)
    osa = s["osa"]
    osa.write("SENS:WAV:CENT 1549.6;SPAN 4;:SENS:BAND:RES 0.05;:SENS:SWE:POIN 2049")
    osa.write("INIT:IMM")
    assert osa.query("*OPC?") == "1"
    osa.write("FORM:DATA ASC")
    y_ascii = np.array(osa.query_ascii_values("TRAC:DATA? LEVEL"))
    x_ascii = np.array(osa.query_ascii_values("TRAC:DATA? WLEN"))
    osa.write("FORM:DATA REAL,32")
    for border, big in (("SWAP", False), ("NORM", True)):   # SCPI-1999 FORM:BORD
        osa.write(f"FORM:BORD {border}")
        # pyvisa's own IEEE 488.2 definite-length block codec decodes the reply
        y = osa.query_binary_values("TRAC:DATA? LEVEL", datatype="f", is_big_endian=big,
                                    container=np.array)
        x = osa.query_binary_values("TRAC:DATA? WLEN", datatype="f", is_big_endian=big,
                                    container=np.array)
        assert y.size == x.size == 2049
        np.testing.assert_allclose(y, y_ascii, atol=6e-4)    # ASCII carries 3 decimals
        np.testing.assert_allclose(x, x_ascii, atol=2e-4)    # float32 near 1550 nm: ~1e-4
    osa.write("FORM:BORD SWAP")
    raw = osa.query_binary_values("TRAC:DATA? LEVEL", datatype="B", container=bytes)
    assert len(raw) == 4 * 2049
    assert osa.query("FORM?") == "REAL,32" and osa.query("FORM:BORD?") == "SWAP"
    assert error(osa) == 0
    close_all(s)


def test_sweep_matches_bessel_model_for_dispersion_free_spool(rm):
    """Lines read through the OSA match P_k = T [Pa J_k(m)^2 + Pb J_(k-1)(m)^2]
    (docs/design.md §5.2, Thompson and Roy 1991) computed here with scipy.special.jv."""
    spool = {"name": "FLAT-T1", "length_km": 1.0, "loss_db_per_km": 0.8,
             "gamma_per_w_per_km": 10.0, "dispersion_ps_per_nm_km": 0.0,
             "dispersion_slope_ps_per_nm2_km": 0.0, "reference_wavelength_nm": 1550.0}
    data = scenario_data(spools=[spool], connected="FLAT-T1")
    with VirtualLab(parse_scenario(data)) as lab:
        s = light_up(rm, lab, pa=10.0, pb=10.0, wl_a=1550.0, wl_b=1549.2)
        osa = s["osa"]
        osa.write("SENS:WAV:CENT 1549.6;SPAN 6;:SENS:BAND:RES 0.05;:SENS:SWE:POIN 6001")
        osa.write("INIT:IMM;*WAI")
        osa.write("FORM:DATA REAL,32;BORD SWAP")
        y = osa.query_binary_values("TRAC:DATA? LEVEL", datatype="f", container=np.array)
        x = osa.query_binary_values("TRAC:DATA? WLEN", datatype="f", container=np.array)
        close_all(s)
    bench = data["bench"]
    pa = 10 ** ((10.0 - bench["path_loss_a_db"]) / 10) * 1e-3   # launched, W
    pb = 10 ** ((10.0 - bench["path_loss_b_db"]) / 10) * 1e-3
    m = 2 * 10.0 * effective_length_km(1.0, 0.8) * np.sqrt(pa * pb)
    t = 10 ** (-0.8 / 10)
    peaks, _ = find_peaks(y, height=-65, distance=100)
    got = {round(float(w), 1): float(p) for w, p in zip(x[peaks], y[peaks], strict=True)}
    c = 299_792_458.0
    f_a, f_b = c / 1550.0e-9, c / 1549.2e-9          # laser a is the lower frequency (tone a)
    for k in range(-2, 4):
        p_k = t * (pa * jv(k, m) ** 2 + pb * jv(k - 1, m) ** 2)
        expect_dbm = 10 * np.log10(p_k * 1e3) - bench["output_to_osa_db"]
        wl = round(c / (f_a + k * (f_b - f_a)) * 1e9, 1)
        assert wl in got, (k, wl, got)
        assert abs(got[wl] - expect_dbm) < 0.05, (k, got[wl], expect_dbm)


def test_switch_path_2_shows_the_input_tap_and_power_meter_reads_it(rm, lab):
    s = light_up(rm, lab, pa=6.0, pb=6.0)
    s["switch"].write("ROUT:PATH 2")
    assert s["switch"].query("ROUT:PATH?") == "2"
    osa = s["osa"]
    osa.write("SENS:WAV:CENT 1549.6;SPAN 4;:SENS:SWE:POIN 4001")
    osa.write("INIT:IMM")
    osa.query("*OPC?")
    y = np.array(osa.query_ascii_values("TRAC:DATA? LEVEL"))
    cal = lab.scenario.bench
    tap_a = 6.0 - cal.path_loss_a_db - cal.input_tap_db
    assert abs(y.max() - max(tap_a, 6.0 - cal.path_loss_b_db - cal.input_tap_db)) < 0.05
    peaks, _ = find_peaks(y, height=-60, distance=50)
    assert len(peaks) == 2                               # tones only: no FWM before the spool
    total = 10 * np.log10(10 ** ((6 - cal.path_loss_a_db) / 10)
                          + 10 ** ((6 - cal.path_loss_b_db) / 10)) - cal.input_tap_db
    assert abs(float(s["power_meter"].query("READ:POW?")) - total) < 1e-3
    close_all(s)


def test_orthogonal_polarisation_suppresses_sidebands(rm, lab):
    s = light_up(rm, lab, pa=10.0, pb=10.0)
    osa = s["osa"]
    osa.write("SENS:WAV:CENT 1549.6;SPAN 4;:SENS:SWE:POIN 4001")

    def first_sideband() -> float:
        osa.write("INIT:IMM")
        osa.query("*OPC?")
        y = np.array(osa.query_ascii_values("TRAC:DATA? LEVEL"))
        x = np.array(osa.query_ascii_values("TRAC:DATA? WLEN"))
        return float(y[np.argmin(np.abs(x - 1548.4))])

    parallel = first_sideband()
    s["pol_controller"].write("POL:STOK -1,0,0")        # orthogonal to tone a's (1,0,0)
    assert s["pol_controller"].query("POL:STOK?") == "-1.000000,0.000000,0.000000"
    crossed = first_sideband()
    assert parallel > -45 and crossed < -70            # docs/design.md §5.5: (1 + s_a.s_b)/2 = 0
    close_all(s)


def test_interlock_open_turns_sources_off_and_refuses_emission(rm, lab):
    s = light_up(rm, lab)
    assert not lab.sources_off()
    lab.open_interlock()
    assert lab.sources_off()
    laser = s["laser_a"]
    assert laser.query("OUTP:INTL?") == "0" and laser.query("OUTP:STAT?") == "0"
    laser.write("OUTP:STAT ON")
    assert error(laser) == -221                         # SCPI-1999 Settings conflict
    assert lab.sources_off()
    lab.close_interlock()
    laser.write("OUTP:STAT ON")
    assert error(laser) == 0
    assert not lab.sources_off()
    close_all(s)


def test_scenario_event_opens_interlock(rm):
    data = scenario_data(events=[{"at_s": 0.2, "action": "open_interlock"}])
    # The event timer starts once the sources are on: light_up may take longer than 0.2 s on a
    # loaded machine, and an event that fired first would leave nothing on to turn off.
    with VirtualLab(parse_scenario(data), hold_events=True) as lab:
        s = light_up(rm, lab)
        assert not lab.sources_off()
        lab.start_events()
        deadline = time.monotonic() + 5
        while not lab.sources_off() and time.monotonic() < deadline:
            time.sleep(0.02)
        assert lab.sources_off()
        assert s["laser_b"].query("OUTP:INTL?") == "0"
        close_all(s)


def test_two_clients_on_one_port(rm, lab):
    first, second = open_role(rm, lab, "laser_a"), open_role(rm, lab, "laser_a")
    first.write("SOUR:POW 4.25")
    # IEEE 488.2 *OPC?: answers once the commands before it on that connection are done; only
    # then may another connection expect to see the new setting.
    assert first.query("*OPC?") == "1"
    assert second.query("SOUR:POW?") == "4.25"
    replies: list[str] = []

    def hammer(inst):
        for _ in range(50):
            replies.append(inst.query("*IDN?"))

    threads = [threading.Thread(target=hammer, args=(i,)) for i in (first, second)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert replies == [lab.scenario.idn("laser_a")] * 100
    first.close()
    second.close()


def test_drop_connections_then_reconnect(rm, lab):
    inst = open_role(rm, lab, "power_meter", timeout_ms=200)
    assert inst.query("*IDN?")
    assert lab.drop_connections("power_meter") == 1
    with pytest.raises((VisaIOError, ConnectionError, OSError)):
        inst.query("*IDN?")
    inst.close()
    again = open_role(rm, lab, "power_meter")
    assert again.query("*IDN?") == lab.scenario.idn("power_meter")
    again.close()


def test_opc_query_waits_for_the_sweep_at_nonzero_time_scale(rm):
    with VirtualLab(parse_scenario(scenario_data()), time_scale=0.5) as lab:
        osa = open_role(rm, lab, "osa")
        osa.write("SENS:WAV:SPAN 10;:SENS:BAND:RES 0.05;:SENS:SWE:POIN 1025")
        t0 = time.perf_counter()
        osa.write("INIT:IMM")
        assert osa.query("*OPC?") == "1"
        # sweep time model 0.05 + 1025*20e-6 + 10/(0.05*2000) = 0.1705 s, times 0.5
        assert time.perf_counter() - t0 >= 0.08
        osa.close()


def test_stop_leaves_no_threads_and_frees_ports(rm):
    before = set(threading.enumerate())
    lab = VirtualLab(parse_scenario(scenario_data())).start()
    ports = [int(r.split("::")[2]) for r in lab.resources.values()]
    inst = open_role(rm, lab, "laser_a")
    inst.query("*IDN?")
    lab.stop()
    inst.close()
    time.sleep(0.05)
    assert set(threading.enumerate()) <= before
    for port in ports:                                  # each port can be bound again
        with socket.socket() as sock:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind(("127.0.0.1", port))


def test_bench_file_loads_with_the_instrument_layer(lab, tmp_path):
    bench = load_bench(lab.write_bench(tmp_path / "vlab-bench.toml"))
    assert bench.settle_scale == 0.0
    assert set(bench.instruments) == set(lab.resources)
    assert bench.instruments["laser_a"].max_power_dbm == lab.scenario.bench.caps["laser_a"]
    assert bench.calibration.input_tap_db == lab.scenario.bench.input_tap_db
    assert all(spec.backend == "@py" for spec in bench.instruments.values())


# Long forms of the mnemonics the generic profiles use (SCPI-1999 command reference; POL, STOK
# and INTL are device-specific nodes of the generic profiles).
LONG_FORMS = {"SOUR": "SOURce", "OUTP": "OUTPut", "STAT": "STATe", "WAV": "WAVelength",
              "POW": "POWer", "INP": "INPut", "ATT": "ATTenuation", "SENS": "SENSe",
              "CENT": "CENTer", "BAND": "BANDwidth", "RES": "RESolution", "SWE": "SWEep",
              "POIN": "POINts", "INIT": "INITiate", "IMM": "IMMediate", "TRAC": "TRACe",
              "FORM": "FORMat", "BORD": "BORDer", "ROUT": "ROUTe", "ANGL": "ANGLe",
              "STOK": "STOKes", "INTL": "INTLock", "SYST": "SYSTem", "ERR": "ERRor"}


def _long_form(text: str) -> str:
    head, sep, rest = text.partition(" ")
    nodes = []
    for node in head.split(":"):
        stem = node.rstrip("?0123456789")
        tail = node[len(stem):]
        nodes.append(LONG_FORMS.get(stem, stem).lower() + tail)
    return ":".join(nodes) + sep + rest


def test_long_lower_case_forms_of_every_profile_command(rm, full_lab):
    lab = full_lab
    for role in lab.resources:
        profile = load_profile(f"generic-{ROLE_KINDS[role].replace('_', '-')}")
        inst = open_role(rm, lab, role)
        for op in profile.operations.values():
            text = _long_form(op.render(**_value_for(op)))
            if op.is_query:
                assert inst.query(text) != "", text
            else:
                inst.write(text)
            assert inst.query("system:error?") == '0,"No error"', text
        inst.close()
