"""IEEE 488.2 compound messages, parallel queries and block reads (the per-point fast path),
against the virtual lab and the loopback peer, and checked against pyvisa's block codec."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest
from _engine_support import scenario
from pyvisa.util import from_ieee_block, to_ieee_block

from labrun.bench import load_bench
from labrun.instruments import make_session, open_bench, output_states
from labrun.resources import find_file
from labrun.scpi import ScpiError, ScpiSession, compound, query_each, split_units
from labrun.trafficlog import TrafficLog
from labrun.vlab.lab import VirtualLab


@pytest.fixture()
def lab():
    with VirtualLab(scenario()) as vl:
        yield vl


def _session(lab, role, **kw) -> ScpiSession:
    return ScpiSession(lab.resources[role], "@py", role=role, timeout_ms=2000, **kw).open()


def test_units_split_at_semicolons_outside_strings():
    """IEEE 488.2: message units are separated by ';'; string data is double-quoted, a doubled
    quote standing for one, and may itself hold ';'."""
    assert split_units('9.667;0,"No error"') == ["9.667", '0,"No error"']
    assert split_units('1;-222,"Data out of range;INP:ATT 99"') == [
        "1", '-222,"Data out of range;INP:ATT 99"']
    assert split_units('"a "";"" b";2') == ['"a "";"" b"', "2"]
    # SCPI-1999 vol. 1, 6.2.4: after ';' a header is relative to the previous node unless it
    # starts with ':' (root) or '*' (IEEE 488.2 common command)
    assert compound("INP:ATT 3.000", ["INP:ATT?", "*OPC?", ":SYST:ERR?"]) == \
        "INP:ATT 3.000;:INP:ATT?;*OPC?;:SYST:ERR?"


def test_setting_readback_and_error_query_in_one_message(lab, tmp_path):
    traffic_log = TrafficLog()
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    with open_bench(bench, roles=["attenuator_a"], traffic_log=traffic_log) as ins:
        ins["attenuator_a"].set_attenuation_db(12.5)
    (entry,) = [e for e in traffic_log.writes() if "INP:ATT 12.500" in e.text]
    assert entry.text == "INP:ATT 12.500;:INP:ATT?;:SYST:ERR?"
    assert entry.reply == '12.5;0,"No error"'
    assert traffic_log.commands("attenuator_a")[-1] == "INP:ATT 12.500"
    with lab.state.lock:
        assert lab.state.attenuators["attenuator_a"].attenuation_db == 12.5


@pytest.mark.parametrize(("cmd", "queries", "code"), [
    ("INP:ATT 99.000", ["INP:ATT?"], -222),  # SCPI-1999: -222 Data out of range
    ("INP:ATT 5.000", ["INP:BOGUS?"], -113),  # SCPI-1999: -113 Undefined header
])
def test_compound_error_names_the_setting_and_empties_the_queue(lab, cmd, queries, code):
    with _session(lab, "attenuator_a", compound=True) as s:
        with pytest.raises(ScpiError) as info:
            s.setting(cmd, queries)
        assert info.value.code == code and info.value.command == cmd
        assert s.query("SYST:ERR?") == '0,"No error"'  # drained: nothing blames later commands


def test_profile_without_the_capability_keeps_separate_messages(lab, tmp_path):
    """A profile that does not declare compound_messages: setting, error query and read-back
    travel as three messages, exactly as before."""
    src = Path(find_file("generic-attenuator.toml", "drivers")).read_text(encoding="utf-8")
    assert "compound_messages = true" in src
    plain = tmp_path / "plain-attenuator.toml"
    plain.write_text(src.replace('name = "generic-attenuator"', 'name = "plain-attenuator"')
                     .replace("compound_messages = true", "compound_messages = false"),
                     encoding="utf-8")
    bench_path = lab.write_bench(tmp_path / "bench.toml")
    text = bench_path.read_text(encoding="utf-8")
    bench_path.write_text(text.replace('profile = "generic-attenuator"',
                                       f'profile = "{plain}"', 1), encoding="utf-8")
    traffic_log = TrafficLog()
    with open_bench(load_bench(bench_path), roles=["attenuator_a"],
                    traffic_log=traffic_log) as ins:
        assert not ins["attenuator_a"].session.compound
        ins["attenuator_a"].set_attenuation_db(7.25)
    texts = [e.text for e in traffic_log.entries]
    i = texts.index("INP:ATT 7.250")
    assert texts[i:i + 3] == ["INP:ATT 7.250", "SYST:ERR?", "INP:ATT?"]


def test_pyvisa_sim_never_gets_compound_messages(inst_sim_bench_path):
    """pyvisa-sim devices answer whole messages only: the @sim bench keeps separate ones even
    though the generic profiles declare the capability."""
    bench = load_bench(inst_sim_bench_path)
    assert bench.instruments["laser_a"].profile.capabilities.compound_messages
    assert not any(make_session(bench, role).compound for role in bench.instruments)


def test_parallel_queries_and_their_fallback(lab, tmp_path):
    traffic_log = TrafficLog()
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    with open_bench(bench, roles=["laser_a", "laser_b"], traffic_log=traffic_log) as ins:
        lasers = [ins["laser_a"], ins["laser_b"]]
        lasers[1].output_on()
        assert output_states(lasers) == [False, True]
        # a dropped connection: the pair is asked again one at a time, after reconnecting
        lasers[0].session.set_timeout(300)
        lab.drop_connections("laser_a")
        assert output_states(lasers) == [False, True]
        with pytest.raises(ValueError):
            query_each([(lasers[0].session, "*IDN?"), (lasers[0].session, "*IDN?")])
        lasers[1].output_off()
    asked = [e for e in traffic_log.entries if e.text == "OUTP:STAT?"]
    assert [e.role for e in asked if e.error] == ["laser_a", "laser_b"]  # the failed pair
    assert {e.role for e in asked if e.reply is not None} == {"laser_a", "laser_b"}


def test_block_with_newline_bytes_is_read_whole(inst_scpi_peer):
    """A 20,001-sample REAL,32 block whose bytes hold many 0x0A (the read termination): the
    body is read by length (IEEE 488.2 7.7.6 definite-length block), not up to the first
    newline; values checked against pyvisa's own block codec."""
    newline_float = struct.unpack("<f", b"\n\n\x80\xc2")[0]  # bytes 0x0A 0x0A: about -64 dBm
    rng = np.random.default_rng(7)
    values = rng.normal(-60.0, 5.0, 20001).astype(np.float32)
    values[::7] = newline_float
    block = bytes(to_ieee_block(values.tolist(), "f", False))
    assert block.count(b"\n") > 5000
    np.testing.assert_array_equal(from_ieee_block(block, "f", False), values)
    inst_scpi_peer.state.trace = values.tolist()
    with ScpiSession(inst_scpi_peer.resource, "@py", timeout_ms=2000) as s:
        got = s.query_block_real32("TRAC:DATA? LEVEL", "little")
        assert s.query("*IDN?").startswith("Loopback")  # nothing left over on the connection
    np.testing.assert_array_equal(got, values.astype(float))


def test_sweep_and_trace_in_one_message(lab):
    """INIT:IMM;*OPC?;:TRAC:DATA? LEVEL;:SYST:ERR? : a block inside a compound response
    (IEEE 488.2 arbitrary block response data among ';'-separated units) decodes to the same
    values as a separate TRAC:DATA? LEVEL of that sweep; a failing block query names the
    setting."""
    with _session(lab, "osa", compound=True) as s:
        for cmd in ("FORM:DATA REAL,32", "FORM:BORD SWAP", "SENS:SWE:POIN 129"):
            s.setting(cmd)
        units, y = s.setting_then_block("INIT:IMM", ["*OPC?"], "TRAC:DATA? LEVEL", "little")
        assert units == ["1"] and y.shape == (129,)
        np.testing.assert_array_equal(y, s.query_block_real32("TRAC:DATA? LEVEL", "little"))
        with pytest.raises(ScpiError) as info:
            s.setting_then_block("INIT:IMM", ["*OPC?"], "TRAC:DATA? BOGUS", "little")
        # SCPI-1999 -141 Invalid character data: BOGUS is no trace name of this OSA.
        assert info.value.code == -141 and info.value.command == "INIT:IMM"
        assert s.query("SYST:ERR?") == '0,"No error"' and s.query("*OPC?") == "1"


def test_source_switches_travel_alone(lab, tmp_path):
    """issue 13: several commands in one message only where the profile declares it, and never
    to switch light: output_on/output_off go alone (their read-back and error query follow as
    separate exchanges), while a power setting on the same instrument still travels compound."""
    traffic_log = TrafficLog()
    bench = load_bench(lab.write_bench(tmp_path / "bench.toml"))
    assert bench.settle_scale == 0.0
    with open_bench(bench, roles=["laser_b"], traffic_log=traffic_log) as ins:
        laser = ins["laser_b"]
        assert laser.session.compound
        laser.apply("set_power_dbm", 0.0)
        laser.output_on()
        laser.output_off()
    sent = [e.text for e in traffic_log.entries if e.role == "laser_b"]
    switched = [t for t in sent if "OUTP:STAT O" in t]
    assert switched == ["OUTP:STAT ON", "OUTP:STAT OFF"], sent
    assert any(t.startswith("SOUR:POW 0.000;") for t in sent), sent
