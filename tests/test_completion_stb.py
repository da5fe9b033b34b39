"""The status-byte wait (``[completion] method = "stb"``) against IEEE 488.2 11.2: the status
byte is a whole number 0..255 (8 bits), and the wait ends only when every bit of ``mask`` is
set. Replies are scripted here (the virtual lab's *STB? sets only bit 5; the end-to-end case
is tests/test_profile_dialects.py::test_sweep_waits_by_the_status_byte).
"""

from __future__ import annotations

import pytest

from labrun.completion import waiter
from labrun.errors import InstrumentError
from labrun.profiles import CompletionSpec


class _Replies:
    """A session that answers *STB? from a script and records what it was sent."""

    role = "osa"
    resource = "TCPIP0::127.0.0.1::1::SOCKET"

    def __init__(self, *replies: str):
        self.replies = list(replies)
        self.sent: list[str] = []

    def write(self, command: str) -> None:
        self.sent.append(command)

    def query(self, command: str) -> str:
        self.sent.append(command)
        return self.replies.pop(0)


def _wait(mask: int, *replies: str, timeout_s: float = 60.0) -> _Replies:
    session = _Replies(*replies)
    wait = waiter(CompletionSpec(method="stb", mask=mask, arm=["*CLS", "*OPC"],
                                 interval_s=0.001, timeout_s=timeout_s))
    assert wait is not None
    wait(session)  # type: ignore[arg-type]
    return session


def test_every_bit_of_the_mask_must_be_set():
    """mask 48 (bits 5 and 4): 32 and 16 alone are not done, 48 is; the third read ends it."""
    session = _wait(48, "32", "16", "48", "48")
    assert session.sent == ["*CLS", "*OPC", "*STB?", "*STB?", "*STB?"]


def test_other_bits_do_not_matter():
    """Bits outside the mask (64: request service) neither end nor hold up the wait."""
    assert _wait(32, "64", "96").sent.count("*STB?") == 2


@pytest.mark.parametrize("reply", ["-1", "256", "inf", "-inf", "nan", "3.5", "1e400", "x"])
def test_a_reply_that_is_no_status_byte_is_an_instrument_error(reply):
    """-1 would read as every bit set (done before the sweep ends); inf overflows int()."""
    with pytest.raises(InstrumentError, match="not a status byte"):
        _wait(32, reply, "32")


@pytest.mark.parametrize("reply", ["0", "+32", "255", "32.0"])
def test_status_bytes_in_range_are_read(reply):
    session = _Replies(reply, "32")
    wait = waiter(CompletionSpec(method="stb", mask=32, arm=["*CLS"], interval_s=0.001))
    assert wait is not None
    wait(session)  # type: ignore[arg-type]
    assert session.sent.count("*STB?") == (1 if int(float(reply)) & 32 else 2)
