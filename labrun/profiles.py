"""Instrument profiles: declarative TOML files in drivers/ mapping generic operations to SCPI.

Loading validates everything a typo could break (unknown operation for the kind, missing or
unknown placeholder, bad range, unknown or missing field) and reports the first problem as a
one-line InputError naming the file and the field. See drivers/README.md for the format.
"""

from __future__ import annotations

import functools
import re
import string
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    field_validator,
    model_validator,
)
from pydantic_core import PydanticCustomError

from labrun.errors import InputError
from labrun.inputfile import FILE_MODEL_CONFIG, Number, load_toml
from labrun.resources import find_file

Kind = Literal["laser", "attenuator", "pol_controller", "osa", "power_meter", "amplifier",
               "switch"]
Parse = Literal["float", "int", "bool", "str", "idn", "floats", "trace"]

COMMON_OPERATIONS = ("identify", "reset", "clear_status")
KIND_OPERATIONS: dict[str, tuple[str, ...]] = {
    "laser": ("set_wavelength_nm", "read_wavelength_nm", "set_power_dbm", "read_power_dbm",
              "output_on", "output_off", "read_output_state", "read_interlock"),
    "attenuator": ("set_wavelength_nm", "read_wavelength_nm", "set_attenuation_db",
                   "read_attenuation_db", "output_on", "output_off", "read_output_state"),
    "pol_controller": ("set_angle_deg", "read_angle_deg", "set_stokes", "read_stokes"),
    "osa": ("set_center_nm", "read_center_nm", "set_span_nm", "read_span_nm", "set_rbw_nm",
            "read_rbw_nm", "set_points", "read_points", "sweep", "read_trace_x", "read_trace_y"),
    "power_meter": ("set_wavelength_nm", "read_wavelength_nm", "read_power_dbm"),
    "amplifier": ("set_power_dbm", "read_power_dbm", "output_on", "output_off",
                  "read_output_state", "read_interlock"),
    "switch": ("set_path", "read_path"),
}
# What every profile of a kind must map: identity, and whatever safe_off() needs.
REQUIRED_OPERATIONS: dict[str, tuple[str, ...]] = {
    "laser": ("identify", "set_power_dbm", "output_off"),
    "attenuator": ("identify", "set_attenuation_db"),
    "pol_controller": ("identify",),
    "osa": ("identify", "sweep", "read_trace_x", "read_trace_y"),
    "power_meter": ("identify", "read_power_dbm"),
    "amplifier": ("identify", "set_power_dbm", "output_off"),
    "switch": ("identify", "set_path"),
}
# Operations that take values, and the value placeholders their template must contain.
VALUE_PLACEHOLDERS: dict[str, tuple[str, ...]] = {"set_stokes": ("s1", "s2", "s3")}
SETTINGS_WITHOUT_VALUE = ("output_on", "output_off", "sweep", "reset", "clear_status")
INDEX = "index"
# Operations that switch light: each travels alone, never inside a compound message.
SOURCE_SWITCHES = ("output_on", "output_off")
# Line ends a profile may use as termination (IEEE 488.2 7.5: NL, optionally after CR).
TERMINATIONS = ("\n", "\r\n", "\r")
# A template holds one program message unit: no unit separator, no line end, no control byte.
_NOT_ONE_COMMAND = re.compile(r"[;\x00-\x1f\x7f]")
# Plain format specs only: optional precision (at most 17 digits) and a number type, no width,
# fill or nested fields ({value:.3f}, {value:d}, {value:g}, {value:.6e}).
_PLAIN_SPEC = re.compile(r"(\.(1[0-7]|[0-9])[efg]|[dfeg])?")
# An init command that would switch light on: an OUTPut or STATe node set ON or 1 (short or long
# SCPI forms, any numeric suffix, e.g. OUTP ON, OUTP:STAT ON, SOUR:POW:STAT 1).
_SWITCH_NODES = {"OUTP", "OUTPUT", "STAT", "STATE"}


class _Strict(BaseModel):
    model_config = FILE_MODEL_CONFIG


class _ProfileHead(_Strict):
    name: str
    kind: Kind
    description: str = ""
    write_termination: str = "\n"
    read_termination: str = "\n"
    timeout_ms: int = Field(3000, gt=0, le=600_000)
    error_query: str | None = "SYST:ERR?"
    error_queue: bool = True  # false: the instrument has none (declared, so probe can say so)
    band_nm: Annotated[tuple[Number, Number] | None, Field(strict=False)] = None  # optical band
    opc_query: str | None = "*OPC?"
    init: list[str] = []
    safe_off_init: list[str] = []  # the only commands a safe-off connection sends before off


class Capabilities(_Strict):
    """What the instrument reports (emission state, interlock) and what messages it takes."""

    output_state: bool = False
    interlock: bool = False
    compound_messages: bool = False  # takes IEEE 488.2 compound program messages ("A;:B?;:C?")


class SweepTime(_Strict):
    """How long one OSA sweep takes: a fixed part, a part per sample and a part per span/RBW
    (a grating OSA slows down at a narrow resolution); ``labrun check`` estimates with it."""

    fixed_s: float = Field(0.0, ge=0, le=600)
    per_sample_s: float = Field(0.0, ge=0, le=1)
    per_span_rbw_s: float = Field(0.0, ge=0, le=10)

    def seconds(self, span_nm: float, rbw_nm: float, points: int) -> float:
        """Seconds for one sweep of ``points`` samples over ``span_nm`` at ``rbw_nm``."""
        return self.fixed_s + points * self.per_sample_s + span_nm / rbw_nm * self.per_span_rbw_s


class CompletionSpec(_Strict):
    """How to wait for an operation (``wait = true``, an OSA sweep): see labrun.completion."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)

    method: Literal["opc", "poll", "wai", "fixed", "stb"] = "opc"
    query: str | None = None      # poll: the status query; wai: the confirming query; stb:
                                  #   the status-byte query (default *STB?)
    done: str | None = None       # poll: regular expression a finished reply fullmatches
    mask: int | None = Field(None, ge=1, le=255)  # stb: bits all set once the operation is done
    arm: list[str] = []           # stb: commands sent after the operation, before polling
    interval_s: float = Field(0.05, gt=0, le=60)
    timeout_s: float = Field(60.0, gt=0, le=3600)
    fixed_s: float = Field(0.0, ge=0, le=3600)


# Trace levels no OSA shows (dBm per RBW): beyond them a trace is corrupted, whatever profile.
LEVEL_RANGE_DBM = (-300.0, 100.0)
# IEEE 488.2 definite-length block formats and their struct codes (pyvisa's block codec).
BLOCK_DATATYPES = {"real32": "f", "real64": "d", "int16": "h", "int32": "i"}


class TraceSpec(_Strict):
    """How an OSA transfers traces (REAL,32 definite-length block or ASCII), and how long a
    sweep takes (optional)."""

    format: Literal["real32", "real64", "int16", "int32", "ascii"]
    byte_order: Literal["little", "big"] = "little"  # of a binary block
    format_command: str | None = None
    ascii_command: str | None = None
    byte_order_command: str | None = None
    ascii_separator: Literal[",", " ", "\t"] = ","  # between ASCII values
    ascii_leading_count: bool = False  # the first ASCII value counts the values after it
    ascii_header: str | None = None    # a regular expression the ASCII reply starts with, skipped
    axis_start_query: str | None = None  # the axis from start/stop queries (linear, as many
    axis_stop_query: str | None = None   #   samples as the level trace) instead of read_trace_x
    axis_wire_unit: str = "nm"           # the unit those queries answer in
    axis_from_settings: bool = False     # the axis from read_center_nm, read_span_nm (and the
                                         #   level trace's length), for an OSA with no axis query
    # The levels (dBm per RBW) a trace of this OSA may hold: one outside is refused as corrupted
    # before it is accepted (default LEVEL_RANGE_DBM, wide enough for any instrument).
    level_range_dbm: Annotated[tuple[Number, Number] | None, Field(strict=False)] = None
    sweep_time: SweepTime | None = None

    @property
    def axis_from_start_stop(self) -> bool:
        """True when the wavelength axis comes from start/stop queries."""
        return self.axis_start_query is not None

    @property
    def levels_dbm(self) -> tuple[float, float]:
        """The level range a trace must stay in (declared, else LEVEL_RANGE_DBM)."""
        rng = self.level_range_dbm
        return LEVEL_RANGE_DBM if rng is None else (float(rng[0]), float(rng[1]))

    @property
    def block_datatype(self) -> str | None:
        """The struct code of a binary block's values (None for ASCII)."""
        return BLOCK_DATATYPES.get(self.format)

    @property
    def axis_needs_no_query(self) -> bool:
        """True when read_trace_x is not needed: the axis comes from start/stop or settings."""
        return self.axis_from_start_stop or self.axis_from_settings


# The named groups each reply form must have (labrun reads only those groups).
REPLY_GROUPS: dict[str, tuple[str, ...]] = {"error": ("code",), "number": ("value",),
                                            "state": ("state",)}


class ReplyForms(_Strict):
    """How to read replies that do not follow the generic forms: one regular expression per
    kind of reply, whose named groups hold the parts (see REPLY_GROUPS). None: the generic form
    (SCPI-1999 ``code,"message"``; a bare number; 1/0/ON/OFF)."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)

    error: str | None = None   # groups: code, and optionally message
    number: str | None = None  # group: value (read-backs parsed as float or int)
    state: str | None = None   # group: state (1/0/ON/OFF/TRUE/FALSE inside it)

    def pattern(self, kind: str) -> re.Pattern[str] | None:
        """The compiled form of one kind of reply (None: the generic form)."""
        text = getattr(self, kind)
        return None if text is None else _compiled(text)

    def declared(self) -> dict[str, str]:
        """The forms the profile declares, by kind (for labrun probe)."""
        return {k: v for k in REPLY_GROUPS if (v := getattr(self, k)) is not None}


@functools.lru_cache(maxsize=256)
def _compiled(text: str) -> re.Pattern[str]:
    return re.compile(text)


class Operation(_Strict):
    """One generic operation: SCPI template, parsing, unit, limits, settling and read-back."""

    model_config = ConfigDict(**FILE_MODEL_CONFIG, frozen=True)

    command: str | None = None
    query: str | None = None
    parse: Parse | None = None
    unit: str | None = None
    wire_unit: str | None = None  # the unit the instrument speaks, when not labrun's ``unit``
    scale: float = 1.0            # instrument value = labrun value (in wire_unit) x scale
    offset: float = 0.0           #   + offset
    range: Annotated[tuple[Number, Number] | None, Field(strict=False)] = None
    index_range: Annotated[tuple[Annotated[int, Field(strict=True)], Annotated[int, Field(
        strict=True)]] | None, Field(strict=False)] = None
    settle_s: float = Field(0.0, ge=0.0, le=3600.0)
    readback: str | None = None
    tolerance: float | None = Field(None, ge=0.0)
    wait: bool = False
    # The key in [operations], filled in by parse_profile; last, so a "name" in the file is
    # reported where an unknown key would be.
    name: str = ""

    @field_validator("name", mode="before")
    @classmethod
    def _not_from_file(cls, value: Any) -> Any:
        raise PydanticCustomError("extra_forbidden", "Extra inputs are not permitted")

    @model_validator(mode="after")
    def _one_of(self) -> Operation:
        if (self.command is None) == (self.query is None):
            raise ValueError("give exactly one of 'command' (a setting) or 'query'")
        if self.query is not None and self.parse is None:
            raise ValueError("a query needs 'parse'")
        if self.command is not None and self.parse is not None:
            raise ValueError("'parse' belongs to queries, not commands")
        return self

    @property
    def template(self) -> str:
        """The SCPI text with placeholders (command or query)."""
        return self.command if self.command is not None else self.query  # type: ignore[return-value]

    @property
    def is_query(self) -> bool:
        return self.query is not None

    @property
    def placeholders(self) -> tuple[str, ...]:
        """Names of the placeholders in the template, in order."""
        return placeholders(self.template)

    @property
    def value_spec(self) -> str:
        """The format spec of ``{value}`` in the template ('' when plain or absent)."""
        for _, name, spec, _ in string.Formatter().parse(self.template):
            if name == "value":
                return spec or ""
        return ""

    @property
    def integer(self) -> bool:
        """True when the value placeholder is formatted as an integer (``{value:d}``)."""
        for _, name, spec, _ in string.Formatter().parse(self.template):
            if name == "value" and spec and spec.endswith("d"):
                return True
        return False

    @property
    def converts(self) -> bool:
        """True when the instrument speaks another unit or scale than labrun."""
        return (self.wire_unit not in (None, self.unit)) or self.scale != 1.0 or \
            self.offset != 0.0

    def to_wire(self, value: Any) -> Any:
        """A value (or array) in labrun's unit as the instrument takes it."""
        from labrun.wireunits import to_wire

        if not self.converts:
            return value
        wire = to_wire(value, str(self.unit), self.wire_unit or str(self.unit))
        out = wire * self.scale + self.offset
        return float(out) if out.ndim == 0 else out

    def from_wire(self, value: Any) -> Any:
        """A value (or array) the instrument gave, in labrun's unit."""
        from labrun.wireunits import from_wire

        if not self.converts:
            return value
        plain = (value - self.offset) / self.scale
        out = from_wire(plain, str(self.unit), self.wire_unit or str(self.unit))
        return float(out) if out.ndim == 0 else out

    def render(self, **values: Any) -> str:
        """The SCPI text with placeholders filled (values already checked by the caller)."""
        return self.template.format(**values)


class _ProfileFile(_Strict):
    profile: _ProfileHead
    capabilities: Capabilities = Capabilities()
    replies: ReplyForms = ReplyForms()
    completion: CompletionSpec = CompletionSpec()
    trace: TraceSpec | None = None
    operations: dict[str, Operation]


@dataclass(frozen=True)
class Profile:
    """A loaded, validated profile."""

    name: str
    kind: str
    path: Path
    description: str
    write_termination: str
    read_termination: str
    timeout_ms: int
    error_query: str | None
    opc_query: str | None
    init: tuple[str, ...]
    capabilities: Capabilities
    trace: TraceSpec | None
    operations: dict[str, Operation] = field(default_factory=dict)
    replies: ReplyForms = ReplyForms()
    completion: CompletionSpec = CompletionSpec()
    band_nm: tuple[float, float] | None = None  # declared optical band (probe checks in it)
    safe_off_init: tuple[str, ...] = ()  # sent on a safe-off connection before the switch-off

    def band(self) -> tuple[float, float] | None:
        """The optical band wavelengths must lie in: declared, else the wavelength setting's
        range (laser, attenuator, power meter) or the OSA centre's."""
        if self.band_nm is not None:
            return self.band_nm
        for name in ("set_wavelength_nm", "set_center_nm"):
            rng = self.operations[name].range if name in self.operations else None
            if rng is not None:
                return (float(rng[0]), float(rng[1]))
        return None

    def op(self, name: str) -> Operation:
        """The operation ``name``, or an InputError naming the profile when it is not mapped."""
        try:
            return self.operations[name]
        except KeyError:
            raise InputError(f"profile does not map operation {name!r}", file=str(self.path),
                             field=f"operations.{name}") from None

    def has(self, name: str) -> bool:
        return name in self.operations

    def read_operations(self) -> list[Operation]:
        """Every query operation, in file order: what a probe may exercise safely."""
        return [op for op in self.operations.values() if op.is_query]


def generic_profile_name(kind: str) -> str:
    """File name (without .toml) of the shipped generic profile of a kind."""
    return "generic-" + kind.replace("_", "-")


@functools.cache
def generic_profile(kind: str) -> Profile:
    """The shipped generic profile of a kind, loaded once: the virtual lab speaks it and takes
    its instruments' ranges from it."""
    return load_profile(generic_profile_name(kind))


def placeholders(template: str) -> tuple[str, ...]:
    """Placeholder names in a str.format template."""
    return tuple(name for _, name, _, _ in string.Formatter().parse(template) if name is not None)


def _fail(path: Path, field_name: str, message: str) -> InputError:
    return InputError(message, file=str(path), field=field_name)


def _loc(loc: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in loc if not str(p).startswith("function-after"))


def _check_operation(path: Path, kind: str, name: str, op: Operation,
                     ops: dict[str, Operation]) -> None:
    """Validate one operation against its kind: name, placeholders, ranges, read-back."""
    where = f"operations.{name}"
    allowed = COMMON_OPERATIONS + KIND_OPERATIONS[kind]
    if name not in allowed:
        raise _fail(path, where, f"unknown operation for kind {kind!r}; "
                                 f"allowed: {', '.join(allowed)}")
    try:
        names = op.placeholders
    except ValueError as exc:
        raise _fail(path, where, f"malformed template {op.template!r}: {exc}") from None
    wanted: tuple[str, ...] = ()
    if op.command is not None and name not in SETTINGS_WITHOUT_VALUE:
        wanted = VALUE_PLACEHOLDERS.get(name, ("value",))
    if op.index_range is not None:
        wanted += (INDEX,)
    for missing in (w for w in wanted if w not in names):
        raise _fail(path, where, f"template {op.template!r} lacks placeholder {{{missing}}}")
    for extra in (n for n in names if n not in wanted):
        hint = " (add index_range)" if extra == INDEX else ""
        raise _fail(path, where, f"unknown placeholder {{{extra}}} in {op.template!r}{hint}")
    _check_specs(path, where, op.template)
    for key, rng in (("range", op.range), ("index_range", op.index_range)):
        if rng is not None and not (rng[0] < rng[1] and max(abs(rng[0]), abs(rng[1])) <= 1e9):
            raise _fail(path, f"{where}.{key}", f"range must be [low, high] with low < high "
                                               f"within +-1e9, got {list(rng)}")
    if op.tolerance is not None and op.range is not None and \
            not op.tolerance < (op.range[1] - op.range[0]) / 10.0:
        raise _fail(path, f"{where}.tolerance", f"{op.tolerance:g} is not below a tenth of the "
                                                "range (a read-back check that cannot fail)")
    step = _printed_step(op.template)
    if op.readback is not None and op.tolerance is not None and step and op.tolerance < step / 2:
        raise _fail(path, f"{where}.tolerance", f"{op.tolerance:g} is below half the template's "
                    f"printed step {step:g}: the read-back of a rounded value could never pass")
    if wanted and "value" in wanted and op.range is None:
        raise _fail(path, f"{where}.range", "a setting with {value} needs a range")
    _check_units(path, where, op)
    if op.readback is not None:
        target = ops.get(op.readback)
        if target is None or not target.is_query:
            raise _fail(path, f"{where}.readback",
                        f"{op.readback!r} is not a query operation of this profile")
        if "value" in wanted and op.tolerance is None:
            raise _fail(path, f"{where}.tolerance", "a read-back of a value needs a tolerance")
    try:
        sample = {n: (1 if n == INDEX or op.integer else 0.5) for n in names}
        op.render(**sample)
    except (ValueError, KeyError, IndexError) as exc:
        raise _fail(path, where, f"template {op.template!r} cannot be filled: {exc}") from None


def _check_units(path: Path, where: str, op: Operation) -> None:
    """A wire unit converts from the operation's unit; scale and offset are finite, scale not 0."""
    from labrun.wireunits import WIRE_UNITS

    if op.wire_unit is not None and op.wire_unit != op.unit:
        allowed = WIRE_UNITS.get(op.unit or "", ())
        if op.wire_unit not in allowed:
            raise _fail(path, f"{where}.wire_unit", f"{op.wire_unit!r} does not convert from "
                                                    f"{op.unit!r}; for {op.unit!r}: "
                                                    f"{', '.join(allowed) or 'none'}")
    if op.scale == 0 or not abs(op.scale) < 1e30 or not abs(op.offset) < 1e30:
        raise _fail(path, f"{where}.scale", "scale must be non-zero and finite, offset finite")
    if op.converts and (op.integer or op.parse in ("int", "bool", "idn", "str")):
        raise _fail(path, f"{where}.wire_unit", "only real values and traces convert units")


def _check_one_command(path: Path, where: str, text: str | None, *,
                       template: bool = True) -> None:
    """A template or command holds one program message unit: no ';' and no line end; a
    command sent as is (not a template) holds no placeholder either."""
    if text is not None and _NOT_ONE_COMMAND.search(text):
        raise _fail(path, where, f"{text!r} holds a message separator or line end (';', CR, LF "
                                 "or another control character); one command per template")
    if text is not None and not template and ("{" in text or "}" in text):
        raise _fail(path, where, f"{text!r} holds a placeholder; this command is sent as is")


def _check_specs(path: Path, where: str, template: str) -> None:
    """Placeholders take plain format specs only (precision and type; no width, no fill)."""
    try:
        fields = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise _fail(path, where, f"malformed template {template!r}: {exc}") from None
    for _, name, spec, conversion in fields:
        if name is None:
            continue
        if conversion is not None or not _PLAIN_SPEC.fullmatch(spec or ""):
            raise _fail(path, where, f"placeholder {{{name}}} in {template!r} needs a plain "
                                     "format spec (.3f, .6e, g or d; no width, fill or '!')")


def _printed_step(template: str) -> float | None:
    """The step of ``{value:.Nf}`` as printed (10^-N), None for other specs."""
    for _, name, spec, _ in string.Formatter().parse(template):
        m = re.fullmatch(r"\.(\d+)f", spec or "")
        if name == "value" and m:
            return 10.0 ** -int(m.group(1))
    return None


def switches_source_on(command: str) -> bool:
    """True when ``command`` would switch light on: an OUTPut or STATe node set ON or 1."""
    header, _, argument = command.strip().upper().partition(" ")
    nodes = {re.sub(r"\d+$", "", node) for node in header.lstrip(":").split(":")}
    return bool(nodes & _SWITCH_NODES) and argument.strip() in ("ON", "1")


def _check_messages(path: Path, head: _ProfileHead, trace: TraceSpec | None,
                    ops: dict[str, Operation]) -> None:
    """One command per template everywhere; line ends only as terminations; init stays dark."""
    for key in ("write_termination", "read_termination"):
        if getattr(head, key) not in TERMINATIONS:
            raise _fail(path, f"profile.{key}", "must be a line end: \\n, \\r\\n or \\r")
    for key in ("error_query", "opc_query"):
        _check_one_command(path, f"profile.{key}", getattr(head, key), template=False)
    on = ops.get("output_on")
    for i, command in enumerate(head.init):
        _check_one_command(path, f"profile.init[{i}]", command, template=False)
        if switches_source_on(command) or (on is not None and on.command is not None and
                                           command.strip().upper() == on.command.strip().upper()):
            raise _fail(path, f"profile.init[{i}]", f"{command!r} would switch a source on; "
                                                    "init may not (output_on does, after checks)")
    for i, command in enumerate(head.safe_off_init):
        _check_safe_off_init(path, f"profile.safe_off_init[{i}]", command, ops)
    for key in ("format_command", "ascii_command", "byte_order_command"):
        _check_one_command(path, f"trace.{key}", getattr(trace, key, None), template=False)
    for name, op in ops.items():
        _check_one_command(path, f"operations.{name}", op.template)


def _header(command: str) -> str:
    """A command's header, upper case, without a leading colon or numeric suffixes."""
    head = command.strip().split(" ")[0].upper().lstrip(":")
    return ":".join(re.sub(r"\d+$", "", node) for node in head.split(":"))


def _check_safe_off_init(path: Path, where: str, command: str,
                         ops: dict[str, Operation]) -> None:
    """A safe-off connection's command before the switch-off only readies the connection: no
    query (its reply would be read as the next one's), no common command but ``*CLS`` (no
    ``*RST``, ``*RCL``: they set the instrument), no operation's setting, nothing lit."""
    _check_one_command(path, where, command, template=False)
    header = _header(command)
    why = None
    if header == "*CLS":
        return
    if "?" in command:
        why = "is a query"
    elif header.startswith("*"):
        why = "is a common command other than *CLS (it could change settings)"
    elif switches_source_on(command):
        why = "would switch a source on"
    else:
        for name, op in ops.items():
            if op.command is not None and _header(op.command) == header:
                why = f"is operation {name!r}'s command"
                break
    if why:
        raise _fail(path, where, f"{command!r} {why}; a safe-off connection sends only what "
                                 "readies it for the switch-off (a remote enable, *CLS)")


def _check_replies(path: Path, head: _ProfileHead, replies: ReplyForms) -> None:
    """Reply forms compile and have their groups; error checking is off only when declared."""
    for kind, groups in REPLY_GROUPS.items():
        text = getattr(replies, kind)
        if text is None:
            continue
        try:
            pattern = re.compile(text)
        except re.error as exc:
            raise _fail(path, f"replies.{kind}", f"not a regular expression: {exc}") from None
        for group in groups:
            if group not in pattern.groupindex:
                raise _fail(path, f"replies.{kind}", f"needs a named group (?P<{group}>...)")
    if head.band_nm is not None and not 100.0 <= head.band_nm[0] < head.band_nm[1] <= 20000.0:
        raise _fail(path, "profile.band_nm", "must be [low, high] nm with 100 <= low < high "
                                             "<= 20000")
    if head.error_queue and not head.error_query:
        raise _fail(path, "profile.error_query", "empty: that would turn error checking off; "
                                                 "declare error_queue = false if the "
                                                 "instrument has no error queue")
    if not head.error_queue and head.error_query:
        raise _fail(path, "profile.error_queue", "false, yet error_query is given; remove one")


def _check_axis(path: Path, trace: TraceSpec) -> None:
    """Start and stop queries come together, hold one command each, speak a length unit."""
    from labrun.wireunits import WIRE_UNITS

    rng = trace.level_range_dbm
    if rng is not None and not LEVEL_RANGE_DBM[0] <= rng[0] < rng[1] <= LEVEL_RANGE_DBM[1]:
        raise _fail(path, "trace.level_range_dbm", f"must be [low, high] dBm with "
                                                   f"{LEVEL_RANGE_DBM[0]:g} <= low < high <= "
                                                   f"{LEVEL_RANGE_DBM[1]:g}, got {list(rng)}")
    if trace.ascii_header is not None:
        try:
            re.compile(trace.ascii_header)
        except re.error as exc:
            raise _fail(path, "trace.ascii_header", f"not a regular expression: {exc}") from None
    if trace.axis_from_settings and trace.axis_from_start_stop:
        raise _fail(path, "trace.axis_from_settings", "give start/stop queries or "
                                                      "axis_from_settings, not both")
    if (trace.axis_start_query is None) != (trace.axis_stop_query is None):
        raise _fail(path, "trace.axis_stop_query", "give both axis_start_query and "
                                                   "axis_stop_query, or neither")
    for key in ("axis_start_query", "axis_stop_query"):
        _check_one_command(path, f"trace.{key}", getattr(trace, key), template=False)
    if trace.axis_wire_unit not in WIRE_UNITS["nm"]:
        raise _fail(path, "trace.axis_wire_unit", f"{trace.axis_wire_unit!r} is not one of "
                                                  f"{', '.join(WIRE_UNITS['nm'])}")


def _check_completion(path: Path, head: _ProfileHead, spec: CompletionSpec,
                      ops: dict[str, Operation]) -> None:
    """Every profile with an operation to wait for says how; the method has what it needs."""
    where = "completion"
    _check_one_command(path, f"{where}.query", spec.query, template=False)
    if spec.method == "opc" and not head.opc_query and \
            (head.kind == "osa" or any(op.wait for op in ops.values())):
        raise _fail(path, "profile.opc_query", "empty, and [completion] names no other method: "
                                               "labrun could read a trace before the sweep ends")
    if spec.method == "poll":
        if not spec.query or spec.done is None:
            raise _fail(path, where, "method poll needs 'query' and 'done'")
        try:
            re.compile(spec.done)
        except re.error as exc:
            raise _fail(path, f"{where}.done", f"not a regular expression: {exc}") from None
    if spec.method == "stb" and spec.mask is None:
        raise _fail(path, f"{where}.mask", "method stb needs 'mask', the status-byte bits set "
                                           "once the operation is done (IEEE 488.2 status byte)")
    if spec.arm and spec.method != "stb":
        raise _fail(path, f"{where}.arm", "only method stb sends 'arm' commands")
    for i, command in enumerate(spec.arm):
        _check_one_command(path, f"{where}.arm[{i}]", command, template=False)
        if switches_source_on(command):
            raise _fail(path, f"{where}.arm[{i}]", f"{command!r} would switch a source on")
    if spec.method == "fixed" and spec.fixed_s <= 0:
        raise _fail(path, f"{where}.fixed_s", "method fixed needs fixed_s > 0")
    if spec.method == "stb" and not any(_header(c) == "*CLS" for c in spec.arm):
        raise _fail(path, f"{where}.arm", "method stb needs '*CLS' in 'arm': without clearing "
                                          "the status first, the bits the previous operation "
                                          "set make every later wait end at once")


def parse_profile(data: dict[str, Any], path: Path) -> Profile:
    """Validate a profile already read from TOML; raise a one-line InputError on the first flaw."""
    try:
        model = _ProfileFile.model_validate(data)
    except ValidationError as exc:
        err = exc.errors()[0]
        raise _fail(path, _loc(err["loc"]) or "(top)", err["msg"]) from None
    head = model.profile
    if head.name != path.stem:
        raise _fail(path, "profile.name", f"{head.name!r} must equal the file name {path.stem!r}")
    ops = {name: op.model_copy(update={"name": name}) for name, op in model.operations.items()}
    _check_messages(path, head, model.trace, ops)
    _check_replies(path, head, model.replies)
    _check_completion(path, head, model.completion, ops)
    for name, op in ops.items():
        _check_operation(path, head.kind, name, op, ops)
    for name in REQUIRED_OPERATIONS[head.kind]:
        if name == "read_trace_x" and model.trace is not None and \
                model.trace.axis_needs_no_query:
            continue
        if name not in ops:
            raise _fail(path, f"operations.{name}", f"a {head.kind} profile must map {name!r}")
    if model.trace is not None:
        _check_axis(path, model.trace)
        if model.trace.axis_from_settings:
            for name in ("read_center_nm", "read_span_nm"):
                if name not in ops:
                    raise _fail(path, "trace.axis_from_settings",
                                f"the axis from the settings needs {name!r}")
    if head.kind == "osa" and model.trace is None:
        raise _fail(path, "trace", "an osa profile needs a [trace] table")
    if head.kind != "osa" and model.trace is not None:
        raise _fail(path, "trace", "only osa profiles have a [trace] table")
    return Profile(name=head.name, kind=head.kind, path=path, description=head.description,
                   write_termination=head.write_termination,
                   read_termination=head.read_termination, timeout_ms=head.timeout_ms,
                   error_query=head.error_query or None, opc_query=head.opc_query,
                   init=tuple(head.init), capabilities=model.capabilities, trace=model.trace,
                   operations=ops, replies=model.replies, completion=model.completion,
                   band_nm=None if head.band_nm is None else (float(head.band_nm[0]),
                                                               float(head.band_nm[1])),
                   safe_off_init=tuple(head.safe_off_init))


def resolve_profile_path(name_or_path: str | Path, *, base: Path | None = None) -> Path | None:
    """A profile by path, or by name in drivers/ (``generic-laser`` -> generic-laser.toml)."""
    return find_file(name_or_path, "drivers", base=base, suffixes=(".toml",))


def load_profile(name_or_path: str | Path, *, base: Path | None = None) -> Profile:
    """Load and validate a profile by name or path."""
    path = resolve_profile_path(name_or_path, base=base)
    if path is None:
        raise InputError(f"no profile {str(name_or_path)!r} (not a file, not in drivers/)",
                         file=str(name_or_path))
    _, data = load_toml(path)
    return parse_profile(data, path)
