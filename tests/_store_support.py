"""Shared helpers of the store-side tests (fit, spools, compare, export): real runs of shipped
plans on the virtual lab (realism off, so the scenario's spool values are the truth), stored on
SQLite or PostgreSQL."""

from __future__ import annotations

from pathlib import Path

from _engine_support import OPERATOR, scenario

from labrun.bench import load_bench
from labrun.engine import run_plan
from labrun.plan import load_plan
from labrun.resources import find_file
from labrun.store import open_store
from labrun.vlab.lab import VirtualLab

# The default scenario's spools (sim_instruments/default-scenario.toml; invented values).
HNLF_GAMMA = 11.0  # 1/(W km)
HNLF_D = -0.3  # ps/(nm km)
SMF_GAMMA = 1.3
SMF_D = 17.0  # ps/(nm km)


def run_plan_file(db: str, plan: str | Path, folder: Path, *, connected: str | None = None,
                  text: str | None = None, spools: list[dict] | None = None) -> int:
    """Run a plan (shipped name or path; ``text`` replaces its content) on a fresh virtual lab
    whose connected spool is ``connected`` (default: the plan's); ``spools``: scenario spools
    added to the default scenario's; returns the run id."""
    path = Path(find_file(str(plan), "sweeps", suffixes=("", ".toml")) or plan)
    if text is not None:
        path = folder / f"plan-{abs(hash(text))}.toml"
        path.write_text(text, encoding="utf-8")
    p = load_plan(path)
    store = open_store(db)
    try:
        data = scenario(connected=connected or p.spool)
        data["spools"] = [*data["spools"], *(spools or [])]
        with VirtualLab(data) as lab:
            bench = load_bench(lab.write_bench(folder / "bench.toml"))
            out = run_plan(p, bench, store, operator=OPERATOR, unattended=True, ack_safety=True,
                           progress=False)
        assert out.status == "completed", out
        return out.run_id
    finally:
        store.close()


def record_dispersion(db: str, label: str, d: float, u: float, *args: str) -> None:
    """Record a dispersion the lab knows on a spool (labrun spool set --dispersion), as a lab
    would from the fibre's data sheet; ``args``: further spool-set options."""
    from labrun.cli import main

    assert main(["spool", "set", label, "--dispersion", f"{d!r}", "--dispersion-u", f"{u!r}",
                 *args, "--db", db]) == 0


def shipped_text(name: str) -> str:
    """The text of a shipped plan."""
    return Path(find_file(name, "sweeps")).read_text(encoding="utf-8")
