"""Packaging: the wheel carries the data folders and every sub-package of labrun."""

from __future__ import annotations

import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _pyproject() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text())


def test_every_subpackage_is_listed() -> None:
    listed = set(_pyproject()["tool"]["setuptools"]["packages"])
    on_disk = {
        "labrun." + ".".join(p.parent.relative_to(ROOT / "labrun").parts)
        for p in (ROOT / "labrun").rglob("__init__.py")
        if p.parent != ROOT / "labrun"
    }
    missing = on_disk - listed
    assert not missing, f"add to [tool.setuptools] packages in pyproject.toml: {sorted(missing)}"


@pytest.mark.slow
def test_wheel_carries_data_folders(tmp_path: Path) -> None:
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
         "-w", str(tmp_path), str(ROOT)],
        check=True,
    )
    (wheel,) = tmp_path.glob("labrun-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    for data_dir in ("drivers", "sweeps", "sim_instruments"):
        shipped = {p.name for p in (ROOT / data_dir).iterdir() if p.suffix in {".toml", ".yaml"}}
        for name in shipped:
            assert f"labrun/{data_dir}/{name}" in names, f"{data_dir}/{name} missing from wheel"
    assert "labrun/drivers/generic-laser.toml" in names
    # the schema migrations travel too: an installed labrun must upgrade an old store
    assert "labrun/store/migrations/env.py" in names
    assert "labrun/store/migrations/script.py.mako" in names
    assert "labrun/store/migrations/versions/0001_baseline.py" in names
