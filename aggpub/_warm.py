"""Import slow dependencies in the background while a release reads its input.

Importing diffprivlib (which loads scikit-learn) and matplotlib costs about
2.5 s of a release's wall time. Reading and mapping the edges runs inside
DuckDB with Python's global interpreter lock released, so a background thread
can do those imports at the same time. Nothing else happens in the thread;
an import that fails there is simply imported (and fails, with its real
message) again where it is used.

``import`` statements elsewhere wait for a module another thread is importing,
but some calls look a module up without importing it (``matplotlib.use``
finds a half-imported ``matplotlib.pyplot`` in ``sys.modules``): code that
uses these libraries calls :func:`wait_for_warm_imports` first.
"""

from __future__ import annotations

__all__ = ["warm_imports", "wait_for_warm_imports"]

import importlib
import threading

#: Modules a release needs after ingest: the budget accountant and the report's figures.
SLOW_IMPORTS = ("diffprivlib.accountant", "matplotlib.pyplot")


def _import_all(names) -> None:
    for name in names:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - reported by the real import where the module is used
            pass


_running: list = []
_lock = threading.Lock()


def warm_imports(names=SLOW_IMPORTS) -> threading.Thread:
    """Start importing ``names`` in a daemon thread; returns the thread."""
    thread = threading.Thread(target=_import_all, args=(tuple(names),), name="aggpub-warm-imports", daemon=True)
    with _lock:
        _running[:] = [t for t in _running if t.is_alive()]
        _running.append(thread)
    thread.start()
    return thread


def wait_for_warm_imports() -> None:
    """Return once every background import started by :func:`warm_imports` has finished."""
    with _lock:
        threads = list(_running)
    for thread in threads:
        thread.join()
