"""Shared pytest fixtures.

Instrument-layer fixtures are prefixed ``inst_``: a pyvisa-sim bench copied per test (fresh device
state) and a small loopback TCP SCPI peer for block transfer, error queue and retry tests.
"""

from __future__ import annotations

import contextlib
import shutil
import socket
import socketserver
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from pyvisa.util import to_ieee_block

REPO = Path(__file__).resolve().parents[1]
SIM_DIR = REPO / "sim_instruments"


@pytest.fixture
def inst_sim_bench_path(tmp_path: Path) -> Path:
    """A private copy of the pyvisa-sim bench and devices: each test starts from default state."""
    shutil.copy(SIM_DIR / "fwm-devices.yaml", tmp_path / "fwm-devices.yaml")
    bench = tmp_path / "bench-pyvisa-sim.toml"
    shutil.copy(SIM_DIR / "bench-pyvisa-sim.toml", bench)
    return bench


@dataclass
class InstPeerState:
    """What the loopback peer holds and how it misbehaves on request."""

    trace: list[float] = field(default_factory=lambda: [1.5, -2.25, 3.0e-3, -70.0])
    big_endian: bool = False
    datatype: str = "f"        # struct code of the block's values (f, d, h, i)
    power_dbm: float = 0.0
    power_range: tuple[float, float] = (-10.0, 13.0)
    errors: list[str] = field(default_factory=list)
    silent: int = 0            # answer nothing to this many upcoming queries (forces timeouts)
    drop: int = 0              # close the connection on this many upcoming messages
    endless_errors: bool = False
    received: list[str] = field(default_factory=list)
    connections: int = 0
    lock: threading.Lock = field(default_factory=threading.Lock)


def _peer_reply(state: InstPeerState, line: str) -> bytes | None:
    """The peer's answer to one message (None for a command or a deliberate silence)."""
    if line.endswith("?") and state.silent > 0:
        state.silent -= 1
        return None
    if line == "*IDN?":
        return b"Loopback Test Peer,BLK-1,SN0042,0.1\n"
    if line == "*OPC?":
        return b"1\n"
    if line == "SYST:ERR?":
        if state.endless_errors:
            return b'-350,"Queue overflow"\n'
        return (state.errors.pop(0) if state.errors else '0,"No error"').encode() + b"\n"
    if line == "TRAC:DATA? LEVEL":
        return bytes(to_ieee_block(state.trace, state.datatype,  # type: ignore[arg-type]
                                   state.big_endian)) + b"\n"
    if line == "TRAC:ASC?":
        return (",".join(repr(v) for v in state.trace) + "\n").encode()
    if line == "SOUR:POW?":
        return f"{state.power_dbm:.3f}\n".encode()
    if line.startswith("SOUR:POW "):
        value = float(line.split()[1])
        lo, hi = state.power_range
        if lo <= value <= hi:
            state.power_dbm = value
        else:
            state.errors.append('-222,"Data out of range"')  # SCPI-1999 error code
        return None
    if line in ("*CLS", "*RST"):
        state.errors.clear()
        return None
    state.errors.append('-113,"Undefined header"')  # SCPI-1999 error code
    return None


class _PeerHandler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        state: InstPeerState = self.server.state  # type: ignore[attr-defined]
        with state.lock:
            state.connections += 1
        for raw in self.rfile:
            line = raw.decode().strip()
            with state.lock:
                state.received.append(line)
                if state.drop > 0:
                    state.drop -= 1
                    return
                reply = _peer_reply(state, line)
            if reply is not None:
                self.wfile.write(reply)
                self.wfile.flush()


class _PeerServer(socketserver.ThreadingTCPServer):
    daemon_threads = True
    allow_reuse_address = True


@dataclass
class InstPeer:
    """A running loopback peer: its VISA resource string and its state."""

    resource: str
    state: InstPeerState


@pytest.fixture
def inst_scpi_peer() -> Iterator[InstPeer]:
    """A loopback TCP SCPI peer (raw socket, newline-terminated) for the duration of a test."""
    server = _PeerServer(("127.0.0.1", 0), _PeerHandler)
    server.state = InstPeerState()  # type: ignore[attr-defined]
    thread = threading.Thread(target=server.serve_forever, args=(0.02,), daemon=True)
    thread.start()
    port = server.server_address[1]
    try:
        yield InstPeer(f"TCPIP0::127.0.0.1::{port}::SOCKET", server.state)  # type: ignore[attr-defined]
    finally:
        server.shutdown()
        server.server_close()


@pytest.fixture
def inst_free_port() -> Iterator[int]:
    """A loopback port with nothing listening (for non-answering instrument tests).

    The port stays bound (without listen(), so connections are refused) for the whole test:
    a released port could be taken by a virtual lab of a concurrent test run.
    """
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        yield s.getsockname()[1]


# ----- databases: SQLite always, PostgreSQL when .ci/run (or you) started one ---------------------
# LABRUN_TEST_PG_URL names a PostgreSQL database the tests may use (each test gets its own schema,
# dropped afterwards). Without it the PostgreSQL variants are skipped, except under CI=true, where a
# missing server is a failure (a green CI must have run them).
PG_ENV = "LABRUN_TEST_PG_URL"


def pg_base_url() -> str:
    """The PostgreSQL URL given to the tests; skips (or fails under CI=true) when there is none."""
    import os

    url = os.environ.get(PG_ENV, "")
    if not url:
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"{PG_ENV} is not set: CI must run the PostgreSQL tests (.ci/run starts "
                        "a server)", pytrace=False)
        pytest.skip(f"no PostgreSQL server ({PG_ENV} not set; .ci/run starts one)")
    return url


@contextlib.contextmanager
def pg_schema() -> Iterator[str]:
    """A SQLAlchemy URL of a fresh, empty PostgreSQL schema (search_path), dropped afterwards."""
    import uuid

    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    base = pg_base_url()
    name = f"t_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base)
    try:
        with admin.begin() as conn:
            conn.execute(text(f'CREATE SCHEMA "{name}"'))
    except Exception as exc:  # noqa: BLE001 - any failure to reach the server fails the test
        admin.dispose()
        pytest.fail(f"PostgreSQL at {base} is not usable: {exc}", pytrace=False)
    url = make_url(base).update_query_dict({"options": f"-csearch_path={name}"})
    try:
        yield url.render_as_string(hide_password=False)
    finally:
        with admin.begin() as conn:
            conn.execute(text(f'DROP SCHEMA "{name}" CASCADE'))
        admin.dispose()


@pytest.fixture
def pg_url() -> Iterator[str]:
    """A fresh PostgreSQL schema's URL for one test."""
    with pg_schema() as url:
        yield url


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A fresh run-store location on each backend: a SQLite file path, or a PostgreSQL URL."""
    if request.param == "sqlite":
        return str(tmp_path / "runs.db")
    return request.getfixturevalue("pg_url")
