"""Trace y encodings of the store, named per trace row (``traces.encoding``); old rows stay read.

- ``f32``: little-endian IEEE 754 binary32, 4 bytes a sample (labrun 0.1.0; still read).
- ``mdb-dz1`` (default): each value rounded to whole thousandths of a dB (error <= 0.0005 dB),
  first differences (the first value against 0), zigzag-mapped to unsigned 32-bit integers, the
  four little-endian byte planes stored one after another (all low bytes, then the next...), and
  deflate (zlib, level 1: level 6 saves 3 % more for 4x the time). OSA traces are smooth next
  to their noise, so the differences are small and the high byte planes nearly constant: about
  1.1 bytes a sample on the shipped sweeps (benchmarks/bench_store.py).
A trace with a value that is not finite or beyond +/-1e5 dB is stored as ``f32`` instead.
"""

from __future__ import annotations

import zlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # imported where a trace is coded: opening a store (`labrun status`) needs none
    import numpy as np

F32 = "f32"
MDB_DZ1 = "mdb-dz1"
DEFAULT_ENCODING = MDB_DZ1
STEP_DB = 1e-3  # one milli-dB: the quantum of mdb-dz1
LIMIT_DB = 1e5  # beyond this, values go to f32 (keeps every difference inside 32 bits)
ZLIB_LEVEL = 1


def encode_y(y: np.ndarray, encoding: str = DEFAULT_ENCODING) -> tuple[bytes, str]:
    """(blob, encoding actually used) for a trace's y values in dBm."""
    import numpy as np

    values = np.asarray(y, dtype=np.float64).ravel()
    if encoding == MDB_DZ1 and np.all(np.isfinite(values)) and (
            values.size == 0 or float(np.max(np.abs(values))) <= LIMIT_DB):
        milli = np.rint(values / STEP_DB).astype(np.int64)
        delta = np.diff(milli, prepend=0)
        zigzag = ((delta << 1) ^ (delta >> 63)).astype("<u4")
        planes = zigzag.view(np.uint8).reshape(-1, 4).T
        return zlib.compress(planes.tobytes(), ZLIB_LEVEL), MDB_DZ1
    if encoding not in (F32, MDB_DZ1):
        raise ValueError(f"unknown trace encoding {encoding!r}")
    return values.astype("<f4").tobytes(), F32


def decode_y(blob: bytes, encoding: str | None, n: int) -> np.ndarray:
    """A stored trace's y values (dBm) as float64; ``None`` encoding means ``f32`` (old rows)."""
    import numpy as np

    if encoding in (None, F32):
        return np.frombuffer(blob, dtype="<f4").astype(np.float64)
    if encoding == MDB_DZ1:
        planes = np.frombuffer(zlib.decompress(blob), dtype=np.uint8).reshape(4, n)
        zigzag = np.ascontiguousarray(planes.T).view("<u4").ravel().astype(np.int64)
        delta = (zigzag >> 1) ^ -(zigzag & 1)
        return np.cumsum(delta) / 1000.0  # whole milli-dB back to dB
    raise ValueError(f"unknown trace encoding {encoding!r}")
