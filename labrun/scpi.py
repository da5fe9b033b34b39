"""SCPI sessions over pyvisa: terminations and timeouts from the profile, typed errors, retries.

Everything on the wire goes through pyvisa (and a backend chosen by name: ``@py`` pyvisa-py,
``@sim`` pyvisa-sim, ``@ivi`` vendor VISA). Blocks use pyvisa's own IEEE 488.2 definite-length
parser; after each setting the SCPI-1999 error queue is read until code 0 ("0,\"No error\"").
Timeouts and lost connections are retried a bounded number of times, reconnecting each time;
every attempt is logged and recorded in the transcript.
"""

from __future__ import annotations

import logging
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import TypeVar

import numpy as np
import pyvisa
from pyvisa import constants, rname
from pyvisa.errors import VisaIOError

from labrun.errors import InputError, InstrumentError
from labrun.transcript import Direction, Transcript

log = logging.getLogger("labrun.scpi")
log.addHandler(logging.NullHandler())  # library: shown only when the application configures logging

BACKENDS = ("@py", "@sim", "@ivi")
MAX_ERROR_QUEUE = 32  # SCPI-1999 queues hold a few dozen entries; more means the reply is bogus
T = TypeVar("T")

_RM_LOCK = threading.Lock()
_RESOURCE_MANAGERS: dict[str, pyvisa.ResourceManager] = {}


class ScpiError(InstrumentError):
    """An entry from the instrument's error queue, with the command that caused it."""

    def __init__(self, code: int, message: str, command: str, *, role: str | None = None,
                 resource: str | None = None, more: int = 0):
        self.code = code
        self.error_message = message
        self.command = command
        extra = f" (+{more} more)" if more else ""
        super().__init__(f'error {code},"{message}" after {command!r}{extra}',
                         role=role, resource=resource)


class NoAnswerError(InstrumentError):
    """The instrument did not answer (timeout, refused or lost connection) after every retry."""


def _no_delay(res: object) -> None:
    """Disable Nagle on raw TCP sockets: a command followed by SYST:ERR? otherwise waits for the
    peer's delayed ACK (~40 ms on Linux) before the query leaves. pyvisa-py 0.8 does not accept
    VI_ATTR_TCPIP_NODELAY on SOCKET sessions, so set it on the socket it exposes."""
    try:
        sock = res.visalib.sessions[res.session].interface  # type: ignore[attr-defined]
        if isinstance(sock, socket.socket):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except (AttributeError, KeyError, OSError, TypeError):
        pass  # another backend or resource type: nothing to tune


@dataclass(frozen=True)
class Idn:
    """The four fields of an IEEE 488.2 ``*IDN?`` reply."""

    manufacturer: str
    model: str
    serial: str
    firmware: str

    def __str__(self) -> str:
        return ",".join((self.manufacturer, self.model, self.serial, self.firmware))


def parse_idn(reply: str) -> Idn:
    """Split an ``*IDN?`` reply (IEEE 488.2 10.14: four comma-separated fields) into an Idn."""
    parts = [p.strip() for p in reply.strip().split(",", 3)]
    parts += [""] * (4 - len(parts))
    return Idn(*parts)


def parse_error_reply(reply: str) -> tuple[int, str]:
    """Split a ``SYST:ERR?`` reply such as ``-222,"Data out of range"`` into (code, message)."""
    code_text, _, message = reply.strip().partition(",")
    try:
        code = int(code_text.strip())
    except ValueError:
        raise ValueError(f"not an error-queue reply: {reply!r}") from None
    return code, message.strip().strip('"')


def visa_library_spec(backend: str, sim_file: str | Path | None = None) -> str:
    """The pyvisa ResourceManager argument for a backend name (``path.yaml@sim`` for @sim)."""
    if backend not in BACKENDS:
        raise InputError(f"unknown backend {backend!r}; use one of {', '.join(BACKENDS)}",
                         field="backend")
    if backend == "@sim":
        return f"{sim_file}@sim" if sim_file else "@sim"
    return backend


def resource_manager(backend: str, sim_file: str | Path | None = None) -> pyvisa.ResourceManager:
    """One shared ResourceManager per backend (and per sim file), created on first use."""
    spec = visa_library_spec(backend, sim_file)
    with _RM_LOCK:
        rm = _RESOURCE_MANAGERS.get(spec)
        if rm is None:
            try:
                rm = pyvisa.ResourceManager(spec)
            except (OSError, ValueError, VisaIOError) as exc:
                raise InstrumentError(f"cannot load VISA backend {spec!r}: {exc}") from exc
            _RESOURCE_MANAGERS[spec] = rm
        return rm


def _is_transport_error(exc: BaseException) -> bool:
    """True for failures a reconnect may cure: timeouts, lost or refused connections, I/O."""
    if isinstance(exc, VisaIOError):
        return exc.error_code != constants.StatusCode.error_invalid_resource_name
    return isinstance(exc, OSError)


class ScpiSession:
    """A message-based VISA session speaking SCPI, with error draining, retries and a transcript."""

    def __init__(self, resource: str, backend: str = "@py", *, write_termination: str = "\n",
                 read_termination: str = "\n", timeout_ms: int = 3000,
                 error_query: str | None = "SYST:ERR?", opc_query: str | None = "*OPC?",
                 transcript: Transcript | None = None, role: str | None = None,
                 retries: int = 2, sim_file: str | Path | None = None):
        self.resource = resource
        self.backend = backend
        self.write_termination = write_termination
        self.read_termination = read_termination
        self.timeout_ms = timeout_ms
        self.error_query = error_query
        self.opc_query = opc_query
        self.transcript = transcript
        self.role = role
        self.retries = max(0, int(retries))
        self.sim_file = sim_file
        self._res = None
        self._lock = threading.RLock()

    # -- connection -------------------------------------------------------------------------

    @property
    def who(self) -> str:
        """Role or resource, for messages."""
        return self.role or self.resource

    @property
    def is_open(self) -> bool:
        return self._res is not None

    def open(self) -> ScpiSession:
        """Open the VISA resource with the profile's terminations and timeout."""
        with self._lock:
            if self._res is not None:
                return self
            try:
                rname.parse_resource_name(self.resource)
            except rname.InvalidResourceName:
                raise InputError(f"invalid VISA resource string {self.resource!r}",
                                 field="resource") from None
            rm = resource_manager(self.backend, self.sim_file)
            try:
                self._res = rm.open_resource(self.resource,
                                             write_termination=self.write_termination,
                                             read_termination=self.read_termination,
                                             timeout=self.timeout_ms)
            except VisaIOError as exc:
                if exc.error_code == constants.StatusCode.error_invalid_resource_name:
                    raise InputError(f"invalid VISA resource string {self.resource!r}",
                                     field="resource") from exc
                raise self._no_answer(exc) from exc
            except OSError as exc:
                raise self._no_answer(exc) from exc
            _no_delay(self._res)
            log.debug("%s: opened %s via %s", self.who, self.resource, self.backend)
            return self

    def close(self) -> None:
        """Close the VISA resource; safe to call twice and after a lost connection."""
        with self._lock:
            res, self._res = self._res, None
            if res is not None:
                try:
                    res.close()
                except (VisaIOError, OSError) as exc:  # already gone: nothing to release
                    log.debug("%s: close: %s", self.who, exc)

    def __enter__(self) -> ScpiSession:
        return self.open()

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def _no_answer(self, exc: BaseException) -> NoAnswerError:
        """The one-line error for an instrument that does not answer."""
        return NoAnswerError(
            f"no answer at {self.resource} via {self.backend} ({type(exc).__name__}: {exc}); "
            "check power, cable and address", role=self.role, resource=self.resource)

    def _reconnect(self) -> None:
        """Drop and reopen the resource after a transport failure."""
        self.close()
        self.open()

    # -- traffic ----------------------------------------------------------------------------

    def _attempts(self, direction: Direction, text: str, action: Callable[[], T],
                  describe: Callable[[T], str | None]) -> T:
        """Run ``action`` with bounded reconnect-and-retry; record and log every attempt."""
        last: BaseException | None = None
        for attempt in range(1, self.retries + 2):
            started = time.time()
            try:
                if self._res is None:
                    self.open()
                    if attempt > 1:
                        self._discard_stale_errors()
                result = action()
            except InstrumentError as exc:  # reopen failed: counts as an attempt
                last = exc
                self._record(direction, text, started, None, str(exc), attempt)
            except Exception as exc:
                if not _is_transport_error(exc):
                    self._record(direction, text, started, None, repr(exc), attempt)
                    raise
                last = exc
                self._record(direction, text, started, None, f"{type(exc).__name__}: {exc}",
                             attempt)
                self.close()
            else:
                reply = describe(result)
                self._record(direction, text, started, reply, None, attempt)
                log.debug("%s: %s %r -> %r", self.who, direction, text, reply)
                return result
            if attempt <= self.retries:
                log.warning("%s: %s %r failed (attempt %d of %d): %s; reconnecting",
                            self.who, direction, text, attempt, self.retries + 1, last)
                time.sleep(min(0.05 * attempt, 0.5))
        log.error("%s: %s %r failed after %d attempts", self.who, direction, text,
                  self.retries + 1)
        if isinstance(last, InstrumentError):
            raise last
        assert last is not None
        raise self._no_answer(last) from last

    def _discard_stale_errors(self) -> None:
        """After a reconnect, empty the error queue: old entries must not blame new commands."""
        if not self.error_query or self._res is None:
            return
        for _ in range(MAX_ERROR_QUEUE):
            reply = self._res.query(self.error_query)
            try:
                code, message = parse_error_reply(reply)
            except ValueError:
                return
            if code == 0:
                return
            log.warning("%s: discarded stale error %d,%r after reconnect", self.who, code, message)

    def _record(self, direction: Direction, text: str, started: float, reply: str | None,
                error: str | None, attempt: int) -> None:
        if self.transcript is not None:
            self.transcript.record(resource=self.resource, role=self.role, direction=direction,
                                   text=text, started=started, reply=reply, error=error,
                                   attempt=attempt)

    def write(self, cmd: str, *, check_errors: bool = True) -> None:
        """Send one command; then drain the error queue and raise ScpiError if it held errors."""
        with self._lock:
            self._attempts("write", cmd, lambda: self._res.write(cmd), lambda _r: None)
            if check_errors and self.error_query:
                self.drain_errors(cmd)

    def query(self, cmd: str) -> str:
        """Send a query and return its reply without the read termination."""
        with self._lock:
            return self._attempts("query", cmd, lambda: self._res.query(cmd).strip(),
                                  lambda r: r)

    def query_block_real32(self, cmd: str, byte_order: str = "little") -> np.ndarray:
        """Query an IEEE 488.2 definite-length block of REAL,32 values (pyvisa's block parser)."""
        if byte_order not in ("little", "big"):
            raise ValueError(f"byte order must be 'little' or 'big', not {byte_order!r}")

        def action() -> np.ndarray:
            return np.asarray(self._res.query_binary_values(
                cmd, datatype="f", is_big_endian=byte_order == "big", header_fmt="ieee",
                container=np.array), dtype=float)

        with self._lock:
            return self._attempts("query", cmd, action, lambda a: f"<block {4 * a.size} bytes>")

    def query_ascii_floats(self, cmd: str) -> np.ndarray:
        """Query a comma-separated list of numbers (the SCPI ASCii data format)."""
        def action() -> np.ndarray:
            return np.asarray(self._res.query_ascii_values(cmd, converter="f", separator=",",
                                                           container=np.array), dtype=float)

        with self._lock:
            return self._attempts("query", cmd, action, lambda a: f"<{a.size} ascii values>")

    def opc_wait(self, timeout_ms: int | None = None) -> None:
        """Block until pending operations finish (IEEE 488.2 ``*OPC?`` answers 1)."""
        if not self.opc_query:
            return
        with self._lock:
            old = self.timeout_ms
            if timeout_ms is not None and self._res is not None:
                self._res.timeout = timeout_ms
            try:
                reply = self.query(self.opc_query)
            finally:
                if self._res is not None:
                    self._res.timeout = old
            if reply.strip().lstrip("+") not in ("1", "1.0"):
                raise InstrumentError(f"{self.opc_query} answered {reply!r}, expected 1",
                                      role=self.role, resource=self.resource)

    def drain_errors(self, after_cmd: str) -> None:
        """Read the error queue until code 0; raise ScpiError naming ``after_cmd`` if not empty.

        SCPI-1999 (and IEEE 488.2 queue rules): each read pops the oldest entry, and
        ``0,"No error"`` means the queue is empty.
        """
        if not self.error_query:
            return
        errors: list[tuple[int, str]] = []
        for _ in range(MAX_ERROR_QUEUE):
            reply = self.query(self.error_query)
            try:
                code, message = parse_error_reply(reply)
            except ValueError as exc:
                raise InstrumentError(f"{exc} (after {after_cmd!r})", role=self.role,
                                      resource=self.resource) from None
            if code == 0:
                break
            errors.append((code, message))
        else:
            raise InstrumentError(f"error queue did not empty after {MAX_ERROR_QUEUE} reads "
                                  f"(after {after_cmd!r})", role=self.role, resource=self.resource)
        if errors:
            code, message = errors[0]
            raise ScpiError(code, message, after_cmd, role=self.role, resource=self.resource,
                            more=len(errors) - 1)

    def idn(self) -> Idn:
        """Read and parse ``*IDN?``."""
        return parse_idn(self.query("*IDN?"))
