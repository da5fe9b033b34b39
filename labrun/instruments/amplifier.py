"""Optical amplifier adapter (constant output power): power in dBm, emission on/off."""

from __future__ import annotations

from labrun.instruments.source import SourceAdapter


class AmplifierAdapter(SourceAdapter):
    """The optional amplifier after the combiner; its cap is the bench's max_power_dbm."""

    kind = "amplifier"
