"""Virtual-lab speed figures: one OSA sweep at 20,001 points, in-process and over the wire.

Target (issue 3): a virtual-lab sweep computed in <= 20 ms, so the simulator never dominates a
rehearsal. "cached" repeats the same optical state (the spool model is reused); "new state"
changes the launch power by 0.1 dB before each sweep (the spool model is recomputed).
Not a test. Run: python benchmarks/bench_vlab.py
"""

from __future__ import annotations

import time
import tomllib
from pathlib import Path

import numpy as np
import pyvisa

from labrun.vlab import VirtualLab
from labrun.vlab.scenario import parse_scenario

TARGET_MS = 20.0
POINTS = 20001
SCENARIO = Path(__file__).resolve().parents[1] / "sim_instruments" / "default-scenario.toml"


def lab_for(spool: str) -> VirtualLab:
    """The shipped scenario with the given spool connected."""
    data = tomllib.loads(SCENARIO.read_text())
    data["connected"] = spool
    return VirtualLab(parse_scenario(data), time_scale=0.0, seed=0)


def light_up(lab: VirtualLab) -> None:
    """Both lasers on at 10 dBm, 100 GHz apart, attenuators open, OSA at 20,001 points."""
    st = lab.state
    with st.lock:
        for role, wl in (("laser_a", 1550.0), ("laser_b", 1549.2)):
            st.lasers[role].wavelength_nm, st.lasers[role].power_dbm = wl, 10.0
            st.lasers[role].output = True
        for att in st.attenuators.values():
            att.attenuation_db, att.output = 0.0, True
        osa = st.osa
        osa.center_nm, osa.span_nm, osa.rbw_nm, osa.points = 1549.6, 8.0, 0.02, POINTS


def in_process(lab: VirtualLab, vary: bool, n: int = 20) -> float:
    """Median ms of LabState.sweep()."""
    times = []
    for i in range(n):
        if vary:
            lab.state.lasers["laser_a"].power_dbm = 10.0 - 0.1 * (i % 50)
        t0 = time.perf_counter()
        with lab.state.lock:
            lab.state.sweep()
        times.append((time.perf_counter() - t0) * 1e3)
    return float(np.median(times))


def over_wire(lab: VirtualLab, rm: pyvisa.ResourceManager, vary: bool, n: int = 20) -> float:
    """Median ms of INIT:IMM, *OPC? and a REAL,32 TRAC:DATA? LEVEL read through pyvisa-py."""
    osa = rm.open_resource(lab.resources["osa"], read_termination="\n",
                           write_termination="\n", timeout=5000)
    laser = rm.open_resource(lab.resources["laser_a"], read_termination="\n",
                             write_termination="\n", timeout=5000)
    osa.write("FORM:DATA REAL,32;:FORM:BORD SWAP")
    times = []
    for i in range(n):
        if vary:
            laser.write(f"SOUR:POW {9.0 - 0.1 * (i % 50):.3f}")
            laser.query("*OPC?")
        t0 = time.perf_counter()
        osa.write("INIT:IMM")
        osa.query("*OPC?")
        y = osa.query_binary_values("TRAC:DATA? LEVEL", datatype="f", container=np.array)
        times.append((time.perf_counter() - t0) * 1e3)
        assert y.size == POINTS
    osa.close()
    laser.close()
    return float(np.median(times))


def main() -> None:
    rm = pyvisa.ResourceManager("@py")
    print(f"virtual-lab OSA sweep, {POINTS} points, median ms (target <= {TARGET_MS:.0f} ms)")
    for spool in ("HNLF-A17", "SMF-B02"):
        with lab_for(spool) as lab:
            light_up(lab)
            for vary in (False, True):
                label = "new state" if vary else "cached"
                a = in_process(lab, vary)
                b = over_wire(lab, rm, vary)
                flag = "ok" if a <= TARGET_MS else "SLOW"
                print(f"  {spool:<9} {label:<9} compute {a:7.2f} ms [{flag}]   "
                      f"sweep + *OPC? + REAL,32 read over TCP {b:7.2f} ms")


if __name__ == "__main__":
    main()
