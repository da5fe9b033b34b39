"""Role adapters against the pyvisa-sim devices: every operation of every role, limits, safe_off."""

from __future__ import annotations

import contextlib
import re

import numpy as np
import pytest

from labrun.bench import load_bench
from labrun.errors import InputError, InstrumentError, SafetyError
from labrun.instruments import (
    AmplifierAdapter,
    AttenuatorAdapter,
    LaserAdapter,
    OsaAdapter,
    PolControllerAdapter,
    PowerMeterAdapter,
    SwitchAdapter,
    open_bench,
)
from labrun.physics.units import dbm_to_mw, mw_to_dbm
from labrun.scpi import ScpiError
from labrun.trafficlog import TrafficLog


@pytest.fixture
def inst_bench(inst_sim_bench_path):
    """Open instruments of a private pyvisa-sim bench, with a traffic log."""
    bench = load_bench(inst_sim_bench_path)
    traffic_log = TrafficLog()
    instruments = open_bench(bench, traffic_log=traffic_log)
    yield bench, instruments, traffic_log
    instruments.close()


def test_adapter_types(inst_bench):
    _, ins, _ = inst_bench
    expected = {"laser_a": LaserAdapter, "laser_b": LaserAdapter,
                "attenuator_a": AttenuatorAdapter, "attenuator_b": AttenuatorAdapter,
                "pol_controller": PolControllerAdapter, "osa": OsaAdapter,
                "power_meter": PowerMeterAdapter, "amplifier": AmplifierAdapter,
                "switch": SwitchAdapter}
    assert {role: type(a) for role, a in ins.items()} == expected
    idns = ins.identities()
    assert idns["laser_a"].serial == "PS00A1" and idns["laser_b"].serial == "PS00B2"
    assert all(i.manufacturer for i in idns.values())


@pytest.mark.parametrize("role", ["laser_a", "laser_b"])
def test_laser_every_operation(inst_bench, role):
    _, ins, traffic_log = inst_bench
    laser = ins[role]
    laser.set_wavelength_nm(1549.3152)
    assert laser.wavelength_nm() == pytest.approx(1549.3152, abs=1e-4)
    laser.set_power_dbm(6.5)
    assert laser.power_dbm() == pytest.approx(6.5)
    assert laser.interlock_closed() is True
    assert laser.output_state() is False
    laser.output_on()
    assert laser.output_state() is True
    laser.output_off()
    assert laser.output_state() is False
    sent = [e.text for e in traffic_log.writes(role)]
    assert sent[-4:] == ["SOUR:WAV 1549.3152", "SOUR:POW 6.500", "OUTP:STAT ON", "OUTP:STAT OFF"]
    # every setting was followed by an error-queue read and a read-back
    texts = [e.text for e in traffic_log.entries if e.role == role]
    i = texts.index("SOUR:POW 6.500")
    assert texts[i + 1:i + 3] == ["SYST:ERR?", "SOUR:POW?"]


def test_laser_refuses_before_writing(inst_bench):
    _, ins, traffic_log = inst_bench
    laser = ins["laser_a"]
    before = len(traffic_log.writes())
    with pytest.raises(SafetyError, match="max_power_dbm"):
        laser.set_power_dbm(11.0)          # inside the profile range, above the bench cap
    with pytest.raises(InputError, match="set_wavelength_nm.range"):
        laser.set_wavelength_nm(1490.0)    # outside the profile range
    with pytest.raises(InputError):
        laser.set_power_dbm(float("nan"))
    assert len(traffic_log.writes()) == before


def test_output_on_refused_when_power_above_cap(inst_bench):
    """Power raised behind labrun's back (e.g. front panel) must block emission."""
    _, ins, traffic_log = inst_bench
    laser = ins["laser_b"]
    laser.session.write("SOUR:POW 12.000")
    with pytest.raises(SafetyError, match="emission not enabled"):
        laser.output_on()
    assert "OUTP:STAT ON" not in [e.text for e in traffic_log.writes("laser_b")]
    assert laser.output_state() is False


def test_instrument_error_queue_surfaces(inst_bench):
    """An unknown command lands in the pyvisa-sim error queue and comes back as ScpiError."""
    _, ins, _ = inst_bench
    with pytest.raises(ScpiError) as info:
        ins["osa"].session.write("FORM:DATA REAL,32")
    assert info.value.code == -100 and info.value.command == "FORM:DATA REAL,32"


def test_attenuator_every_operation(inst_bench):
    _, ins, _ = inst_bench
    for role in ("attenuator_a", "attenuator_b"):
        att = ins[role]
        att.set_wavelength_nm(1550.5)
        assert att.wavelength_nm() == pytest.approx(1550.5)
        att.set_attenuation_db(12.25)
        assert att.attenuation_db() == pytest.approx(12.25)
        att.output_on()
        assert att.output_state() is True
        att.output_off()
        assert att.output_state() is False
        assert att.max_attenuation_db == 60.0
        with pytest.raises(InputError):
            att.set_attenuation_db(61.0)


def test_pol_controller_every_operation(inst_bench):
    _, ins, traffic_log = inst_bench
    pc = ins["pol_controller"]
    pc.set_angles_deg((12.5, 90.0, 359.99))
    assert pc.angles_deg() == pytest.approx((12.5, 90.0, 359.99))
    pc.set_stokes((0.0, 0.6, -0.8))
    assert pc.stokes() == pytest.approx((0.0, 0.6, -0.8))
    assert "POL:STOK 0.0000,0.6000,-0.8000" in [e.text for e in traffic_log.writes()]
    before = len(traffic_log.writes())
    with pytest.raises(InputError):
        pc.set_angles_deg((10.0, 20.0, 400.0))  # third out of range: none of the three is sent
    with pytest.raises(InputError, match="length"):
        pc.set_stokes((1.0, 1.0, 0.0))
    assert len(traffic_log.writes()) == before


def test_osa_every_operation(inst_bench):
    _, ins, traffic_log = inst_bench
    osa = ins["osa"]
    osa.configure(1549.8, 2.56, 0.05, 129)
    assert osa.settings() == pytest.approx({"center_nm": 1549.8, "span_nm": 2.56,
                                            "rbw_nm": 0.05, "points": 129})
    osa.sweep()
    assert [e.text for e in traffic_log.entries][-3:] == ["INIT:IMM", "SYST:ERR?", "*OPC?"]
    x, y = osa.read_trace()
    assert x.size == y.size == 129
    assert x[0] == pytest.approx(1548.52) and x[-1] == pytest.approx(1551.08)
    assert np.all(np.diff(x) > 0)
    assert x[np.argmax(y)] in (pytest.approx(1549.6), pytest.approx(1550.0))
    assert "FORM:DATA ASC" in [e.text for e in traffic_log.writes("osa")]
    with pytest.raises(InputError):
        osa.configure(1549.8, 2.0, 0.05, 100.5)  # points must be a whole number in range


def test_power_meter_every_operation(inst_bench):
    _, ins, _ = inst_bench
    pm = ins["power_meter"]
    pm.set_wavelength_nm(1310.0)
    assert pm.wavelength_nm() == pytest.approx(1310.0)
    assert pm.power_dbm() == pytest.approx(-17.35)
    # P[mW] = 10^(P[dBm]/10) (common practice): -17.35 dBm = 0.018408 mW
    assert pm.power_mw() == pytest.approx(0.0184077, rel=1e-5)


def test_dbm_mw_conversion():
    """dBm <-> mW, common practice: 0 dBm = 1 mW, +10 dB = x10, +3 dB ~ x2."""
    assert dbm_to_mw(0.0) == pytest.approx(1.0)
    assert dbm_to_mw(10.0) == pytest.approx(10.0)
    assert dbm_to_mw(-30.0) == pytest.approx(1e-3)
    assert dbm_to_mw(3.0) == pytest.approx(1.99526, rel=1e-5)
    assert mw_to_dbm(100.0) == pytest.approx(20.0)
    values = np.array([-60.0, -17.35, 0.0, 13.0, 27.0])
    assert mw_to_dbm(dbm_to_mw(values)) == pytest.approx(values)


def test_amplifier_every_operation(inst_bench):
    _, ins, _ = inst_bench
    amp = ins["amplifier"]
    amp.set_power_dbm(18.0)
    assert amp.power_dbm() == pytest.approx(18.0)
    assert amp.interlock_closed() is True
    amp.output_on()
    assert amp.output_state() is True
    amp.safe_off()
    assert amp.output_state() is False
    with pytest.raises(SafetyError):
        amp.set_power_dbm(21.0)  # profile allows 27 dBm, bench cap is 20


def test_switch_every_operation(inst_bench):
    _, ins, _ = inst_bench
    sw = ins["switch"]
    sw.set_path(2)
    assert sw.path() == 2
    sw.set_path(1)
    assert sw.path() == 1
    with pytest.raises(InputError):
        sw.set_path(3)


def test_readback_mismatch_is_instrument_error(inst_bench):
    """A read-back outside tolerance fails loudly (here: a read-back of another setting)."""
    _, ins, _ = inst_bench
    laser = ins["laser_a"]
    laser.set_power_dbm(2.0)
    with pytest.raises(InstrumentError, match="read-back"):
        laser.verify(laser.profile.op("set_power_dbm"), laser.power_dbm(), 2.2)


def test_safe_off_all_leaves_everything_dark(inst_bench):
    _, ins, _ = inst_bench
    for role in ("laser_a", "laser_b", "amplifier"):
        ins[role].set_power_dbm(5.0)
        ins[role].output_on()
    for role in ("attenuator_a", "attenuator_b"):
        ins[role].set_attenuation_db(3.0)
        ins[role].output_on()
    assert ins.safe_off_all() == []
    for role in ("laser_a", "laser_b", "amplifier"):
        assert ins[role].output_state() is False
    for role in ("attenuator_a", "attenuator_b"):
        assert ins[role].attenuation_db() == 60.0 and ins[role].output_state() is False


def test_safe_off_all_tries_every_source_and_never_raises(inst_bench, inst_free_port):
    _, ins, _ = inst_bench
    ins["laser_a"].output_on()
    ins["laser_b"].output_on()
    amp = ins["amplifier"].session  # the amplifier goes silent: nothing listens there
    amp.close()
    amp.backend, amp.resource = "@py", f"TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"
    problems = ins.safe_off_all()  # the amplifier comes first in the order and fails
    assert len(problems) == 1 and problems[0].startswith("amplifier: no answer")
    assert ins["laser_a"].output_state() is False and ins["laser_b"].output_state() is False


def test_traffic_log_proves_no_setting_above_cap(inst_bench, tmp_path):
    """Read the saved traffic log back and check every power ever written against the caps."""
    bench, ins, traffic_log = inst_bench
    attempts = {"laser_a": [5.0, 10.0, 10.5, 13.0, -3.0], "laser_b": [9.99, 11.0, 0.0],
                "amplifier": [15.0, 20.0, 20.01, 27.0]}
    for role, values in attempts.items():
        for value in values:
            with contextlib.suppress(SafetyError):
                ins[role].set_power_dbm(value)
    saved = TrafficLog.load(traffic_log.save(tmp_path / "traffic_log.jsonl"))
    assert len(saved) == len(traffic_log)
    for role, values in attempts.items():
        cap = bench.instruments[role].max_power_dbm
        pattern = re.compile(r"^SOUR:POW (\S+)$")  # the set_power_dbm template of the profile
        written = [float(m.group(1)) for e in saved.writes(role)
                   if (m := pattern.match(e.text))]
        assert written == [v for v in values if v <= cap]  # the allowed ones did go out
        assert written and max(written) <= cap


def test_open_bench_subset_and_unknown_role(inst_sim_bench_path):
    bench = load_bench(inst_sim_bench_path)
    with open_bench(bench, roles=["osa", "switch"]) as ins:
        assert set(ins) == {"osa", "switch"}
    with pytest.raises(InputError, match="not on this bench"):
        open_bench(bench, roles=["laser_c"])


def test_real32_trace_and_safe_off_against_virtual_lab(tmp_path):
    """The REAL,32 block path end to end over TCP (pyvisa-py) against the virtual lab."""
    vlab = pytest.importorskip("labrun.vlab")
    with vlab.VirtualLab("default-scenario.toml") as lab:
        bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
        assert bench.instruments["osa"].profile.trace.format == "real32"
        traffic_log = TrafficLog()
        with open_bench(bench, traffic_log=traffic_log, roles=["laser_a", "attenuator_a",
                                                             "osa"]) as ins:
            ins["laser_a"].set_power_dbm(5.0)
            ins["laser_a"].output_on()
            ins["attenuator_a"].set_attenuation_db(3.0)
            ins["attenuator_a"].output_on()
            ins["osa"].configure(1550.0, 4.0, 0.05, 2049)
            ins["osa"].sweep()
            x, y = ins["osa"].read_trace()
            assert x.size == y.size == 2049 and np.all(np.diff(x) > 0)
            assert y.max() > -30.0  # the laser line stands far above the floor
            assert ins.safe_off_all() == []
        assert lab.sources_off()
        assert "<block 8196 bytes>" in [e.reply for e in traffic_log.entries]


def test_block_osa_falls_back_to_ascii_when_refused(inst_sim_bench_path):
    """The REAL,32 profile on an OSA that refuses FORM:DATA REAL,32 (pyvisa-sim) reads ASCII."""
    text = inst_sim_bench_path.read_text().replace('"generic-osa-ascii"', '"generic-osa"')
    inst_sim_bench_path.write_text(text)
    bench = load_bench(inst_sim_bench_path)
    assert bench.instruments["osa"].profile.trace.format == "real32"
    traffic_log = TrafficLog()
    with open_bench(bench, traffic_log=traffic_log, roles=["osa"]) as ins:
        x, y = ins["osa"].read_trace()
        assert x.size == y.size == 129
    sent = [e.text for e in traffic_log.writes("osa")]
    assert sent[-2:] == ["FORM:DATA REAL,32", "FORM:DATA ASC"]
