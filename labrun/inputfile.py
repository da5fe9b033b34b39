"""Reading user input files safely, and the strict number types every file model uses.

Every file labrun reads (plans, benches, profiles, scenarios, traces) goes through ``read_bytes``
(size limit) and ``decode`` (UTF-8), and TOML files through ``parse_toml`` (nesting depth), so a
huge, binary or pathologically nested file is refused in one line naming the file, before any
parsing work. ``FILE_MODEL_CONFIG`` makes pydantic refuse NaN and infinity and booleans given
for numbers (``port = true``) in every file model; ``Number`` does the same inside tuples.
"""

from __future__ import annotations

import tomllib
from collections.abc import Iterable
from pathlib import Path
from typing import Annotated, Any

from pydantic import ConfigDict, Strict
from pydantic.types import AllowInfNan

from labrun.errors import InputError

MAX_TOML_BYTES = 4 * 1024 * 1024  # far above any hand-written plan, bench, profile or scenario
MAX_TRACE_BYTES = 64 * 1024 * 1024  # a 200,001-sample OSA trace as CSV is about 4 MB
MAX_DEPTH = 16  # tables and arrays nest at most 4 deep in the documented formats

# pydantic settings of every model that validates a file: unknown keys are errors, numbers are
# finite, and a boolean is not taken for a number (nor a number for a boolean).
FILE_MODEL_CONFIG = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False)

# A finite float that refuses booleans, for tuple members (tuple fields need strict=False so a
# TOML array becomes a tuple; this keeps each member strict).
Number = Annotated[float, Strict(), AllowInfNan(False)]


def read_bytes(path: str | Path, *, limit: int | None = None, name: str | None = None) -> bytes:
    """The file's bytes; InputError when it cannot be read or exceeds ``limit`` bytes."""
    shown = name or str(path)
    limit = MAX_TOML_BYTES if limit is None else limit
    try:
        with open(path, "rb") as fh:
            raw = fh.read(limit + 1)
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror or exc}", file=shown) from None
    if len(raw) > limit:
        raise InputError(f"file larger than {limit:,} bytes; not read", file=shown)
    return raw


def decode(raw: bytes, file: str) -> str:
    """UTF-8 text of ``raw`` (a leading byte-order mark is dropped); InputError otherwise."""
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"not UTF-8 text (byte {exc.start})", file=file) from None


def depth(data: Any) -> int:
    """Nesting depth of tables and arrays (a scalar is 0), without recursion."""
    children: Iterable[Any]
    deepest, stack = 0, [(data, 0)]
    while stack:
        obj, level = stack.pop()
        if isinstance(obj, dict):
            children = obj.values()
        elif isinstance(obj, list):
            children = obj
        else:
            continue
        deepest = max(deepest, level + 1)
        stack.extend((child, level + 1) for child in children)
    return deepest


def parse_toml(text: str, file: str) -> dict[str, Any]:
    """TOML text to a mapping; InputError for a syntax error or nesting deeper than MAX_DEPTH."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=file) from None
    except RecursionError:
        raise InputError(f"tables or arrays nested deeper than {MAX_DEPTH}", file=file) from None
    if depth(data) > MAX_DEPTH:
        raise InputError(f"tables or arrays nested deeper than {MAX_DEPTH}", file=file)
    return data


def load_toml(path: str | Path, *, name: str | None = None) -> tuple[str, dict[str, Any]]:
    """Read, decode and parse a TOML file: (text, mapping), or a one-line InputError."""
    shown = name or str(path)
    text = decode(read_bytes(path, name=shown), shown)
    return text, parse_toml(text, shown)
