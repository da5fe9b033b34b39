"""How long the engine waits after a setting: the larger of the profile's and the plan's settle.

A point's settings are written together and the engine waits once, for the longest settle time of
what moved (settles overlap, as they do on a real bench); each setting's settle time is the larger
of its profile operation's ``settle_s`` and the plan's ``settle_s`` for the axes that drive it,
times the bench's ``settle_scale``. ``labrun check`` estimates with the same rule.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

from labrun.plan import POWER_SETPOINTS

# Which plan axes drive each group of instrument settings (their settle times apply to it).
SETTLE_AXES: dict[str, tuple[str, ...]] = {
    "wavelength_a": ("wavelength_a_nm",),
    "wavelength_b": ("wavelength_a_nm", "spacing_ghz"),
    "power": POWER_SETPOINTS,
    "pol_angles_deg": ("pol_angles_deg",),
    "pol_stokes": ("pol_stokes",),
}


def group_settles(plan_settle_s: Mapping[str, float]) -> dict[str, float]:
    """The plan's settle time of each group of settings: the longest of the axes driving it."""
    return {group: max([float(plan_settle_s.get(a, 0.0)) for a in axes] + [0.0])
            for group, axes in SETTLE_AXES.items()}


def setting_s(profile_s: Iterable[float], plan_s: float) -> float:
    """Settle time of one engine setting (unscaled): the larger of the plan's and of its profile
    operations' (a paddle triple is three operations)."""
    return max([float(plan_s), 0.0, *(float(s or 0.0) for s in profile_s)])


def wait_s(settles: Iterable[float], scale: float) -> float:
    """The one wait of a point: the longest settle of what moved, x the bench's settle_scale."""
    return max([0.0, *settles]) * max(0.0, float(scale))
