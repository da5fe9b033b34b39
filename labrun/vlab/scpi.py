"""SCPI message parsing for the virtual lab: program headers with short/long mnemonics, optional
nodes and numeric suffixes, ``;``-separated commands, parameters, and the error queue.

Follows SCPI-1999 vol. 1 (command syntax, error codes) and IEEE 488.2 (common commands, event
status register). The command tables themselves live in labrun.vlab.siminstruments.
"""

from __future__ import annotations

import re
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

# Every error code the simulator can queue, with its SCPI-1999 message (vol. 2, 21.8). A code
# missing here is a simulator bug: ErrorQueue.push and ScpiFault refuse it (KeyError).
ERRORS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -141: "Invalid character data",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -310: "System error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -410: "Query INTERRUPTED",
}
QUEUE_SIZE = 10  # SCPI requires at least 2; 10 is common practice

_TOKEN = re.compile(r"\[:?([A-Za-z]+)(#?)\]|:?([A-Za-z]+)(#?)")
_INPUT_NODE = re.compile(r"([A-Za-z_]+?)(\d*)")


class ScpiFault(Exception):
    """A command failed: carries the SCPI error code and an optional detail."""

    def __init__(self, code: int, detail: str = ""):
        self.code = code
        self.detail = detail
        super().__init__(f"{code},{ERRORS[code]}{';' + detail if detail else ''}")


@dataclass(frozen=True)
class Node:
    """One header node of a pattern: long form, short form (its upper-case letters), flags."""

    long: str
    optional: bool
    suffix: bool

    @property
    def short(self) -> str:
        """Short form: the upper-case letters of the long form (SCPI-1999 6.2.1)."""
        return "".join(c for c in self.long if c.isupper()) or self.long.upper()

    def matches(self, name: str) -> bool:
        """Case-insensitive match of a received mnemonic with the short or the long form."""
        up = name.upper()
        return up == self.short or up == self.long.upper()


def compile_pattern(pattern: str) -> tuple[Node, ...]:
    """Parse a header pattern such as ``[SOURce#]:POWer[:LEVel]`` into nodes."""
    nodes = []
    pos = 0
    pattern = pattern.strip()
    while pos < len(pattern):
        m = _TOKEN.match(pattern, pos)
        if not m:
            raise ValueError(f"bad SCPI pattern {pattern!r} at {pos}")
        if m.group(1):
            nodes.append(Node(m.group(1), True, m.group(2) == "#"))
        else:
            nodes.append(Node(m.group(3), False, m.group(4) == "#"))
        pos = m.end()
    return tuple(nodes)


def _match(received: list[tuple[str, int | None]], pattern: tuple[Node, ...], i: int = 0,
           j: int = 0) -> list[int | None] | None:
    """Match received nodes against pattern nodes (optional nodes may be skipped)."""
    if j == len(pattern):
        return [] if i == len(received) else None
    node = pattern[j]
    if i < len(received):
        name, num = received[i]
        if node.matches(name) and (num is None or node.suffix):
            rest = _match(received, pattern, i + 1, j + 1)
            if rest is not None:
                return [num, *rest]
    if node.optional:
        rest = _match(received, pattern, i, j + 1)
        if rest is not None:
            return [None, *rest]
    return None


@dataclass
class Call:
    """One parsed command handed to a handler: parameters and numeric suffixes of the pattern."""

    header: str
    args: list[str]
    suffixes: list[int | None]

    def suffix(self, default: int = 1) -> int:
        """The first numeric suffix given in the header (default 1, as SCPI specifies)."""
        for s in self.suffixes:
            if s is not None:
                return s
        return default


Handler = Callable[[Call], "str | bytes | None"]


@dataclass
class Entry:
    """A command-table entry."""

    pattern: tuple[Node, ...]
    query: bool
    handler: Handler
    waits: bool = False       # wait for pending operations (sweep) before running
    nargs: tuple[int, int] = (0, 0)


@dataclass
class CommandTable:
    """All headers an instrument understands."""

    entries: list[Entry] = field(default_factory=list)
    common: dict[tuple[str, bool], Entry] = field(default_factory=dict)

    def add(self, pattern: str, handler: Handler, *, query: bool = False, waits: bool = False,
            nargs: tuple[int, int] | None = None) -> None:
        """Register a command (``query=False``) or a query (``query=True``)."""
        default = (0, 0) if query else (1, 1)
        limits = nargs if nargs is not None else default
        if pattern.startswith("*"):  # IEEE 488.2 common command: fixed header
            self.common[(pattern.upper(), query)] = Entry((), query, handler, waits, limits)
            return
        self.entries.append(Entry(compile_pattern(pattern), query, handler, waits, limits))

    def find_common(self, header: str, query: bool) -> tuple[Entry, list[int | None]] | None:
        """The entry of an IEEE 488.2 common command such as ``*IDN`` (query) or ``*RST``."""
        entry = self.common.get((header.upper(), query))
        return None if entry is None else (entry, [])

    def find(self, nodes: list[tuple[str, int | None]], query: bool
             ) -> tuple[Entry, list[int | None]] | None:
        """The entry matching received nodes, with the suffixes it matched."""
        for entry in self.entries:
            if entry.query != query:
                continue
            suffixes = _match(nodes, entry.pattern)
            if suffixes is not None:
                return entry, suffixes
        return None


@dataclass
class ParsedCommand:
    """One command of a program message, split into header nodes and parameters."""

    text: str
    common: str | None                       # "*IDN" etc. for IEEE 488.2 common commands
    nodes: list[tuple[str, int | None]]
    absolute: bool
    query: bool
    args: list[str]


def split_message(message: str) -> list[str]:
    """Split a program message at ``;`` outside quoted strings."""
    parts, cur, quote = [], [], None
    for ch in message:
        if quote:
            cur.append(ch)
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
            cur.append(ch)
        elif ch == ";":
            parts.append("".join(cur))
            cur = []
        else:
            cur.append(ch)
    parts.append("".join(cur))
    return [p.strip() for p in parts if p.strip()]


def split_args(text: str) -> list[str]:
    """Comma-separated parameters (quotes kept), whitespace trimmed."""
    if not text.strip():
        return []
    return [a.strip() for a in re.findall(r'"[^"]*"|[^,]+', text)]


def parse_command(text: str) -> ParsedCommand:
    """Parse one command; raises ScpiFault(-102/-113) for malformed headers."""
    header, _, rest = text.strip().partition(" ")
    if "\t" in header:
        header, _, more = header.partition("\t")
        rest = more + " " + rest
    query = header.endswith("?")
    head = header[:-1] if query else header
    args = split_args(rest)
    if head.startswith("*"):
        if not re.fullmatch(r"\*[A-Za-z]+", head):
            raise ScpiFault(-113, header)
        return ParsedCommand(text, head.upper(), [], True, query, args)
    absolute = head.startswith(":")
    parts = head[1:].split(":") if absolute else head.split(":")
    nodes: list[tuple[str, int | None]] = []
    for part in parts:
        m = _INPUT_NODE.fullmatch(part)
        if not m:
            raise ScpiFault(-113, header)
        nodes.append((m.group(1), int(m.group(2)) if m.group(2) else None))
    return ParsedCommand(text, None, nodes, absolute, query, args)


class ErrorQueue:
    """SCPI error/event queue: FIFO; when full the newest entry becomes -350 Queue overflow."""

    def __init__(self, size: int = QUEUE_SIZE):
        self._q: deque[tuple[int, str]] = deque()
        self.size = size

    def push(self, code: int, detail: str = "") -> None:
        """Add an error (SCPI-1999 vol. 2, 21.8: overflow replaces the last entry with -350)."""
        msg = ERRORS[code] + (f";{detail}" if detail else "")
        if len(self._q) >= self.size:
            self._q[-1] = (-350, ERRORS[-350])
        else:
            self._q.append((code, msg))

    def pop(self) -> tuple[int, str]:
        """Oldest entry, or (0, "No error")."""
        return self._q.popleft() if self._q else (0, ERRORS[0])

    def clear(self) -> None:
        """*CLS."""
        self._q.clear()

    def __len__(self) -> int:
        return len(self._q)


def esr_bit(code: int) -> int:
    """IEEE 488.2 status bit of an error: command 32, execution 16, device 8, query 4."""
    if -199 <= code <= -100:
        return 32
    if -299 <= code <= -200:
        return 16
    if -399 <= code <= -300:
        return 8
    if -499 <= code <= -400:
        return 4
    return 0


_MINMAX = {"MIN": "min", "MINIMUM": "min", "MAX": "max", "MAXIMUM": "max", "DEF": "def",
           "DEFAULT": "def"}


def number(call: Call, lo: float, hi: float, default: float | None = None, index: int = 0
           ) -> float:
    """A numeric parameter within [lo, hi]: -104 when not a number, -222 when out of range.

    MIN, MAX and DEF are accepted (SCPI-1999 7.2.1.1).
    """
    text = call.args[index]
    special = _MINMAX.get(text.upper())
    if special == "min":
        return lo
    if special == "max":
        return hi
    if special == "def":
        return lo if default is None else default
    try:
        value = float(text)
    except ValueError:
        raise ScpiFault(-104, f"{call.header} {text}") from None
    if value != value or not lo - 1e-9 <= value <= hi + 1e-9:
        raise ScpiFault(-222, f"{call.header} {text}")
    return value


def boolean(call: Call, index: int = 0) -> bool:
    """A boolean parameter: ON/OFF/1/0 (numeric values round, non-zero is ON; SCPI-1999 7.3)."""
    text = call.args[index].upper()
    if text == "ON":
        return True
    if text == "OFF":
        return False
    try:
        return round(float(text)) != 0
    except ValueError:
        raise ScpiFault(-224, f"{call.header} {call.args[index]}") from None


def fmt(value: float) -> str:
    """Numeric reply: enough digits to reproduce what was set."""
    return f"{value:.10g}"
