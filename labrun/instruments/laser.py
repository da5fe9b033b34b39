"""Tunable CW laser adapter: wavelength in nm, power in dBm, emission on/off."""

from __future__ import annotations

from labrun.instruments.source import SourceAdapter


class LaserAdapter(SourceAdapter):
    """One tunable laser (role laser_a or laser_b)."""

    kind = "laser"

    def set_wavelength_nm(self, nm: float) -> None:
        """Tune the laser (vacuum wavelength)."""
        self.apply("set_wavelength_nm", nm)

    def wavelength_nm(self) -> float:
        return self.read("read_wavelength_nm")
