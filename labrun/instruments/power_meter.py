"""Optical power meter adapter: calibration wavelength in nm, power in dBm."""

from __future__ import annotations

from labrun.instruments.base import Adapter
from labrun.physics.units import dbm_to_mw


class PowerMeterAdapter(Adapter):
    """The power meter on the spool-input tap."""

    kind = "power_meter"

    def set_wavelength_nm(self, nm: float) -> None:
        self.apply("set_wavelength_nm", nm)

    def wavelength_nm(self) -> float:
        return self.read("read_wavelength_nm")

    def power_dbm(self) -> float:
        return self.read("read_power_dbm")

    def power_mw(self) -> float:
        """The reading in mW (P[mW] = 10^(P[dBm]/10), common practice)."""
        return float(dbm_to_mw(self.power_dbm()))
