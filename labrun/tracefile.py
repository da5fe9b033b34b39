"""CSV trace files: read the traces users bring from an OSA and write the ones labrun saves.

Format: optional leading metadata or comment lines, then a header naming the x column
(``wavelength_nm`` or ``frequency_thz``) and ``power_dbm``, then one sample per line.
Metadata lines look like ``# rbw_nm: 0.02``, ``# rbw_nm = 0.02`` or ``rbw_nm,0.02``; any other
leading line (instrument banners, blank lines) is skipped. Errors name the file and the line.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from labrun.errors import InputError
from labrun.inputfile import MAX_TRACE_BYTES, decode, read_bytes

X_COLUMNS = {"wavelength_nm": "nm", "frequency_thz": "thz"}
Y_COLUMN = "power_dbm"
# Physical ranges of trace samples: optical wavelengths (200 nm - 5 um, i.e. 60-1500 THz) and
# powers per RBW from far below any OSA's floor up to 1 kW (as labrun.reduce.SAMPLE_RANGE_DBM,
# named here with the line it is on).
X_RANGES = {"nm": (200.0, 5000.0), "thz": (60.0, 1500.0)}
POWER_RANGE_DBM = (-300.0, 60.0)
MAX_SAMPLES = 1_000_001
_META = re.compile(r"^\s*[#;%]*\s*([A-Za-z_][\w .\-]*?)\s*[:=,]\s*(.*?)\s*$")


@dataclass
class TraceFile:
    """A trace read from disk: x (ascending as in the file), y in dBm, unit and metadata."""

    path: str
    x: np.ndarray
    y_dbm: np.ndarray
    x_unit: str  # "nm" or "thz"
    metadata: dict[str, str] = field(default_factory=dict)

    def meta_float(self, key: str) -> float | None:
        """A metadata value as float, None when absent; InputError when not a number."""
        if key not in self.metadata:
            return None
        try:
            value = float(self.metadata[key])
        except ValueError:
            raise InputError(f"metadata value {self.metadata[key]!r} is not a number",
                             file=self.path, field=key) from None
        if not np.isfinite(value):
            raise InputError("metadata value is not finite", file=self.path, field=key)
        return value

    @property
    def rbw_nm(self) -> float | None:
        """RBW from the metadata line ``rbw_nm``, if the file has one."""
        return self.meta_float("rbw_nm")


def _split(line: str) -> list[str]:
    """Fields of one CSV line (comma, semicolon or tab separated)."""
    return [f.strip().strip('"').strip() for f in re.split(r"[,;\t]", line)]


def _header_columns(line: str) -> tuple[int, int, str] | None:
    """(x column, y column, x unit) when this line is a trace header, else None."""
    names = [f.lower() for f in _split(line.lstrip("#").strip())]
    xi = next((i for i, n in enumerate(names) if n in X_COLUMNS), None)
    if xi is None or Y_COLUMN not in names:
        return None
    return xi, names.index(Y_COLUMN), X_COLUMNS[names[xi]]


def read_trace_csv(path: str | Path) -> TraceFile:
    """Read a CSV trace; InputError naming the file and line for anything malformed."""
    name = str(path)
    if not Path(path).exists():
        raise InputError("no such file", file=name)
    text = decode(read_bytes(path, limit=MAX_TRACE_BYTES, name=name), name)
    lines = text.splitlines()
    meta: dict[str, str] = {}
    header = None
    for lineno, line in enumerate(lines, start=1):
        cols = _header_columns(line)
        if cols is not None:
            header = (lineno, cols)
            break
        m = _META.match(line)
        if m and m.group(2):
            meta[m.group(1).strip().lower().replace(" ", "_")] = m.group(2)
    if header is None:
        raise InputError(
            "no header line with 'wavelength_nm,power_dbm' or 'frequency_thz,power_dbm'",
            file=name,
        )
    (hline, (xi, yi, unit)) = header
    x, y = _parse_rows(lines, hline, xi, yi, name, unit)
    return TraceFile(name, x, y, unit, meta)


def _parse_rows(lines: list[str], hline: int, xi: int, yi: int, name: str, unit: str):
    """Numeric rows after the header; blank and '#' lines skipped."""
    xs: list[float] = []
    ys: list[float] = []
    xname = "wavelength_nm" if unit == "nm" else "frequency_thz"
    need = max(xi, yi)
    for lineno in range(hline + 1, len(lines) + 1):
        line = lines[lineno - 1].strip()
        if not line or line.startswith("#"):
            continue
        fields = _split(line)
        if len(fields) <= need:
            raise InputError(f"line {lineno}: expected at least {need + 1} fields, "
                             f"got {len(fields)}", file=name, field=Y_COLUMN)
        for col, out, fname in ((xi, xs, xname), (yi, ys, Y_COLUMN)):
            try:
                v = float(fields[col])
            except ValueError:
                raise InputError(f"line {lineno}: {fields[col]!r} is not a number",
                                 file=name, field=fname) from None
            if not np.isfinite(v):
                raise InputError(f"line {lineno}: value is not finite", file=name, field=fname)
            lo, hi = X_RANGES[unit] if col == xi else POWER_RANGE_DBM
            if not lo <= v <= hi:
                raise InputError(f"line {lineno}: {v:g} is outside [{lo:g}, {hi:g}]", file=name,
                                 field=fname)
            out.append(v)
        if len(xs) > MAX_SAMPLES:
            raise InputError(f"more than {MAX_SAMPLES:,} data rows", file=name)
    if len(xs) < 8:
        raise InputError(f"only {len(xs)} data rows; a trace needs at least 8", file=name)
    x = np.asarray(xs)
    y = np.asarray(ys)
    d = np.diff(x)
    if not (np.all(d > 0) or np.all(d < 0)):
        bad = int(np.argmax(d <= 0) if d[0] > 0 else np.argmax(d >= 0))
        raise InputError(f"x values must be strictly increasing or decreasing (data row {bad + 2})",
                         file=name, field=xname)
    return x, y


def write_trace_csv(path: str | Path, x: np.ndarray, y_dbm: np.ndarray, *, x_unit: str = "nm",
                    metadata: dict[str, object] | None = None) -> Path:
    """Write a trace in the format read_trace_csv reads: '# key: value' lines, header, rows."""
    if x_unit not in ("nm", "thz"):
        raise ValueError("x_unit must be 'nm' or 'thz'")
    x = np.asarray(x, dtype=float)
    y = np.asarray(y_dbm, dtype=float)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError("x and y must be 1-D arrays of the same length")
    xname = "wavelength_nm" if x_unit == "nm" else "frequency_thz"
    head = "".join(f"# {k}: {v}\n" for k, v in (metadata or {}).items())
    body = "\n".join(f"{a:.6f},{b:.4f}" for a, b in zip(x.tolist(), y.tolist(), strict=True))
    out = Path(path)
    out.write_text(f"{head}{xname},{Y_COLUMN}\n{body}\n", encoding="utf-8")
    return out
