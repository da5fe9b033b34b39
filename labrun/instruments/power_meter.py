"""Optical power meter adapter: calibration wavelength in nm, power in dBm."""

from __future__ import annotations

from labrun.instruments.base import WavelengthAdapter
from labrun.physics.units import dbm_to_mw


class PowerMeterAdapter(WavelengthAdapter):
    """The power meter on the spool-input tap."""

    kind = "power_meter"

    def power_dbm(self) -> float:
        return self.read("read_power_dbm")

    def power_mw(self) -> float:
        """The reading in mW (P[mW] = 10^(P[dBm]/10), common practice)."""
        return float(dbm_to_mw(self.power_dbm()))
