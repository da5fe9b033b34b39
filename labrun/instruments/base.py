"""The common part of every role adapter: checked settings, parsed queries, read-back, settling.

A setting goes out only after its value passed the profile range (and, for sources, the bench
cap); after it, the session drains the error queue, the adapter waits the settle time (scaled by
the bench's settle_scale) and verifies by read-back where the profile names one.
"""

from __future__ import annotations

import logging
import math
import re
import time
from collections.abc import Callable
from dataclasses import dataclass
from decimal import Decimal
from typing import Any

import numpy as np

from labrun.bench import InstrumentSpec
from labrun.errors import InputError, InstrumentError, SafetyError
from labrun.profiles import SOURCE_SWITCHES, Operation, Profile, ReplyForms
from labrun.scpi import Idn, ScpiError, ScpiSession, compound, parse_idn

log = logging.getLogger("labrun.instruments")

CAP_STEPS = 4  # rounding steps down at the template's precision before giving up
FLOAT_SLACK = 1e-9  # absorbs binary round-off when comparing against ranges and tolerances
TRUE_WORDS = {"1", "+1", "ON", "TRUE"}
FALSE_WORDS = {"0", "+0", "-0", "OFF", "FALSE"}


def _declared_part(form: re.Pattern[str] | None, group: str, text: str, op: Operation) -> str:
    """The part of a reply the profile's declared form names (the whole reply without one)."""
    if form is None:
        return text
    found = form.fullmatch(text)
    if found is None or found[group] is None:
        raise ValueError(f"reply {text!r} to {op.query!r} does not match the declared form "
                         f"{form.pattern!r}")
    return str(found[group]).strip()


def parse_reply(op: Operation, reply: str, forms: ReplyForms | None = None) -> Any:
    """Convert a query reply according to the operation's ``parse`` (not for traces), through
    the profile's declared reply forms (``forms``) where it has them."""
    text = reply.strip()
    forms = forms or ReplyForms()
    if op.parse in ("float", "int"):
        text = _declared_part(forms.pattern("number"), "value", text, op)
    elif op.parse == "bool":
        text = _declared_part(forms.pattern("state"), "state", text, op)
    try:
        if op.parse == "float":
            return op.from_wire(float(text))
        if op.parse == "int":
            number = float(text)
            if not number.is_integer():
                raise ValueError
            return int(number)
        if op.parse == "bool":
            word = text.upper()
            if word in TRUE_WORDS:
                return True
            if word in FALSE_WORDS:
                return False
            raise ValueError
        if op.parse == "floats":
            return tuple(float(p) for p in text.split(","))
        if op.parse == "idn":
            return parse_idn(text)
        return text
    except ValueError:
        raise ValueError(f"reply {text!r} to {op.query!r} is not {op.parse}") from None


@dataclass(frozen=True)
class PlannedSetting:
    """One setting checked and rendered, not yet sent: what to write and how to verify it."""

    adapter: Adapter
    op: Operation
    text: str
    back: Operation | None = None
    back_text: str | None = None
    target: Any = None
    cap: float | None = None
    index: int | None = None


class Adapter:
    """Base of all role adapters: one instrument, one profile, one SCPI session."""

    kind = ""

    def __init__(self, spec: InstrumentSpec, session: ScpiSession, *, settle_scale: float = 1.0):
        self.spec = spec
        self.role = spec.role
        self.profile: Profile = spec.profile
        self.session = session
        self.settle_scale = settle_scale
        self.sleep: Callable[[float], None] = time.sleep  # labrun check: its simulated clock
        self._idn: Idn | None = None
        self._trace_format: str | None = None

    # -- life cycle -------------------------------------------------------------------------

    def initialise(self) -> None:
        """Send the profile's init commands (e.g. ``*CLS``) once after connecting."""
        for cmd in self.profile.init:
            self.session.write(cmd)

    def close(self) -> None:
        self.session.close()

    def idn(self) -> Idn:
        """The instrument's identity (``*IDN?``), read once and kept."""
        if self._idn is None:
            if self.profile.has("identify"):
                self._idn = self.read("identify")
            else:
                self._idn = self.session.idn()
        return self._idn

    def confirmed_idn(self, reads: int = 4) -> Idn:
        """The identity read afresh until two replies in a row agree (a garbled ``*IDN?`` reply
        is not an identity); kept for :meth:`idn`. InstrumentError after ``reads`` reads."""
        previous: Idn | None = None
        for _ in range(max(2, reads)):
            self._idn = None
            got = self.idn()
            if got == previous:
                return got
            previous = got
        self._idn = None
        raise self.instrument_error(f"*IDN? gave a different reply each time ({previous})")

    # -- errors -----------------------------------------------------------------------------

    def instrument_error(self, message: str) -> InstrumentError:
        """An InstrumentError naming this role and resource (batch and bench readers raise it
        for an instrument's reply too)."""
        return InstrumentError(message, role=self.role, resource=self.spec.resource)

    def _range_error(self, op: Operation, key: str, value: float,
                     rng: tuple[float, float]) -> InputError:
        unit = f" {op.unit}" if op.unit and key == "range" else ""
        return InputError(f"{self.role}: {value:g}{unit} is outside [{rng[0]:g}, {rng[1]:g}] "
                          f"for {op.name}; nothing was sent", file=str(self.profile.path),
                          field=f"operations.{op.name}.{key}")

    # -- checks done before anything is written ----------------------------------------------

    def check_value(self, op: Operation, value: float, *, cap: float | None = None,
                    cap_name: str = "max_power_dbm") -> float | int:
        """Refuse a non-finite, over-cap or out-of-range value; return it in the template's type."""
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{self.role}: {value!r} is not a number for {op.name}",
                             file=str(self.profile.path), field=f"operations.{op.name}") from None
        if not math.isfinite(number):
            raise InputError(f"{self.role}: {number} is not a finite value for {op.name}",
                             file=str(self.profile.path), field=f"operations.{op.name}")
        if cap is not None and number > cap + FLOAT_SLACK:
            raise SafetyError(f"{self.role}: {number:.9g} {op.unit or ''} exceeds the bench cap "
                              f"{cap_name} = {cap:g} by {number - cap:.2g}; nothing was sent")
        if op.range is not None and not (op.range[0] - FLOAT_SLACK <= number
                                         <= op.range[1] + FLOAT_SLACK):
            raise self._range_error(op, "range", number, op.range)
        if op.integer:
            if not number.is_integer():
                raise InputError(f"{self.role}: {op.name} needs a whole number, got {number:g}",
                                 file=str(self.profile.path), field=f"operations.{op.name}")
            return int(number)
        return number

    def check_index(self, op: Operation, index: int | None) -> int | None:
        """Refuse a channel-like index outside the operation's index_range."""
        if op.index_range is None:
            return None
        if index is None or not (op.index_range[0] <= index <= op.index_range[1]):
            raise self._range_error(op, "index_range", float(index or 0), op.index_range)
        return int(index)

    # -- wire operations --------------------------------------------------------------------

    def read(self, name: str, *, index: int | None = None) -> Any:
        """Run a query operation and parse its reply (traces come back as numpy arrays)."""
        op = self.profile.op(name)
        if not op.is_query:
            raise InputError(f"{name} is a setting, not a query", file=str(self.profile.path),
                             field=f"operations.{name}")
        fields: dict[str, Any] = {}
        checked = self.check_index(op, index)
        if checked is not None:
            fields["index"] = checked
        text = op.render(**fields)
        if op.parse == "trace":
            return op.from_wire(self._read_trace_values(text))
        reply = self.session.query(text)
        try:
            return parse_reply(op, reply, self.profile.replies)
        except ValueError as exc:
            raise self.instrument_error(str(exc)) from None

    def query_text(self, name: str) -> tuple[Operation, str]:
        """The operation and SCPI text of a value query without an index (for batched reads)."""
        op = self.profile.op(name)
        if not op.is_query or op.parse == "trace" or op.index_range is not None:
            raise InputError(f"{name} is not a plain value query", file=str(self.profile.path),
                             field=f"operations.{name}")
        return op, op.render()

    def parse(self, op: Operation, reply: str) -> Any:
        """Parse a reply to ``op`` (an InstrumentError naming this role when it does not fit)."""
        try:
            return parse_reply(op, reply, self.profile.replies)
        except ValueError as exc:
            raise self.instrument_error(str(exc)) from None

    def _read_trace_values(self, query: str) -> np.ndarray:
        """Read one trace array in the profile's transfer format (block, or ASCII fallback)."""
        if self._trace_format is None:
            self._trace_format = self._select_trace_format()
        trace = self.profile.trace
        if self._trace_format != "ascii":
            assert trace is not None and trace.block_datatype is not None
            return self.session.query_block(query, trace.block_datatype, trace.byte_order)
        if trace is None:
            return self.session.query_ascii_floats(query)
        return self.session.query_ascii_floats(query, trace.ascii_separator,
                                               trace.ascii_leading_count, trace.ascii_header)

    def _select_trace_format(self) -> str:
        """Send the profile's transfer-format commands once; fall back to ASCII if a binary
        format is refused by the instrument's error queue and the profile names an ASCII command."""
        trace = self.profile.trace
        if trace is None:
            raise InputError("profile has no [trace] table", file=str(self.profile.path),
                             field="trace")
        if trace.format != "ascii":
            try:
                for cmd in (trace.format_command, trace.byte_order_command):
                    if cmd:
                        self.session.write(cmd)
                return trace.format
            except ScpiError as exc:
                if not trace.ascii_command:
                    raise
                log.warning("%s: block transfer refused (%s); falling back to ASCII traces",
                            self.role, exc)
        if trace.ascii_command:
            self.session.write(trace.ascii_command)
        return "ascii"

    def prepare(self, name: str, value: float | None = None, *, index: int | None = None,
                values: dict[str, float] | None = None, cap: float | None = None,
                expect: Any = None) -> PlannedSetting:
        """Check one setting and render it, sending nothing (range, cap, index, placeholders).

        ``value`` fills ``{value}``; ``values`` fills named placeholders (``{s1}``...); ``expect``
        is the read-back expected from a value-less command (True after ``output_on``).
        """
        op = self.profile.op(name)
        if op.is_query:
            raise InputError(f"{name} is a query, not a setting", file=str(self.profile.path),
                             field=f"operations.{name}")
        fields: dict[str, Any] = {}
        if value is not None:
            fields["value"] = self.check_value(op, value, cap=cap)
        for key, val in (values or {}).items():
            fields[key] = self.check_value(op, val, cap=cap)
        checked = self.check_index(op, index)
        if checked is not None:
            fields["index"] = checked
        missing = [p for p in op.placeholders if p not in fields]
        if missing:
            raise InputError(f"{self.role}: {name} needs {', '.join(missing)}",
                             file=str(self.profile.path), field=f"operations.{name}")
        target: Any = expect
        if "value" in fields:
            target = fields["value"]
        elif values:
            target = tuple(fields[k] for k in op.placeholders if k != "index")
        if "value" in fields and op.converts:
            fields["value"] = op.to_wire(fields["value"])  # checked in labrun's unit
        if "value" in fields and cap is not None and not op.integer:
            fields["value"] = self.under_cap(op, fields["value"], cap)
        back = self.profile.op(op.readback) if op.readback and target is not None else None
        back_text = None
        if back is not None:
            back_text = back.render(**({"index": checked} if checked is not None else {}))
        return PlannedSetting(self, op, op.render(**fields), back, back_text, target, cap,
                              checked)

    def under_cap(self, op: Operation, wire: float, cap: float) -> float:
        """The value to send for a capped setting such that, as the template prints it, it is
        at or under ``cap`` in labrun's unit: printing may round up (10.2 dBm as
        ``{value:.6e}`` W is 1.047129e-02 W, 10.2000019 dBm), so it steps down by the last
        printed digit. SafetyError (nothing sent) when that does not bring it under."""
        spec = op.value_spec
        for _ in range(CAP_STEPS):
            text = format(wire, spec)
            sent = float(text)
            if float(op.from_wire(sent)) <= cap:
                return sent
            exponent = Decimal(text).as_tuple().exponent
            wire = sent - 10.0 ** (exponent if isinstance(exponent, int) else 0)
        raise SafetyError(f"{self.role}: {op.name} cannot be printed at or under the bench cap "
                          f"{cap:g} {op.unit or ''} with {op.template!r}; nothing was sent")

    def planned(self, method: str, value: Any) -> list[PlannedSetting]:
        """The checked profile settings an engine setting (adapter method, value) stands for, not
        sent: the engine checks every setting of a point before it writes any."""
        return [self.prepare(method, value)]

    def apply(self, name: str, value: float | None = None, *, index: int | None = None,
              values: dict[str, float] | None = None, cap: float | None = None,
              expect: Any = None, settle: bool = True) -> None:
        """Check, send, settle and verify one setting (``settle`` False: the caller waits the
        operation's settle time itself, overlapped with others)."""
        p = self.prepare(name, value, index=index, values=values, cap=cap, expect=expect)
        op = p.op
        settle_s = op.settle_s * self.settle_scale if settle else 0.0
        if name in SOURCE_SWITCHES and self.compound_ok() and not op.wait:
            self.switch_alone(p, settle)
            return
        if self.compound_ok() and settle_s <= 0 and not (op.wait and self.session.completion):
            self._apply_compound(op, p.text, p.back, p.index, p.target, cap)
            return
        self.session.write(p.text)
        if settle:
            self.settle(op.settle_s)
        if op.wait:
            self.session.opc_wait()
        if p.back is not None:
            self.verify(op, self.read(p.back.name, index=p.index), p.target, cap=cap)

    def switch_alone(self, p: PlannedSetting, settle: bool) -> None:
        """Switch light with the command as a message of its own (never compound), then its
        error query and read-back together in one query message."""
        session = self.session
        with session.held():
            session.write(p.text, check_errors=False)
            if settle:
                self.settle(p.op.settle_s)
            queries = [p.back_text] if p.back_text is not None else []
            message = compound(queries[0], [str(session.error_query)]) if queries else \
                str(session.error_query)
            reply = session.query(message)
            units = session.check_reply(p.text, message, reply, len(queries))
        if p.back is not None:
            self.verify(p.op, self.parse(p.back, units[0]), p.target, cap=p.cap)

    def compound_ok(self) -> bool:
        """True when settings may travel as one compound message with their follow-up queries."""
        return bool(self.session.compound and self.session.error_query)

    def _apply_compound(self, op: Operation, text: str, back: Operation | None,
                        index: int | None, target: Any, cap: float | None = None) -> None:
        """Setting, ``*OPC?`` (if the operation waits), read-back and error query in ONE message:
        the same checks as the separate exchanges, in one round trip (no settle time to wait)."""
        queries: list[str] = []
        if op.wait and self.session.opc_query:
            queries.append(self.session.opc_query)
        if back is not None:
            queries.append(back.render(**({"index": index} if index is not None else {})))
        replies = self.session.setting(text, queries)
        if op.wait and self.session.opc_query:
            opc = replies.pop(0)
            if opc.strip().lstrip("+") not in ("1", "1.0"):
                raise self.instrument_error(f"{self.session.opc_query} answered {opc!r}, "
                                             "expected 1")
        if back is not None:
            try:
                got = parse_reply(back, replies[0], self.profile.replies)
            except ValueError as exc:
                raise self.instrument_error(str(exc)) from None
            self.verify(op, got, target, cap=cap)

    def verify(self, op: Operation, got: Any, want: Any, *, cap: float | None = None) -> None:
        """Compare a read-back with the value set, within the operation's tolerance.

        A read-back above the bench cap is a safety condition (SafetyError: the run switches
        everything off and aborts), not a fault to retry.
        """
        tol = (op.tolerance or 0.0) + FLOAT_SLACK
        if (cap is not None and isinstance(got, int | float) and not isinstance(got, bool)
                and float(got) > cap + tol):
            raise SafetyError(f"{self.role}: read-back of {op.name} is {float(got):.9g}, "
                              f"{float(got) - cap:.2g} above the bench cap {cap:g}")
        if isinstance(want, bool) or isinstance(got, bool):
            ok = bool(got) == bool(want)
        elif isinstance(want, tuple):
            ok = len(got) == len(want) and all(abs(g - w) <= tol for g, w in zip(got, want,
                                                                                  strict=True))
        else:
            ok = abs(float(got) - float(want)) <= tol
        if not ok:
            raise self.instrument_error(f"read-back of {op.name} gave {got!r}, expected {want!r}"
                                         f" (tolerance {op.tolerance or 0:g})")

    def settle(self, seconds: float) -> None:
        """Wait a settling time, scaled by the bench's settle_scale (0 in the virtual lab)."""
        delay = seconds * self.settle_scale
        if delay > 0:
            self.sleep(delay)

    def optional_read(self, name: str) -> Any:
        """Read an operation the profile may not map; None when it does not."""
        return self.read(name) if self.profile.has(name) else None


class WavelengthAdapter(Adapter):
    """An adapter with a wavelength setting: a laser's tuning, an attenuator's or meter's
    calibration wavelength (the same profile operations for all three kinds)."""

    def set_wavelength_nm(self, nm: float) -> None:
        """Set the wavelength (vacuum, nm)."""
        self.apply("set_wavelength_nm", nm)

    def wavelength_nm(self) -> float:
        return self.read("read_wavelength_nm")
