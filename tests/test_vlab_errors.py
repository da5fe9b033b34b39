"""The virtual lab's error queue speaks SCPI-1999: every code it can queue carries the standard's
message, in the standard's reply form ``<code>,"<message>[;<device-dependent detail>]"``.

Source: SCPI-1999 Volume 2 (Command Reference), 21.8 "Error/Event Queue": the standard error and
event numbers with their descriptions. ``STANDARD`` below is written out here from that table, not
taken from labrun, so a wrong or missing message in labrun.vlab.scpi.ERRORS fails.
"""

from __future__ import annotations

import copy
import re
import tomllib
from pathlib import Path

import pytest
import pyvisa

from labrun.vlab import VirtualLab
from labrun.vlab.faults import SPURIOUS_CODES
from labrun.vlab.scenario import parse_scenario
from labrun.vlab.scpi import ERRORS, QUEUE_SIZE, ErrorQueue

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"

# SCPI-1999 Vol. 2, 21.8: number -> description (the subset a simple instrument can raise).
STANDARD = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -141: "Invalid character data",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -310: "System error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
}
REPLY = re.compile(r'^(-?\d+),"([^";]*)(?:;([^"]*))?"$')  # SCPI-1999 Vol. 2, 21.8.1 form


def _codes_in_source() -> set[int]:
    """Every literal error code the virtual lab's code can queue or raise."""
    codes: set[int] = set(SPURIOUS_CODES)
    for path in (REPO / "labrun" / "vlab").glob("*.py"):
        text = path.read_text(encoding="utf-8")
        codes |= {int(c) for c in re.findall(r"(?:ScpiFault|push_error|push)\((-\d+)", text)}
    return codes


def test_every_message_is_the_standards() -> None:
    assert {code: STANDARD[code] for code in ERRORS} == ERRORS


def test_every_code_the_virtual_lab_can_raise_has_its_message() -> None:
    raised = _codes_in_source()
    assert {-104, -108, -109, -113, -114, -141, -221, -222, -224, -300, -310, -363} <= raised
    assert raised <= set(ERRORS), sorted(raised - set(ERRORS))
    with pytest.raises(KeyError):  # a code without a message is refused, not sent as "Error"
        ErrorQueue().push(-999)


def test_queue_overflow_keeps_the_oldest_and_ends_with_350() -> None:
    # SCPI-1999 Vol. 2, 21.8: when the queue is full the most recent entry is replaced by -350.
    q = ErrorQueue()
    for _ in range(QUEUE_SIZE + 3):
        q.push(-222, "x")
    got = [q.pop() for _ in range(QUEUE_SIZE)]
    assert got[0] == (-222, "Data out of range;x") and got[-1] == (-350, "Queue overflow")
    assert q.pop() == (0, "No error")


def _scenario(faults: dict | None = None):
    data = tomllib.loads(DEFAULT.read_text())
    if faults is not None:
        data["faults"] = {"enabled": True, **copy.deepcopy(faults)}
    return parse_scenario(data)


def _drain(inst) -> list[tuple[int, str, str | None]]:
    """Read SYST:ERR? until 0; each reply split into code, message and detail."""
    out = []
    for _ in range(2 * QUEUE_SIZE):
        m = REPLY.match(inst.query("SYST:ERR?"))
        assert m, "reply not in the SCPI-1999 form"
        code, msg, detail = int(m.group(1)), m.group(2), m.group(3)
        if code == 0:
            assert msg == STANDARD[0]
            return out
        out.append((code, msg, detail))
    raise AssertionError("error queue never emptied")


@pytest.fixture(scope="module")
def rm():
    return pyvisa.ResourceManager("@py")  # shared with labrun.scpi: never closed here


def _open(rm, lab, role):
    return rm.open_resource(lab.resources[role], read_termination="\n",
                            write_termination="\n", timeout=2000)


@pytest.mark.parametrize(("role", "message", "code"), [
    ("switch", "ROUT:BOGUS 1", -113),
    ("switch", "ROUT:PATH", -109),
    ("switch", "*CLS 3", -108),
    ("switch", "ROUT:PATH one", -104),
    ("switch", "ROUT:PATH 7", -222),
    ("switch", "ROUT:PATH 1.5", -224),
    ("pol_controller", "POL:ANGL4 10", -114),
    ("osa", "TRAC:DATA? SPECTRUM", -141),  # not one of its trace names
    ("osa", "TRAC:DATA?", -109),
    ("laser_a", "OUTP:STAT ON", -221),     # the interlock is open in this test
])
def test_each_error_over_the_wire_carries_the_standard_message(rm, role, message, code):
    with VirtualLab(_scenario(), seed=1) as lab:
        lab.state.set_interlock(False)
        inst = _open(rm, lab, role)
        try:
            inst.write("*CLS")
            inst.write(message)
            got = _drain(inst)
        finally:
            inst.close()
    assert [(c, m) for c, m, _ in got] == [(code, STANDARD[code])]


def test_spurious_entries_carry_the_standard_messages(rm):
    # The fault that used to answer -310,"Error": every spurious code now has its message.
    with VirtualLab(_scenario({"spurious_error_probability": 1.0, "roles": ["switch"]}),
                    seed=5) as lab:
        inst = _open(rm, lab, "switch")
        seen: dict[int, str] = {}
        try:
            for _ in range(40):
                inst.write("*CLS")  # the entry drawn for *CLS lands after the clear
                code, msg, _ = REPLY.match(inst.query("SYST:ERR?")).groups()
                seen[int(code)] = msg
        finally:
            inst.close()
    assert set(seen) == set(SPURIOUS_CODES)  # 40 draws of 4 codes: all of them seen
    assert seen == {c: STANDARD[c] for c in SPURIOUS_CODES}
