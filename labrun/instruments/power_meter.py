"""Optical power meter adapter: calibration wavelength in nm, power in dBm."""

from __future__ import annotations

from labrun.instruments.base import Adapter


class PowerMeterAdapter(Adapter):
    """The power meter on the spool-input tap."""

    kind = "power_meter"

    def set_wavelength_nm(self, nm: float) -> None:
        self.apply("set_wavelength_nm", nm)

    def wavelength_nm(self) -> float:
        return self.read("read_wavelength_nm")

    def power_dbm(self) -> float:
        return self.read("read_power_dbm")
