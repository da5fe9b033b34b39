"""Seeded realism and fault injection of the virtual lab.

Rates are checked against binomial bounds from scipy.stats.binom (a general-purpose reference
library): a count outside the 99.99 % interval means the injector does not honour its rate.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path

import numpy as np
import pytest
import pyvisa
from pyvisa.errors import VisaIOError
from scipy.stats import binom

from labrun.vlab import VirtualLab
from labrun.vlab.faults import SPURIOUS_CODES, FaultInjector
from labrun.vlab.scenario import Faults, parse_scenario
from labrun.vlab.state import LabState

REPO = Path(__file__).resolve().parents[1]
DEFAULT = REPO / "sim_instruments" / "default-scenario.toml"


def scenario_with(faults: dict | None = None, realism: dict | None = None):
    data = tomllib.loads(DEFAULT.read_text())
    if faults is not None:
        data["faults"] = {"enabled": True, **copy.deepcopy(faults)}
    if realism is not None:
        data["realism"] = realism
    return parse_scenario(data)


@pytest.fixture(scope="module")
def rm():
    # pyvisa keeps one ResourceManager per VISA library, shared with labrun.scpi: never close it
    # here, only the sessions opened from it.
    return pyvisa.ResourceManager("@py")


def open_role(rm, lab, role, timeout_ms):
    return rm.open_resource(lab.resources[role], read_termination="\n",
                            write_termination="\n", timeout=timeout_ms)


def within_binomial(count: int, n: int, p: float) -> bool:
    lo, hi = binom.interval(0.9999, n, p)  # scipy.stats.binom: 99.99 % central interval
    return lo <= count <= hi


def test_timeouts_occur_at_the_seeded_rate_over_the_wire(rm):
    """10 % timeout probability over 500 queries: the client times out exactly on the queries
    the seeded injector swallows, and at that rate."""
    scenario = scenario_with({"timeout_probability": 0.1, "roles": ["laser_a"]})
    # The server draws one decision per received message from its own (seed, role) generator,
    # so a twin injector says beforehand which queries it will swallow. Those get a short
    # timeout (no reply ever comes); the others a long one, so a slow reply on a loaded machine
    # is never mistaken for a swallowed query (nor read later as the next query's reply).
    twin = FaultInjector(scenario.faults, "laser_a", seed=7)
    swallowed = [twin.on_command().timeout for _ in range(500)]
    with VirtualLab(scenario, seed=7) as lab:
        inst = open_role(rm, lab, "laser_a", timeout_ms=5000)
        timed_out = []
        for expect_silence in swallowed:
            inst.timeout = 50 if expect_silence else 5000
            try:
                assert inst.query("*IDN?") == scenario.idn("laser_a")
                timed_out.append(False)
            except VisaIOError as exc:
                assert exc.error_code == pyvisa.constants.StatusCode.error_timeout
                timed_out.append(True)
        inst.close()
        injected = lab.instruments["laser_a"].faults.counts["timeout"]
        other = open_role(rm, lab, "laser_b", timeout_ms=5000)  # faults limited to laser_a
        assert all(other.query("*IDN?") for _ in range(50))
        other.close()
    assert timed_out == swallowed
    assert within_binomial(sum(timed_out), 500, 0.1), sum(timed_out)
    assert injected == sum(timed_out)


def test_every_fault_kind_follows_its_rate_and_the_seed():
    faults = Faults(enabled=True, timeout_probability=0.05, drop_probability=0.02,
                    garble_probability=0.1, spurious_error_probability=0.03,
                    short_trace_probability=0.2)
    n = 5000
    runs = []
    for _ in range(2):
        inj = FaultInjector(faults, "osa", seed=11)
        decisions = [inj.on_command() for _ in range(n)]
        shorts = [inj.short_trace_length(1000) for _ in range(n)]
        runs.append((decisions, shorts, dict(inj.counts)))
    assert runs[0] == runs[1]                           # same seed, same faults
    decisions, shorts, counts = runs[0]
    for name, p in (("timeout", 0.05), ("drop", 0.02), ("garble", 0.1)):
        assert within_binomial(sum(getattr(d, name) for d in decisions), n, p), name
    assert within_binomial(sum(d.spurious is not None for d in decisions), n, 0.03)
    assert within_binomial(sum(s is not None for s in shorts), n, 0.2)
    assert all(100 <= s < 900 for s in shorts if s is not None)
    assert {d.spurious for d in decisions if d.spurious} <= set(SPURIOUS_CODES)
    other = FaultInjector(faults, "osa", seed=12)
    assert [other.on_command() for _ in range(n)] != decisions
    off = FaultInjector(Faults(enabled=True, timeout_probability=1.0, roles=["laser_a"]),
                        "osa", seed=1)
    assert not any(off.on_command().timeout for _ in range(100))   # role not selected


def test_garbled_reply_spurious_error_and_short_trace_over_the_wire(rm):
    scenario = scenario_with({"garble_probability": 1.0, "roles": ["laser_a"]})
    with VirtualLab(scenario, seed=3) as lab:
        inst = open_role(rm, lab, "laser_a", timeout_ms=1000)
        replies = {inst.query("*IDN?") for _ in range(5)}
        assert scenario.idn("laser_a") not in replies
        inst.close()
    scenario = scenario_with({"spurious_error_probability": 1.0, "roles": ["switch"]})
    with VirtualLab(scenario, seed=3) as lab:
        inst = open_role(rm, lab, "switch", timeout_ms=1000)
        inst.write("ROUT:PATH 1")
        code, _, _ = inst.query("SYST:ERR?").partition(",")
        assert int(code) in SPURIOUS_CODES   # messages: tests/test_vlab_errors.py
        inst.close()
    scenario = scenario_with({"short_trace_probability": 1.0, "roles": ["osa"]})
    with VirtualLab(scenario, seed=3) as lab:
        osa = open_role(rm, lab, "osa", timeout_ms=2000)
        osa.write("SENS:SWE:POIN 1025;:INIT:IMM")
        assert osa.query("*OPC?") == "1"
        osa.write("FORM:DATA REAL,32;:FORM:BORD SWAP")
        y = osa.query_binary_values("TRAC:DATA? LEVEL", datatype="f", container=np.array)
        x = osa.query_binary_values("TRAC:DATA? WLEN", datatype="f", container=np.array)
        assert x.size == 1025 and 102 <= y.size < 1025
        osa.close()


def test_dropped_connection_fault(rm):
    scenario = scenario_with({"drop_probability": 1.0, "roles": ["power_meter"]})
    with VirtualLab(scenario) as lab:
        inst = open_role(rm, lab, "power_meter", timeout_ms=200)
        with pytest.raises((VisaIOError, ConnectionError, OSError)):
            inst.query("*IDN?")
        inst.close()
        assert lab.instruments["power_meter"].faults.counts["drop"] >= 1


def test_realism_is_seeded_and_drifts_slowly():
    realism = {"enabled": True, "laser_power_offset_db": 0.1, "laser_wavelength_offset_pm": 2.0,
               "laser_power_drift_db_per_sqrt_h": 0.05,
               "laser_wavelength_drift_pm_per_sqrt_h": 1.0, "pol_walk_hours": 2.0}
    scenario = scenario_with(realism=realism)

    def history(seed):
        state = LabState(scenario, seed=seed)
        for laser in state.lasers.values():
            laser.output = True
        out = []
        for _ in range(40):
            state.advance(900.0)                       # 15 simulated minutes per step
            out.append((*state.emitted("laser_a"), *state.stokes_b()))
        return np.array(out)

    a, b, c = history(5), history(5), history(6)
    np.testing.assert_array_equal(a, b)                 # same seed, same drift
    assert not np.array_equal(a, c)
    wl, p, s = a[:, 0], a[:, 1], a[:, 2:]
    assert np.all(np.abs(np.diff(wl)) < 0.005)           # steps of a slow walk, not jumps (nm)
    assert np.all(np.abs(np.diff(p)) < 0.2)
    np.testing.assert_allclose(np.linalg.norm(s, axis=1), 1.0, atol=1e-9)   # Stokes unit vectors
    angle = np.degrees(np.arccos(np.clip(s[0] @ s[-1], -1, 1)))
    assert angle > 1.0                                   # ten hours of a 2-hour walk moves it
