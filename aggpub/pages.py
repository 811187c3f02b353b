"""Memory pages: numpy's huge-page advice switched off around work that makes many short-lived large arrays,
the kernel's transparent huge pages switched off for the ``aggpub`` command (:func:`no_huge_pages`), and
freed memory kept for reuse by the C library's allocator in the command (:func:`keep_freed_memory`).

On Linux numpy asks the kernel for transparent huge pages for every array of 4 MiB or more. With the
kernel's common setting (``defrag = madvise``) each such allocation may stop to compact memory first.
The release's post-processing and the audit make hundreds of arrays of a table's size; measured on a
2-core machine at 10M contacts (``benchmarks/bench_small_pages.py`` and the notes in
``benchmarks/README.md``), switching the advice off around them saved about a second of system time.
Speed only: every array holds the same values.
"""

from __future__ import annotations

__all__ = ["small_pages", "no_huge_pages", "huge_pages_disabled", "HUGE_PAGES_VARIABLE", "keep_freed_memory",
           "MALLOC_VARIABLES"]

import contextlib
import os
import sys
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


#: Set to ``keep`` to keep the kernel's transparent huge pages in an ``aggpub`` command (:func:`no_huge_pages`).
HUGE_PAGES_VARIABLE = "AGGPUB_HUGE_PAGES"
#: Linux ``prctl`` options (``linux/prctl.h``).
_PR_SET_THP_DISABLE, _PR_GET_THP_DISABLE = 41, 42


def no_huge_pages() -> bool:
    """Transparent huge pages off for this process and the processes it starts (Linux), during an ``aggpub`` command.

    The kernel backs large anonymous allocations (DuckDB's hash tables, numpy's and Arrow's
    arrays) with 2 MiB pages and clears each one when first touched. On a virtual machine whose
    host takes back the guest's free memory (free page reporting), each such page is fresh host
    memory: in ``perf record`` of a 10M-contact release, ``clear_page_erms`` under huge-page faults
    took half of all samples, and the system time of the same release went from 1 s to 6 s as the
    machine's memory state changed. Measured on a 2-core machine, whole processes, interleaved
    (``benchmarks/README.md``, 2026-12-03): 10M contacts 4.50-4.64 s with huge pages off against
    7.01-8.71 s with them on (system time 1.3 against 4.8 s); the demo town the same (median 1.58
    against 1.61 s). Set with ``prctl(PR_SET_THP_DISABLE)``, which children inherit (the audit's
    helper). Nothing changes when :data:`HUGE_PAGES_VARIABLE` is set to ``keep``, off Linux, or
    for library use (``import aggpub``). Speed only: memory holds the same values whichever page
    size backs it.

    Returns
    -------
    bool
        Whether huge pages were switched off here.
    """
    if os.environ.get(HUGE_PAGES_VARIABLE, "").strip().lower() == "keep":
        return False
    return _prctl(_PR_SET_THP_DISABLE, 1) == 0


def huge_pages_disabled() -> bool | None:
    """Whether this process has transparent huge pages switched off (``None`` where that cannot be asked)."""
    got = _prctl(_PR_GET_THP_DISABLE, 0)
    return None if got is None or got < 0 else bool(got)


def _prctl(option: int, arg: int):
    """Linux's ``prctl(option, arg, 0, 0, 0)`` through the C library; ``None`` off Linux or without it."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        import ctypes

        return ctypes.CDLL(None, use_errno=True).prctl(option, arg, 0, 0, 0)
    except (OSError, AttributeError):  # no C library to call, or no prctl in it
        return None


#: glibc's settings of its allocator that a user may have chosen (any one set: :func:`keep_freed_memory` does nothing).
MALLOC_VARIABLES = ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_", "MALLOC_TOP_PAD_", "MALLOC_MMAP_MAX_",
                    "GLIBC_TUNABLES")
#: Freed memory at the top of the C library's heap that is kept for reuse instead of handed back (bytes).
KEPT_FREED_BYTES = 2 ** 31 - 1
#: Allocations from this size on get their own mapping (glibc's largest choice, 32 MiB on 64-bit systems).
OWN_MAPPING_BYTES = 32 * 2 ** 20
#: ``mallopt`` parameters (``malloc.h``).
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3


def keep_freed_memory() -> bool:
    """The C library's allocator keeps freed memory for reuse during an ``aggpub`` command (glibc on Linux).

    By default glibc gives an array of 128 KiB or more its own mapping (raising that size as such arrays
    are freed) and hands freed memory at the top of its heap back to the kernel beyond twice that size.
    A release makes thousands of short-lived arrays of a few MiB (numpy's, and Arrow's through the system
    pool, :func:`aggpub.cli.system_arrow_memory`), so the same memory went back and forth: every reuse
    was a fresh page the kernel had to find and clear (about 200,000 page faults for the demo town, whose
    peak is 0.4 GB; on a virtual machine each is slow). Here freed memory up to 2 GiB stays in the heap
    (``M_TRIM_THRESHOLD``) and only allocations of 32 MiB or more get their own mapping
    (``M_MMAP_THRESHOLD``, glibc's largest; those are handed back when freed). Measured on a 2-core
    machine, whole processes, interleaved (``benchmarks/README.md``, section "Freed memory kept for
    reuse"): the demo town 184,000 -> 87,000 page faults, system time 0.61 -> 0.40 s, median 2.42 ->
    2.17 s; 10M contacts system time 1.94 -> 1.70 s; the 100M release's peak about 0.1 GB higher, as
    memory freed by one phase is kept for the next (3.59-3.62 against 3.52-3.55 GB by ``/usr/bin/time``;
    the scale benchmark's process-tree peak stayed at 3.43-3.44 GB).

    Applied with ``mallopt`` to this process, and through glibc's variables
    (``MALLOC_TRIM_THRESHOLD_``, ``MALLOC_MMAP_THRESHOLD_``) to the processes it starts (the audit's
    helper). Nothing changes when the user set any of :data:`MALLOC_VARIABLES`, off glibc, or for library
    use (``import aggpub``). Speed only: memory holds the same values whoever hands it out.

    Returns
    -------
    bool
        Whether the settings were applied here.
    """
    if any(name in os.environ for name in MALLOC_VARIABLES) or not sys.platform.startswith("linux"):
        return False
    import platform

    if platform.libc_ver()[0] != "glibc":
        return False
    try:
        import ctypes

        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):  # no C library to call, or no mallopt in it
        return False
    if not (mallopt(_M_TRIM_THRESHOLD, KEPT_FREED_BYTES) and mallopt(_M_MMAP_THRESHOLD, OWN_MAPPING_BYTES)):
        return False
    os.environ["MALLOC_TRIM_THRESHOLD_"] = str(KEPT_FREED_BYTES)
    os.environ["MALLOC_MMAP_THRESHOLD_"] = str(OWN_MAPPING_BYTES)
    return True
