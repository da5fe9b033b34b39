"""A source whose power changes behind labrun's back during a run is noticed.

The emission watch reads each source's power with its output state (one compound message where
the profile allows): above the bench cap the run aborts at once with every source off (a safety
condition, never retried); away from the value set by more than the profile tolerance it is read
again once, and the run aborts only when the second read confirms it. The change is made in the
virtual lab's own state (as a front-panel knob or an instrument reset would) while the OSA
sweeps, and the outcome is checked on that state.
"""

from __future__ import annotations

from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.plan import load_plan
from labrun.store import open_store
from labrun.vlab.lab import DEFAULT_CAPS_DBM, VirtualLab

N_POINTS = 8
AT_SWEEP = 4  # the power changes during the 4th sweep: 3 points are stored before it


def _change_power_during_sweep(lab: VirtualLab, role: str, dbm: float, at_sweep: int) -> dict:
    """Set ``role``'s power to ``dbm`` in the lab state when the OSA receives sweep ``at_sweep``
    (someone turns the knob while the point is measured)."""
    osa = lab.instruments["osa"]
    real = osa.execute
    seen = {"sweeps": 0}

    def execute(message: str):
        if "INIT" in message.upper():
            seen["sweeps"] += 1
            if seen["sweeps"] == at_sweep:
                with lab.state.lock:
                    lab.state.lasers[role].power_dbm = dbm
        return real(message)

    osa.execute = execute
    return seen


def _run(tmp_path, lab):
    plan = load_plan(write_plan(tmp_path, long_powers(N_POINTS)))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    out = run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                   progress=False)
    return out, store


def test_power_above_the_cap_aborts_at_once(tmp_path):
    above = DEFAULT_CAPS_DBM["laser_a"] + 2.0  # 12 dBm: inside the laser's range, over the cap
    with VirtualLab(scenario()) as lab:
        _change_power_during_sweep(lab, "laser_a", above, AT_SWEEP)
        out, store = _run(tmp_path, lab)
        assert out.status == "aborted", out.reason
        assert "laser_a" in out.reason and "above the bench cap" in out.reason
        assert out.points_done == AT_SWEEP - 1  # the point measured at 12 dBm is not stored
        assert not store.events(out.run_id, ["retry"])  # a safety condition is never retried
        assert dark(lab)


def test_power_changed_behind_our_back_aborts_when_confirmed(tmp_path):
    with VirtualLab(scenario()) as lab:
        _change_power_during_sweep(lab, "laser_b", -9.0, AT_SWEEP)  # far below what was set
        out, store = _run(tmp_path, lab)
        assert out.status == "aborted", out.reason
        assert "laser_b power changed" in out.reason and "-9 dBm" in out.reason
        assert out.points_done == AT_SWEEP - 1
        faults = [e.message for e in store.events(out.run_id, ["fault"])]
        assert any("re-read says -9 dBm" in m for m in faults), faults
        assert dark(lab)


def test_one_corrupted_power_reply_does_not_end_the_run(tmp_path):
    """The laser answers the state-and-power query once with a wrong power (a corrupted reply):
    the re-read shows the set value, the run goes on and completes."""
    with VirtualLab(scenario()) as lab:
        laser = lab.instruments["laser_a"]
        real = laser.execute
        seen = {"watch": 0, "corrupted": False}

        def execute(message: str):
            reply = real(message)
            if "OUTP" in message.upper() and "POW?" in message.upper():
                seen["watch"] += 1  # state and power asked in one compound message
                if seen["watch"] == 3 and not seen["corrupted"]:
                    seen["corrupted"] = True
                    state, _ = reply.decode("latin-1").strip().split(";")
                    reply = f"{state};-7.500\n".encode("latin-1")
            return reply

        laser.execute = execute
        out, store = _run(tmp_path, lab)
        assert seen["corrupted"]
        assert out.status == "completed" and out.points_done == N_POINTS, out.reason
        faults = [e.message for e in store.events(out.run_id, ["fault"])]
        assert any("laser_a power reply -7.5 dBm disagreed" in m for m in faults), faults
        assert dark(lab)
