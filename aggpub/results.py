"""What a release produces: :class:`Release` (built, not yet published) and :class:`ReleaseRun`
(what :func:`aggpub.run_release` did).

Plain containers: built by :mod:`aggpub.pipeline`, read by the audit, the gate and the bundle writer.
"""

from __future__ import annotations

__all__ = ["Release", "ReleaseRun"]

from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa

from .bundle.guide import render_guide
from .grouping import Grouping
from .network import Network
from .policy import ReleasePolicy


@dataclass(frozen=True)
class Release:
    """A built release, before publication (immutable once built).

    ``tables`` and ``manifest`` are public. ``truth`` holds the true statistics
    for the auditor: confidential, never written into a bundle. ``mechanisms``
    are the noise laws used, by statistic name.
    """

    tables: dict
    manifest: dict
    grouping: Grouping
    network: Network
    policy: ReleasePolicy
    truth: dict = field(default_factory=dict)
    mechanisms: dict = field(default_factory=dict)

    @property
    def supernodes(self) -> pa.Table:
        return self.tables["supernodes"]

    @property
    def superedges(self) -> pa.Table | None:
        return self.tables.get("superedges")

    def guide(self) -> str:
        return render_guide(self.manifest)


class ReleaseRun(tuple):
    """What :func:`run_release` did: unpacks as ``(release, path)``; the confidential audit and the
    report's folder are the attributes ``audit`` and ``report_path``."""

    def __new__(cls, release: Release, path: Path, audit: dict, report_path: Path):
        run = super().__new__(cls, (release, path))
        run.audit, run.report_path = audit, report_path
        return run

    @property
    def release(self) -> Release:
        return self[0]

    @property
    def path(self) -> Path:
        return self[1]
