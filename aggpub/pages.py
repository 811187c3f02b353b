"""numpy's huge-page advice, switched off around work that makes many short-lived large arrays.

On Linux numpy asks the kernel for transparent huge pages for every array of 4 MiB or more. With the
kernel's common setting (``defrag = madvise``) each such allocation may stop to compact memory first.
The release's post-processing and the audit make hundreds of arrays of a table's size; measured on a
2-core machine at 10M contacts (``benchmarks/bench_small_pages.py`` and the notes in
``benchmarks/README.md``), switching the advice off around them saved about a second of system time.
Speed only: every array holds the same values.
"""

from __future__ import annotations

__all__ = ["small_pages"]

import contextlib
import threading

_PAGES_LOCK = threading.Lock()
_PAGES_STATE = {"depth": 0, "before": None}


def _huge_page_setter():
    """numpy's switch for its huge-page advice (``NUMPY_MADVISE_HUGEPAGE`` at run time), or ``None``."""
    try:
        from numpy._core import multiarray
    except ImportError:  # numpy 1.x
        from numpy.core import multiarray
    return getattr(multiarray, "_set_madvise_hugepage", None)


@contextlib.contextmanager
def small_pages():
    """numpy's advice to back large arrays with huge pages, switched off while the block runs.

    Used around the release's post-processing and around the audit with its report. Measured on a 2-core
    machine at 10M contacts, five interleaved whole releases each: off during the audit, median 4.62 s
    against 5.88 s with the advice on everywhere (system time 1.08 against 2.64 s; 4.96 s with it off for
    the whole process, which slows the engine's stage); off during the post-processing as well, median
    5.45 s against 5.85 s on a busier moment (system time 1.48 against 1.98 s). The advice is restored
    afterwards, once the last of any concurrent blocks ends; without the switch (another numpy) nothing
    changes. Speed only: every array holds the same values.
    """
    setter = _huge_page_setter()
    if setter is None:
        yield
        return
    with _PAGES_LOCK:
        if _PAGES_STATE["depth"] == 0:
            _PAGES_STATE["before"] = setter(False)
        _PAGES_STATE["depth"] += 1
    try:
        yield
    finally:
        with _PAGES_LOCK:
            _PAGES_STATE["depth"] -= 1
            if _PAGES_STATE["depth"] == 0:
                setter(_PAGES_STATE["before"])
