"""Safety paths of the sources, each checked on the virtual lab's own state: a read-back above
the bench cap is a SafetyError (not a fault to retry), emission is never requested with the
interlock open, and a run switches off sources it finds emitting before it touches anything else.
"""

from __future__ import annotations

import pytest
from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.errors import InstrumentError, SafetyError
from labrun.instruments import open_bench
from labrun.plan import load_plan
from labrun.store import open_store
from labrun.trafficlog import TrafficLog, split_units
from labrun.vlab.lab import DEFAULT_CAPS_DBM, VirtualLab
from labrun.vlab.state import Laser

CAP_DBM = DEFAULT_CAPS_DBM["laser_a"]  # 10 dBm, the virtual lab bench's cap for laser_a


class OvershootingLaser(Laser):
    """A faulty laser that applies 3 dB more than it is asked (and reports what it applies)."""

    overshoot_db = 3.0

    @property  # type: ignore[override]
    def power_dbm(self) -> float:
        return self._power

    @power_dbm.setter
    def power_dbm(self, value: float) -> None:
        self._power = value + self.overshoot_db


def test_readback_above_the_cap_is_a_safety_error(tmp_path):
    with VirtualLab(scenario()) as lab:
        with lab.state.lock:
            lab.state.lasers["laser_a"] = OvershootingLaser()
        bench = load_bench(write_bench(lab, tmp_path))
        with open_bench(bench, roles=["laser_a"]) as ins:
            laser = ins["laser_a"]
            with pytest.raises(InstrumentError) as mismatch:
                laser.set_power_dbm(5.0)  # reads back 8 dBm: a fault to retry, under the cap
            assert not isinstance(mismatch.value, SafetyError)
            with pytest.raises(SafetyError, match="above the bench cap"):
                laser.set_power_dbm(CAP_DBM - 1.0)  # 9 dBm asked, 12 dBm applied and reported
        with lab.state.lock:
            assert lab.state.lasers["laser_a"].power_dbm > CAP_DBM  # what the lab really did
        assert lab.sources_off()


def test_output_on_checks_the_interlock_before_sending(tmp_path):
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        traffic_log = TrafficLog()
        with open_bench(bench, roles=["laser_a"], traffic_log=traffic_log) as ins:
            laser = ins["laser_a"]
            laser.set_power_dbm(2.0)
            lab.open_interlock()
            with pytest.raises(SafetyError, match="interlock is open"):
                laser.output_on()
            sent = [e.text for e in traffic_log.writes("laser_a")]
            assert not any("OUTP:STAT ON" in text for text in sent), sent
            lab.close_interlock()
            laser.output_on()  # the same call goes through once the interlock is closed
            assert not lab.sources_off()
            laser.output_off()
        assert lab.sources_off()


def test_a_run_switches_off_sources_found_on_before_anything_else(tmp_path):
    """laser_a was left emitting at 12 dBm (above its cap): the run's first setting reaches it
    only after it is dark, and the run records what it found."""
    with VirtualLab(scenario()) as lab:
        with lab.state.lock:
            laser_state = lab.state.lasers["laser_a"]
            laser_state.power_dbm, laser_state.output = CAP_DBM + 2.0, True
        inst = lab.instruments["laser_a"]
        real = inst.execute
        settings: list[tuple[str, bool]] = []  # (setting received, laser_a emitting then)

        def execute(message: str):
            for unit in split_units(message):  # a compound message carries several settings
                if unit.lstrip(":").upper().startswith(("SOUR:WAV ", "SOUR:POW ")):
                    with lab.state.lock:
                        settings.append((unit, lab.state.lasers["laser_a"].output))
            return real(message)

        inst.execute = execute
        plan = load_plan(write_plan(tmp_path, long_powers(3)))
        store = open_store(tmp_path / "runs.db")
        out = run_plan(plan, load_bench(write_bench(lab, tmp_path)), store, operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False)
        assert out.status == "completed", out.reason
        # the first point's wavelength and power (the run switches the laser on after them)
        first_point = settings[:2]
        assert len(first_point) == 2, settings
        assert not any(on for _, on in first_point), f"laser_a emitting while set: {first_point}"
        (found,) = store.events(out.run_id, ["found_on"])
        assert found.role == "laser_a"
        assert dark(lab)
