"""Parallel safe-off (labrun/safe_off.py): every role darkened at once with short timeouts, so
a hung or vanished laser never delays its attenuator or the other sources. Timed against the
virtual lab's own state (``StateWatch`` polling ``lab.role_dark``), never against a mock. The
1 s bound for every reachable role is the requirement of issue 13 ("every reachable source and
shutter safe within 1 s of the decision").
"""

from __future__ import annotations

import time

import pytest
from _engine_support import dark, scenario, write_bench

from labrun.bench import load_bench
from labrun.cli import main
from labrun.instruments import open_bench
from labrun.safe_off import OFF_ROLES, TIMEOUT_MS, darken
from labrun.vlab.lab import VirtualLab
from labrun.vlab.watch import StateWatch

WITHIN_S = 1.0


def _light_everything(lab: VirtualLab) -> None:
    """Lasers on, shutters open at 0 dB: the brightest state a run can leave."""
    with lab.state.lock:
        for laser in lab.state.lasers.values():
            laser.output = True
        for att in lab.state.attenuators.values():
            att.output, att.attenuation_db = True, 0.0
    assert not any(lab.role_dark(r) for r in ("laser_a", "laser_b", "attenuator_a",
                                              "attenuator_b"))


def _watch(lab: VirtualLab) -> StateWatch:
    return StateWatch({role: (lambda r=role: lab.role_dark(r)) for role in OFF_ROLES
                       if role in lab.servers})


@pytest.mark.parametrize("fault", ["hang", "refuse"])
def test_an_unreachable_laser_never_delays_its_attenuator(tmp_path, fault):
    """laser_b hung (accepts, never replies) or gone (refuses connections): every other role is
    dark within 1 s of the decision, over the run's own connections and fresh ones."""
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        ins = open_bench(bench)
        _light_everything(lab)
        getattr(lab, fault)("laser_b")
        watch = _watch(lab).arm()
        problems = darken(bench, ins, budget_s=2.0)
        took = time.monotonic() - watch.t0
        watch.stop()
        ins.close()
        reachable = [r for r in watch.checks if r != "laser_b"]
        late = {r: watch.after(r) for r in reachable}
        assert all(t is not None and t <= WITHIN_S for t in late.values()), late
        assert watch.after("laser_b") is None  # unreachable: still on, as expected
        assert len(problems) == 1 and problems[0].startswith("laser_b"), problems
        assert took <= 2.0 + TIMEOUT_MS / 1000 + 0.6  # the budget bounds the call itself


def test_all_reachable_dark_in_one_round_trip(tmp_path):
    """Nothing wrong: darken confirms every role quickly and reports no problem."""
    with VirtualLab(scenario()) as lab:
        bench = load_bench(write_bench(lab, tmp_path))
        _light_everything(lab)
        t0 = time.monotonic()
        assert darken(bench) == []
        assert time.monotonic() - t0 <= WITHIN_S and dark(lab)


def test_labrun_off_is_parallel_too(tmp_path, capsys):
    """'labrun off' with laser_a hung: the others are dark within 1 s, exit 1 naming laser_a."""
    with VirtualLab(scenario()) as lab:
        path = write_bench(lab, tmp_path)
        _light_everything(lab)
        lab.hang("laser_a")
        watch = _watch(lab).arm()
        assert main(["off", "--bench", str(path)]) == 1
        watch.stop()
        late = {r: watch.after(r) for r in watch.checks if r != "laser_a"}
        assert all(t is not None and t <= WITHIN_S for t in late.values()), late
        out = capsys.readouterr()
        assert "laser_a: FAILED" in out.out and "not every source" in out.err
