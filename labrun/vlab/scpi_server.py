"""The virtual lab's TCP server: simulated SCPI instruments on loopback TCP, one port per
instrument, raw socket, newline terminated, with the lab's faults (drop, swallow, garble).

``InstrumentServer`` serves one instrument (``labrun.vlab.siminstruments``) on a threading TCP
server (several clients at once). The instrument classes stay importable from here.
"""

from __future__ import annotations

import contextlib
import logging
import socket
import socketserver
import threading

from labrun.vlab.sidialect import speak_dialect as speak_dialect
from labrun.vlab.siminstruments import INSTRUMENT_CLASSES as INSTRUMENT_CLASSES
from labrun.vlab.siminstruments import TRACE_NAMES as TRACE_NAMES
from labrun.vlab.siminstruments import WAVELENGTH_CAL as WAVELENGTH_CAL
from labrun.vlab.siminstruments import AmplifierInstrument as AmplifierInstrument
from labrun.vlab.siminstruments import AttenuatorInstrument as AttenuatorInstrument
from labrun.vlab.siminstruments import LaserInstrument as LaserInstrument
from labrun.vlab.siminstruments import OsaInstrument as OsaInstrument
from labrun.vlab.siminstruments import PolControllerInstrument as PolControllerInstrument
from labrun.vlab.siminstruments import PowerMeterInstrument as PowerMeterInstrument
from labrun.vlab.siminstruments import SimInstrument
from labrun.vlab.siminstruments import SwitchInstrument as SwitchInstrument

log = logging.getLogger(__name__)
MAX_INPUT_BYTES = 1 << 20  # a message longer than this without a newline overruns the buffer


def _quick_ack(sock: socket.socket) -> None:
    """Acknowledge at once (Linux TCP_QUICKACK): a client that writes a command and then a query
    as two small packets would otherwise wait ~40 ms for a delayed ACK (Nagle's algorithm)."""
    if hasattr(socket, "TCP_QUICKACK"):
        with contextlib.suppress(OSError):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_QUICKACK, 1)


class _Handler(socketserver.BaseRequestHandler):
    """One client connection: read newline-terminated messages, answer queries."""

    server: _TcpServer

    def handle(self) -> None:
        sock: socket.socket = self.request
        srv = self.server
        srv.track(sock, True)
        buf = b""
        try:
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            while not srv.stopping.is_set():
                data = sock.recv(65536)
                if not data:
                    return
                _quick_ack(sock)
                buf += data
                while b"\n" in buf:
                    line, buf = buf.split(b"\n", 1)
                    if not srv.serve_line(sock, line.rstrip(b"\r")):
                        return
                if len(buf) > MAX_INPUT_BYTES:
                    buf = b""
                    with srv.instrument.lab.lock:
                        srv.instrument.push_error(-363)
        except OSError:
            return
        finally:
            srv.track(sock, False)
            with contextlib.suppress(OSError):
                sock.close()


class _TcpServer(socketserver.ThreadingTCPServer):
    """Threading TCP server for one instrument; tracks clients so they can be dropped."""

    allow_reuse_address = True
    daemon_threads = False
    block_on_close = True

    def __init__(self, address: tuple[str, int], instrument: SimInstrument,
                 stopping: threading.Event):
        self.instrument = instrument
        self.stopping = stopping
        self._clients: set[socket.socket] = set()
        self._remote: set[socket.socket] = set()  # clients that sent the remote-enable command
        self._clients_lock = threading.Lock()
        super().__init__(address, _Handler)

    def track(self, sock: socket.socket, add: bool) -> None:
        """Remember or forget a client socket."""
        with self._clients_lock:
            (self._clients.add if add else self._clients.discard)(sock)
            self._remote.discard(sock)

    def client_count(self) -> int:
        """How many client connections are open now."""
        with self._clients_lock:
            return len(self._clients)

    def drop_clients(self) -> int:
        """Close every client connection (as a power cycle or a cable pull would)."""
        with self._clients_lock:
            clients = list(self._clients)
        for sock in clients:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
        return len(clients)

    def serve_line(self, sock: socket.socket, line: bytes) -> bool:
        """Handle one received message, with faults; False when the connection must close."""
        if not line.strip():
            return True
        inst = self.instrument
        with inst.lab.lock:  # clients of one instrument share its fault generator and counts
            decision = inst.faults.on_command()
        if decision.drop:
            log.debug("%s: fault: dropping connection", inst.role)
            sock.shutdown(socket.SHUT_RDWR)
            return False
        if decision.timeout:
            log.debug("%s: fault: swallowing %r", inst.role, line[:60])
            return True
        text = line.decode("latin-1")
        local = inst.remote_enable is not None and sock not in self._remote
        if local and text.split(";")[0].strip().upper() == inst.remote_enable:
            with self._clients_lock:
                self._remote.add(sock)
        reply = inst.execute(text, local=True) if local else inst.execute(text)
        if decision.spurious:
            with inst.lab.lock:
                inst.push_error(decision.spurious)
        if reply is not None:
            if decision.garble:
                with inst.lab.lock:
                    reply = inst.faults.garble(reply)
            sock.sendall(reply)
        return True


class InstrumentServer:
    """One simulated instrument listening on its own TCP port, served from a background thread."""

    def __init__(self, instrument: SimInstrument, host: str, port: int):
        self.instrument = instrument
        self._tcp = _TcpServer((host, port), instrument, instrument.stopping)
        address = self._tcp.server_address  # (host, port[, flow, scope]) of an AF_INET(6) socket
        self.host: str = str(address[0])
        self.port: int = int(address[1])
        self._thread = threading.Thread(target=self._tcp.serve_forever, kwargs={
            "poll_interval": 0.05}, name=f"vlab-{instrument.role}", daemon=True)

    @property
    def resource(self) -> str:
        """VISA resource string of this instrument."""
        host = self.host
        if host in ("0.0.0.0", "::", ""):  # bound to every interface: reach it on loopback
            host = "127.0.0.1"
        return f"TCPIP0::{host}::{self.port}::SOCKET"

    def start(self) -> None:
        """Start accepting clients."""
        self._thread.start()

    @property
    def clients(self) -> int:
        """How many client connections are open now (a test sees a leaked session here)."""
        return self._tcp.client_count()

    def drop_connections(self) -> int:
        """Close every client connection; returns how many there were."""
        return self._tcp.drop_clients()

    def stop(self) -> None:
        """Stop accepting, close clients, join every handler thread, release the port."""
        if self._thread.is_alive():
            self._tcp.shutdown()
            self._thread.join()
        self._tcp.drop_clients()
        self._tcp.server_close()
