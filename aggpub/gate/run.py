"""The gate at its two moments in a release: before any noise (pre-flight) and on the built release.

:func:`preflight_gate` reads the policy and public inputs only (:mod:`aggpub.gate.predicted`);
:func:`release_gate` reads the released tables and the law of their noise only
(:mod:`aggpub.gate.released`); :func:`enforce_gate` refuses the release when it failed. None of
them ever reads a true value.
"""

from __future__ import annotations

__all__ = ["preflight_gate", "release_gate", "enforce_gate"]

from typing import TYPE_CHECKING

from ..progress import silent
from . import GATE_METRICS

if TYPE_CHECKING:  # annotations only
    from pathlib import Path

    from ..network import Network
    from ..policy import ReleasePolicy
    from ..results import Release


def _no_thresholds(policy: ReleasePolicy) -> bool:
    """True when the policy sets no gate threshold (public: read from the policy only)."""
    return not any(getattr(policy.gate, key) is not None for key in GATE_METRICS)


def preflight_gate(policy: ReleasePolicy, network: Network, progress=None) -> dict:
    """The gate predicted before any noise, from the policy and public inputs; refuses (uncharged) a
    release expected to fail.

    Under unit ``edge`` the person table is public and the supernodes are formed
    as the release will form them; under ``person`` only the policy is read
    (:mod:`aggpub.gate.predicted`). A figure that cannot be predicted (no public
    assumption for it) does not stop the release here; the gate on the released
    values still judges it.

    Raises
    ------
    GateError
        The gate is expected to fail; nothing was charged and no noise was drawn.
    """
    from ..errors import GateError
    from . import evaluate_gate, gate_failure_message
    from .predicted import predicted_metrics

    progress = progress or silent
    if _no_thresholds(policy):
        return {"passed": True, "failed": [], "checked": [], "unknown": [], "basis": "no thresholds set"}
    progress("pre-flight: predicting the gate from the policy and public inputs (no noise drawn yet)")
    people = network.people if policy.privacy.unit == "edge" else None
    metrics = predicted_metrics(policy, people)
    gate = evaluate_gate(policy, metrics, basis="predicted before any noise from the policy and public inputs",
                         unknown_fails=False)
    gate["notes"] = metrics.get("notes", [])
    if not gate["passed"]:
        raise GateError(gate_failure_message(gate, charged=False))
    return gate


def release_gate(release: Release) -> dict:
    """The gate on a built release: thresholds against figures computed from its public tables only.

    Reads ``release.tables`` and ``release.manifest`` (post-processing of the
    noisy output), never ``release.truth`` or the network.
    """
    from . import evaluate_gate
    from .released import released_metrics

    if _no_thresholds(release.policy):
        return {"passed": True, "failed": [], "checked": [], "unknown": [], "basis": "no thresholds set"}
    metrics = released_metrics(release.tables, release.manifest, release.policy)
    gate = evaluate_gate(release.policy, metrics, basis="estimated from the released values and the law of "
                                                        "their noise")
    gate["metrics"] = {k: v for k, v in metrics.items() if k != "why"}
    return gate


def enforce_gate(gate: dict, release: Release, report_path: Path, progress=None) -> None:
    """Refuse a release whose gate failed (its budget counts as spent); say so when it passed.

    Raises
    ------
    GateError
        The gate on the released values failed: no bundle is to be written.
    """
    from ..errors import GateError
    from . import gate_failure_message

    progress = progress or silent
    if not gate["passed"]:
        raise GateError(gate_failure_message(gate, charged=True, epsilon=release.manifest.get("epsilon_spent"),
                                             report_path=report_path / "report.html"))
    if gate["checked"]:
        progress(f"gate passed ({len(gate['checked'])} threshold(s), on the released values)")
