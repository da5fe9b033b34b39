"""The trace is reduced while the sources answer the emission watch (issue 11, item 4): the
watch's queries are sent after the sweep, the reduction runs before their replies are read, and
the watch's verdict still comes first. ``send_each`` / ``PendingReplies`` (labrun.scpi) are the
split ``query_each`` this rests on."""

from __future__ import annotations

import time

from _engine_support import OPERATOR, dark, long_powers, scenario, write_bench, write_plan

import labrun.instruments
import labrun.reduce
from labrun.bench import load_bench
from labrun.engine import Seams, run_plan
from labrun.faults import RetryPolicy
from labrun.plan import load_plan
from labrun.scpi import ScpiSession, send_each
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab


def _wait_for(pred, timeout: float = 2.0) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if pred():
            return True
        time.sleep(0.005)
    return pred()


def test_sent_before_read_and_abandoned_replies_never_answer_later(inst_scpi_peer):
    with ScpiSession(inst_scpi_peer.resource, "@py", timeout_ms=2000) as s:
        pending = send_each([(s, "*IDN?")])
        # the instrument has the query before anything is read
        assert _wait_for(lambda: "*IDN?" in inst_scpi_peer.state.received)
        assert pending.read()[0].startswith("Loopback")
        pending = send_each([(s, "SOUR:POW?")])
        assert _wait_for(lambda: "SOUR:POW?" in inst_scpi_peer.state.received)
        pending.abandon()  # its reply is left on a closed connection
        assert s.query("*IDN?").startswith("Loopback")  # not the power reply
        assert inst_scpi_peer.state.connections == 2


def _run(tmp_path, lab, seams, n=4):
    plan = load_plan(write_plan(tmp_path, long_powers(n)))
    bench = load_bench(write_bench(lab, tmp_path))
    store = open_store(tmp_path / "runs.db")
    return run_plan(plan, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                    progress=False, policy=RetryPolicy(attempts=2, backoff_s=0.0),
                    seams=seams), store


def test_the_run_reduces_while_the_watch_waits_for_its_replies(tmp_path):
    real_readings, real_reduce = labrun.instruments.source_readings, labrun.reduce.reduce_trace
    order: list[str] = []

    def readings(adapters, between=None):
        def during() -> None:
            order.append("between")
            between()
        out = real_readings(adapters, between=None if between is None else during)
        order.append("read")
        return out

    def reducing(*args, **kwargs):
        order.append("reduce")
        return real_reduce(*args, **kwargs)

    with VirtualLab(scenario()) as lab:
        out, _ = _run(tmp_path, lab, Seams(source_readings=readings, reduce_trace=reducing))
        assert out.status == "completed" and dark(lab)
    # every point's reduction ran inside the watch, before its replies were read
    per_point = [i for i, x in enumerate(order) if x == "reduce"]
    assert len(per_point) == 4
    for i in per_point:
        assert order[i - 1] == "between" and order[i + 1] == "read"


def test_the_watch_verdict_outranks_an_unreducible_trace(tmp_path):
    """A laser found off after the sweep aborts the run even when the same point's trace
    cannot be reduced (as when the watch came first); not a retried trace fault."""
    state = {"lab": None}

    def unreducible(*args, **kwargs):
        state["lab"].state.all_sources_off()  # someone pressed the front-panel button
        raise ValueError("no tone found")

    with VirtualLab(scenario()) as lab:
        state["lab"] = lab
        out, _ = _run(tmp_path, lab, Seams(reduce_trace=unreducible), n=2)
        assert out.status == "aborted" and "found off unexpectedly" in (out.reason or "")
        assert dark(lab) and out.points_done == 0
