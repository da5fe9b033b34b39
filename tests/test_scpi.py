"""SCPI session layer against a loopback TCP peer (pyvisa-py) and pyvisa's own block codec."""

from __future__ import annotations

import logging
import struct
import time

import numpy as np
import pytest
from _engine_support import scenario
from pyvisa.util import from_ieee_block, to_ieee_block

from labrun.errors import InputError, InstrumentError
from labrun.scpi import (
    Idn,
    NoAnswerError,
    ScpiError,
    ScpiSession,
    parse_error_reply,
    parse_idn,
    visa_library_spec,
)
from labrun.trafficlog import TrafficLog
from labrun.vlab import VirtualLab
from labrun.vlab.state import sweep_time_s


def _session(peer, traffic_log=None, **kw) -> ScpiSession:
    kw.setdefault("timeout_ms", 2000)
    return ScpiSession(peer.resource, "@py", traffic_log=traffic_log, role="peer", **kw).open()


# -- IEEE 488.2 definite-length arbitrary block ------------------------------------------------

@pytest.mark.parametrize("byte_order", ["little", "big"])
def test_block_real32_matches_pyvisa_codec(inst_scpi_peer, byte_order):
    """The session decodes what pyvisa.util.to_ieee_block encodes (reference library)."""
    values = np.linspace(-80.0, 12.5, 257).astype(np.float32)
    inst_scpi_peer.state.trace = values.tolist()
    inst_scpi_peer.state.big_endian = byte_order == "big"
    traffic_log = TrafficLog()
    with _session(inst_scpi_peer, traffic_log) as s:
        got = s.query_block_real32("TRAC:DATA? LEVEL", byte_order)
    np.testing.assert_array_equal(got, values.astype(float))
    # the traffic log keeps the size, not the bytes
    assert traffic_log.entries[-1].reply == f"<block {4 * values.size} bytes>"


def test_block_header_follows_ieee_488_2(inst_scpi_peer):
    """IEEE 488.2 7.7.6.2: '#', one digit n, n digits of length, then the bytes.

    The block is built by hand here with struct (little-endian IEEE 754 single), checked against
    pyvisa's from_ieee_block (reference library), then read through the session.
    """
    values = [1550.0, -3.5, 0.125]
    payload = struct.pack("<3f", *values)
    block = b"#" + str(len(str(len(payload)))).encode() + str(len(payload)).encode() + payload
    assert block[:4] == b"#212"
    assert list(from_ieee_block(block, "f", False)) == values
    assert bytes(to_ieee_block(values, "f", False)) == block
    inst_scpi_peer.state.trace = values
    with _session(inst_scpi_peer) as s:
        assert s.query_block_real32("TRAC:DATA? LEVEL", "little").tolist() == values


def test_wrong_byte_order_gives_different_values(inst_scpi_peer):
    """A block read with the wrong byte order must not silently equal the right one."""
    inst_scpi_peer.state.trace = [1.0, 2.0, 3.0]
    with _session(inst_scpi_peer) as s:
        assert s.query_block_real32("TRAC:DATA? LEVEL", "big").tolist() != [1.0, 2.0, 3.0]


def test_ascii_fallback(inst_scpi_peer):
    inst_scpi_peer.state.trace = [-65.25, -3.0, 2.5]
    with _session(inst_scpi_peer) as s:
        assert s.query_ascii_floats("TRAC:ASC?").tolist() == [-65.25, -3.0, 2.5]


# -- error queue -----------------------------------------------------------------------------

def test_error_reply_parsing():
    """SCPI-1999 21.8: <code>,"<message>"; code 0 is 'No error'."""
    assert parse_error_reply('0,"No error"') == (0, "No error")
    assert parse_error_reply('-222,"Data out of range"') == (-222, "Data out of range")
    assert parse_error_reply('+0,"No error"\n') == (0, "No error")
    with pytest.raises(ValueError):
        parse_error_reply("garbage")


def test_drain_reads_until_no_error_and_names_command(inst_scpi_peer):
    """SCPI-1999 / IEEE 488.2: each SYST:ERR? pops the oldest entry; 0,"No error" ends it."""
    inst_scpi_peer.state.errors = ['-113,"Undefined header"', '-222,"Data out of range"',
                                   '-350,"Queue overflow"']
    traffic_log = TrafficLog()
    with _session(inst_scpi_peer, traffic_log) as s:
        with pytest.raises(ScpiError) as info:
            s.write("SOUR:POW 1.000")
        err = info.value
        assert (err.code, err.error_message, err.command) == (-113, "Undefined header",
                                                              "SOUR:POW 1.000")
        assert "SOUR:POW 1.000" in str(err) and "+2 more" in str(err)
        polls = [e for e in traffic_log.entries if e.text == "SYST:ERR?"]
        assert [p.reply for p in polls][-1] == '0,"No error"'
        assert len(polls) == 4  # three entries, then the one that ends the queue
        s.write("SOUR:POW 2.000")  # queue now empty: no error
        assert s.query("SOUR:POW?") == "2.000"


def test_out_of_range_on_instrument_raises_typed_error(inst_scpi_peer):
    with _session(inst_scpi_peer) as s, pytest.raises(ScpiError) as info:
        s.write("SOUR:POW 40.000")
    assert info.value.code == -222 and info.value.command == "SOUR:POW 40.000"


def test_error_queue_that_never_empties_is_bounded(inst_scpi_peer):
    inst_scpi_peer.state.endless_errors = True
    with _session(inst_scpi_peer) as s, pytest.raises(InstrumentError, match="did not empty"):
        s.write("*CLS")


# -- retries ---------------------------------------------------------------------------------

def test_timeout_is_not_sent_again(inst_scpi_peer, caplog):
    """An exchange that ran out its timeout is reported at once, not re-sent: a hung instrument
    must cost one timeout before the engine can switch the light off, not retries + 1."""
    inst_scpi_peer.state.silent = 1
    traffic_log = TrafficLog()
    with (caplog.at_level(logging.WARNING, logger="labrun.scpi"),
          _session(inst_scpi_peer, traffic_log, timeout_ms=200, retries=2) as s):
        t0 = time.monotonic()
        with pytest.raises(NoAnswerError, match="no answer"):
            s.idn()
        assert time.monotonic() - t0 < 0.2 * 1.9  # one timeout, not two or three
        assert s.idn().model == "BLK-1"  # the next call reconnects and is answered
    idn_tries = [e for e in traffic_log.entries if e.text == "*IDN?"]
    assert [e.attempt for e in idn_tries] == [1, 1]
    assert "TMO" in (idn_tries[0].error or "") and idn_tries[1].reply
    assert inst_scpi_peer.state.connections == 2


def test_lost_connection_is_retried(inst_scpi_peer):
    """A peer that closed the connection is not a silent one: reconnected and asked again."""
    traffic_log = TrafficLog()
    with _session(inst_scpi_peer, traffic_log, timeout_ms=500) as s:
        inst_scpi_peer.state.drop = 1
        assert s.query("SOUR:POW?") == "0.000"
    tries = [e for e in traffic_log.entries if e.text == "SOUR:POW?"]
    assert len(tries) == 2 and tries[0].error and tries[1].error is None


def test_retries_are_bounded(inst_free_port):
    """Refused connections fail fast and are retried ``retries`` times, then reported."""
    traffic_log = TrafficLog()
    resource = f"TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"
    s = ScpiSession(resource, "@py", timeout_ms=2000, retries=2, role="laser_a",
                    traffic_log=traffic_log)
    t0 = time.monotonic()
    with pytest.raises(NoAnswerError, match="no answer"):
        s.query("*IDN?")
    assert time.monotonic() - t0 < 1.0
    assert len([e for e in traffic_log.entries if e.text == "*IDN?"]) == 3


def test_quick_bounds_the_timeout_and_restores_it(inst_scpi_peer):
    """The safe-off's short exchanges: one try within the short timeout, then the profile's
    own timeout and retries again."""
    inst_scpi_peer.state.silent = 1
    with _session(inst_scpi_peer, timeout_ms=2000, retries=2) as s:
        t0 = time.monotonic()
        with s.quick(150), pytest.raises(NoAnswerError):
            s.query("*IDN?")
        assert time.monotonic() - t0 < 1.0  # 0.15 s, not the 2 s of the profile
        assert (s.timeout_ms, s.retries) == (2000, 2)
        assert s.idn().model == "BLK-1"


def test_refused_connection_is_one_line_instrument_error(inst_free_port):
    resource = f"TCPIP0::127.0.0.1::{inst_free_port}::SOCKET"
    s = ScpiSession(resource, "@py", timeout_ms=200, retries=1, role="laser_a").open()
    with pytest.raises(NoAnswerError) as info:
        s.idn()
    assert "\n" not in str(info.value) and str(info.value).startswith("laser_a: no answer")


def test_opc_wait_blocks_until_the_sweep_is_done():
    """IEEE 488.2 12.5.3: *OPC? answers 1 only once every pending operation is complete. On the
    virtual lab at time scale 1 an OSA sweep takes its simulated duration in real time, so
    opc_wait after INIT:IMM must take at least that long (the lab's own sweep-time model)."""
    sweep_s = sweep_time_s(10.0, 0.05, 1025)  # 0.05 + 1025 * 20e-6 + 10 / (0.05 * 2000)
    log = TrafficLog()
    with VirtualLab(scenario(), time_scale=1.0) as lab, ScpiSession(
            lab.resources["osa"], "@py", timeout_ms=2000, traffic_log=log, role="osa") as s:
        s.open()
        for cmd in ("SENS:WAV:SPAN 10", "SENS:BAND:RES 0.05", "SENS:SWE:POIN 1025"):
            s.write(cmd)
        assert s.query("SYST:ERR?") == '0,"No error"'
        s.write("INIT:IMM")
        t0 = time.monotonic()
        s.opc_wait(timeout_ms=10_000)
        waited = time.monotonic() - t0
    assert waited >= 0.9 * sweep_s, (waited, sweep_s)
    last = log.entries[-1]
    assert (last.text, last.reply) == ("*OPC?", "1")


def test_opc_wait_without_an_opc_query_sends_nothing(inst_scpi_peer):
    with _session(inst_scpi_peer, opc_query=None) as s:
        s.opc_wait(timeout_ms=1000)
        s.query("*IDN?")
    assert "*OPC?" not in inst_scpi_peer.state.received
    assert inst_scpi_peer.state.received[-1] == "*IDN?"


# -- identity and backends -------------------------------------------------------------------

def test_idn_fields():
    """IEEE 488.2 10.14: manufacturer, model, serial number, firmware level."""
    assert parse_idn("ACME Optics,TL-9,SN123,2.1.0\n") == Idn("ACME Optics", "TL-9", "SN123",
                                                             "2.1.0")
    assert parse_idn("Maker,Model") == Idn("Maker", "Model", "", "")
    assert parse_idn("A,B,C,D,with,commas").firmware == "D,with,commas"


def test_backend_names():
    assert visa_library_spec("@py") == "@py"
    assert visa_library_spec("@sim", "/x/devices.yaml") == "/x/devices.yaml@sim"
    assert visa_library_spec("@ivi") == "@ivi"
    with pytest.raises(InputError):
        visa_library_spec("@nope")


def test_invalid_resource_string_is_input_error():
    with pytest.raises(InputError):
        ScpiSession("NOT-A-RESOURCE", "@py").open()
