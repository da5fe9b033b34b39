"""Optical spectrum analyser adapter: settings, sweep (waits via *OPC?), trace read-out."""

from __future__ import annotations

import numpy as np

from labrun.instruments.base import Adapter
from labrun.profiles import LEVEL_RANGE_DBM
from labrun.wireunits import FLOOR_DBM, POWER


class OsaAdapter(Adapter):
    """The OSA at the spool output (x in nm, y in dBm per RBW)."""

    kind = "osa"

    def configure(self, center_nm: float, span_nm: float, rbw_nm: float, points: int) -> None:
        """Set centre, span, RBW and points; all four are checked before the first is sent."""
        wanted = (("set_center_nm", center_nm), ("set_span_nm", span_nm),
                  ("set_rbw_nm", rbw_nm), ("set_points", points))
        for name, value in wanted:
            self.check_value(self.profile.op(name), value)
        for name, value in wanted:
            self.apply(name, value)

    def settings(self) -> dict[str, float]:
        """The current centre, span, RBW and points as the instrument reports them."""
        return {"center_nm": self.read("read_center_nm"), "span_nm": self.read("read_span_nm"),
                "rbw_nm": self.read("read_rbw_nm"), "points": self.read("read_points")}

    def sweep(self) -> None:
        """Start one sweep and wait for it to finish (*OPC?, IEEE 488.2)."""
        op = self.profile.op("sweep")
        self.apply("sweep")
        if not op.wait:
            self.session.opc_wait()

    def sweep_and_read(self, *, with_x: bool = True) -> tuple[np.ndarray | None, np.ndarray]:
        """Sweep, wait for it, and read the trace (y only unless ``with_x``; x is then None).

        Once the REAL,32 transfer is set up, on an instrument that takes compound messages and
        with no settle time after the sweep, y comes in the same message as the sweep, ``*OPC?``
        and the error query: one round trip per point instead of two.
        """
        op = self.profile.op("sweep")
        y_op = self.profile.op("read_trace_y")
        if (not with_x and self.compound_ok() and self._trace_format == "real32"
                and self.session.opc_query and op.settle_s * self.settle_scale <= 0):
            assert self.profile.trace is not None
            (opc,), y = self.session.setting_then_block(
                op.render(), [self.session.opc_query], y_op.render(),
                self.profile.trace.byte_order)
            if opc.strip().lstrip("+") not in ("1", "1.0"):
                self.session.close()  # a garbled response: do not trust what follows it
                raise self.instrument_error(f"{self.session.opc_query} answered {opc!r}, "
                                             "expected 1")
            y = y_op.from_wire(y)
            self.accept(None, y)
            return None, y
        self.sweep()
        if with_x:
            return self.read_trace()
        y = self.read("read_trace_y")
        self.accept(None, y)
        return None, y

    def read_trace(self) -> tuple[np.ndarray, np.ndarray]:
        """The last trace: wavelengths (nm) and powers (dBm per RBW), same length."""
        trace = self.profile.trace
        if trace is not None and trace.axis_from_start_stop:
            y = self.read("read_trace_y")
            x = self.axis_from_start_stop(y.size)
        elif trace is not None and trace.axis_from_settings:
            y = self.read("read_trace_y")
            x = self.axis_from_settings(y.size)
        else:
            x = self.read("read_trace_x")
            y = self.read("read_trace_y")
        self.accept(x, y)
        return x, y

    def accept(self, x: np.ndarray | None, y: np.ndarray) -> None:
        """Refuse (InstrumentError: a fault, read again) a trace this profile cannot have
        sent: x and y of one length, the axis finite, never decreasing and rising from first
        to last (an integer axis in pm repeats values when samples are closer than 1 pm), the
        levels finite and inside the profile's ``level_range_dbm`` (a linear trace's samples
        at or below 0 W read as FLOOR_DBM, exempt from its lower bound)."""
        if x is not None and (x.size != y.size or x.size == 0):
            raise self.instrument_error(f"short trace: x has {x.size} points and y {y.size}")
        if x is not None and not (np.all(np.isfinite(x)) and np.all(np.diff(x) >= 0)
                                  and (x.size == 1 or x[0] < x[-1])):
            raise self.instrument_error("corrupted trace: the axis is not finite, never "
                                         "decreasing and rising from first to last")
        if y.size == 0 or not np.all(np.isfinite(y)):
            raise self.instrument_error("corrupted trace: the levels are empty or not finite")
        lo, hi = self.profile.trace.levels_dbm if self.profile.trace else LEVEL_RANGE_DBM
        levels = y[y != FLOOR_DBM] if self._linear_levels() else y
        if levels.size and (float(levels.min()) < lo or float(levels.max()) > hi):
            raise self.instrument_error(
                f"corrupted trace: levels {float(levels.min()):.6g}..{float(levels.max()):.6g} "
                f"dBm outside the profile's level_range_dbm [{lo:g}, {hi:g}]")

    def _linear_levels(self) -> bool:
        """True when the instrument sends its levels in a linear power unit (W, mW)."""
        op = self.profile.operations.get("read_trace_y")
        return op is not None and op.wire_unit in POWER

    def axis_from_settings(self, n: int) -> np.ndarray:
        """The wavelength axis (nm) from the instrument's centre and span read back: n samples
        evenly spaced from centre - span/2 to centre + span/2, for an OSA with no axis query."""
        center = float(self.read("read_center_nm"))
        span = float(self.read("read_span_nm"))
        return np.linspace(center - span / 2.0, center + span / 2.0, n)

    def axis_from_start_stop(self, n: int) -> np.ndarray:
        """The wavelength axis (nm) from the profile's start and stop queries: n samples
        evenly spaced, as a grating OSA samples its sweep."""
        from labrun.wireunits import from_wire

        trace = self.profile.trace
        assert trace is not None and trace.axis_start_query and trace.axis_stop_query
        ends = []
        for query in (trace.axis_start_query, trace.axis_stop_query):
            reply = self.session.query(query)
            try:
                ends.append(float(from_wire(float(reply), "nm", trace.axis_wire_unit)))
            except ValueError:
                raise self.instrument_error(f"reply {reply!r} to {query!r} is not a number"
                                             ) from None
        if trace.axis_wire_unit in ("Hz", "GHz", "THz"):
            ends.sort()
        return np.linspace(ends[0], ends[1], n)
