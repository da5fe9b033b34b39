"""The simulated SCPI instruments of the virtual lab: one class per kind (laser, amplifier,
attenuator, polarisation controller, OSA, power meter, switch), each with its command table.

Each ``SimInstrument`` owns an IEEE 488.2 status model (error queue, event status register) and a
command table; all of them change one shared ``LabState`` under its lock. Every value range
an instrument accepts comes from the generic profile of its kind (drivers/generic-<kind>.toml,
the profile the lab's bench file names), so the lab and the profiles cannot disagree. The TCP
server that puts one on a port is ``labrun.vlab.scpi_server``.
"""

from __future__ import annotations

import logging
import math
import threading
import time

import numpy as np

from labrun.blockframe import build_block
from labrun.profiles import generic_profile
from labrun.vlab.faults import FaultInjector
from labrun.vlab.scpi import (
    Call,
    CommandTable,
    Entry,
    ErrorQueue,
    ParsedCommand,
    ScpiFault,
    boolean,
    esr_bit,
    fmt,
    number,
    parse_command,
    split_message,
)
from labrun.vlab.state import Amplifier, LabState, PowerMeter, Switch

log = logging.getLogger(__name__)
# The wavelength-calibration node of labrun's attenuator and power meter (one form for both).
WAVELENGTH_CAL = "CALibration#:WLENgth"
# Trace names of the OSA's TRAC:DATA? query: wavelength axis and level axis.
TRACE_NAMES = {"WLEN": "x", "LEVEL": "y"}
# FORM:DATA block formats the OSA takes (SCPI-1999 FORMat[:DATA] <type>,<length>) and the
# struct code of their values. INT blocks carry levels in 0.01 dBm and wavelengths in pm
# (labrun's own choice for its generic OSA; a profile declares it with scale and wire_unit).
BLOCK_FORMATS = {("REAL", "32"): "f", ("REAL", "64"): "d", ("INT", "16"): "h",
                 ("INT", "32"): "i"}
INT_SCALE = {"x": 1e3, "y": 100.0}  # pm per nm, 0.01 dBm per dBm


def source_switch(call: Call, lab: LabState) -> bool:
    """OUTP:STAT value for a light source; switching on with the interlock open is error -221."""
    on = boolean(call)
    if on and not lab.interlock_closed:
        raise ScpiFault(-221, "interlock open")
    return on


class SimInstrument:
    """Common part of every simulated instrument: IEEE 488.2 commands and the error queue."""

    kind = "generic"

    def __init__(self, role: str, lab: LabState, idn: str, faults: FaultInjector,
                 stopping: threading.Event):
        self.role = role
        self.lab = lab
        self.idn = idn
        self.faults = faults
        self.stopping = stopping
        self.errors = ErrorQueue()
        self.esr = 0
        self.ese = 0
        self._opc_armed = False
        # A header that must open every connection before it may change a setting (None: any
        # connection may): an instrument that starts each session in local mode.
        self.remote_enable: str | None = None
        # How the error queue answers (SCPI-1999's code,"message" unless a test changes it;
        # {short}: the message without its ";detail").
        self.error_reply = '{code},"{message}"'
        # False: queries answer at once from memory, even during a sweep (an instrument that
        # does not hold its replies until pending operations finish).
        self.queries_wait = True
        # False: in local mode (before remote_enable) queries are refused too, all but the
        # common ones and the error queue (the si dialect; labrun.vlab.sidialect).
        self.local_queries = True
        self.dialect = "generic"
        self.table = CommandTable()
        self.rebuild_table()
        self.register()

    def rebuild_table(self, *, opc: bool = True) -> None:
        """A fresh command table with the common commands only (``opc`` False: without
        ``*OPC``, ``*OPC?``, ``*WAI`` and ``STAT:BUSY?``); a dialect then adds its own."""
        self.table = CommandTable()
        self._register_common(opc=opc)

    # ---- tables ------------------------------------------------------------------------------
    def _register_common(self, *, opc: bool = True) -> None:
        """IEEE 488.2 common commands and the SCPI SYSTem subsystem."""
        t = self.table
        t.add("*IDN", lambda c: self.idn, query=True)
        t.add("*RST", self._rst, nargs=(0, 0))
        t.add("*CLS", self._cls, nargs=(0, 0))
        if opc:
            t.add("*OPC", self._opc_set, nargs=(0, 0))
            t.add("*OPC", lambda c: "1", query=True, waits=True)
            t.add("*WAI", lambda c: None, nargs=(0, 0), waits=True)
        t.add("*ESR", self._esr_query, query=True)
        t.add("*ESE", lambda c: self._set_ese(c), nargs=(1, 1))
        t.add("*ESE", lambda c: str(self.ese), query=True)
        t.add("*STB", self._stb, query=True)
        t.add("*TST", lambda c: "0", query=True)
        t.add("SYSTem:ERRor[:NEXT]", self._next_error, query=True)
        t.add("SYSTem:ERRor:COUNt", lambda c: str(len(self.errors)), query=True)
        t.add("SYSTem:VERSion", lambda c: "1999.0", query=True)
        t.add("SESSion:OWN", lambda c: None, nargs=(0, 0))  # the si remote enable: labrun's own
        if opc:
            t.add("STATus:BUSY", lambda c: "1" if self.busy() else "0", query=True)

    def register(self) -> None:
        """Kind-specific commands (overridden)."""

    @classmethod
    def limits(cls, operation: str) -> tuple[float, float]:
        """The range the generic profile of this kind gives ``operation`` (a setting)."""
        rng = generic_profile(cls.kind).op(operation).range
        if rng is None:
            raise ValueError(f"generic {cls.kind} profile gives {operation} no range")
        return rng

    def reset(self) -> None:
        """Kind-specific *RST state (overridden)."""

    # ---- common handlers ---------------------------------------------------------------------
    def _rst(self, call: Call) -> None:
        self._opc_armed = False
        self.reset()

    def _cls(self, call: Call) -> None:
        self.errors.clear()
        self.esr = 0
        self._opc_armed = False

    def _opc_set(self, call: Call) -> None:
        self._opc_armed = True

    def _set_ese(self, call: Call) -> None:
        self.ese = int(number(call, 0, 255))

    def _esr_query(self, call: Call) -> str:
        self._update_opc()
        value, self.esr = self.esr, 0
        return str(value)

    def _stb(self, call: Call) -> str:
        self._update_opc()
        stb = (4 if len(self.errors) else 0) | (32 if self.esr & self.ese else 0)
        return str(stb | (64 if stb else 0))

    def _next_error(self, call: Call) -> str:
        code, msg = self.errors.pop()
        return self.error_reply.format(code=code, message=msg, short=msg.split(";")[0])

    def _update_opc(self) -> None:
        if self._opc_armed and not self.busy():
            self.esr |= 1
            self._opc_armed = False

    def push_error(self, code: int, detail: str = "") -> None:
        """Queue an error and set its event status bit."""
        self.errors.push(code, detail)
        self.esr |= esr_bit(code)

    # ---- pending operations ------------------------------------------------------------------
    def busy(self) -> bool:
        """True while an overlapped operation (an OSA sweep) is still running."""
        return False

    def wait_idle(self) -> None:
        """Block until pending operations finish (interruptible by stop)."""

    # ---- execution ---------------------------------------------------------------------------
    def execute(self, message: str, *, local: bool = False) -> bytes | None:
        """Run one program message; returns the response message (with newline) or None.
        ``local``: the connection has not sent ``remote_enable`` yet, so every setting but
        that one and the IEEE 488.2 common commands is refused (error -221)."""
        replies: list[bytes] = []
        prefix: list[tuple[str, int | None]] = []
        for text in split_message(message):
            try:
                cmd = parse_command(text)
            except ScpiFault as fault:
                with self.lab.lock:
                    self.push_error(fault.code, fault.detail)
                prefix = []
                continue
            found = None
            if cmd.common:
                found = self.table.find_common(cmd.common, cmd.query)
                prefix = []
            else:
                scope = cmd.nodes
                if not cmd.absolute and prefix:
                    found = self.table.find(prefix + cmd.nodes, cmd.query)
                    if found is not None:
                        scope = prefix + cmd.nodes
                if found is None:
                    found = self.table.find(cmd.nodes, cmd.query)
                prefix = scope[:-1] if found is not None else []
            if local and not self._allowed_in_local(cmd, found):
                with self.lab.lock:
                    self.push_error(-221, "remote not enabled")
                continue
            reply = self._run(cmd, found)
            if reply is not None:
                replies.append(reply if isinstance(reply, bytes) else reply.encode("latin-1"))
        with self.lab.lock:
            self.lab.tick()
        if not replies:
            return None
        return b";".join(replies) + b"\n"

    def _allowed_in_local(self, cmd: ParsedCommand,
                          found: tuple[Entry, list[int | None]] | None) -> bool:
        """What a connection may send before ``remote_enable``: that command, the common
        ones, the error queue, and (unless ``local_queries`` is False) any query."""
        if cmd.common or cmd.text.split()[0].upper() == self.remote_enable:
            return True
        if cmd.query and self.local_queries:
            return True
        return found is not None and found[0].handler == self._next_error

    def _run(self, cmd: ParsedCommand, found: tuple[Entry, list[int | None]] | None
             ) -> str | bytes | None:
        """Check parameters and call the handler under the state lock; errors go to the queue."""
        header = cmd.text.split()[0] if cmd.text.split() else cmd.text
        if found is None:
            with self.lab.lock:
                self.push_error(-113, header)
            return None
        entry, suffixes = found
        lo, hi = entry.nargs
        try:
            if len(cmd.args) < lo:
                raise ScpiFault(-109, header)
            if len(cmd.args) > hi:
                raise ScpiFault(-108, header)
            if entry.waits and (self.queries_wait or not cmd.query):
                self.wait_idle()
            with self.lab.lock:
                return entry.handler(Call(header, cmd.args, suffixes))
        except ScpiFault as fault:
            with self.lab.lock:
                self.push_error(fault.code, fault.detail)
            return None
        except Exception as exc:  # a simulator bug must not kill the connection: report it
            log.exception("%s: %s failed", self.role, header)
            with self.lab.lock:
                self.push_error(-300, f"{header}: {type(exc).__name__}")
            return None


def _onoff(value: bool) -> str:
    return "1" if value else "0"


class LaserInstrument(SimInstrument):
    """Tunable CW laser: SOUR:WAV, SOUR:POW, OUTP:STAT, OUTP:INTL? (generic-laser profile)."""

    kind = "laser"

    si_units = False  # True: wavelengths in m and powers in W on the wire (SI units)

    def _state(self):
        return self.lab.lasers[self.role]

    def register(self) -> None:
        t = self.table
        t.add("[SOURce#]:WAVelength", self._set_wavelength)
        t.add("[SOURce#]:WAVelength", lambda c: fmt(self._wire_nm(self._state().wavelength_nm)),
              query=True)
        t.add("[SOURce#]:POWer[:LEVel][:IMMediate][:AMPLitude]", self._set_power)
        t.add("[SOURce#]:POWer[:LEVel][:IMMediate][:AMPLitude]",
              lambda c: fmt(self._wire_dbm(self._state().power_dbm)), query=True)
        t.add("OUTPut#[:STATe]", self._set_output)
        t.add("OUTPut#[:STATe]", lambda c: _onoff(self._state().output), query=True)
        t.add("OUTPut#:INTLock", lambda c: _onoff(self.lab.interlock_closed), query=True)

    def reset(self) -> None:
        laser = self._state()
        laser.output = False
        laser.wavelength_nm = 1550.0
        laser.power_dbm = 0.0

    def _wire_nm(self, nm: float) -> float:
        return nm * 1e-9 if self.si_units else nm

    def _wire_dbm(self, dbm: float) -> float:
        return 1e-3 * 10.0 ** (dbm / 10.0) if self.si_units else dbm

    def _set_wavelength(self, call: Call) -> None:
        lo, hi = self.limits("set_wavelength_nm")
        wire = number(call, self._wire_nm(lo), self._wire_nm(hi), self._wire_nm(1550.0))
        self._state().wavelength_nm = wire * 1e9 if self.si_units else wire

    def _set_power(self, call: Call) -> None:
        lo, hi = self.limits("set_power_dbm")
        wire = number(call, self._wire_dbm(lo), self._wire_dbm(hi), self._wire_dbm(0.0))
        self._state().power_dbm = 10.0 * math.log10(wire * 1e3) if self.si_units else wire

    def _set_output(self, call: Call) -> None:
        self._state().output = source_switch(call, self.lab)


class AmplifierInstrument(SimInstrument):
    """Constant-output-power amplifier: SOUR:POW, OUTP:STAT, OUTP:INTL? (generic-amplifier)."""

    kind = "amplifier"

    @property
    def _amp(self) -> Amplifier:
        """The lab's amplifier (served only when the scenario has one)."""
        part = self.lab.amplifier
        if part is None:
            raise RuntimeError("the scenario has no amplifier")
        return part

    def register(self) -> None:
        t = self.table
        amp = self._amp
        t.add("[SOURce#]:POWer[:LEVel][:IMMediate][:AMPLitude]", self._set_power)
        t.add("[SOURce#]:POWer[:LEVel][:IMMediate][:AMPLitude]",
              lambda c: fmt(amp.power_dbm), query=True)
        t.add("OUTPut#[:STATe]", self._set_output)
        t.add("OUTPut#[:STATe]", lambda c: _onoff(amp.output), query=True)
        t.add("OUTPut#:INTLock", lambda c: _onoff(self.lab.interlock_closed), query=True)

    def reset(self) -> None:
        self._amp.output = False
        self._amp.power_dbm = 10.0

    def _set_power(self, call: Call) -> None:
        self._amp.power_dbm = number(call, *self.limits("set_power_dbm"), 10.0)

    def _set_output(self, call: Call) -> None:
        self._amp.output = source_switch(call, self.lab)


class AttenuatorInstrument(SimInstrument):
    """Variable attenuator with shutter: CAL:WLEN, INP:ATT, OUTP:STAT (generic-attenuator)."""

    kind = "attenuator"

    def _state(self):
        return self.lab.attenuators[self.role]

    def register(self) -> None:
        t = self.table
        t.add(WAVELENGTH_CAL, self._set_wavelength)
        t.add(WAVELENGTH_CAL, lambda c: fmt(self._state().wavelength_nm), query=True)
        t.add("INPut#:ATTenuation", self._set_attenuation)
        t.add("INPut#:ATTenuation", lambda c: fmt(self._state().attenuation_db), query=True)
        t.add("OUTPut#[:STATe]", self._set_output)
        t.add("OUTPut#[:STATe]", lambda c: _onoff(self._state().output), query=True)

    def reset(self) -> None:
        att = self._state()
        att.attenuation_db = self.limits("set_attenuation_db")[1]
        att.output = False
        att.wavelength_nm = 1550.0

    def _set_wavelength(self, call: Call) -> None:
        self._state().wavelength_nm = number(call, *self.limits("set_wavelength_nm"), 1550.0)

    def _set_attenuation(self, call: Call) -> None:
        lo, hi = self.limits("set_attenuation_db")
        self._state().attenuation_db = number(call, lo, hi, hi)

    def _set_output(self, call: Call) -> None:
        self._state().output = boolean(call)


class PolControllerInstrument(SimInstrument):
    """Three-paddle controller: POL:ANGL<n>, POL:STOK (generic-pol-controller)."""

    kind = "pol_controller"

    def register(self) -> None:
        t = self.table
        t.add("POLarization:ANGLe#", self._set_angle)
        t.add("POLarization:ANGLe#", self._angle, query=True)
        t.add("POLarization:STOKes", self.set_stokes, nargs=(3, 3))
        t.add("POLarization:STOKes", self.stokes, query=True)

    def reset(self) -> None:
        self.lab.pol.angles_deg = [0.0, 0.0, 0.0]
        self.lab.pol.stokes_target = None

    def paddle(self, call: Call) -> int:
        n = call.suffix(1)
        first, last = generic_profile(self.kind).op("set_angle_deg").index_range or (1, 3)
        if not first <= n <= last:
            raise ScpiFault(-114, call.header)
        return n

    def _set_angle(self, call: Call) -> None:
        n = self.paddle(call)
        self.lab.pol.angles_deg[n - 1] = number(call, *self.limits("set_angle_deg"), 0.0)
        self.lab.pol.stokes_target = None

    def _angle(self, call: Call) -> str:
        return fmt(self.lab.pol.angles_deg[self.paddle(call) - 1])

    def set_stokes(self, call: Call) -> None:
        lo, hi = self.limits("set_stokes")
        s = np.array([number(call, lo, hi, 0.0, i) for i in range(3)])
        norm = float(np.linalg.norm(s))
        if norm < 0.5:
            raise ScpiFault(-222, f"{call.header} not a polarised state")
        x, y, z = (float(v) for v in s / norm)
        self.lab.pol.stokes_target = (x, y, z)

    def stokes(self, call: Call) -> str:
        from labrun.physics.polarisation import paddles_to_stokes

        pol = self.lab.pol
        s = pol.stokes_target if pol.stokes_target is not None else paddles_to_stokes(
            tuple(pol.angles_deg))
        return ",".join(f"{float(v):.6f}" for v in s)


class OsaInstrument(SimInstrument):
    """Optical spectrum analyser: SENS:WAV:CENT/SPAN, SENS:BAND:RES, SENS:SWE:POIN, INIT:IMM,
    TRAC:DATA? WLEN|LEVEL, FORM:DATA, FORM:BORD (generic-osa)."""

    kind = "osa"
    ascii_separator = ","  # between ASCII trace values
    ascii_count = False    # True: an ASCII trace starts with the number of values after it
    ascii_cut = 0          # values lost from the end of an ASCII trace (a reply cut short)
    ascii_prefix = ""      # text before an ASCII trace's values (a header a profile skips)

    def register(self) -> None:
        t = self.table
        osa = self.lab.osa
        t.add("[SENSe]:WAVelength:CENTer", self._setter("center_nm", "set_center_nm"))
        t.add("[SENSe]:WAVelength:CENTer", lambda c: fmt(osa.center_nm), query=True)
        t.add("[SENSe]:WAVelength:SPAN", self._setter("span_nm", "set_span_nm"))
        t.add("[SENSe]:WAVelength:SPAN", lambda c: fmt(osa.span_nm), query=True)
        t.add("[SENSe]:BANDwidth[:RESolution]", self._setter("rbw_nm", "set_rbw_nm"))
        t.add("[SENSe]:BANDwidth[:RESolution]", lambda c: fmt(osa.rbw_nm), query=True)
        t.add("[SENSe]:SWEep:POINts", self.set_points)
        t.add("[SENSe]:SWEep:POINts", lambda c: str(osa.points), query=True)
        t.add("INITiate[:IMMediate]", self.start_sweep, nargs=(0, 0), waits=True)
        # SCPI-1999 TRACe[:DATA]? <trace_name>, with trace names of labrun's own.
        t.add("TRACe[:DATA]", self._named_trace, query=True, waits=True, nargs=(1, 1))
        t.add("[SENSe]:WAVelength:STARt", lambda c: fmt(osa.center_nm - osa.span_nm / 2),
              query=True)
        t.add("[SENSe]:WAVelength:STOP", lambda c: fmt(osa.center_nm + osa.span_nm / 2),
              query=True)
        t.add("FORMat[:DATA]", self._set_format, nargs=(1, 2))
        t.add("FORMat[:DATA]", lambda c: self._format_name(), query=True)
        t.add("FORMat:BORDer", self._set_border)
        t.add("FORMat:BORDer", lambda c: "SWAP" if osa.little_endian else "NORM", query=True)

    def reset(self) -> None:
        osa = self.lab.osa
        osa.center_nm, osa.span_nm, osa.rbw_nm, osa.points = 1550.0, 10.0, 0.05, 1025
        osa.real32, osa.little_endian, osa.block_type = False, False, "f"

    def _setter(self, name: str, operation: str):
        lo, hi = self.limits(operation)

        def handler(call: Call) -> None:
            setattr(self.lab.osa, name, number(call, lo, hi, getattr(self.lab.osa, name)))
        return handler

    def set_points(self, call: Call) -> None:
        self.lab.osa.points = int(round(number(call, *self.limits("set_points"), 1025)))

    def _set_format(self, call: Call) -> None:
        kind = call.args[0].upper()
        length = call.args[1].strip() if len(call.args) > 1 else "32"
        if kind in ("REAL", "REAL32", "INT", "INTEGER"):
            base = "REAL" if kind.startswith("REAL") else "INT"
            block = BLOCK_FORMATS.get((base, "32" if kind == "REAL32" else length))
            if block is None:
                raise ScpiFault(-224, f"{call.header} {','.join(call.args)}")
            self.lab.osa.real32, self.lab.osa.block_type = True, block
        elif kind in ("ASC", "ASCII"):
            self.lab.osa.real32 = False
        else:
            raise ScpiFault(-224, f"{call.header} {','.join(call.args)}")

    def _format_name(self) -> str:
        """FORM:DATA? reply: the block type and length, or ASC,8."""
        osa = self.lab.osa
        if not osa.real32:
            return "ASC,8"
        return next(f"{k},{n}" for (k, n), code in BLOCK_FORMATS.items()
                    if code == osa.block_type)

    def _set_border(self, call: Call) -> None:
        kind = call.args[0].upper()
        if kind in ("SWAP", "SWAPPED"):
            self.lab.osa.little_endian = True
        elif kind in ("NORM", "NORMAL"):
            self.lab.osa.little_endian = False
        else:
            raise ScpiFault(-224, f"{call.header} {call.args[0]}")

    def busy(self) -> bool:
        return time.monotonic() < self.lab.osa.busy_until

    def wait_idle(self) -> None:
        while not self.stopping.is_set():
            left = self.lab.osa.busy_until - time.monotonic()
            if left <= 0:
                return
            self.stopping.wait(min(left, 0.1))

    def start_sweep(self, call: Call) -> None:
        self.lab.sweep()

    def _named_trace(self, call: Call) -> str | bytes:
        """TRAC:DATA? WLEN (wavelengths, nm) or TRAC:DATA? LEVEL (dBm per RBW); another name
        is -141 Invalid character data (SCPI-1999 vol. 2, 21.8)."""
        axis = TRACE_NAMES.get(call.args[0].strip().upper())
        if axis is None:
            raise ScpiFault(-141, f"{call.header} {call.args[0]}")
        return self._trace(call, axis)

    def trace_values(self, axis: str) -> np.ndarray:
        """The last sweep's axis ("x", nm) or levels ("y", dBm per RBW); a short-trace fault
        cuts the levels."""
        osa = self.lab.osa
        if osa.sweeps == 0:  # trace memory at power-on: a dark trace at the floor, no error
            floor = self.lab.scenario.instruments.osa.floor_dbm
            x = np.linspace(osa.center_nm - osa.span_nm / 2, osa.center_nm + osa.span_nm / 2,
                            osa.points)
            data = x if axis == "x" else np.full(x.size, -70.0 if floor is None else floor)
        else:
            data = osa.x_nm if axis == "x" else osa.y_dbm
        if axis == "y" and osa.sweeps:
            short = self.faults.short_trace_length(len(data))
            if short is not None:
                data = data[:short]
        return np.asarray(data, dtype=float)

    def _trace(self, call: Call, axis: str) -> str | bytes:
        osa = self.lab.osa
        values = self.trace_values(axis)
        if not osa.real32:
            head = [str(values.size)] if self.ascii_count else []
            sent = values[:values.size - self.ascii_cut] if self.ascii_cut > 0 else values
            return self.ascii_prefix + self.ascii_separator.join(
                head + [f"{v:.6f}" if axis == "x" else f"{v:.3f}" for v in sent])
        code = osa.block_type
        if code in ("h", "i"):  # integers in 0.01 dBm or pm; a value that does not fit: -222
            values = np.round(values * INT_SCALE[axis])
            info = np.iinfo(np.int16 if code == "h" else np.int32)
            if values.size and (values.min() < info.min or values.max() > info.max):
                raise ScpiFault(-222, f"{call.header} {call.args[0]}")
        order = "<" if osa.little_endian else ">"
        body = values.astype(order + code).tobytes()
        return build_block(body)  # IEEE 488.2 definite length


class PowerMeterInstrument(SimInstrument):
    """Power meter on the spool-input tap: CAL:WLEN, READ:POW? (generic-power-meter)."""

    kind = "power_meter"

    @property
    def _pm(self) -> PowerMeter:
        """The lab's power meter (served only when the scenario has one)."""
        part = self.lab.power_meter
        if part is None:
            raise RuntimeError("the scenario has no power meter")
        return part

    def register(self) -> None:
        t = self.table
        pm = self._pm
        t.add(WAVELENGTH_CAL, self._set_wavelength)
        t.add(WAVELENGTH_CAL, lambda c: fmt(pm.wavelength_nm), query=True)
        for pattern in ("READ#[:SCALar]:POWer[:DC]", "FETCh#[:SCALar]:POWer[:DC]",
                        "MEASure#[:SCALar]:POWer[:DC]"):
            t.add(pattern, lambda c: f"{self.lab.tap_power_dbm():.4f}", query=True)

    def reset(self) -> None:
        self._pm.wavelength_nm = 1550.0

    def _set_wavelength(self, call: Call) -> None:
        self._pm.wavelength_nm = number(call, *self.limits("set_wavelength_nm"),
                                                    1550.0)


class SwitchInstrument(SimInstrument):
    """1x2 switch before the OSA: ROUT:PATH 1|2 (generic-switch)."""

    kind = "switch"

    @property
    def _switch(self) -> Switch:
        """The lab's switch (served only when the scenario has one)."""
        part = self.lab.switch
        if part is None:
            raise RuntimeError("the scenario has no switch")
        return part

    def register(self) -> None:
        t = self.table
        t.add("ROUTe#:PATH", self.set_path)
        t.add("ROUTe#:PATH", lambda c: str(self._switch.path), query=True)

    def reset(self) -> None:
        self._switch.path = 1

    def set_path(self, call: Call) -> None:
        value = number(call, *self.limits("set_path"), 1)
        if value != int(value):
            raise ScpiFault(-224, f"{call.header} {call.args[0]}")
        self._switch.path = int(value)


INSTRUMENT_CLASSES: dict[str, type[SimInstrument]] = {
    "laser": LaserInstrument,
    "amplifier": AmplifierInstrument,
    "attenuator": AttenuatorInstrument,
    "pol_controller": PolControllerInstrument,
    "osa": OsaInstrument,
    "power_meter": PowerMeterInstrument,
    "switch": SwitchInstrument,
}

