"""Compact traces on real virtual-lab spectra: every stored sample within 0.001 dB of what the
OSA sent (decoded independently from the traffic log's IEEE 488.2 blocks with pyvisa's own
parser), the noise floor included, at <= 2.0 bytes a sample."""

from __future__ import annotations

import base64

import numpy as np
from _engine_support import OPERATOR, scenario, write_bench, write_plan
from pyvisa.util import from_ieee_block
from sqlalchemy import select

from labrun.cli import main
from labrun.profiles import load_profile
from labrun.resources import find_file
from labrun.store import Trace, open_store
from labrun.trafficlog import TrafficLog
from labrun.vlab.lab import VirtualLab


def test_stored_traces_within_a_milli_db_of_the_osa_blocks_floor_included(tmp_path):
    sc = scenario()
    sc["realism"]["enabled"] = True  # noise on the floor, drifts: the hard case for delta coding
    with VirtualLab(sc, seed=5) as lab:
        plan = write_plan(tmp_path, [-2.0, 0.0, 2.0, 4.0])
        bench = write_bench(lab, tmp_path)
        db, log = tmp_path / "r.db", tmp_path / "traffic.jsonl"
        assert main(["run", str(plan), "--bench", str(bench), "--db", str(db), "--unattended",
                     "--operator", OPERATOR, "--ack-safety", "--no-progress",
                     "--traffic-log", str(log)]) == 0
    y_query = load_profile(find_file("generic-osa.toml", "drivers")).op("read_trace_y").query
    blocks = [from_ieee_block(base64.b64decode(e.data), datatype="f", is_big_endian=False,
                              container=np.array)
              for e in TrafficLog.load(log).entries
              if e.data and e.role == "osa" and y_query in e.text and e.error is None]
    store = open_store(db)
    try:
        with store.session() as s:
            traces = s.scalars(select(Trace).order_by(Trace.id)).all()
            stored = [(t.y(), len(t.y_data), t.encoding) for t in traces]
    finally:
        store.close()
    assert len(stored) == 4 and len(blocks) >= 4
    sent = blocks[-4:]  # the sweeps of the four points, in order (retries come before)
    total_bytes = total_samples = floor_samples = 0
    for (y, size, encoding), block in zip(stored, sent, strict=True):
        assert encoding == "mdb-dz1" and y.size == block.size
        assert np.max(np.abs(y - block)) <= 0.0005 + 1e-6  # whole milli-dB: half a step
        floor = np.median(block)
        floor_samples += int(np.sum(block < floor + 3.0))
        total_bytes, total_samples = total_bytes + size, total_samples + y.size
    assert floor_samples > 0.5 * total_samples  # most compared samples are the noisy floor
    assert total_bytes / total_samples <= 2.0
