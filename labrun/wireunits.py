"""Instrument units: converting a value between labrun's unit and the unit an instrument
speaks (a profile operation's ``wire_unit``, or its ``scale`` and ``offset``). Pure, no I/O.

Powers: labrun speaks dBm; an instrument W, mW, dBm or dBW (P[mW] = 10^(P[dBm]/10), common
practice; dBW = dBm - 30). Wavelengths: labrun speaks nm; an instrument m, um, nm, pm, or a
frequency in Hz, GHz or THz (f = c / lambda, c exact by the SI). Angles: labrun speaks
degrees; an instrument deg or rad (pi rad = 180 deg). Linear power at or below
zero (a linear trace's noise) reads as FLOOR_DBM, below any optical spectrum analyser's floor.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from labrun.physics.units import C_M_PER_S

FLOOR_DBM = -200.0
# For each of labrun's units, the instrument units it converts to.
POWER = {"W": 1e-3, "mW": 1.0}          # linear: factor from mW
POWER_DB = {"dBm": 0.0, "dBW": -30.0}    # logarithmic: offset from dBm
LENGTH = {"m": 1e-9, "um": 1e-3, "nm": 1.0, "pm": 1e3}  # factor from nm
FREQUENCY = {"Hz": 1.0, "GHz": 1e-9, "THz": 1e-12}      # factor from Hz
ANGLE = {"deg": 1.0, "rad": np.pi / 180.0}               # factor from degrees
WIRE_UNITS: dict[str, tuple[str, ...]] = {
    "dBm": (*POWER, *POWER_DB),
    "nm": (*LENGTH, *FREQUENCY),
    "dB": ("dB",),
    "deg": tuple(ANGLE),
}


def to_wire(value: ArrayLike, unit: str, wire_unit: str) -> np.ndarray:
    """A value in labrun's ``unit`` expressed in the instrument's ``wire_unit``."""
    v = np.asarray(value, dtype=float)
    if wire_unit == unit:
        return v
    if unit == "dBm" and wire_unit in POWER:
        return np.power(10.0, v / 10.0) * POWER[wire_unit]
    if unit == "dBm" and wire_unit in POWER_DB:
        return v + POWER_DB[wire_unit]
    if unit == "nm" and wire_unit in LENGTH:
        return v * LENGTH[wire_unit]
    if unit == "nm" and wire_unit in FREQUENCY:
        return C_M_PER_S / (v * 1e-9) * FREQUENCY[wire_unit]
    if unit == "deg" and wire_unit in ANGLE:
        return v * ANGLE[wire_unit]
    raise ValueError(f"no conversion from {unit} to {wire_unit}")


def from_wire(value: ArrayLike, unit: str, wire_unit: str) -> np.ndarray:
    """A value the instrument gave in ``wire_unit`` expressed in labrun's ``unit``."""
    v = np.asarray(value, dtype=float)
    if wire_unit == unit:
        return v
    if unit == "dBm" and wire_unit in POWER:
        mw = v / POWER[wire_unit]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(mw > 0, 10.0 * np.log10(np.where(mw > 0, mw, 1.0)), FLOOR_DBM)
    if unit == "dBm" and wire_unit in POWER_DB:
        return v - POWER_DB[wire_unit]
    if unit == "nm" and wire_unit in LENGTH:
        return v / LENGTH[wire_unit]
    if unit == "nm" and wire_unit in FREQUENCY:
        return C_M_PER_S / (v / FREQUENCY[wire_unit]) * 1e9
    if unit == "deg" and wire_unit in ANGLE:
        return v / ANGLE[wire_unit]
    raise ValueError(f"no conversion from {wire_unit} to {unit}")
