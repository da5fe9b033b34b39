"""Import heavy modules in the background while a run opens its instruments and waits to settle.

The spectrum reduction needs scipy, whose import takes about half a second (several on a busy
machine). A run does not need it before its first trace is read, so ``preload`` starts the
import in a daemon thread as the run starts; the engine's own ``import`` then finds the module
ready, or waits for the thread to finish it (CPython's per-module import lock), never imports it
twice. A failed preload is silent: the engine's own import raises the error where it belongs.
"""

from __future__ import annotations

import importlib
import threading


def _import_quietly(names: tuple[str, ...]) -> None:
    """Import each module; leave any failure for the real import to report."""
    for name in names:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001, S112 - the caller's own import reports it
            continue


def preload(*names: str) -> threading.Thread:
    """Start importing ``names`` in a daemon thread; the thread (already started)."""
    thread = threading.Thread(target=_import_quietly, args=(names,), name="labrun-preload",
                              daemon=True)
    thread.start()
    return thread
