"""The roles of a bench, listed once: which instrument kind plays each role, which roles a sweep
needs, which emit light. Bench files, safety, the engine and the virtual lab all read these."""

from __future__ import annotations

# role -> instrument kind (the kinds of drivers/README.md)
ROLE_KINDS: dict[str, str] = {
    "laser_a": "laser", "laser_b": "laser",
    "attenuator_a": "attenuator", "attenuator_b": "attenuator",
    "pol_controller": "pol_controller", "osa": "osa",
    "amplifier": "amplifier", "power_meter": "power_meter", "switch": "switch",
}
# Roles every sweep needs; the others (amplifier, power_meter, switch) are optional.
SWEEP_ROLES = ("laser_a", "laser_b", "attenuator_a", "attenuator_b", "pol_controller", "osa")
# Roles that emit light and carry a bench power cap.
SOURCE_ROLES = ("laser_a", "laser_b", "amplifier")
LASER_ROLES = ("laser_a", "laser_b")
ATTENUATOR_ROLES = ("attenuator_a", "attenuator_b")
# Roles that carry light to the spool, darkened on every way out: strongest source first.
OFF_ROLES = ("amplifier", *LASER_ROLES, *ATTENUATOR_ROLES)

__all__ = ["ATTENUATOR_ROLES", "LASER_ROLES", "OFF_ROLES", "ROLE_KINDS", "SOURCE_ROLES",
           "SWEEP_ROLES"]
