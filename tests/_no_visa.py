"""Instrument sessions forbidden for a test, through labrun's own seam.

``visa_refused(error)`` puts a pyvisa backend under ``labrun.scpi.visa_library_override`` whose
``open`` raises ``error``: every session labrun opens goes through it, except inside a
``labrun check`` rehearsal, whose own recording backend (``labrun.rehearse.DryRunLibrary``)
overrides it for the rehearsal's duration.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

from labrun import scpi
from labrun.visareplay import TrafficReplayLibrary


class _RefusingLibrary(TrafficReplayLibrary):
    """A pyvisa backend whose every ``open`` raises the test's error."""

    error: type[BaseException] = AssertionError

    def open(self, session: int, resource_name: str, *args: Any, **kwargs: Any) -> Any:
        """Refuse: no instrument may be opened here."""
        raise self.error(f"instrument session opened: {resource_name}")


@contextlib.contextmanager
def visa_refused(error: type[BaseException] = AssertionError) -> Iterator[None]:
    """Inside, opening any instrument session raises ``error`` (a ``labrun check`` rehearsal's
    recording backend aside)."""
    library = _RefusingLibrary.from_entries([])
    library.error = error
    with scpi.visa_library_override(library):
        yield
