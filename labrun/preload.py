"""Import heavy modules in the background while a run opens its instruments and waits to settle.

The spectrum reduction needs scipy, whose import takes about half a second (several on a busy
machine). A run does not need it before its first trace is read, so ``preload`` starts the
import in a daemon thread as the run starts; the engine's own ``import`` then finds the module
ready, or waits for the thread to finish it (CPython's per-module import lock), never imports it
twice. A failed preload is silent: the engine's own import raises the error where it belongs.
``when_bench_opens`` keeps such work until the engine starts opening the bench (``bench_opening``),
so it runs while the instruments answer rather than before the first exchange.
"""

from __future__ import annotations

import importlib
import threading
from collections.abc import Callable


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


_waiting: list[Callable[[], object]] = []
_waiting_lock = threading.Lock()


def when_bench_opens(start: Callable[[], object]) -> None:
    """Call ``start`` once the run begins opening its bench (``bench_opening``), so heavy work
    started there (imports, opening the store) waits on the instruments' replies instead of
    delaying the first exchange."""
    with _waiting_lock:
        _waiting.append(start)


def forget(start: Callable[[], object]) -> None:
    """No longer call ``start`` when the bench opens (it ran, or is not needed any more)."""
    with _waiting_lock:
        if start in _waiting:
            _waiting.remove(start)


def bench_opening() -> None:
    """The engine is about to open the bench: run what waited for it (once each)."""
    with _waiting_lock:
        todo = list(_waiting)
        _waiting.clear()
    for start in todo:
        start()
