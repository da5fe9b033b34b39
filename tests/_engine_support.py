"""Shared helpers of the engine, safety-exit and resume tests: virtual lab, plans, polling."""

from __future__ import annotations

import contextlib
import copy
import os
import re
import signal
import subprocess
import sys
import time
import tomllib
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from labrun.resources import find_file
from labrun.vlab.lab import VirtualLab

OPERATOR = "R. Okafor"  # invented
# The virtual lab's command dialects (labrun/vlab/sidialect.py): the engine's core cases run
# on both, every instrument speaking the same one.
DIALECTS = ("generic", "si")


def scenario(*, dialect: str = "generic", **changes: Any) -> dict[str, Any]:
    """The shipped default scenario as a dict, realism off (deterministic), with changes; every
    instrument speaking ``dialect``."""
    from labrun.vlab.scenario import Instruments

    path = find_file("default-scenario.toml", "sim_instruments")
    data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    data = copy.deepcopy(data)
    data["realism"]["enabled"] = False
    for key, value in changes.items():
        data[key] = value
    if dialect != "generic":
        instruments = data.setdefault("instruments", {})
        for role in Instruments.model_fields:
            instruments.setdefault(role, {})["dialect"] = dialect
    return data


def plan_text(powers: Sequence[float], *, orders: int = 2, extra: str = "",
              spool: str = "HNLF-A17") -> str:
    """A zipped equal-power sweep at 1550 nm, 100 GHz spacing (invented lab values)."""
    vals = ", ".join(f"{p:g}" for p in powers)
    return f"""[plan]
name = "engine test sweep"
spool = "{spool}"
orders = {orders}

[fixed]
wavelength_a_nm = 1550.0
spacing_ghz = 100.0
pol_angles_deg = [0.0, 0.0, 0.0]

[axes.power_a_dbm]
values = [{vals}]

[axes.power_b_dbm]
values = [{vals}]

[order]
zip = [["power_a_dbm", "power_b_dbm"]]
{extra}"""


def long_powers(n: int) -> list[float]:
    """n distinct launched powers between -5 and 5 dBm."""
    return [round(-5.0 + 10.0 * i / max(n - 1, 1), 4) for i in range(n)]


def write_plan(folder: Path, powers: list[float], name: str = "plan.toml", **kw: Any) -> Path:
    """Write a plan file and return its path."""
    path = folder / name
    path.write_text(plan_text(powers, **kw), encoding="utf-8")
    return path


def write_bench(lab: VirtualLab, folder: Path, *, osa_timeout_ms: int | None = None) -> Path:
    """The lab's bench file; optionally with an OSA profile whose timeout is short."""
    bench = lab.write_bench(folder / "bench.toml")
    if osa_timeout_ms is not None:
        name = lab.profile_name("osa")  # the profile of the OSA's dialect
        src = Path(find_file(f"{name}.toml", "drivers")).read_text(encoding="utf-8")
        prof = folder / "quick-osa.toml"
        prof.write_text(re.sub(f'name = "{name}"', 'name = "quick-osa"',
                               re.sub(r"timeout_ms = \d+", f"timeout_ms = {osa_timeout_ms}", src)),
                        encoding="utf-8")
        text = bench.read_text(encoding="utf-8").replace(f'profile = "{name}"',
                                                         f'profile = "{prof}"')
        bench.write_text(text, encoding="utf-8")
    return bench


def attenuators_at_max(lab: VirtualLab) -> bool:
    """Both attenuators at 60 dB (the generic profile's maximum) with the shutter closed."""
    with lab.state.lock:
        return all(a.attenuation_db >= 60.0 - 1e-9 and not a.output
                   for a in lab.state.attenuators.values())


def dark(lab: VirtualLab) -> bool:
    """Sources off and attenuators at maximum: the state every way out must leave."""
    return lab.sources_off() and attenuators_at_max(lab)


def wait_for(pred: Callable[[], bool], timeout: float, step: float = 0.01) -> float | None:
    """Poll ``pred`` until true; the seconds it took, or None on timeout."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if pred():
            return time.monotonic() - t0
        time.sleep(step)
    return None


def labrun_process(*args: str, cwd: Path, new_session: bool = False) -> subprocess.Popen:
    """Start ``labrun ARGS`` as a separate Python process (own signal handling); with
    ``new_session`` it leads its own process group (which a test may then kill whole)."""
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "labrun", *args], cwd=cwd, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=new_session)


@contextlib.contextmanager
def run_in_process(lab: VirtualLab, folder: Path, n_points: int, *extra: str, min_points: int,
                   stop: int = signal.SIGKILL, db: str | Path | None = None
                   ) -> Iterator[tuple[subprocess.Popen, Path, Path, Path | str]]:
    """``labrun run`` of an ``n_points`` sweep (unattended, acknowledged) in another process,
    once ``min_points`` are stored; yields (process, plan, bench, db). On the way out a process
    still alive gets ``stop`` (then SIGKILL if it lingers 30 s). ``db``: a SQLite path or a
    database URL (default: runs.db in ``folder``)."""
    plan = write_plan(folder, long_powers(n_points))
    bench = write_bench(lab, folder)
    db = folder / "runs.db" if db is None else db
    proc = labrun_process("run", str(plan), "--bench", str(bench), "--db", str(db),
                          "--unattended", "--operator", OPERATOR, "--ack-safety",
                          "--no-progress", *extra, cwd=folder)
    try:
        assert wait_for(lambda: count_points(db) >= min_points, 60) is not None, proc.stderr
        yield proc, plan, bench, db
    finally:
        if proc.poll() is None:
            proc.send_signal(stop)
            try:
                proc.wait(timeout=30)
            finally:
                if proc.poll() is None:
                    proc.kill()


def count_points(db: Path | str) -> int:
    """Points stored so far (read-only peek through sqlite3, as another process would; a
    database URL is read through SQLAlchemy)."""
    import sqlite3

    if "://" in str(db):
        from sqlalchemy import create_engine, text

        engine = create_engine(str(db))
        try:
            with engine.connect() as conn:
                return int(conn.execute(text("SELECT count(*) FROM points")).scalar())
        except Exception:  # noqa: BLE001 - no table yet
            return 0
        finally:
            engine.dispose()
    db = Path(db)
    if not db.exists():
        return 0
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    try:
        return int(con.execute("SELECT count(*) FROM points").fetchone()[0])
    except sqlite3.OperationalError:
        return 0
    finally:
        con.close()
