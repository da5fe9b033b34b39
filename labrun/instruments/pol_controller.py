"""Polarisation controller adapter: three paddle angles in degrees, or a target Stokes vector."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from labrun.errors import InputError
from labrun.instruments.base import Adapter, PlannedSetting
from labrun.setpoints import PADDLES, profile_settings

NORM_TOLERANCE = 0.01


class PolControllerAdapter(Adapter):
    """The polarisation controller on one arm."""

    kind = "pol_controller"

    def set_angles_deg(self, angles: Sequence[float]) -> None:
        """Set the three paddles; every angle is range-checked before the first is sent."""
        if len(angles) != len(PADDLES):
            raise InputError(f"{self.role}: need {len(PADDLES)} paddle angles, got {len(angles)}")
        paddles = profile_settings("set_angles_deg", angles)
        for one in paddles:
            op = self.profile.op(one.op)
            self.check_value(op, one.value)
            self.check_index(op, one.index)
        for one in paddles:
            self.apply(one.op, one.value, index=one.index)

    def angles_deg(self) -> tuple[float, float, float]:
        a, b, c = (self.read("read_angle_deg", index=p) for p in PADDLES)
        return (a, b, c)

    def set_stokes(self, stokes: Sequence[float]) -> None:
        """Drive to a normalised Stokes vector (s1, s2, s3); refused if not of unit length."""
        self.apply("set_stokes", values=self._stokes_values(stokes))

    def _stokes_values(self, stokes: Sequence[float]) -> dict[str, float]:
        """{s1, s2, s3} of a Stokes vector; InputError unless 3 components of unit length."""
        if len(stokes) != 3:
            raise InputError(f"{self.role}: a Stokes vector has 3 components, got {len(stokes)}")
        norm = math.sqrt(sum(float(s) ** 2 for s in stokes))
        if abs(norm - 1.0) > NORM_TOLERANCE:
            raise InputError(f"{self.role}: Stokes vector {tuple(stokes)} has length {norm:.3f}, "
                             "not 1")
        return {one.key: float(one.value) for one in profile_settings("set_stokes", stokes)}

    def planned(self, method: str, value: Any) -> list[PlannedSetting]:
        """As Adapter.planned: three paddle angles are three settings, a Stokes vector one."""
        if method == "set_angles_deg":
            if len(value) != len(PADDLES):
                raise InputError(f"{self.role}: need {len(PADDLES)} paddle angles, got "
                                 f"{len(value)}")
            return [self.prepare(one.op, one.value, index=one.index)
                    for one in profile_settings(method, value)]
        if method == "set_stokes":
            return [self.prepare("set_stokes", values=self._stokes_values(value))]
        return super().planned(method, value)

    def stokes(self) -> tuple[float, float, float]:
        values = self.read("read_stokes")
        if len(values) != 3:
            raise self.instrument_error(f"read_stokes gave {len(values)} values, expected 3")
        return (values[0], values[1], values[2])
