"""Virtual lab: simulated SCPI instruments on loopback TCP sharing one physical model.

``VirtualLab`` (labrun.vlab.lab) is imported on first use so that loading a scenario, or the CLI,
does not pull in the server machinery.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from labrun.vlab.lab import VirtualLab
    from labrun.vlab.scenario import Scenario, load_scenario

__all__ = ["Scenario", "VirtualLab", "load_scenario"]


def __getattr__(name: str) -> Any:
    """Lazy exports: VirtualLab, Scenario, load_scenario."""
    if name == "VirtualLab":
        from labrun.vlab.lab import VirtualLab

        return VirtualLab
    if name in ("Scenario", "load_scenario"):
        from labrun.vlab import scenario

        return getattr(scenario, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
