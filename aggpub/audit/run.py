"""The confidential audit at its moment in a release: where its report goes, and the audit itself.

Called by :func:`aggpub.run_release` after the release is built and judged by
the gate (on released values only). The audit compares the release with the
true network for the governance board; it decides nothing, and its report is
written even when the gate refuses the release, so that the refusal is explained.
"""

from __future__ import annotations

__all__ = ["report_folder", "audit_and_report", "small_pages"]

import contextlib
import threading
from pathlib import Path

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

    On Linux numpy asks the kernel for transparent huge pages for every array of 4 MiB or more. With the
    kernel's common setting (``defrag = madvise``) each such allocation may stop to compact memory first,
    and the audit makes hundreds of short-lived arrays of a table's size: measured on a 2-core machine, a
    10M-contact release took 4.4-4.7 s with the advice off during the audit against 5.4-5.8 s with it on
    (system time 1.0 s against 2.3-2.7 s; 4.6-5.0 s with it off for the whole process; three interleaved
    runs each). The advice is restored afterwards, once the last of any concurrent audits ends; without
    the switch (another numpy) nothing changes. Speed only: every array holds the same values.
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


def report_folder(out: Path, report, overwrite: bool) -> Path:
    """The confidential report's folder (``report``, else ``<out>.report``), checked before any work.

    Raises
    ------
    OutputError
        The folder cannot be written (see :func:`aggpub.audit.report.check_report_target`).
    """
    from . import report as report_mod

    report_dir = Path(report).absolute() if report is not None else report_mod.default_report_path(out)
    report_mod.check_report_target(report_dir, overwrite, bundle=out)
    return report_dir


def audit_and_report(release, *, gate: dict, preflight: dict, out: Path, report_dir: Path, overwrite: bool,
                     monte_carlo=None, progress=None) -> tuple[dict, Path]:
    """Audit a built release against the true network and write the confidential report.

    Parameters
    ----------
    release : aggpub.Release
        Holds the confidential truth beside the released tables.
    gate, preflight : dict
        The gate on the released values and the pre-flight gate, recorded in the report.
    out : Path
        The bundle folder the release is to be written to (named in the report).
    report_dir : Path
        From :func:`report_folder`.

    Returns
    -------
    findings : dict
        The audit (:func:`aggpub.audit.audit_release`) with the gates and the outcome.
    report_path : Path
        The report's folder as written.
    """
    from .. import audit
    from ..progress import silent
    from . import report as report_mod

    progress = progress or silent
    progress("auditing the release against the true network (confidential; decides nothing)")
    with small_pages():
        findings = audit.audit_release(release, monte_carlo=monte_carlo, progress=progress)
        findings.update(gate=gate, preflight=preflight,
                        outcome=("refused by the gate: no bundle written" if not gate["passed"]
                                 else f"passed the gate; bundle to be written to {out}"))
        progress("drawing the figures of the confidential report")
        report_path = report_mod.write_report(report_dir, findings, overwrite=overwrite, bundle=out)
    progress(f"confidential report written to {report_path}")
    return findings, report_path
