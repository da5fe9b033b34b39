"""One mapping from a setpoint to instrument settings: which adapter method of which role gets
which value, and which profile operations that method stands for.

The engine (and through it ``labrun check``'s rehearsal and ``labrun replay``) builds a point's
settings from ``targets``; the plan-time range check (``labrun.safety``) reads the same list,
so a setting the run will command is the setting the check looked at. ``profile_settings`` is
the one place that says a paddle triple is three ``set_angle_deg`` operations (the
polarisation controller's adapter uses it too). Pure: no I/O, no instruments.
"""

from __future__ import annotations

from collections.abc import Container, Mapping
from dataclasses import dataclass
from typing import Any

PADDLES = (1, 2, 3)  # quarter, half, quarter wave (generic polarisation controller profile)
STOKES_KEYS = ("s1", "s2", "s3")  # the placeholders of a profile's set_stokes command


@dataclass(frozen=True)
class Target:
    """One instrument setting a setpoint asks for: role, adapter method, value, and the group of
    settings (``labrun.settle.SETTLE_AXES``) whose plan settle time applies to it."""

    role: str
    method: str
    value: Any
    group: str


@dataclass(frozen=True)
class ProfileSetting:
    """One profile operation behind an adapter method: its name, one value, the index it takes
    (a paddle), the placeholder the value fills, and a label for messages."""

    op: str
    value: Any  # a number; the adapter's range check refuses anything else
    index: int | None = None
    key: str = "value"
    label: str | None = None


# (role, adapter method, key of the value in the commanded values, settle group), in the order
# the engine writes them: wavelengths, then powers and attenuations, then polarisation.
RULES: tuple[tuple[str, str, str, str], ...] = (
    ("laser_a", "set_wavelength_nm", "wavelength_a_nm", "wavelength_a"),
    ("laser_b", "set_wavelength_nm", "wavelength_b_nm", "wavelength_b"),
    ("attenuator_a", "set_wavelength_nm", "wavelength_a_nm", "wavelength_a"),
    ("attenuator_b", "set_wavelength_nm", "wavelength_b_nm", "wavelength_b"),
    # the tap power meter's calibration wavelength: midway between the tones (``tap_wavelength``)
    ("power_meter", "set_wavelength_nm", "tap_wavelength_nm", "wavelength_b"),
    ("laser_a", "set_power_dbm", "laser_a_dbm", "power"),
    ("laser_b", "set_power_dbm", "laser_b_dbm", "power"),
    ("attenuator_a", "set_attenuation_db", "attenuation_a_db", "power"),
    ("attenuator_b", "set_attenuation_db", "attenuation_b_db", "power"),
    ("amplifier", "set_power_dbm", "amplifier_dbm", "power"),
    ("pol_controller", "set_angles_deg", "pol_angles_deg", "pol_angles_deg"),
    ("pol_controller", "set_stokes", "pol_stokes", "pol_stokes"),
)


def targets(values: Mapping[str, Any], roles: Container[str]) -> list[Target]:
    """The settings of one point from its commanded values (the setpoint with the laser levels,
    attenuations and amplifier output ``safety.instrument_settings`` worked out), for the roles
    the bench has; a value that is None (or missing) sets nothing."""
    out: list[Target] = []
    values = {**values, "tap_wavelength_nm": tap_wavelength(values)}
    for role, method, key, group in RULES:
        value = values.get(key)
        if value is None or role not in roles:
            continue
        out.append(Target(role, method, tuple(value) if isinstance(value, list | tuple) else value,
                          group))
    return out


def tap_wavelength(values: Mapping[str, Any]) -> float | None:
    """The wavelength the input-tap power meter is calibrated at for a point: midway between
    the two tones (nm, to the 1 pm a meter's wavelength setting takes; the responsivity of a
    photodiode changes little over the few nm between them), None without both tones."""
    a, b = values.get("wavelength_a_nm"), values.get("wavelength_b_nm")
    if a is None or b is None:
        return None
    return round((float(a) + float(b)) / 2.0, 3)


def profile_settings(method: str, value: Any) -> list[ProfileSetting]:
    """The profile operations an adapter method stands for: a paddle triple is one
    ``set_angle_deg`` per paddle, a Stokes vector one ``set_stokes`` with three values, any
    other method the operation of its own name."""
    if method == "set_angles_deg":
        return [ProfileSetting("set_angle_deg", v, index=p, label=f"paddle {p}")
                for p, v in zip(PADDLES, value, strict=False)]
    if method == "set_stokes":
        return [ProfileSetting("set_stokes", v, key=k)
                for k, v in zip(STOKES_KEYS, value, strict=False)]
    return [ProfileSetting(method, value)]
