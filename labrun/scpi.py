"""SCPI sessions over pyvisa: terminations and timeouts from the profile, typed errors, retries.

Everything on the wire goes through pyvisa (and a backend chosen by name: ``@py`` pyvisa-py,
``@sim`` pyvisa-sim, ``@ivi`` vendor VISA). Blocks use pyvisa's own IEEE 488.2 definite-length
parser; after each setting the SCPI-1999 error queue is read until code 0 ("0,\"No error\"").
Lost connections and garbled replies are retried a bounded number of times, reconnecting each
time, within two timeouts; an instrument that stays silent on an open connection is not asked
again (so a hung instrument costs one timeout, not three); every attempt is logged and recorded
in the traffic log.
When the profile says the instrument takes IEEE 488.2 compound program messages, a setting, its
follow-up queries and the error query travel as one message
(``INP:ATT 3.000;:INP:ATT?;:SYST:ERR?``): one round trip instead of three.
"""

from __future__ import annotations

import base64
import contextlib
import logging
import re
import select
import socket
import struct
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import pyvisa
from pyvisa import constants, highlevel, rname
from pyvisa.errors import VisaIOError
from pyvisa.resources import MessageBasedResource
from pyvisa.util import from_ascii_block, from_ieee_block

from labrun.blockframe import body_length, length_digits, strip_termination
from labrun.errors import InputError, InstrumentError
from labrun.trafficlog import Direction, TrafficLog, split_units

log = logging.getLogger("labrun.scpi")
log.addHandler(logging.NullHandler())  # library: shown only when the application configures logging

BACKENDS = ("@py", "@sim", "@ivi")
MAX_ERROR_QUEUE = 32  # SCPI-1999 queues hold a few dozen entries; more means the reply is bogus
BLOCK_CHUNK = 1 << 20  # bytes per socket read of a block (20,001 REAL,32 samples: 80 kB)
T = TypeVar("T")
# pyvisa's block parsers take np.array as container (their fast path); their hints say Sequence.
_NDARRAY: Any = np.array

_RM_LOCK = threading.Lock()
_RESOURCE_MANAGERS: dict[str, pyvisa.ResourceManager] = {}
_OVERRIDE: pyvisa.ResourceManager | None = None  # set by visa_library_override


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


# Called once per failed exchange (session, message text, the failure, attempt number), so a run
# can record every fault as an event, also the ones a reconnect-and-retry inside the session cured.
FaultHook = Callable[["ScpiSession", str, BaseException, int], None]


def _no_delay(res: object) -> None:
    """Disable Nagle on raw TCP sockets: a command followed by SYST:ERR? otherwise waits for the
    peer's delayed ACK (~40 ms on Linux) before the query leaves. pyvisa-py 0.8 does not accept
    VI_ATTR_TCPIP_NODELAY on SOCKET sessions, so set it on the socket it exposes. Also let its
    socket reads take up to BLOCK_CHUNK bytes at a time (pyvisa-py's default is 4 kB)."""
    try:
        session = res.visalib.sessions[res.session]  # type: ignore[attr-defined]
        sock = session.interface
        if isinstance(sock, socket.socket):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            if isinstance(getattr(session, "max_recv_size", None), int):
                session.max_recv_size = max(session.max_recv_size, BLOCK_CHUNK)
    except (AttributeError, KeyError, OSError, TypeError):
        pass  # another backend or resource type: nothing to tune


def rooted(unit: str) -> str:
    """A program message unit that starts at the root of the SCPI tree wherever it sits in a
    compound message: ``:`` is prefixed unless it is a common command (``*``) or already rooted
    (SCPI-1999 vol. 1, 6.2.4: after ``;`` a header is relative to the previous one's node)."""
    text = unit.strip()
    return text if text.startswith((":", "*")) else ":" + text


def compound(setting: str, queries: list[str]) -> str:
    """One program message: the setting, then each query rooted (``SET;:Q1?;:Q2?``)."""
    return ";".join([setting.strip(), *(rooted(q) for q in queries)])


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


def parse_error_reply(reply: str, form: re.Pattern[str] | None = None) -> tuple[int, str]:
    """Split a ``SYST:ERR?`` reply such as ``-222,"Data out of range"`` into (code, message);
    ``form``: the profile's declared error-reply form (named groups ``code``, ``message``)."""
    if form is not None:
        found = form.fullmatch(reply.strip())
        if found is None:
            raise ValueError(f"not an error-queue reply of the declared form: {reply!r}")
        try:
            return int(found["code"]), (found.groupdict().get("message") or "").strip()
        except ValueError:
            raise ValueError(f"error code not a whole number: {reply!r}") from None
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


@contextlib.contextmanager
def visa_library_override(library: highlevel.VisaLibraryBase) -> Iterator[None]:
    """Inside, every session opens its resource through ``library`` whatever the bench's
    backend says (a traffic-log replay: ``labrun.visareplay``)."""
    global _OVERRIDE
    rm = pyvisa.ResourceManager(library)
    with _RM_LOCK:
        saved, _OVERRIDE = _OVERRIDE, rm
    try:
        yield
    finally:
        with _RM_LOCK:
            _OVERRIDE = saved
        with contextlib.suppress(Exception):
            rm.close()


def resource_manager(backend: str, sim_file: str | Path | None = None) -> pyvisa.ResourceManager:
    """One shared ResourceManager per backend (and per sim file), created on first use."""
    spec = visa_library_spec(backend, sim_file)
    with _RM_LOCK:
        if _OVERRIDE is not None:
            return _OVERRIDE
        rm = _RESOURCE_MANAGERS.get(spec)
        if rm is None:
            try:
                rm = pyvisa.ResourceManager(spec)
            except (OSError, ValueError, VisaIOError) as exc:
                raise InstrumentError(f"cannot load VISA backend {spec!r}: {exc}") from exc
            _RESOURCE_MANAGERS[spec] = rm
        return rm


def is_timeout(exc: BaseException | None) -> bool:
    """True for an exchange that ran out its timeout (the instrument accepted it, never replied):
    trying it again costs another whole timeout, so a session does not (see ``_attempts``)."""
    if isinstance(exc, VisaIOError):
        return exc.error_code == constants.StatusCode.error_timeout
    return isinstance(exc, TimeoutError | socket.timeout)


def peer_closed(res: object) -> bool:
    """True when the peer of a raw TCP session has closed the connection (end of stream waits
    to be read): pyvisa-py reports that as a read that timed out, as for a silent peer."""
    try:
        sock = res.visalib.sessions[res.session].interface  # type: ignore[attr-defined]
        if not isinstance(sock, socket.socket):
            return False
        readable, _, _ = select.select([sock], [], [], 0)
        return bool(readable) and sock.recv(1, socket.MSG_PEEK) == b""
    except (AttributeError, KeyError, OSError, TypeError, ValueError):
        return False


def _is_transport_error(exc: BaseException) -> bool:
    """True for failures a reconnect may cure: timeouts, lost or refused connections, I/O."""
    if isinstance(exc, VisaIOError):
        return exc.error_code != constants.StatusCode.error_invalid_resource_name
    return isinstance(exc, OSError)


class ScpiSession:
    """A message-based VISA session speaking SCPI, with error draining, retries, traffic log."""

    def __init__(self, resource: str, backend: str = "@py", *, write_termination: str = "\n",
                 read_termination: str = "\n", timeout_ms: int = 3000,
                 error_query: str | None = "SYST:ERR?", opc_query: str | None = "*OPC?",
                 traffic_log: TrafficLog | None = None, role: str | None = None,
                 retries: int = 2, sim_file: str | Path | None = None, compound: bool = False,
                 on_fault: FaultHook | None = None, init: tuple[str, ...] = (),
                 error_form: re.Pattern[str] | None = None,
                 completion: Callable[[ScpiSession], None] | None = None):
        self.resource = resource
        self.backend = backend
        self.write_termination = write_termination
        self.read_termination = read_termination
        self.timeout_ms = timeout_ms
        self.error_query = error_query
        self.opc_query = opc_query
        self.traffic_log = traffic_log
        self.role = role
        self.retries = max(0, int(retries))
        self.sim_file = sim_file
        self.compound = bool(compound)  # the instrument takes IEEE 488.2 compound messages
        self.on_fault = on_fault
        self.completion = completion  # the profile's wait other than *OPC? (labrun.completion)
        self.error_form = error_form  # the profile's error-reply form (None: SCPI-1999's)
        self.init = tuple(init)  # the profile's init commands, sent again on every reopen
        self._opened = False  # opened once already: a later open is a reconnect
        self._res: MessageBasedResource | None = None
        self._last_block: bytes | None = None  # the last block read, for the traffic log
        self._lock = threading.RLock()

    # -- connection -------------------------------------------------------------------------

    def _live(self) -> MessageBasedResource:
        """The open resource (callers hold the lock and opened it; typed for mypy)."""
        if self._res is None:
            raise AttributeError("'NoneType' object has no attribute: session not open")
        return self._res

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
                self._res = rm.open_resource(self.resource,  # type: ignore[assignment]
                                             write_termination=self.write_termination,
                                             read_termination=self.read_termination,
                                             timeout=self.timeout_ms)
            except VisaIOError as exc:
                if exc.error_code == constants.StatusCode.error_invalid_resource_name:
                    raise InputError(f"invalid VISA resource string {self.resource!r}",
                                     field="resource") from exc
                raise self.no_answer(exc) from exc
            except OSError as exc:
                raise self.no_answer(exc) from exc
            _no_delay(self._res)
            log.debug("%s: opened %s via %s", self.who, self.resource, self.backend)
            if self._opened:
                self._send_init()
            self._opened = True
            return self

    def _send_init(self) -> None:
        """After a reconnect, send the profile's init commands again (a remote enable, ``*CLS``):
        the instrument may have started a new session in its power-on state. Profile loading
        refuses init commands that switch a source on."""
        for cmd in self.init:
            started = time.time()
            self._live().write(cmd)
            self.record("write", cmd, started, None, None, 1)
            log.info("%s: sent init %r again after reconnecting", self.who, cmd)

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

    def held(self) -> contextlib.AbstractContextManager[Any]:
        """The session's lock: held for an exchange that spans several calls (a message sent
        now and its reply read later, as ``query_each`` does across sessions)."""
        return self._lock

    def send_unread(self, message: str) -> None:
        """Send ``message`` (opening the session first when closed) and read nothing: the caller
        holds the session (``held``) and reads the reply with ``read_reply``; tried once."""
        with self._lock:
            if self._res is None:
                self.open()
            self._live().write(message)

    def read_reply(self) -> str:
        """The reply (stripped) to a message sent with ``send_unread``."""
        with self._lock:
            return self._live().read().strip()

    def peer_gone(self) -> bool:
        """True when the instrument has closed the connection (``peer_closed``)."""
        return peer_closed(self._res)

    def no_answer(self, exc: BaseException) -> NoAnswerError:
        """The one-line error for an instrument that does not answer."""
        return NoAnswerError(
            f"no answer at {self.resource} via {self.backend} ({type(exc).__name__}: {exc}); "
            "check power, cable and address", role=self.role, resource=self.resource)

    @contextlib.contextmanager
    def single_attempt(self) -> Iterator[ScpiSession]:
        """Exchanges inside are tried once, never reconnected and sent again by the session: for
        switching emission on, which after a lost connection (the instrument may have reset, at
        another power) only the caller may repeat, after checking again."""
        with self._lock:
            saved, self.retries = self.retries, 0
            try:
                yield self
            finally:
                self.retries = saved

    @contextlib.contextmanager
    def quick(self, timeout_ms: int, *, wait_s: float = 0.1) -> Iterator[ScpiSession]:
        """Exchanges inside use at most ``timeout_ms`` and are tried once (for the safe-off: an
        unanswered exchange must not hold up the light going off). NoAnswerError when another
        thread holds the session for longer than ``wait_s``."""
        if not self._lock.acquire(timeout=max(0.0, wait_s)):
            raise NoAnswerError(f"session busy for more than {wait_s:g} s", role=self.role,
                                resource=self.resource)
        saved = self.timeout_ms, self.retries
        try:
            self.timeout_ms, self.retries = max(1, min(self.timeout_ms, int(timeout_ms))), 0
            self._set_timeout(self.timeout_ms)
            yield self
        finally:
            self.timeout_ms, self.retries = saved
            self._set_timeout(self.timeout_ms)
            self._lock.release()

    def set_timeout(self, timeout_ms: int) -> None:
        """Use ``timeout_ms`` for every exchange from now on (also on the open connection)."""
        with self._lock:
            self.timeout_ms = int(timeout_ms)
            self._set_timeout(self.timeout_ms)

    @property
    def visa_resource(self) -> MessageBasedResource | None:
        """The open pyvisa resource (None when closed): what a test wraps to lose a message on
        the wire at a chosen moment."""
        return self._res

    def _set_timeout(self, timeout_ms: int) -> None:
        """Give an open resource a new timeout (a lost resource needs none)."""
        if self._res is not None:
            with contextlib.suppress(VisaIOError, OSError, AttributeError):
                self._res.timeout = timeout_ms

    def _reconnect(self) -> None:
        """Drop and reopen the resource after a transport failure."""
        self.close()
        self.open()

    # -- traffic ----------------------------------------------------------------------------

    def _attempts(self, direction: Direction, text: str, action: Callable[[], T],
                  describe: Callable[[T], str | None | tuple[str, str | None]]) -> T:
        """Run ``action`` with bounded reconnect-and-retry; record and log every attempt.

        A silent instrument (the exchange ran out its timeout on a connection still open: it
        accepted the message and never replied) is not asked again: the caller decides, the
        engine with the light off. Other failures (a dropped or refused connection, a garbled
        reply) are retried while less than two timeouts have passed since the first try. So
        one call lasts at most one timeout for a hung instrument and about two for a dropped
        connection (pyvisa-py notices a closed peer only when the read times out), never
        ``retries + 1`` timeouts.
        """
        last: BaseException | None = None
        first = time.monotonic()
        for attempt in range(1, self.retries + 2):
            silent = False  # the instrument kept the connection and did not reply in time
            started = time.time()
            try:
                if self._res is None:
                    self.open()
                    if attempt > 1:
                        self._discard_stale_errors()
                result = action()
            except InstrumentError as exc:  # reopen failed, or a reply that broke the framing
                last = exc
                self.record(direction, text, started, None, str(exc), attempt)
                self.close()  # what is left on the wire is unknown: never read it as a reply
                self.report_fault(text, exc, attempt)
            except ValueError as exc:  # a reply that does not decode or parse: garbled
                last = InstrumentError(f"garbled reply to {text!r} ({exc})", role=self.role,
                                       resource=self.resource)
                self.record(direction, text, started, None, str(last), attempt)
                self.close()
                self.report_fault(text, last, attempt)
            except Exception as exc:
                if not _is_transport_error(exc):
                    self.record(direction, text, started, None, repr(exc), attempt)
                    self.close()
                    raise
                silent = is_timeout(exc) and not peer_closed(self._res)
                last = exc
                self.record(direction, text, started, None, f"{type(exc).__name__}: {exc}",
                            attempt)
                self.close()
                self.report_fault(text, exc, attempt)
            else:
                described = describe(result)
                reply, data = described if isinstance(described, tuple) else (described, None)
                self.record(direction, text, started, reply, None, attempt, data)
                log.debug("%s: %s %r -> %r", self.who, direction, text, reply)
                return result
            if silent or time.monotonic() - first >= 2 * self.timeout_ms / 1000.0:
                break
            if attempt <= self.retries:
                log.warning("%s: %s %r failed (attempt %d of %d): %s; reconnecting",
                            self.who, direction, text, attempt, self.retries + 1, last)
                time.sleep(min(0.05 * attempt, 0.5))
        log.error("%s: %s %r failed after %d attempts", self.who, direction, text, attempt)
        if isinstance(last, InstrumentError):
            last.fault_reported = True  # type: ignore[attr-defined]
            raise last
        assert last is not None
        final = self.no_answer(last)
        final.fault_reported = True  # type: ignore[attr-defined]
        raise final from last

    def report_fault(self, text: str, exc: BaseException, attempt: int) -> None:
        """Tell ``on_fault`` about one failed exchange (a failing hook never hides the fault)."""
        if self.on_fault is not None:
            try:
                self.on_fault(self, text, exc, attempt)
            except Exception as hook_error:  # noqa: BLE001 - reporting must not change the outcome
                log.error("%s: fault hook failed: %s", self.who, hook_error)

    def _discard_stale_errors(self) -> None:
        """After a reconnect, empty the error queue: old entries must not blame new commands."""
        if not self.error_query or self._res is None:
            return
        for _ in range(MAX_ERROR_QUEUE):
            started = time.time()
            reply = self._res.query(self.error_query)
            self.record("query", self.error_query, started, reply.strip(), None, 1)
            try:
                code, message = parse_error_reply(reply, self.error_form)
            except ValueError:
                return
            if code == 0:
                return
            log.warning("%s: discarded stale error %d,%r after reconnect", self.who, code, message)

    def record(self, direction: Direction, text: str, started: float, reply: str | None,
               error: str | None, attempt: int, data: str | None = None) -> None:
        """One exchange into the traffic log (when the session has one)."""
        if self.traffic_log is not None:
            self.traffic_log.record(resource=self.resource, role=self.role, direction=direction,
                                    text=text, started=started, reply=reply, error=error,
                                    attempt=attempt, data=data)

    def _block_data(self) -> str | None:
        """The last block as received (header and body), base64, for the traffic log: what its
        ``<block N bytes>`` summary stands for, so a replay can serve it again exactly."""
        if self.traffic_log is None or self._last_block is None:
            return None
        return base64.b64encode(self._last_block).decode("ascii")

    def write(self, cmd: str, *, check_errors: bool = True) -> None:
        """Send one command; then drain the error queue and raise ScpiError if it held errors.

        With compound messages the first error-queue read travels with the command.
        """
        if check_errors and self.error_query and self.compound:
            self.setting(cmd)
            return
        with self._lock:
            self._attempts("write", cmd, lambda: self._live().write(cmd), lambda _r: None)
            if check_errors and self.error_query:
                self.drain_errors(cmd)

    def setting(self, cmd: str, queries: list[str] | tuple[str, ...] = ()) -> list[str]:
        """Send a setting, then ``queries``, then the error query: one compound program message
        and one response message; the replies to ``queries``.

        The error query comes last, so it also reports errors caused by the queries. A non-zero
        entry: the rest of the queue is drained and ScpiError names ``cmd``. Only for sessions
        whose instrument takes compound messages (``compound=True``) and has an error query.
        """
        if not (self.compound and self.error_query):
            raise InstrumentError("compound messages are not enabled for this instrument",
                                  role=self.role, resource=self.resource)
        message = compound(cmd, [*queries, self.error_query])
        with self._lock:
            reply = self.query(message, direction="write")
            return self.check_reply(cmd, message, reply, len(queries))

    def check_reply(self, cmd: str, message: str, reply: str, queries: int) -> list[str]:
        """The replies to ``queries`` queries of a compound ``message`` whose last unit is the
        error query: ScpiError naming ``cmd`` (the queue drained) on an entry, InstrumentError
        when the reply does not have one unit per query."""
        units = split_units(reply)
        try:
            code, text = parse_error_reply(units[-1], self.error_form)
        except ValueError as exc:
            raise InstrumentError(f"{exc} (after {message!r})", role=self.role,
                                  resource=self.resource) from None
        if code != 0:
            more = self._count_more_errors(cmd)
            raise ScpiError(code, text, cmd, role=self.role, resource=self.resource, more=more)
        if len(units) != queries + 1:
            raise InstrumentError(f"reply {reply!r} to {message!r} has {len(units)} "
                                  f"units, expected {queries + 1}", role=self.role,
                                  resource=self.resource)
        return units[:-1]

    def _count_more_errors(self, after_cmd: str) -> int:
        """Drain what is left in the error queue after a first entry; how many entries it held."""
        assert self.error_query
        for n in range(MAX_ERROR_QUEUE):
            try:
                code, _ = parse_error_reply(self.query(self.error_query), self.error_form)
            except ValueError:
                return n
            if code == 0:
                return n
        raise InstrumentError(f"error queue did not empty after {MAX_ERROR_QUEUE} reads "
                              f"(after {after_cmd!r})", role=self.role, resource=self.resource)

    def query(self, cmd: str, *, direction: Direction = "query") -> str:
        """Send a query and return its reply without the read termination (``direction``
        "write": a message that carries settings, recorded as such in the traffic log)."""
        with self._lock:
            return self._attempts(direction, cmd, lambda: self._live().query(cmd).strip(),
                                  lambda r: r)

    def query_block_real32(self, cmd: str, byte_order: str = "little") -> np.ndarray:
        """Query an IEEE 488.2 definite-length block of REAL,32 values (pyvisa's block parser)."""
        return self.query_block(cmd, "f", byte_order)

    def query_block(self, cmd: str, datatype: str = "f", byte_order: str = "little"
                    ) -> np.ndarray:
        """Query a definite-length block of ``datatype`` values (struct codes: f REAL,32, d
        REAL,64, h INT,16, i INT,32; decoded by pyvisa's block parser), as floats."""
        if byte_order not in ("little", "big"):
            raise ValueError(f"byte order must be 'little' or 'big', not {byte_order!r}")
        size = struct.calcsize(datatype)

        def action() -> np.ndarray:
            self._live().write(cmd)
            return np.asarray(self._read_block(byte_order == "big", datatype=datatype),
                              dtype=float)

        with self._lock:
            return self._attempts("query", cmd, action,
                                  lambda a: (f"<block {size * a.size} bytes>",
                                             self._block_data()))

    def _read_block(self, big_endian: bool, *, head: bytes = b"", last: bool = True,
                    datatype: str = "f") -> np.ndarray:
        """Read one definite-length block response (IEEE 488.2 7.7.6) and decode it with pyvisa.

        The header (``#``, digit n, n digits of length) is read first (``head``: what of it was
        already read); the body, whose length is then known, is read with the termination
        character disabled, because binary data holds newline bytes and each one would otherwise
        end a low-level read (hundreds per trace). ``last``: the block ends the response message
        (the termination follows); otherwise more response units follow it.
        """
        res = self._live()
        head = head + res.read_bytes(2 - len(head))
        digits = res.read_bytes(self._frame(length_digits, head))
        term = (self.read_termination or "").encode("ascii") if last else b""
        size = self._frame(body_length, digits) + len(term)
        res.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_FALSE)
        try:
            body = res.read_bytes(size, chunk_size=max(size, 1))
        finally:
            if self.read_termination:
                res.set_visa_attribute(constants.ResourceAttribute.termchar_enabled,
                                       constants.VI_TRUE)
        block = head + digits + self._frame(strip_termination, body, term)
        self._last_block = block
        return np.asarray(from_ieee_block(block, datatype=datatype,  # type: ignore[arg-type]
                                          is_big_endian=big_endian, container=_NDARRAY))

    def _frame(self, check: Callable[..., T], *args: Any) -> T:
        """One block framing check (labrun/blockframe.py); its ValueError as this instrument's
        InstrumentError."""
        try:
            return check(*args)
        except ValueError as exc:
            raise InstrumentError(str(exc), role=self.role, resource=self.resource) from None

    def setting_then_block(self, cmd: str, queries: list[str] | tuple[str, ...], block_query: str,
                           byte_order: str = "little") -> tuple[list[str], np.ndarray]:
        """A setting, ``queries``, a REAL,32 block query and the error query in ONE compound
        message (``INIT:IMM;*OPC?;:TRAC:DATA? LEVEL;:SYST:ERR?``); the replies to ``queries``
        and the block's values. Errors are handled as in :meth:`setting` (the error query comes
        last)."""
        if not (self.compound and self.error_query):
            raise InstrumentError("compound messages are not enabled for this instrument",
                                  role=self.role, resource=self.resource)
        message = compound(cmd, [*queries, block_query, self.error_query])

        def action() -> tuple[list[str], np.ndarray | None, str]:
            self._live().write(message)
            return self._read_mixed(len(queries), byte_order == "big")

        def describe(r: tuple[list[str], np.ndarray | None, str]) -> tuple[str, str | None]:
            block = "<no block>" if r[1] is None else f"<block {4 * r[1].size} bytes>"
            return ";".join([*r[0], block, r[2]]), None if r[1] is None else self._block_data()

        with self._lock:
            units, values, err = self._attempts("write", message, action, describe)
            try:
                code, text = parse_error_reply(err, self.error_form)
            except ValueError as exc:
                self.close()  # a garbled response may have left part of itself on the wire
                raise InstrumentError(f"{exc} (after {message!r})", role=self.role,
                                      resource=self.resource) from None
            if code != 0:
                raise ScpiError(code, text, cmd, role=self.role, resource=self.resource,
                                more=self._count_more_errors(cmd))
            if values is None or len(units) != len(queries):
                self.close()
                raise InstrumentError(f"reply to {message!r} has {len(units)} text units and "
                                      f"{'no' if values is None else 'a'} block, expected "
                                      f"{len(queries)} and a block", role=self.role,
                                      resource=self.resource)
            return units, values

    def _read_mixed(self, n_text: int, big_endian: bool
                    ) -> tuple[list[str], np.ndarray | None, str]:
        """Read a response of ``n_text`` text units, a block, and a last text unit (the error
        query's reply); (text units, block values or None, last unit). A response that ends
        early (a query failed, so its unit is missing) comes back without the block."""
        res = self._live()
        units: list[str] = []
        text = bytearray()
        quoted = False
        while len(units) < n_text:
            ch = res.read_bytes(1)
            if ch == b"\n":  # the message ended before the block: a query gave no reply
                units.append(text.decode("ascii", "replace").strip())
                return units[:-1], None, units[-1]
            if ch == b'"':
                quoted = not quoted
            if ch == b";" and not quoted:
                units.append(text.decode("ascii", "replace").strip())
                text.clear()
            else:
                text += ch
        first = res.read_bytes(1)
        if first != b"#":  # no block: what is left is text up to the termination
            tail = split_units((first + res.read_raw()).decode("ascii", "replace").strip())
            return units + tail[:-1], None, tail[-1]
        values = self._read_block(big_endian, head=first, last=False)
        rest = res.read().strip()
        if not rest.startswith(";"):
            raise InstrumentError(f"expected ';' after the block, got {rest[:20]!r}",
                                  role=self.role, resource=self.resource)
        return units, values, rest[1:]

    def query_ascii_floats(self, cmd: str, separator: str = ",", counted: bool = False,
                           header: str | None = None) -> np.ndarray:
        """Query a list of numbers (the SCPI ASCii data format; ``counted``: the first value
        says how many follow, and a reply whose count disagrees is garbled; ``header``: a
        regular expression the reply starts with, skipped, and a reply without it garbled)."""
        def action() -> tuple[np.ndarray, str]:
            text = self._live().query(cmd)  # parsed as pyvisa's query_ascii_values parses it
            body = text.strip()
            if header is not None:
                found = re.match(header, body)
                if found is None:
                    raise ValueError(f"ASCII trace does not start with the header {header!r}")
                body = body[found.end():].strip()
            split: str | Callable[[str], list[str]] = separator if separator.strip() \
                else str.split  # spaces or tabs: any run of whitespace
            values = np.asarray(from_ascii_block(body, converter="f", separator=split,
                                                 container=_NDARRAY), dtype=float)
            if counted:
                if values.size == 0 or values[0] != values.size - 1:
                    raise ValueError(f"ASCII trace count {values[:1]} does not match "
                                     f"{max(values.size - 1, 0)} values")
                values = values[1:]
            return values, text

        def describe(r: tuple[np.ndarray, str]) -> tuple[str, str | None]:
            return f"<{r[0].size} ascii values>", r[1] if self.traffic_log is not None else None

        with self._lock:
            return self._attempts("query", cmd, action, describe)[0]

    def opc_wait(self, timeout_ms: int | None = None) -> None:
        """Block until pending operations finish (IEEE 488.2 ``*OPC?`` answers 1, or the
        profile's other completion method)."""
        if self.completion is not None:
            with self._lock:
                self.completion(self)
            return
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
                code, message = parse_error_reply(reply, self.error_form)
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


def query_each(requests: list[tuple[ScpiSession, str]], *,
               direction: Direction = "query") -> list[str]:
    """One query to each of several instruments, all sent before any reply is read.

    Each instrument has its own connection, so they answer in parallel: N instruments cost about
    one round trip instead of N. If anything goes wrong on the wire, every connection involved
    is closed (a reply left pending must never answer a later query) and the queries are asked
    again one at a time, with the usual reconnect-and-retry. ``direction`` "write": messages
    that carry settings (with their error query), recorded as writes in the traffic log.
    """
    return send_each(requests, direction=direction).read()


def send_each(requests: list[tuple[ScpiSession, str]], *,
              direction: Direction = "query") -> PendingReplies:
    """The first half of ``query_each``: every message sent, the replies not read yet (the
    caller may work meanwhile, then ``read()``s them, or ``abandon()``s them). The sessions
    stay locked until then."""
    pending = PendingReplies(requests, direction)
    pending.send()
    return pending


class PendingReplies:
    """Messages sent to several instruments whose replies are still on the wire."""

    def __init__(self, requests: list[tuple[ScpiSession, str]], direction: Direction):
        self.requests = requests
        self.direction = direction
        self.sessions = [s for s, _ in requests]
        if len({id(s) for s in self.sessions}) != len(self.sessions):
            raise ValueError("query_each takes one query per session")
        self._stack = contextlib.ExitStack()
        for s in self.sessions:
            self._stack.enter_context(s.held())
        self.started = time.time()
        self._current = self.sessions[0]  # the session whose exchange failed, for the fault
        self._replies: list[str] | None = None

    def send(self) -> None:
        """Write every message (a failure falls back to one at a time, replies then known)."""
        try:
            for s, cmd in self.requests:
                self._current = s
                s.send_unread(cmd)
        except Exception as exc:
            try:
                self._replies = self._one_at_a_time(exc)
            finally:
                self._stack.close()
        except BaseException:  # a signal while writing: the sessions are released all the same
            self._stack.close()
            raise

    def read(self) -> list[str]:
        """Every reply, in the order sent (the sessions are released)."""
        try:
            if self._replies is not None:
                return self._replies
            try:
                replies = []
                for s in self.sessions:
                    self._current = s
                    replies.append(s.read_reply())
            except Exception as exc:
                return self._one_at_a_time(exc)
            for (s, cmd), reply in zip(self.requests, replies, strict=True):
                s.record(self.direction, cmd, self.started, reply, None, 1)
            return replies
        finally:
            self._stack.close()

    def abandon(self) -> None:
        """Drop the replies unread: every connection involved is closed, so a pending reply can
        never answer a later query (the next exchange reconnects)."""
        try:
            if self._replies is None:
                for s, cmd in self.requests:
                    s.record(self.direction, cmd, self.started, None, "abandoned unread", 1)
                    s.close()
        finally:
            self._stack.close()

    def _one_at_a_time(self, exc: Exception) -> list[str]:
        """After a failure on the wire: close every connection involved and ask again one at a
        time (a silent instrument raises its no-answer error at once)."""
        if not _is_transport_error(exc) and not isinstance(exc, InstrumentError):
            raise exc
        silent = is_timeout(exc) and not self._current.peer_gone()
        log.warning("parallel queries failed (%s); asking one at a time", exc)
        for s, cmd in self.requests:
            s.record(self.direction, cmd, self.started, None, f"{type(exc).__name__}: {exc}", 1)
            s.close()
        owner = next((s for s in self.sessions
                      if s.role and s.role == getattr(exc, "role", None)), self._current)
        owner.report_fault(" | ".join(cmd for _, cmd in self.requests), exc, 1)
        if silent:  # asking a silent instrument again would cost another timeout
            final = owner.no_answer(exc)
            final.fault_reported = True  # type: ignore[attr-defined]
            raise final from exc
        return [s.query(cmd, direction=self.direction) for s, cmd in self.requests]
