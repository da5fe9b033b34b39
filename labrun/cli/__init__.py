"""Command-line entry point: builds the argparse tree from one module per command group.

Each module in ``labrun.cli`` listed in COMMAND_MODULES exposes ``register(subparsers)``, which adds
its sub-commands and sets ``func`` (called with the parsed namespace, returns an exit code).
Errors that labrun raises on purpose become one line on stderr and their exit code; no traceback.
A reader that closes the pipe early (``labrun status --json | head -1``) is a normal end: the
command stops writing and exits quietly with 141 (128 + SIGPIPE, what a shell tool killed by the
signal reports).
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
import sys
from collections.abc import Mapping, Sequence
from typing import Any, NoReturn

from labrun.errors import InputError, LabrunError

# Command groups, each in its own module (labrun/cli/<name>.py). A module that does not exist yet
# is skipped so the tree can grow one group at a time.
COMMAND_MODULES = ("demo", "probe", "sim", "analyze", "check", "run", "status", "off", "db",
                   "fit", "spools", "replay", "runs", "compare", "export", "report")
EXIT_BROKEN_PIPE = 128 + int(signal.SIGPIPE)  # 141


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors as exit code 2 and one line (argparse's own convention)."""

    def error(self, message: str) -> NoReturn:  # noqa: D401 - argparse API
        self.exit(2, f"{self.prog}: error: {message}\n")


class _Version(argparse.Action):
    """``--version``: the installed version, looked up only when asked for."""

    def __call__(self, parser: argparse.ArgumentParser, *args: Any, **kwargs: Any) -> None:
        from labrun import __version__

        # as argparse's own "version" action: stdout, a closed pipe ignored
        parser._print_message(f"labrun {__version__}\n", sys.stdout)
        parser.exit()


def add_traffic_log_option(parser: argparse.ArgumentParser, help_text: str) -> None:
    """``--traffic-log FILE``, and its name before 0.2 (``--transcript``) as a hidden alias so
    scripts written against it keep working."""
    parser.add_argument("--traffic-log", dest="traffic_log", metavar="FILE", help=help_text)
    parser.add_argument("--transcript", dest="traffic_log", metavar="FILE",
                        help=argparse.SUPPRESS)


def build_parser() -> argparse.ArgumentParser:
    """The full ``labrun`` parser with every available command group registered."""
    parser = _Parser(prog="labrun", description="Four-wave-mixing sweeps on optical fibre.")
    parser.add_argument("--version", action=_Version, nargs=0,
                        help="show the program's version number and exit")
    parser.add_argument("-v", "--verbose", action="store_true", help="log instrument traffic")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMAND_MODULES:
        try:
            module = importlib.import_module(f"labrun.cli.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"labrun.cli.{name}":
                continue
            raise
        module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None, *,
         overrides: Mapping[str, Any] | None = None) -> int:
    """Run one labrun command; returns the process exit code (141 when stdout's reader left).

    ``overrides``: values set on the parsed arguments that no command-line option sets (a
    command's ``func``, ``run``/``resume``'s ``confirm`` prompt, ``run``'s ``open_store``: what
    opens the store, ``labrun.store.open_store`` when None): the seam tests use instead of
    replacing module attributes."""
    try:
        try:
            return _main(argv, overrides or {})
        finally:  # also after --help or --version (SystemExit): output still in the buffer
            sys.stdout.flush()
    except BrokenPipeError:
        _silence_stdout()
        return EXIT_BROKEN_PIPE


def _silence_stdout() -> None:
    """Point stdout at /dev/null so the interpreter's final flush does not fail a second time
    (the recipe of the Python documentation's note on SIGPIPE)."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):  # stdout replaced by an object without a file descriptor
        pass
    finally:
        os.close(devnull)


def _naming_the_store(exc: LabrunError, args: argparse.Namespace) -> LabrunError:
    """An InputError about a run or spool the database lacks names the database it looked in
    (the one-line rule: file and field), which the store layer itself does not know."""
    db = getattr(args, "db", None)
    if isinstance(exc, InputError) and exc.file is None and exc.field in ("RUN_ID", "LABEL") and db:
        return InputError(exc.message, file=str(db), field=exc.field)
    return exc


def _main(argv: Sequence[str] | None, overrides: Mapping[str, Any]) -> int:
    """Parse the arguments and run the command's function; labrun's own errors become one line."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None):
        for name, value in overrides.items():
            setattr(args, name, value)
    if args.verbose:
        import logging

        logging.basicConfig(level=logging.DEBUG, format="%(asctime)s %(name)s %(message)s")
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except LabrunError as exc:
        print(f"labrun: error: {_naming_the_store(exc, args)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("labrun: interrupted", file=sys.stderr)
        return 130
