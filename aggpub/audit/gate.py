"""The release gate: the policy's ``[gate]`` thresholds against the audit's figures."""

from __future__ import annotations

__all__ = ["evaluate_gate", "gate_failure_message", "GATE_METRICS"]

import math

#: Gate key -> (what it measures, how to read it from an audit)
GATE_METRICS = {
    "max_degree_ks": "degree-distribution KS distance",
    "max_degree_wasserstein": "degree-distribution Wasserstein-1 distance",
    "max_contact_matrix_median_relative_error": "median relative error of the contact matrix",
    "max_superedge_median_relative_error": "median relative error of the superedge cells",
}


def _measured(key, audit, attribute):
    dd = audit.get("degree_distribution", {})
    q = audit.get("queries", {})
    if key == "max_degree_ks":
        return dd.get("ks"), "the release has no degree distribution to compare"
    if key == "max_degree_wasserstein":
        return dd.get("wasserstein1"), "the release has no degree distribution to compare"
    if key == "max_contact_matrix_median_relative_error":
        w = q.get(f"contact_matrix:{attribute}")
        return (w or {}).get("median_relative_error"), (
            f"no contact matrix by '{attribute}': it must be a grouping attribute (a column of the "
            "supernode labels) and superedge counts must be released")
    if key == "max_superedge_median_relative_error":
        return q.get("superedge_cells", {}).get("median_relative_error"), "the release has no superedge counts"
    raise KeyError(key)  # pragma: no cover


def evaluate_gate(policy, audit: dict) -> dict:
    """Check every threshold set in ``policy.gate`` (``None`` = not checked).

    A threshold passes when ``measured <= allowed``; a threshold whose figure
    the audit could not measure fails (the board cannot sign off a number that
    does not exist).

    Returns
    -------
    dict
        ``passed``, ``failed`` (gate keys), and for each set threshold
        ``{"allowed", "measured", "passed", "excess", "measures"}``.
    """
    gate = policy.gate
    attribute = gate.contact_matrix_attribute or (policy.grouping.attributes[0]
                                                  if policy.grouping.attributes else None)
    out = {"passed": True, "failed": [], "contact_matrix_attribute": attribute}
    for key, what in GATE_METRICS.items():
        allowed = getattr(gate, key)
        if allowed is None:
            continue
        measured, why = _measured(key, audit, attribute)
        entry = {"allowed": float(allowed), "measures": what}
        if measured is None or (isinstance(measured, float) and math.isnan(measured)):
            entry.update(measured=None, passed=False, excess=None, reason=f"not measurable: {why}")
        else:
            entry.update(measured=float(measured), passed=bool(measured <= allowed),
                         excess=float(max(0.0, measured - allowed)))
        if key == "max_contact_matrix_median_relative_error":
            entry["attribute"] = attribute
        out[key] = entry
        if not entry["passed"]:
            out["passed"] = False
            out["failed"].append(key)
    out["checked"] = [k for k in GATE_METRICS if k in out]
    return out


def gate_failure_message(gate: dict, *, epsilon=None, report_path=None) -> str:
    """One plain message naming every failed threshold, measured against allowed."""
    parts = []
    for key in gate["failed"]:
        e = gate[key]
        if e["measured"] is None:
            parts.append(f"[gate] {key} = {e['allowed']:g}: {e['reason']}")
        else:
            parts.append(f"[gate] {key}: measured {e['measured']:.4g} > allowed {e['allowed']:.4g} "
                         f"(over by {e['excess']:.4g})")
    text = "release refused: " + "; ".join(parts) + ". No bundle was written."
    if epsilon is not None:
        text += (f" The privacy budget of this attempt (epsilon {epsilon:g}) counts as spent: the noise was "
                 "drawn on the private data.")
    if report_path is not None:
        text += f" Confidential audit report: {report_path}"
    return text
