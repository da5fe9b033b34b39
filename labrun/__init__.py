"""labrun: unattended four-wave-mixing measurements on optical fibre.

Drives generic SCPI instruments through VISA, runs declarative sweep plans, reduces OSA traces to
tone and sideband powers, fits fibre parameters and stores everything in a database.
"""

from __future__ import annotations

from typing import Any

__all__ = ["__version__"]


def __getattr__(name: str) -> Any:
    """``__version__`` from the installed package metadata, looked up on first use (PEP 562):
    importlib.metadata is a noticeable part of a bare ``labrun --help``."""
    if name != "__version__":
        raise AttributeError(f"module 'labrun' has no attribute {name!r}")
    from importlib.metadata import PackageNotFoundError, version

    try:
        found = version("labrun")
    except PackageNotFoundError:  # running from a source tree that was never installed
        found = "0.0.0+unknown"
    globals()["__version__"] = found
    return found
