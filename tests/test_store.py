"""The run store: compact traces, one transaction per point, WAL reads beside a writer."""

from __future__ import annotations

import struct
import subprocess
import sys
import zlib

import numpy as np
import pytest
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError

from labrun.errors import InputError
from labrun.store import Line, Point, Run, Trace, TraceData, open_store, store_url


def _run(store, **extra) -> int:
    fields = dict(plan_text="[plan]\nname='t'\n", plan_sha256="0" * 64, bench_text="[bench]",
                  software_version="test", points_total=3)
    fields.update(extra)
    return store.create_run(**fields)


def _line(kind="tone", side="low", order=0, power=-3.0, **kw):
    return dict(kind=kind, side=side, order=order, freq_thz=193.1, wavelength_nm=1552.52,
                power_dbm=power, floor_dbm=-60.0, snr_db=57.0, detected=True, **kw)


@pytest.fixture()
def store(db_url):
    """A new store on each backend (SQLite file; PostgreSQL schema when a server is given)."""
    s = open_store(db_url)
    yield s
    s.close()


@pytest.fixture()
def sqlite_store(tmp_path):
    s = open_store(tmp_path / "runs.db")
    yield s
    s.close()


def test_path_becomes_sqlite_url_and_urls_pass(tmp_path):
    assert store_url(tmp_path / "a.db") == f"sqlite:///{(tmp_path / 'a.db').resolve()}"
    assert store_url("sqlite:///:memory:") == "sqlite:///:memory:"
    with pytest.raises(InputError, match="--db"):
        store_url(tmp_path / "missing-folder" / "a.db")


def test_sqlite_pragmas(sqlite_store):
    # journal_mode=wal, foreign_keys=1: SQLite documentation, "PRAGMA Statements".
    with sqlite_store.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
        assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() >= 5000


def _decode_mdb_dz1(blob: bytes, n: int) -> list[float]:
    """The documented mdb-dz1 layout decoded with Python's zlib and struct modules only: inflate,
    four byte planes of n bytes each, little-endian uint32 zigzag (n >> 1 ^ -(n & 1)), running
    sum of the differences, thousandths of a dB."""
    raw = zlib.decompress(blob)
    assert len(raw) == 4 * n
    total, out = 0, []
    for i in range(n):
        z = struct.unpack("<I", bytes(raw[j * n + i] for j in range(4)))[0]
        total += (z >> 1) ^ -(z & 1)
        out.append(total / 1000)
    return out


def test_trace_is_compact_and_linear_x_is_three_numbers(store):
    run_id = _run(store)
    x = np.linspace(1549.0, 1556.0, 20001)
    y = np.random.default_rng(1).normal(-50.0, 5.0, x.size)
    store.add_point(run_id, key="p0", index=0, setpoint={"power_a_dbm": 3.0},
                    traces=[TraceData(x, y, rbw_nm=0.02)], lines=[_line()])
    with store.session() as s:
        tr = s.scalars(select(Trace)).one()
        assert tr.x_data is None and tr.n == x.size
        assert tr.encoding == "mdb-dz1"
        # white noise of 5 dB rms is the worst case for delta coding: still under 2 B/sample
        assert len(tr.y_data) < 2.0 * x.size
        np.testing.assert_allclose(tr.x(), x, rtol=0, atol=1e-9)
        assert np.max(np.abs(tr.y() - y)) <= 0.0005 + 1e-9  # half the 0.001 dB quantum
        independent = _decode_mdb_dz1(tr.y_data, tr.n)
        np.testing.assert_allclose(independent, y, rtol=0, atol=5e-4 + 1e-9)


def test_old_float32_rows_stay_readable(store):
    """A trace row written by labrun 0.1.0 (float32 bytes, encoding column filled "f32" by the
    migration) decodes as IEEE 754 binary32 (checked with Python's struct module)."""
    run_id = _run(store)
    y = np.array([-60.25, -3.5, 0.125, -75.125])
    store.add_point(run_id, key="p0", index=0, setpoint={}, traces=[TraceData(y, y)], lines=[])
    blob = struct.pack("<4f", *y)
    with store.engine.begin() as conn:
        conn.execute(Trace.__table__.update().values(y_data=blob, encoding="f32"))
    with store.session() as s:
        tr = s.scalars(select(Trace)).one()
        np.testing.assert_array_equal(tr.y(), y)  # all four exact in binary32


@pytest.mark.parametrize("widened", [False, True])
def test_float32_linear_x_is_a_grid(store, widened):
    """A float32 x axis (REAL,32 block) of a linear grid is rebuilt within one float32 ulp, also
    when the reader already widened it to float64 (labrun.scpi returns float64 arrays)."""
    run_id = _run(store)
    x32 = np.linspace(1548.5, 1551.6, 20001).astype(np.float32)
    x = x32.astype(np.float64) if widened else x32
    store.add_point(run_id, key="p0", index=0, setpoint={}, traces=[TraceData(x, x * 0)],
                    lines=[])
    with store.session() as s:
        tr = s.scalars(select(Trace)).one()
        assert tr.x_data is None
        # one ulp of IEEE 754 binary32 near 1551.6 is 2**-13 (numpy.spacing as the reference)
        assert np.max(np.abs(tr.x() - x32.astype(float))) <= np.spacing(np.float32(1551.6))


def test_irregular_x_kept_exactly(store):
    run_id = _run(store)
    x = np.sort(np.random.default_rng(2).uniform(1540.0, 1560.0, 101))
    store.add_point(run_id, key="p0", index=0, setpoint={}, traces=[TraceData(x, x * 0)],
                    lines=[])
    with store.session() as s:
        tr = s.scalars(select(Trace)).one()
        assert tr.x_data is not None
        np.testing.assert_array_equal(tr.x(), x)


def test_point_traces_lines_in_one_transaction(store):
    run_id = _run(store)
    x = np.linspace(1550, 1551, 11)
    good = [_line(), _line(side="high")]
    store.add_point(run_id, key="p0", index=0, setpoint={}, traces=[TraceData(x, x)],
                    lines=good)
    bad = [_line(), {"kind": None, "side": "low", "order": 1}]  # kind is NOT NULL: fails late
    with pytest.raises(IntegrityError):
        store.add_point(run_id, key="p1", index=1, setpoint={}, traces=[TraceData(x, x)],
                        lines=bad)
    with store.session() as s:
        assert s.scalars(select(Point.key)).all() == ["p0"]
        assert len(s.scalars(select(Trace)).all()) == 1
        assert len(s.scalars(select(Line)).all()) == 2


def test_duplicate_key_refused(store):
    run_id = _run(store)
    store.add_point(run_id, key="k", index=0, setpoint={}, traces=[], lines=[])
    with pytest.raises(IntegrityError):
        store.add_point(run_id, key="k", index=0, setpoint={}, traces=[], lines=[])
    other = _run(store)
    store.add_point(other, key="k", index=0, setpoint={}, traces=[], lines=[])
    assert store.completed_keys(run_id) == {"k"} and store.count_points(other) == 1


def test_foreign_keys_enforced(store):
    with pytest.raises(IntegrityError):
        store.add_point(999, key="k", index=0, setpoint={}, traces=[], lines=[])


def test_nan_powers_stored_as_null(store):
    run_id = _run(store)
    store.add_point(run_id, key="k", index=0, setpoint={}, traces=[],
                    lines=[_line(power=float("nan"), upper_limit_dbm=-61.0)])
    with store.session() as s:
        ln = s.scalars(select(Line)).one()
        assert ln.power_dbm is None and ln.upper_limit_dbm == -61.0


def test_status_heartbeat_events(store):
    run_id = _run(store)
    store.set_status(run_id, "running")
    store.add_event(run_id, "fault", "osa: timeout", role="osa", data={"attempt": 1})
    store.set_status(run_id, "aborted", "interlock open", finished=True)
    run = store.get_run(run_id)
    assert run.status == "aborted" and run.reason == "interlock open"
    assert run.finished_at is not None and run.heartbeat_at.tzinfo is not None
    (ev,) = store.events(run_id, ["fault"])
    assert ev.role == "osa" and ev.data == {"attempt": 1}
    assert store.latest_run_id() == run_id


_READER = """
import sys
from labrun.store import open_store
s = open_store(sys.argv[1], create=False)
print(s.count_points(int(sys.argv[2])))
"""


def test_another_process_reads_while_a_write_is_open(tmp_path):
    store = open_store(tmp_path / "runs.db")
    run_id = _run(store)
    store.add_point(run_id, key="a", index=0, setpoint={}, traces=[], lines=[])
    with store.engine.begin() as conn:  # an open write transaction, as during a point commit
        conn.execute(Run.__table__.update().values(reason="writing"))
        out = subprocess.run([sys.executable, "-c", _READER, str(tmp_path / "runs.db"),
                              str(run_id)], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "1"
    store.close()
