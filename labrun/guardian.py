"""Owns the watcher that darkens the bench when a run dies without its own way out (SIGKILL).

A SIGKILL, an out-of-memory kill or a hard crash cannot be caught by the run itself, so
``labrun run`` and ``labrun resume`` start a small separate process (``python -m
labrun.guardian``) in its own session: a kill of the run's pid or of its process group, or a
Ctrl-C at the terminal, does not reach it. The run holds the write end of a pipe whose read end
the watcher blocks on. The run writes ``lit RUN_ID`` before it first switches a source on and
``done`` once its own safe-off is over; end of file without ``done`` after ``lit`` means the run
died with the light possibly on, whatever the cause. The watcher then darkens every role at once
over fresh connections, only ``safe_off_init`` sent, unchecked (labrun/safe_off.py), records
what it did (a ``guardian`` event in the store, else a JSON line beside the database, and one
line on stderr) and exits. It never switches anything on, and a run that never lit leaves it
nothing to do. Not started by the rehearsal (``labrun check``) or a replay.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from labrun.bench import Bench

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())

LIT, DONE = "lit", "done"
WAIT_S = 2.0  # longest wait for the watcher to leave after ``done`` (it leaves at once)
WATCHER_WAIT_S = 15.0  # longest wait of a resume for a killed run's watcher to finish darkening


class Guardian:
    """The run's end of the watcher: ``lit`` before the first switch-on, ``done`` at the end."""

    def __init__(self, proc: subprocess.Popen, fd: int):
        self.proc, self.fd = proc, fd
        self.armed = False

    def _send(self, line: str) -> None:
        """One line to the watcher; a watcher gone is logged, never fatal for the run."""
        if self.fd < 0:
            return
        try:
            os.write(self.fd, (line + "\n").encode("ascii"))
        except OSError as exc:
            log.warning("the guardian watcher is gone (%s); a killed run stays lit", exc)

    def lit(self, run_id: int | None) -> None:
        """The run is about to switch a source on: from now on its death darkens the bench."""
        if not self.armed:
            self.armed = True
            self._send(f"{LIT} {run_id if run_id is not None else '-'}")

    def done(self) -> None:
        """The run's own safe-off is over: the watcher leaves without touching anything."""
        self._send(DONE)
        if self.fd >= 0:
            with contextlib.suppress(OSError):
                os.close(self.fd)
            self.fd = -1
        try:
            self.proc.wait(WAIT_S)
        except subprocess.TimeoutExpired:
            log.warning("the guardian watcher (pid %d) did not leave after 'done'", self.proc.pid)


def start(bench: Bench, db_url: str) -> Guardian | None:
    """Start the watcher for ``bench`` (its text goes over stdin, so it darkens exactly the
    bench the run drives); None (and a warning) if it cannot be started."""
    read_fd, write_fd = os.pipe()  # both non-inheritable; only the read end is passed on
    try:
        proc = subprocess.Popen(
            [sys.executable, "-m", "labrun.guardian", "--fd", str(read_fd),
             "--bench", str(bench.path), "--db", db_url, "--parent", str(os.getpid())],
            stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, pass_fds=(read_fd,),
            start_new_session=True, close_fds=True)
    except OSError as exc:
        os.close(read_fd)
        os.close(write_fd)
        log.warning("cannot start the guardian watcher: %s", exc)
        return None
    os.close(read_fd)
    try:
        assert proc.stdin is not None
        proc.stdin.write(bench.text.encode("utf-8"))
        proc.stdin.close()
    except OSError as exc:
        log.warning("the guardian watcher did not take the bench: %s", exc)
    return Guardian(proc, write_fd)


def watchers_of(parent: int) -> list[int]:
    """Pids of watcher processes still alive on this host that run process ``parent`` started
    (read from /proc on Linux; elsewhere none are found and a resume does not wait)."""
    proc = Path("/proc")
    if not proc.is_dir():
        return []
    found = []
    for entry in proc.iterdir():
        if not entry.name.isdigit():
            continue
        try:
            argv = (entry / "cmdline").read_bytes().split(b"\0")
        except OSError:
            continue  # gone meanwhile, or not ours to read
        if b"labrun.guardian" in argv and b"--parent" in argv:
            i = argv.index(b"--parent")
            if i + 1 < len(argv) and argv[i + 1] == str(parent).encode("ascii"):
                found.append(int(entry.name))
    return found


def wait_for_watchers_of(parent: int, timeout_s: float = WATCHER_WAIT_S) -> list[int]:
    """Wait until no watcher of run process ``parent`` is left (it may still be darkening the
    bench after a kill; a resume that switched on before it finished would be darkened
    mid-point); the pids still alive after ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    left = watchers_of(parent)
    while left and time.monotonic() < deadline:
        time.sleep(0.05)
        left = watchers_of(parent)
    return left


# ---- the watcher process ------------------------------------------------------------------
def wait_for_end(fd: int) -> tuple[str | None, bool]:
    """Block on the pipe until end of file; (the run id sent with ``lit``, clean end seen)."""
    run_id: str | None = None
    lit = False
    buffer = b""
    while True:
        chunk = os.read(fd, 4096)
        if not chunk:
            break
        buffer += chunk
        while b"\n" in buffer:
            line, buffer = buffer.split(b"\n", 1)
            word, _, rest = line.decode("ascii", "replace").partition(" ")
            if word == LIT:
                lit, run_id = True, rest.strip()
            elif word == DONE:
                return run_id, True
    return run_id, not lit  # died after ``lit``: not clean


def record(db: str, run_id: str | None, message: str, problems: list[str],
           elapsed_s: float) -> str:
    """The ``guardian`` event in the store, else a JSON line beside the database; where."""
    data = {"problems": problems, "elapsed_s": round(elapsed_s, 3)}
    try:
        from labrun.store import open_store

        if run_id is None or not run_id.isdigit():
            raise ValueError("no run id")
        store = open_store(db)
        store.add_event(int(run_id), "guardian", message, data=data)
        return "store"
    except Exception as exc:  # noqa: BLE001 - the fallback record below, then stderr
        from labrun.runstore import write_fallback

        path = write_fallback(db, {"run_id": run_id, "guardian": message, **data,
                                   "store_error": f"{type(exc).__name__}: {exc}"})
        return str(path) if path else "nowhere"


def watch(fd: int, bench: Bench, db: str, parent: int) -> int:
    """The watcher's whole job; 0 when nothing was needed or everything is dark, else 1."""
    from labrun.safe_off import darken

    run_id, clean = wait_for_end(fd)
    if clean:
        return 0
    t0 = time.monotonic()
    problems = darken(bench, None)  # fresh connections (safe_off_init only), every role at once
    elapsed = time.monotonic() - t0
    state = ("every source off, attenuators at maximum" if not problems
             else "NOT CONFIRMED OFF: " + "; ".join(problems))
    message = (f"the run process (pid {parent}) ended without its own safe-off; "
               f"the guardian darkened the bench in {elapsed:.2f} s: {state}")
    where = record(db, run_id, message, problems, elapsed)
    print(f"labrun guardian: {message} (recorded in {where})", file=sys.stderr, flush=True)
    return 1 if problems else 0


def main(argv: list[str] | None = None) -> int:
    """``python -m labrun.guardian --fd N --bench PATH --db URL --parent PID`` (bench text on
    stdin); started by the run, not by hand."""
    from labrun.bench import parse_bench
    from labrun.instruments import ADAPTERS, make_session  # noqa: F401 - ready before the end

    p = argparse.ArgumentParser(prog="labrun.guardian", description=__doc__.splitlines()[0])
    p.add_argument("--fd", type=int, required=True)
    p.add_argument("--bench", required=True)
    p.add_argument("--db", required=True)
    p.add_argument("--parent", type=int, default=0)
    args = p.parse_args(argv)
    try:
        bench = parse_bench(sys.stdin.read(), Path(args.bench))
    except Exception as exc:  # noqa: BLE001 - one line; the run goes on without a watcher
        print(f"labrun guardian: cannot read the bench: {exc}", file=sys.stderr, flush=True)
        return 2
    return watch(args.fd, bench, args.db, args.parent)


if __name__ == "__main__":
    sys.exit(main())
