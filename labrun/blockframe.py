"""IEEE 488.2 definite-length block framing (7.7.6), as pure functions on bytes: building a block
(``#``, one digit n, n digits of the body's length, the body) and checking the parts of one that
is being read. ``labrun.scpi.ScpiSession`` reads blocks with these; pyvisa decodes the values.

Every refusal is a ``ValueError`` with the reason; the session turns it into an
``InstrumentError`` naming its instrument.
"""

from __future__ import annotations


def build_block(body: bytes) -> bytes:
    """``body`` framed as a definite-length block: ``#<n><length in n digits><body>``."""
    length = str(len(body)).encode("ascii")
    return b"#" + str(len(length)).encode("ascii") + length + body


def length_digits(head: bytes) -> int:
    """How many length digits follow the two-byte block head ``#n`` (n from 1 to 9); ValueError
    for anything else (an indefinite-length ``#0`` block included)."""
    if head[:1] != b"#" or not head[1:2].isdigit() or head[1:2] == b"0":
        raise ValueError(f"expected a definite-length block, got {head!r}")
    return int(head[1:2])


def body_length(digits: bytes) -> int:
    """The body length the header's length digits state; ValueError when they are not digits."""
    if not digits.isdigit():
        raise ValueError(f"bad block length {digits!r}")
    return int(digits)


def strip_termination(body: bytes, term: bytes) -> bytes:
    """The block body without the read termination ``term`` that must follow it (none when
    ``term`` is empty); ValueError when it does not."""
    if term and not body.endswith(term):
        raise ValueError("block not followed by the read termination")
    return body[:len(body) - len(term)]
