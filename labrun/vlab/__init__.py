"""Virtual lab: simulated SCPI instruments on loopback TCP sharing one physical model."""

from labrun.vlab.lab import VirtualLab
from labrun.vlab.scenario import Scenario, load_scenario

__all__ = ["Scenario", "VirtualLab", "load_scenario"]
