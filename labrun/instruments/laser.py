"""Tunable CW laser adapter: wavelength in nm, power in dBm, emission on/off."""

from __future__ import annotations

from labrun.instruments.base import WavelengthAdapter
from labrun.instruments.source import SourceAdapter


class LaserAdapter(SourceAdapter, WavelengthAdapter):
    """One tunable laser (role laser_a or laser_b)."""

    kind = "laser"
