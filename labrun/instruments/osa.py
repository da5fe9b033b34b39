"""Optical spectrum analyser adapter: settings, sweep (waits via *OPC?), trace read-out."""

from __future__ import annotations

import numpy as np

from labrun.instruments.base import Adapter


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
        if (not with_x and self._compound_ok() and self._trace_format == "real32"
                and self.session.opc_query and op.settle_s * self.settle_scale <= 0):
            assert self.profile.trace is not None
            (opc,), y = self.session.setting_then_block(
                op.render(), [self.session.opc_query], y_op.render(),
                self.profile.trace.byte_order)
            if opc.strip().lstrip("+") not in ("1", "1.0"):
                self.session.close()  # a garbled response: do not trust what follows it
                raise self._instrument_error(f"{self.session.opc_query} answered {opc!r}, "
                                             "expected 1")
            return None, y_op.from_wire(y)
        self.sweep()
        if with_x:
            return self.read_trace()
        return None, self.read("read_trace_y")

    def read_trace(self) -> tuple[np.ndarray, np.ndarray]:
        """The last trace: wavelengths (nm) and powers (dBm per RBW), same length."""
        trace = self.profile.trace
        if trace is not None and trace.axis_from_start_stop:
            y = self.read("read_trace_y")
            return self.axis_from_start_stop(y.size), y
        x = self.read("read_trace_x")
        y = self.read("read_trace_y")
        if x.size != y.size or x.size == 0:
            raise self._instrument_error(f"short trace: x has {x.size} points and y {y.size}")
        return x, y

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
                raise self._instrument_error(f"reply {reply!r} to {query!r} is not a number"
                                             ) from None
        if trace.axis_wire_unit in ("Hz", "GHz", "THz"):
            ends.sort()
        return np.linspace(ends[0], ends[1], n)
