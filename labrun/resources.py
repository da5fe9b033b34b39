"""Locate files shipped with labrun (drivers/, sweeps/, sim_instruments/) from any folder.

A path that exists as given wins; otherwise the name is looked up in the installed data package,
so ``profile = "generic-tunable-laser"`` works from a checkout and from an installed wheel alike.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

DATA_PACKAGES = {
    "drivers": "labrun.drivers",
    "sweeps": "labrun.sweeps",
    "sim_instruments": "labrun.sim_instruments",
}


def data_dir(kind: str) -> Path:
    """Folder holding the shipped files of one kind (drivers, sweeps, sim_instruments)."""
    return Path(str(resources.files(DATA_PACKAGES[kind])))


def find_file(name: str | Path, kind: str, *, base: Path | None = None,
              suffixes: tuple[str, ...] = ("",)) -> Path | None:
    """Resolve ``name`` as a path (relative to ``base``), then as a shipped file of ``kind``.

    Returns None when nothing matches, so callers can raise an InputError naming their own field.
    """
    candidates: list[Path] = []
    raw = Path(name)
    for suffix in suffixes:
        with_suffix = raw if not suffix or raw.suffix == suffix else Path(f"{raw}{suffix}")
        if base is not None and not with_suffix.is_absolute():
            candidates.append(base / with_suffix)
        candidates.append(with_suffix)
        candidates.append(data_dir(kind) / with_suffix.name)
    for path in candidates:
        if path.is_file():
            return path
    return None
