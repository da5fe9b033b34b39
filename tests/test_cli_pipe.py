"""A reader that closes stdout early (``labrun status --json | head -1``) is a normal end.

POSIX (write(2), EPIPE): writing to a pipe with no reader fails with EPIPE; Python ignores SIGPIPE
at start-up, so the failure arrives as BrokenPipeError. The Python documentation's note on
SIGPIPE (library/signal) gives the recipe labrun follows: stop writing, point stdout at
/dev/null, exit. The exit code is 128 + SIGPIPE = 141, what a shell reports for a tool ended by
the signal. Each command runs as its own process with stdout a pipe whose reader is gone, so the
very first write fails however small the output is.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

from labrun.store import open_store

SPECTRUM = ("sim", "spectrum", "--scenario", "default-scenario.toml", "--spool", "HNLF-A17",
            "--power-a-dbm", "6", "--power-b-dbm", "6", "--wavelength-a-nm", "1550",
            "--spacing-ghz", "100", "--json")


def _run_into_closed_pipe(*argv: str, cwd: str) -> subprocess.CompletedProcess[str]:
    """Run ``python -m labrun ARGV`` with stdout a pipe whose read end is already closed."""
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        return subprocess.run([sys.executable, "-m", "labrun", *argv], stdout=write_end,
                              stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True,
                              cwd=cwd, timeout=120, check=False)
    finally:
        os.close(write_end)


def _store_with_a_run(path: str) -> None:
    """A run store holding one run with one point, enough for ``labrun status --json``."""
    store = open_store(path)
    run_id = store.create_run(plan_text="[plan]\nname='pipe'\n", plan_sha256="0" * 64,
                              bench_text="[bench]", software_version="test", points_total=1)
    store.add_point(run_id, key="p0", index=0, setpoint={"power_a_dbm": 6.0}, traces=[],
                    lines=[dict(kind="tone", side="low", order=0, freq_thz=193.1,
                                wavelength_nm=1552.52, power_dbm=-3.0, floor_dbm=-60.0,
                                snr_db=57.0, detected=True)])


@pytest.mark.parametrize(("argv", "code"), [
    # argparse's own --help and --version output discards a failed write itself (its
    # _print_message catches OSError) and exits 0, quietly too.
    (("--help",), 0),
    (("--version",), 0),
    (SPECTRUM, 128 + int(signal.SIGPIPE)),
    (("status", "--db", "runs.db", "--json"), 128 + int(signal.SIGPIPE)),
    (("check", "power-sweep.toml", "--bench", "bench-pyvisa-sim.toml", "--json"),
     128 + int(signal.SIGPIPE)),
], ids=["help", "version", "sim-spectrum", "status", "check"])
def test_a_closed_pipe_ends_the_command_quietly(tmp_path, argv, code):
    _store_with_a_run(str(tmp_path / "runs.db"))
    done = _run_into_closed_pipe(*argv, cwd=str(tmp_path))
    assert done.stderr == "", done.stderr  # no traceback, no "Exception ignored" at exit
    assert done.returncode == code


def test_an_open_pipe_still_gets_the_whole_output(tmp_path):
    # The handling only starts when the reader is gone: a reader that stays gets everything.
    _store_with_a_run(str(tmp_path / "runs.db"))
    done = subprocess.run([sys.executable, "-m", "labrun", "status", "--db", "runs.db", "--json"],
                          capture_output=True, text=True, cwd=str(tmp_path), timeout=120,
                          check=False)
    assert done.returncode == 0 and done.stdout.rstrip().endswith("}") and done.stderr == ""
