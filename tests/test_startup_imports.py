"""Start-up stays light: heavy libraries are imported where they are needed, not when labrun
starts. Checked on ``sys.modules`` in a fresh interpreter (not timed: speed figures live in
benchmarks/); the import names are the libraries' own."""

from __future__ import annotations

import json
import subprocess
import sys

HEAVY = ("scipy", "pandas", "matplotlib")


def _loaded_after(code: str) -> set[str]:
    """Top-level modules loaded in a fresh interpreter after running ``code``."""
    probe = (f"{code}\nimport json, sys\n"
             "print(json.dumps(sorted({m.split('.')[0] for m in sys.modules})))")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,
                         check=True, timeout=120)
    return set(json.loads(out.stdout.splitlines()[-1]))


def test_importing_the_cli_loads_no_heavy_library():
    loaded = _loaded_after("import labrun.cli")
    assert not loaded & set(HEAVY), loaded & set(HEAVY)


def test_help_loads_no_numerical_database_or_visa_library():
    """`labrun --help` builds the whole parser: every command module is imported."""
    loaded = _loaded_after("import labrun.cli\nlabrun.cli.build_parser()")
    assert not loaded & {*HEAVY, "numpy", "sqlalchemy", "pyvisa", "pydantic"}, loaded


def test_opening_the_store_loads_no_numpy():
    """`labrun status` reads the store: SQLAlchemy yes, numpy (trace decoding) no."""
    loaded = _loaded_after("import labrun.cli\nlabrun.cli.build_parser()\n"
                           "import labrun.store.db")
    assert "sqlalchemy" in loaded
    assert not loaded & {*HEAVY, "numpy", "pyvisa"}, loaded
