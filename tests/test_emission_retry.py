"""Emission is never switched on by a blind resend: when the connection is lost while ``OUTP:STAT
ON`` travels, the session must not reconnect and send it again on its own (the instrument may have
rebooted, at a power above the bench cap); the run's retry switches on again only after setting
the power and checking the cap and interlock. Checked on the virtual lab's own state."""

from __future__ import annotations

import pytest
from _engine_support import OPERATOR, dark, scenario, write_bench, write_plan

import labrun.instruments
import labrun.reduce
from labrun.bench import load_bench
from labrun.engine import RetryPolicy, Seams, run_plan
from labrun.errors import InstrumentError
from labrun.instruments import open_bench
from labrun.plan import load_plan
from labrun.store import open_store
from labrun.vlab.lab import DEFAULT_CAPS_DBM, VirtualLab

ABOVE_CAP_DBM = 12.0  # inside the generic laser's range [-10, 13] dBm, above its 10 dBm cap


def _reboot_while_switching_on(lab: VirtualLab, session, calls: dict) -> None:
    """Make the first message carrying OUTP:STAT ON find the laser rebooted (power-on default
    above the cap, output off) and the connection gone, as after a mains glitch."""
    res = session.visa_resource
    real_query, real_write = res.query, res.write

    def lost(message: str) -> None:
        if "OUTP:STAT ON" in message and not calls["done"]:
            calls["done"] = True
            with lab.state.lock:
                laser = lab.state.lasers[session.role]
                laser.power_dbm, laser.output = ABOVE_CAP_DBM, False
            raise ConnectionResetError("connection lost (injected by the test)")

    def query(message: str, *a, **kw):
        lost(message)
        return real_query(message, *a, **kw)

    def write(message: str, *a, **kw):
        lost(message)
        return real_write(message, *a, **kw)

    res.query, res.write = query, write


def test_a_lost_output_on_is_not_resent_by_the_session(tmp_path):
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        calls = {"done": False}
        with open_bench(bench, roles=["laser_a"]) as ins:
            laser = ins["laser_a"]
            laser.set_power_dbm(5.0)
            _reboot_while_switching_on(lab, laser.session, calls)
            with pytest.raises(InstrumentError):  # the caller retries, after checking again
                laser.output_on()
            assert calls["done"]
            with lab.state.lock:
                state = lab.state.lasers["laser_a"]
                assert not (state.output and state.power_dbm > DEFAULT_CAPS_DBM["laser_a"]), \
                    "emission switched on above the cap by a resend"


def test_the_run_switches_on_again_only_with_the_power_set_again(tmp_path):
    """The point retry reconnects, sets the planned power again and checks the cap before the
    light comes back: at every reduced trace the laser is at or under its cap."""
    calls = {"done": False}
    seen: list[float] = []
    real_open, real_reduce = labrun.instruments.open_bench, labrun.reduce.reduce_trace

    with VirtualLab(scenario()) as lab:
        def open_and_arm(bench, **kw):
            ins = real_open(bench, **kw)
            if "laser_a" in ins and not calls["done"]:
                _reboot_while_switching_on(lab, ins["laser_a"].session, calls)
            return ins

        def reduce_watching(*args, **kwargs):
            with lab.state.lock:
                seen.append(lab.state.lasers["laser_a"].power_dbm)
            return real_reduce(*args, **kwargs)

        store = open_store(tmp_path / "runs.db")
        out = run_plan(load_plan(write_plan(tmp_path, [0.0, 1.0, 2.0])),
                       load_bench(write_bench(lab, tmp_path)), store, operator=OPERATOR,
                       unattended=True, ack_safety=True, progress=False,
                       policy=RetryPolicy(attempts=3, backoff_s=0.0),
                       seams=Seams(open_bench=open_and_arm, reduce_trace=reduce_watching))
        assert calls["done"]
        assert out.status == "completed" and out.points_done == 3 and dark(lab)
    assert seen and max(seen) <= DEFAULT_CAPS_DBM["laser_a"], seen
    assert store.events(out.run_id, ["retry"])
