"""The virtual lab's second command dialect, ``si``: every role can speak it instead of the
generic one (scenario ``dialect = "si"``; the drivers/si-<kind>.toml profiles speak it).

It differs from the generic dialect in each way issue 15 lists, with command forms of labrun's
own invention: SI units on the wire (wavelengths in m, powers in W, angles in rad); the error
queue answering ``<code> <message>`` (``0 No error``); no ``*OPC?``, ``*OPC`` or ``*WAI`` (the
OSA tells a running sweep by ``SPEC:BUSY?``, 1 or 0); an OSA trace sent as space-separated ASCII
in W with the number of values first, its axis only as ``SPEC:STAR?``/``SPEC:STOP?``; a
power meter answering each value with its unit (``2.5e-05 W``); an attenuator answering its
shutter as ``GATE 1``; and each connection starting in local mode, where every command and
query but the IEEE 488.2 common ones and ``SYST:ERR?`` is refused (error -221) until
``SESS:OWN`` is sent. The lasers keep the generic headers (in m and W).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from labrun.vlab.scpi import Call, ScpiFault, boolean, fmt, number
from labrun.vlab.siminstruments import (
    AmplifierInstrument,
    AttenuatorInstrument,
    LaserInstrument,
    OsaInstrument,
    PolControllerInstrument,
    PowerMeterInstrument,
    SimInstrument,
    SwitchInstrument,
    source_switch,
)

REMOTE_ENABLE = "SESS:OWN"
ERROR_REPLY = "{code} {short}"


def nm_to_m(nm: float) -> float:
    return nm * 1e-9


def m_to_nm(m: float) -> float:
    return m * 1e9


def dbm_to_w(dbm: float) -> float:
    return 1e-3 * 10.0 ** (dbm / 10.0)


def w_to_dbm(w: float) -> float:
    """A power in W as dBm; zero or less is out of range (-222)."""
    if w <= 0:
        raise ValueError("not a positive power")
    return 10.0 * math.log10(w * 1e3)


def si_value(call: Call, lo: float, hi: float, from_si: Callable[[float], float],
             index: int = 0) -> float:
    """A parameter sent in SI units, as labrun's unit, within [lo, hi] of the generic profile
    (compared after converting, so the slack is the generic unit's): -104 when not a number,
    -222 when out of range."""
    text = call.args[index]
    try:
        wire = float(text)
    except ValueError:
        raise ScpiFault(-104, f"{call.header} {text}") from None
    try:
        value = from_si(wire)
    except (ValueError, OverflowError):
        raise ScpiFault(-222, f"{call.header} {text}") from None
    if value != value or not lo - 1e-9 <= value <= hi + 1e-9:
        raise ScpiFault(-222, f"{call.header} {text}")
    return value


def si_number(value: float) -> str:
    """A reply in SI units: ten significant digits, exponent form."""
    return f"{value:.10e}"


def _attenuator(inst: SimInstrument) -> None:
    """ATT:WAV (m), ATT:LEV (dB), ATT:GATE 1|0 (shutter; answered as ``GATE 1``)."""
    assert isinstance(inst, AttenuatorInstrument)
    t = inst.table
    state = inst.lab.attenuators[inst.role]
    wl = inst.limits("set_wavelength_nm")
    att = inst.limits("set_attenuation_db")

    def set_wavelength(c: Call) -> None:
        state.wavelength_nm = si_value(c, *wl, m_to_nm)

    def set_level(c: Call) -> None:
        state.attenuation_db = number(c, *att, att[1])

    def set_gate(c: Call) -> None:
        state.output = boolean(c)

    t.add("ATTenuator:WAVelength", set_wavelength)
    t.add("ATTenuator:WAVelength", lambda c: si_number(nm_to_m(state.wavelength_nm)), query=True)
    t.add("ATTenuator:LEVel", set_level)
    t.add("ATTenuator:LEVel", lambda c: fmt(state.attenuation_db), query=True)
    t.add("ATTenuator:GATE", set_gate)
    t.add("ATTenuator:GATE", lambda c: f"GATE {int(state.output)}", query=True)


def _power_meter(inst: SimInstrument) -> None:
    """METR:WAV (m), METR:POW? (W); every value answered with its unit (``1.55e-06 m``)."""
    assert isinstance(inst, PowerMeterInstrument)
    t = inst.table
    pm = inst.lab.power_meter
    assert pm is not None
    wl = inst.limits("set_wavelength_nm")

    def set_wavelength(c: Call) -> None:
        pm.wavelength_nm = si_value(c, *wl, m_to_nm)

    t.add("METeR:WAVelength", set_wavelength)
    t.add("METeR:WAVelength", lambda c: f"{si_number(nm_to_m(pm.wavelength_nm))} m", query=True)
    t.add("METeR:POWer", lambda c: f"{si_number(dbm_to_w(inst.lab.tap_power_dbm()))} W",
          query=True)


def _amplifier(inst: SimInstrument) -> None:
    """AMPL:POW (W), AMPL:EMIS 1|0, AMPL:INTL?."""
    assert isinstance(inst, AmplifierInstrument)
    t = inst.table
    amp = inst.lab.amplifier
    assert amp is not None
    lo, hi = inst.limits("set_power_dbm")

    def set_power(c: Call) -> None:
        amp.power_dbm = si_value(c, lo, hi, w_to_dbm)

    def set_emission(c: Call) -> None:
        amp.output = source_switch(c, inst.lab)

    t.add("AMPLifier:POWer", set_power)
    t.add("AMPLifier:POWer", lambda c: si_number(dbm_to_w(amp.power_dbm)), query=True)
    t.add("AMPLifier:EMISsion", set_emission)
    t.add("AMPLifier:EMISsion", lambda c: str(int(amp.output)), query=True)
    t.add("AMPLifier:INTLock", lambda c: str(int(inst.lab.interlock_closed)), query=True)


def _pol_controller(inst: SimInstrument) -> None:
    """PADD<n>:ANG (rad), PADD:SOP s1,s2,s3 (the generic controller's Stokes mode)."""
    assert isinstance(inst, PolControllerInstrument)
    t = inst.table
    pol = inst.lab.pol
    lo, hi = inst.limits("set_angle_deg")

    def set_angle(c: Call) -> None:
        n = inst.paddle(c)
        pol.angles_deg[n - 1] = si_value(c, lo, hi, math.degrees)
        pol.stokes_target = None

    t.add("PADDle#:ANGle", set_angle)
    t.add("PADDle#:ANGle", lambda c: si_number(math.radians(pol.angles_deg[inst.paddle(c) - 1])),
          query=True)
    t.add("PADDle:SOP", inst.set_stokes, nargs=(3, 3))
    t.add("PADDle:SOP", inst.stokes, query=True)


def _switch(inst: SimInstrument) -> None:
    """SWIT:CHAN 1|2."""
    assert isinstance(inst, SwitchInstrument)
    inst.table.add("SWITch:CHANnel", inst.set_path)
    inst.table.add("SWITch:CHANnel", lambda c: str(inst.lab.switch.path)  # type: ignore[union-attr]
                   , query=True)


def _osa(inst: SimInstrument) -> None:
    """SPEC:CENT/SPAN/RES (m), SPEC:NPTS, SPEC:SWE (starts a sweep), SPEC:BUSY? (1 while it
    runs), SPEC:DATA? (the levels in W: '<n> v1 v2 ...'), SPEC:STAR?/STOP? (the axis ends, m)."""
    assert isinstance(inst, OsaInstrument)
    t = inst.table
    osa = inst.lab.osa

    def setter(name: str, operation: str):
        lo, hi = inst.limits(operation)

        def handler(c: Call) -> None:
            setattr(osa, name, si_value(c, lo, hi, m_to_nm))
        return handler

    def getter(name: str) -> Callable[[Call], str]:
        return lambda c: si_number(nm_to_m(getattr(osa, name)))

    for node, name, operation in (("CENTer", "center_nm", "set_center_nm"),
                                  ("SPAN", "span_nm", "set_span_nm"),
                                  ("RESolution", "rbw_nm", "set_rbw_nm")):
        t.add(f"SPECtrum:{node}", setter(name, operation))
        t.add(f"SPECtrum:{node}", getter(name), query=True)
    t.add("SPECtrum:NPTS", inst.set_points)
    t.add("SPECtrum:NPTS", lambda c: str(osa.points), query=True)
    t.add("SPECtrum:SWEep", inst.start_sweep, nargs=(0, 0), waits=True)
    t.add("SPECtrum:BUSY", lambda c: "1" if inst.busy() else "0", query=True)
    t.add("SPECtrum:STARt", lambda c: si_number(nm_to_m(osa.center_nm - osa.span_nm / 2)),
          query=True)
    t.add("SPECtrum:STOP", lambda c: si_number(nm_to_m(osa.center_nm + osa.span_nm / 2)),
          query=True)
    t.add("SPECtrum:DATA", lambda c: _levels_in_w(inst), query=True, waits=True)


def _levels_in_w(inst: OsaInstrument) -> str:
    """The last sweep's levels in W, space-separated, after their count."""
    dbm = inst.trace_values("y")
    watts = 1e-3 * np.power(10.0, np.asarray(dbm, dtype=float) / 10.0)
    return " ".join([str(watts.size)] + [f"{w:.6e}" for w in watts])


def _laser(inst: SimInstrument) -> None:
    """The generic laser headers, in m and W."""
    assert isinstance(inst, LaserInstrument)
    inst.si_units = True
    inst.register()


SI_TABLES: dict[str, Callable[[SimInstrument], None]] = {
    "laser": _laser,
    "attenuator": _attenuator,
    "power_meter": _power_meter,
    "amplifier": _amplifier,
    "pol_controller": _pol_controller,
    "switch": _switch,
    "osa": _osa,
}
DIALECTS = ("generic", "si")


def speak_dialect(inst: SimInstrument, dialect: str) -> None:
    """Make ``inst`` speak ``dialect`` instead of the generic one (see the module docstring)."""
    if dialect == "generic":
        return
    if dialect != "si" or inst.kind not in SI_TABLES:
        raise ValueError(f"the {dialect!r} dialect is not simulated for a {inst.kind}")
    inst.dialect = dialect
    inst.remote_enable = REMOTE_ENABLE
    inst.local_queries = False
    inst.error_reply = ERROR_REPLY
    inst.queries_wait = False  # the trace answers from memory: completion is the client's job
    inst.rebuild_table(opc=False)
    SI_TABLES[inst.kind](inst)
