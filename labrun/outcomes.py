"""The outcomes that end a run's point loop early: an abort (safety or faults beyond the policy)
and a stop condition met. Raised to leave the loop; ``labrun.engine`` turns them into a status."""

from __future__ import annotations


class RunAborted(Exception):  # noqa: N818 - an outcome, raised to leave the loop
    """A safety condition or faults beyond the retry policy ended the run."""


class StopRequested(Exception):  # noqa: N818 - an outcome, raised to leave the loop
    """A plan stop condition was met: the run ends normally, early."""
