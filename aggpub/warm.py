"""Importing ahead: the modules a release needs after reading, imported on a thread while the engine reads.

A release imports about 0.2 s of modules after its inputs are read (the post-processing,
the audit, scipy's optimiser). While DuckDB or Spark reads the files, Python is mostly
idle, so :func:`import_ahead` imports them on a background thread and
:meth:`Ahead.wait` joins it once reading is done. The main thread imports nothing
from this list meanwhile (reading imports only the engine's own modules), so the two
threads never import the same modules at once. Speed only: a module that fails to
import here is imported (and fails, with its usual message) where it is used.
"""

from __future__ import annotations

__all__ = ["AFTER_READING", "import_ahead"]

import importlib
import threading

#: Modules a release imports after its inputs are read (measured on the demo release).
AFTER_READING = (
    "scipy.sparse", "scipy.sparse.csgraph", "scipy.linalg", "scipy.optimize",
    "aggpub.audit.core", "aggpub.audit.degrees", "aggpub.audit.draws", "aggpub.audit.fidelity",
    "aggpub.audit.metrics", "aggpub.audit.network_stats", "aggpub.audit.queries", "aggpub.audit.truth",
    "aggpub.bundle.read", "aggpub.estimates.counts", "aggpub.estimates.degrees", "aggpub.estimates.intervals",
    "aggpub.estimates.matrix", "aggpub.estimates.release_matrix", "aggpub.estimates.views",
    "aggpub.gate.predicted", "aggpub.gate.released", "aggpub.noise.sparse", "aggpub.released.contact_views",
    "aggpub.synthesis",
)


class Ahead:
    """The background import started by :func:`import_ahead`."""

    def __init__(self, names):
        self.thread = threading.Thread(target=self._run, args=(tuple(names),), name="aggpub-import-ahead",
                                       daemon=True)
        self.thread.start()

    @staticmethod
    def _run(names) -> None:
        for name in names:
            try:
                importlib.import_module(name)
            except Exception:  # noqa: BLE001 - imported again where it is used, which reports the error
                pass

    def wait(self) -> None:
        """Return once every module is imported (call before the main thread imports any of them)."""
        self.thread.join()


def import_ahead(names=AFTER_READING) -> Ahead:
    """Start importing ``names`` on a background thread."""
    return Ahead(names)
