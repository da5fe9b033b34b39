"""IEEE 488.2 definite-length block framing (labrun.blockframe) against pyvisa's own codec
(pyvisa.util.to_ieee_block / from_ieee_block, which implement IEEE 488.2 7.7.6)."""

from __future__ import annotations

import numpy as np
import pytest
from pyvisa.util import from_ieee_block, to_ieee_block

from labrun.blockframe import body_length, build_block, length_digits, strip_termination


@pytest.mark.parametrize("n", [0, 1, 2, 3, 250, 2501, 25_001])  # 1 to 6 length digits
def test_build_block_matches_pyvisa(n: int) -> None:
    """The framed block equals pyvisa's encoding of the same REAL,32 values, and decodes back."""
    values = np.linspace(-70.0, 3.0, n, dtype=np.float32)
    block = build_block(values.astype("<f4").tobytes())
    assert block == to_ieee_block(values.tolist(), "f", False)  # source: pyvisa.util
    back = from_ieee_block(block, datatype="f", is_big_endian=False)
    assert np.array_equal(np.asarray(back, dtype=np.float32), values)


def test_header_parts_read_back() -> None:
    """The header of a built block gives back the body length (#3250: 3 digits, 250 bytes)."""
    block = build_block(b"\n" * 250)  # newline bytes in the body are data, not terminators
    assert block[:5] == b"#3250"
    assert length_digits(block[:2]) == 3
    assert body_length(block[2:5]) == 250


@pytest.mark.parametrize("head", [b"#0", b"#x", b"12", b"#", b""])
def test_length_digits_refuses(head: bytes) -> None:
    """Only #1 .. #9 start a definite-length block (#0 is the indefinite form, IEEE 488.2)."""
    with pytest.raises(ValueError, match="definite-length block"):
        length_digits(head)


def test_body_length_refuses_non_digits() -> None:
    with pytest.raises(ValueError, match="bad block length"):
        body_length(b"2a")


def test_strip_termination() -> None:
    """The termination after a block is removed; a block without it is refused."""
    assert strip_termination(b"abc\n", b"\n") == b"abc"
    assert strip_termination(b"ab\n", b"") == b"ab\n"  # more units follow: nothing to strip
    with pytest.raises(ValueError, match="read termination"):
        strip_termination(b"abc", b"\n")
