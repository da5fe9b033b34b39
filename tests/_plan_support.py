"""Helpers of the plan, safety and check tests: write small plan and bench files in tmp_path."""

from __future__ import annotations

from pathlib import Path

from labrun.bench import Bench, load_bench
from labrun.plan import Plan, load_plan

ROLES = {
    "laser_a": "generic-laser", "laser_b": "generic-laser",
    "attenuator_a": "generic-attenuator", "attenuator_b": "generic-attenuator",
    "pol_controller": "generic-pol-controller", "osa": "generic-osa",
}

BASE_PLAN = """[plan]
name = "test sweep"
spool = "HNLF-A17"

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
"""

# Two power axes zipped, 3 points (the sweep most safety and check tests start from).
POWERS = """
[axes.power_a_dbm]
values = [0.0, 2.0, 4.0]

[axes.power_b_dbm]
values = [0.0, 2.0, 4.0]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
"""


def write_plan(folder: Path, text: str, name: str = "plan.toml") -> Path:
    """Write plan text to a file and return its path."""
    path = folder / name
    path.write_text(text, encoding="utf-8")
    return path


def make_plan(folder: Path, body: str, *, head: str = BASE_PLAN, name: str = "plan.toml") -> Plan:
    """Load a plan made of the common head (metadata, wavelength, spacing) and ``body``."""
    return load_plan(write_plan(folder, head + body, name))


def bench_text(*, cap_a: float = 10.0, cap_b: float = 10.0, total: float = 20.0,
               loss_a: float = 3.0, loss_b: float = 3.6, amplifier: float | None = None,
               amp_loss: float = 0.5, switch: bool = False, drop: tuple[str, ...] = (),
               settle_scale: float = 1.0) -> str:
    """Bench TOML with the generic profiles at invented loopback addresses (never opened)."""
    lines = ["[bench]", 'name = "test bench"', f"max_total_launched_dbm = {total!r}",
             f"settle_scale = {settle_scale!r}", "", "[calibration]",
             f"path_loss_a_db = {loss_a!r}", f"path_loss_b_db = {loss_b!r}",
             f"amplifier_loss_db = {amp_loss!r}", "output_to_osa_db = 0.5", ""]
    roles = {r: p for r, p in ROLES.items() if r not in drop}
    if amplifier is not None:
        roles["amplifier"] = "generic-amplifier"
    if switch:
        roles["switch"] = "generic-switch"
    caps = {"laser_a": cap_a, "laser_b": cap_b, "amplifier": amplifier}
    for port, (role, profile) in enumerate(roles.items(), start=5201):
        lines += [f"[instruments.{role}]", f'resource = "TCPIP0::127.0.0.1::{port}::SOCKET"',
                  'backend = "@py"', f'profile = "{profile}"']
        if role in caps:
            lines.append(f"max_power_dbm = {caps[role]!r}")
        lines.append("")
    return "\n".join(lines)


def make_bench(folder: Path, name: str = "bench.toml", **kw: object) -> Bench:
    """Write a bench file (see bench_text) and load it with labrun.bench.load_bench."""
    path = folder / name
    path.write_text(bench_text(**kw), encoding="utf-8")  # type: ignore[arg-type]
    return load_bench(path)
