"""Typed errors shared by every layer; the CLI maps them to exit codes and one-line messages.

InputError (bad file, bad field, bad argument) -> exit 2, nothing touched.
InstrumentError (an instrument failed or did not answer) -> exit 1.
"""

from __future__ import annotations


class LabrunError(Exception):
    """Base class: every error labrun raises on purpose. ``str(err)`` is the one-line message."""

    exit_code = 1


class InputError(LabrunError):
    """Bad user input: a file, a field in it, or a command-line value. Exit code 2."""

    exit_code = 2

    def __init__(self, message: str, *, file: str | None = None, field: str | None = None):
        self.message = message
        self.file = file
        self.field = field
        where = ": ".join(p for p in (file, field) if p)
        text = f"{where}: {message}" if where else message
        super().__init__(" ".join(text.splitlines()))  # one line, whatever a message quoted


class InstrumentError(LabrunError):
    """An instrument misbehaved: no answer, an error-queue entry, a failed read-back. Exit 1."""

    exit_code = 1

    def __init__(self, message: str, *, role: str | None = None, resource: str | None = None):
        self.role = role
        self.resource = resource
        who = role or resource
        super().__init__(f"{who}: {message}" if who else message)


class SafetyError(LabrunError):
    """A setting or plan would exceed a power cap, or a safety condition is not met. Exit 1."""

    exit_code = 1
