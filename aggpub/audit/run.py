"""The confidential audit at its moment in a release: where its report goes, and the audit itself.

Called by :func:`aggpub.run_release` after the release is built and judged by
the gate (on released values only). The audit compares the release with the
true network for the governance board; it decides nothing, and its report is
written even when the gate refuses the release, so that the refusal is explained.
"""

from __future__ import annotations

__all__ = ["report_folder", "audit_and_report"]

from pathlib import Path

from ..pages import small_pages


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
        findings = audit.audit_release(release, monte_carlo=monte_carlo, progress=progress, draw_figures=True)
        findings.update(gate=gate, preflight=preflight,
                        outcome=("refused by the gate: no bundle written" if not gate["passed"]
                                 else f"passed the gate; bundle to be written to {out}"))
        progress("drawing the figures of the confidential report")
        report_path = report_mod.write_report(report_dir, findings, overwrite=overwrite, bundle=out)
    progress(f"confidential report written to {report_path}")
    return findings, report_path
