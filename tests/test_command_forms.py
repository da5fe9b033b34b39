"""labrun's own command forms where SCPI-1999 leaves the choice open, on every simulated peer.

SCPI-1999 Volume 2 (TRACe subsystem): ``TRACe[:DATA]? <trace_name>`` returns the named trace;
the trace names are the instrument's to choose. labrun's are ``WLEN`` (wavelength axis) and
``LEVEL`` (level axis). SCPI-1999 Volume 1, 6.2 (program headers): long and short forms and
optional nodes in square brackets are equivalent. The attenuator and the power meter share one
wavelength-calibration node, ``CAL:WLEN``. The older forms answer -113 Undefined header
(SCPI-1999 Vol. 2, 21.8), and no shipped file uses them.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import numpy as np
import pytest
import pyvisa

from labrun.plan import POINT_STEPS
from labrun.profiles import load_profile
from labrun.vlab import VirtualLab
from labrun.vlab.scenario import parse_scenario

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"
# The forms labrun no longer uses, spelled apart so this file does not match itself.
OLD_FORMS = ("TRAC:DATA:" + "X", "TRAC:DATA:" + "Y", "INP:" + "WAV", "SENS:POW:" + "WAV",
             "101, " + "50001", "Simulated " + "Photonics")
SHIPPED = ("drivers", "sim_instruments", "sweeps", "labrun", "tests", "docs", "benchmarks")


@pytest.fixture(scope="module")
def rm():
    return pyvisa.ResourceManager("@py")  # shared with labrun.scpi: never closed here


@pytest.fixture
def lab():
    data = tomllib.loads(DEFAULT.read_text())
    data["realism"] = {"enabled": False}
    with VirtualLab(parse_scenario(copy.deepcopy(data)), time_scale=0.0, seed=1) as running:
        yield running


def _open(rm, lab, role):
    return rm.open_resource(lab.resources[role], read_termination="\n",
                            write_termination="\n", timeout=2000)


def test_named_traces_in_every_header_form(rm, lab):
    osa = _open(rm, lab, "osa")
    try:
        osa.write("SENS:WAV:CENT 1549.8;SPAN 3;:SENS:SWE:POIN 257;:INIT:IMM")
        assert osa.query("*OPC?") == "1"
        x = np.array(osa.query_ascii_values("TRAC:DATA? WLEN"))
        y = np.array(osa.query_ascii_values("TRAC:DATA? LEVEL"))
        assert x.size == y.size == 257 and np.all(np.diff(x) > 0)
        assert x[0] == pytest.approx(1548.3, abs=1e-6) and x[-1] == pytest.approx(1551.3, abs=1e-6)
        # SCPI-1999 Vol. 1, 6.2: long form, optional [:DATA] left out, lower case: same trace.
        for header in ("TRACE:DATA? LEVEL", "TRAC? LEVEL", "trace? level"):
            np.testing.assert_array_equal(np.array(osa.query_ascii_values(header)), y)
        assert osa.query("SYST:ERR?") == '0,"No error"'
        osa.write("TRAC:DATA:" + "Y?")  # the older node: no longer a header of this OSA
        assert osa.query("SYST:ERR?").startswith('-113,"Undefined header')
    finally:
        osa.close()


@pytest.mark.parametrize("role", ["attenuator_a", "power_meter"])
def test_wavelength_calibration_node_on_the_virtual_lab(rm, lab, role):
    inst = _open(rm, lab, role)
    try:
        inst.write("CAL:WLEN 1310.5")
        assert float(inst.query("CAL:WLEN?")) == pytest.approx(1310.5)
        assert float(inst.query("CALIBRATION:WLENGTH?")) == pytest.approx(1310.5)  # long form
        assert inst.query("SYST:ERR?") == '0,"No error"'
        inst.write(("INP:" if role.startswith("att") else "SENS:POW:") + "WAV 1550")
        assert inst.query("SYST:ERR?").startswith('-113,"Undefined header')
    finally:
        inst.close()


def test_both_profiles_share_one_wavelength_calibration_form():
    forms = {load_profile(name).op(op).template for name in ("generic-attenuator",
                                                             "generic-power-meter")
             for op in ("set_wavelength_nm", "read_wavelength_nm")}
    assert forms == {"CAL:WLEN {value:.3f}", "CAL:WLEN?"}
    osa = load_profile("generic-osa")
    assert (osa.op("read_trace_x").template, osa.op("read_trace_y").template) == (
        "TRAC:DATA? WLEN", "TRAC:DATA? LEVEL")


def test_pyvisa_sim_devices_speak_the_same_forms(inst_sim_bench_path):
    rm = pyvisa.ResourceManager(f"{inst_sim_bench_path.parent / 'fwm-devices.yaml'}@sim")
    try:
        res = {"attenuator_a": "TCPIP0::127.0.0.1::5103::SOCKET",
               "power_meter": "TCPIP0::127.0.0.1::5107::SOCKET",
               "osa": "TCPIP0::127.0.0.1::5106::SOCKET"}
        for role in ("attenuator_a", "power_meter"):
            inst = rm.open_resource(res[role], read_termination="\n", write_termination="\n")
            inst.write("CAL:WLEN 1310.500")
            assert float(inst.query("CAL:WLEN?")) == pytest.approx(1310.5)
            assert inst.query("*IDN?").startswith("LABRUN-PYSIM,")  # invented identity
        osa = rm.open_resource(res["osa"], read_termination="\n", write_termination="\n")
        x = np.array(osa.query_ascii_values("TRAC:DATA? WLEN"))
        y = np.array(osa.query_ascii_values("TRAC:DATA? LEVEL"))
        assert x.size == y.size == int(osa.query("SENS:SWE:POIN?")) == 129
        assert x[np.argmax(y)] in (pytest.approx(1549.6), pytest.approx(1550.0))
    finally:
        rm.close()


def test_plan_sample_counts_are_labruns_own():
    # Odd (a sample on the centre) and 2^n + 1, so each count halves the spacing of the one
    # before and keeps its samples: (n_next - 1) = 2 (n - 1).
    assert all(n % 2 == 1 and ((n - 1) & (n - 2)) == 0 for n in POINT_STEPS)
    assert all(b - 1 == 2 * (a - 1) for a, b in zip(POINT_STEPS, POINT_STEPS[1:], strict=False))
    assert load_profile("generic-osa").op("set_points").range == (33.0, 65537.0)


def test_no_shipped_file_uses_the_older_forms():
    files = [REPO / f for f in ("README.md", "DEVELOPERS.md", "pyproject.toml")]
    for folder in SHIPPED:
        files += [p for p in (REPO / folder).rglob("*") if p.is_file() and
                  p.suffix in {".py", ".toml", ".md", ".yaml"}]
    found = sorted(f"{p.relative_to(REPO)}: {form}" for p in files
                   for form in OLD_FORMS if form in p.read_text(encoding="utf-8"))
    assert not found, found
