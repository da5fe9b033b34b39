"""A pyvisa backend that answers from a traffic log: a recorded night played back with no lab.

``TrafficReplayLibrary`` is a ``pyvisa.highlevel.VisaLibraryBase`` (pyvisa's extension point for
backends, the one pyvisa-py and pyvisa-sim implement). Each resource of the log gets a queue of
its recorded exchanges in order; a write must carry exactly the recorded message, and the reply
recorded with it (blocks and value lists rebuilt byte for byte from the entry's ``data``) is what
the next reads return. A recorded failure is played back as a timeout. Any other message stops
the replay (``TrafficMismatch``: instrument, expected and actual message).

Polls whose number depends on wall-clock time (the emission watch while a setting settles) can
differ in a replay, which has no instrument latency: a recorded query (every unit ends with
``?``) that the replay skips is passed over, and an extra one gets the reply last served to the
same query; a setting is never skipped or invented.
"""

from __future__ import annotations

import base64
import contextlib
import itertools
import re
from collections import deque
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any, Self

from pyvisa import constants, highlevel, rname
from pyvisa.errors import VisaIOError
from pyvisa.typing import VISARMSession, VISASession
from pyvisa.util import LibraryPath

from labrun.errors import LabrunError
from labrun.trafficlog import TrafficLogEntry, split_units

BLOCK_TOKEN = re.compile(r"<block \d+ bytes>")
VALUES_TOKEN = re.compile(r"<\d+ ascii values>")
_SERIAL = itertools.count(1)


class TrafficMismatch(LabrunError):  # noqa: N818 - the replay's own outcome, named for users
    """The replayed run sent something the recording does not hold at that place."""

    exit_code = 1

    def __init__(self, *, resource: str, role: str | None, expected: str | None, actual: str,
                 index: int | None):
        self.resource, self.role, self.expected, self.actual = resource, role, expected, actual
        self.index = index  # line number (1-based) of the expected entry in the log
        self.point: str | None = None  # set by the replay once it knows which point it was
        super().__init__(self.describe())

    def describe(self) -> str:
        """One line: where, which instrument, what the log expected and what was sent."""
        where = f" at point {self.point}" if self.point else ""
        line = f" (log line {self.index})" if self.index else ""
        expected = repr(self.expected) if self.expected is not None else "nothing more"
        return (f"traffic differs from the recording{where}: {self.role or self.resource} "
                f"expected {expected}{line}, got {self.actual!r}")

    def __str__(self) -> str:
        return self.describe()


def is_poll(text: str) -> bool:
    """True for a message of queries only (every unit ends with ``?``): it changes nothing."""
    return all(unit.endswith("?") for unit in split_units(text))


def response_bytes(entry: TrafficLogEntry, termination: bytes) -> bytes | None:
    """The response message of a recorded exchange as it came off the wire (None: no reply)."""
    if entry.reply is None:
        return None
    reply = entry.reply.encode("ascii", "replace")
    if entry.data is not None and BLOCK_TOKEN.search(entry.reply):
        block = base64.b64decode(entry.data)
        reply = BLOCK_TOKEN.sub(lambda _m: "\0", entry.reply).encode("ascii", "replace")
        reply = reply.replace(b"\0", block, 1)
    elif entry.data is not None and VALUES_TOKEN.fullmatch(entry.reply):
        reply = entry.data.encode("ascii", "replace")
    return reply + termination


@dataclass
class ReplayScript:
    """What one resource is still expected to exchange: (log line number, entry) in order."""

    resource: str
    role: str | None
    todo: deque[tuple[int, TrafficLogEntry]] = field(default_factory=deque)


@dataclass
class ReplaySession:
    """One open replayed resource: its script, the pending response and the VISA attributes."""

    script: ReplayScript
    pending: bytearray = field(default_factory=bytearray)
    fail_next_read: bool = False
    attrs: dict[int, Any] = field(default_factory=dict)


class TrafficReplayLibrary(highlevel.VisaLibraryBase):
    """pyvisa backend serving recorded answers in order (make it with :meth:`from_entries`)."""

    scripts: dict[str, ReplayScript]
    sessions: dict[int, Any]

    @staticmethod
    def get_library_paths() -> tuple[LibraryPath, ...]:
        """No shared library: everything is in Python."""
        return (LibraryPath("unset"),)

    @staticmethod
    def get_debug_info() -> dict[str, str]:
        """What pyvisa-info shows for this backend."""
        return {"backend": "labrun traffic-log replay"}

    def _init(self) -> None:
        self.sessions = {}
        self.scripts = {}
        self.stopped: TrafficMismatch | None = None
        self.last_replies: dict[tuple[str, str], TrafficLogEntry] = {}
        self.answered: dict[tuple[str, str], TrafficLogEntry] = {}  # last served per message
        self.used = 0

    @classmethod
    def from_entries(cls, entries: Iterable[TrafficLogEntry]) -> Self:
        """A fresh library (pyvisa caches libraries by path, so each gets its own) for a log."""
        lib = cls(f"labrun-replay-{next(_SERIAL)}")
        for number, entry in enumerate(entries, start=1):
            script = lib.scripts.setdefault(entry.resource,
                                            ReplayScript(entry.resource, entry.role))
            script.todo.append((number, entry))
            if entry.reply is not None and entry.error is None:
                lib.last_replies[(entry.resource, entry.text)] = entry
        return lib

    def forget(self) -> None:
        """Drop pyvisa's cache entry for this library (it is never reused)."""
        highlevel.VisaLibraryBase._registry.pop((type(self), self.library_path), None)

    def remaining(self) -> list[tuple[int, TrafficLogEntry]]:
        """Recorded exchanges the replay never asked for (settings and polls), in log order."""
        return sorted((item for s in self.scripts.values() for item in s.todo),
                      key=lambda item: item[0])

    # ---- sessions ----------------------------------------------------------------------------
    def _register(self, obj: Any) -> VISASession:
        session = len(self.sessions) + 1
        while session in self.sessions:
            session += 1
        self.sessions[session] = obj
        return VISASession(session)

    def open_default_resource_manager(self) -> tuple[VISARMSession, constants.StatusCode]:
        """The resource manager session."""
        return VISARMSession(self._register(self)), constants.StatusCode.success

    def list_resources(self, session: int, query: str = "?*::INSTR") -> tuple[str, ...]:
        """Every resource the log talks to."""
        return tuple(self.scripts)

    def parse_resource_extended(self, session: int, resource_name: str
                                ) -> tuple[highlevel.ResourceInfo, constants.StatusCode]:
        """Resource type and class from the name (pyvisa's own parser)."""
        try:
            parsed = rname.parse_resource_name(resource_name)
        except rname.InvalidResourceName:
            return (highlevel.ResourceInfo(constants.InterfaceType.unknown, 0, None, None, None),
                    constants.StatusCode.error_invalid_resource_name)
        # the concrete resource name classes (TCPIP, GPIB, ...) carry the board; the base does not
        board = parsed.board  # type: ignore[attr-defined]
        return (highlevel.ResourceInfo(parsed.interface_type_const, board,
                                       parsed.resource_class, str(parsed), None),
                constants.StatusCode.success)

    def open(self, session: int, resource_name: str,
             access_mode: constants.AccessModes = constants.AccessModes.no_lock,
             open_timeout: int = constants.VI_TMO_IMMEDIATE
             ) -> tuple[VISASession, constants.StatusCode]:
        """Open a resource the log holds (anything else is not found)."""
        script = self.scripts.get(resource_name)
        if script is None:
            script = self.scripts.setdefault(resource_name, ReplayScript(resource_name, None))
        attrs: dict[int, Any] = {constants.ResourceAttribute.termchar: ord("\n"),
                 constants.ResourceAttribute.termchar_enabled: constants.VI_FALSE,
                 constants.ResourceAttribute.timeout_value: 2000}
        return self._register(ReplaySession(script, attrs=attrs)), constants.StatusCode.success

    def close(self, session: int) -> constants.StatusCode:
        """Forget a session (what it had pending is dropped, as on a real connection)."""
        if self.sessions.pop(session, None) is None:
            return constants.StatusCode.error_invalid_object
        return constants.StatusCode.success

    def get_attribute(self, session: int, attribute: Any) -> tuple[Any, constants.StatusCode]:
        """An attribute set earlier (or a neutral default)."""
        sess = self.sessions.get(session)
        if not isinstance(sess, ReplaySession):
            return 0, constants.StatusCode.error_invalid_object
        return sess.attrs.get(attribute, 0), constants.StatusCode.success

    def set_attribute(self, session: int, attribute: Any, attribute_state: Any
                      ) -> constants.StatusCode:
        """Keep an attribute (termination character, its enable flag, timeout...)."""
        sess = self.sessions.get(session)
        if not isinstance(sess, ReplaySession):
            return constants.StatusCode.error_invalid_object
        sess.attrs[attribute] = attribute_state
        return constants.StatusCode.success

    def clear(self, session: int) -> constants.StatusCode:
        """Device clear: drop the pending response."""
        sess = self.sessions.get(session)
        if isinstance(sess, ReplaySession):
            sess.pending.clear()
        return constants.StatusCode.success

    def flush(self, session: int, mask: Any) -> constants.StatusCode:
        """Nothing is buffered below this library."""
        return constants.StatusCode.success

    def disable_event(self, session: int, event_type: Any, mechanism: Any
                      ) -> constants.StatusCode:
        """No events in a replay."""
        return constants.StatusCode.success

    def discard_events(self, session: int, event_type: Any, mechanism: Any
                       ) -> constants.StatusCode:
        """No events in a replay."""
        return constants.StatusCode.success

    # ---- traffic -----------------------------------------------------------------------------
    def write(self, session: int, data: bytes) -> tuple[int, constants.StatusCode]:
        """Check the message against the recording and queue the recorded response."""
        sess = self.sessions.get(session)
        if not isinstance(sess, ReplaySession):
            return 0, constants.StatusCode.error_invalid_object
        text = data.decode("ascii", "replace").rstrip("\r\n")
        term = bytes([int(sess.attrs.get(constants.ResourceAttribute.termchar, 10))])
        sess.pending.clear()
        sess.fail_next_read = False
        if self.stopped is not None:  # after a mismatch: let the safe-off through
            self._answer_after_stop(sess, text, term)
            return len(data), constants.StatusCode.success
        entry = self._next(sess.script, text)
        if entry is None:  # a poll the recording holds elsewhere: its last recorded reply
            self._answer_after_stop(sess, text, term)
            return len(data), constants.StatusCode.success
        self.used += 1
        if entry.error is not None:
            sess.fail_next_read = True
            if entry.reply is None and entry.direction == "write" and not is_poll(text):
                raise VisaIOError(constants.StatusCode.error_timeout)
            return len(data), constants.StatusCode.success
        response = response_bytes(entry, term)
        if response is not None:
            sess.pending += response
        return len(data), constants.StatusCode.success

    def _next(self, script: ReplayScript, text: str) -> TrafficLogEntry | None:
        """The recorded exchange this message must match (skipping polls the replay left out);
        None for an extra poll answered before (the replay polled more often while waiting);
        TrafficMismatch otherwise."""
        todo = script.todo
        for skip, (_number, entry) in enumerate(todo):
            if entry.text == text:
                for _ in range(skip + 1):
                    _n, done = todo.popleft()
                    if done.reply is not None and done.error is None:
                        self.answered[(script.resource, done.text)] = done
                return entry
            if not is_poll(entry.text):
                break
        if is_poll(text) and (script.resource, text) in self.answered:
            return None
        expected = todo[0] if todo else (None, None)
        self.stopped = TrafficMismatch(
            resource=script.resource, role=script.role,
            expected=None if expected[1] is None else expected[1].text, actual=text,
            index=expected[0])
        raise self.stopped

    def _answer_after_stop(self, sess: ReplaySession, text: str, term: bytes) -> None:
        """After a mismatch only the safe-off runs: queries get the last recorded reply to the
        same message (the original's own safe-off checks), settings are taken silently. Before
        one, an extra poll gets the reply last served to it."""
        key = (sess.script.resource, text)
        entry = self.last_replies.get(key) if self.stopped else self.answered.get(key)
        if entry is not None:
            sess.pending += response_bytes(entry, term) or b""
        elif not is_poll(text):
            return
        else:
            sess.fail_next_read = True

    def read(self, session: int, count: int) -> tuple[bytes, constants.StatusCode]:
        """Up to ``count`` bytes of the pending response (to the termination character when it
        is enabled); a timeout when nothing is pending or the recorded exchange failed."""
        sess = self.sessions.get(session)
        if not isinstance(sess, ReplaySession):
            return b"", constants.StatusCode.error_invalid_object
        if sess.fail_next_read or not sess.pending:
            sess.fail_next_read = False
            raise VisaIOError(constants.StatusCode.error_timeout)
        term = int(sess.attrs.get(constants.ResourceAttribute.termchar, 10))
        chunk = bytes(sess.pending[:count])
        status = constants.StatusCode.success_max_count_read
        if sess.attrs.get(constants.ResourceAttribute.termchar_enabled):
            at = chunk.find(bytes([term]))
            if at >= 0:
                chunk = chunk[:at + 1]
                status = constants.StatusCode.success_termination_character_read
        del sess.pending[:len(chunk)]
        if not sess.pending and status == constants.StatusCode.success_max_count_read:
            status = constants.StatusCode.success
        return chunk, status


@contextlib.contextmanager
def replaying(entries: Iterable[TrafficLogEntry]) -> Iterator[TrafficReplayLibrary]:
    """Every labrun session opened inside talks to a library serving ``entries``."""
    from labrun import scpi

    lib = TrafficReplayLibrary.from_entries(entries)
    try:
        with scpi.visa_library_override(lib):
            yield lib
    finally:
        lib.forget()
