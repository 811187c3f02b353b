"""The publication gate: the policy's ``[gate]`` thresholds, judged on released values only.

Every publication decision is computed from the policy and public inputs
(before any noise: :mod:`aggpub.gate.predicted`, the pre-flight) or from the
noisy release and the known law of its noise (after the noise:
:mod:`aggpub.gate.released`, post-processing). Never from true values: a gate
that compared the release with the truth would publish only the draws that
happen to lie close to the truth, and retrying until it passes would publish
the truth itself. The confidential audit (:mod:`aggpub.audit`) compares the
release with the truth for the board; it decides nothing.

Each threshold reads one figure of a *metrics table* (a dict), the same table
for the pre-flight, the release, the plan and the sweep:

=========================================== ====================================
gate key                                    metric
=========================================== ====================================
``max_degree_ks``                           ``degree_ks``
``max_degree_wasserstein``                  ``degree_wasserstein1``
``max_contact_matrix_median_relative_error`` ``contact_matrix_median_relative_error``
``max_superedge_median_relative_error``     ``superedge_median_relative_error``
=========================================== ====================================
"""

from __future__ import annotations

__all__ = ["GATE_METRICS", "evaluate_gate", "gate_failure_message", "gate_attribute"]

import math

#: Gate key -> (metric of the metrics table, what it measures)
GATE_METRICS = {
    "max_degree_ks": ("degree_ks", "expected degree-distribution KS distance that the noise adds"),
    "max_degree_wasserstein": ("degree_wasserstein1",
                               "expected degree-distribution Wasserstein-1 distance that the noise adds"),
    "max_contact_matrix_median_relative_error": ("contact_matrix_median_relative_error",
                                                 "expected median relative error of the contact matrix"),
    "max_superedge_median_relative_error": ("superedge_median_relative_error",
                                            "expected median relative error of the superedge cells"),
}


def gate_attribute(policy):
    """The attribute of the gate's contact matrix: ``gate.contact_matrix_attribute``, else the first grouping attribute."""
    return policy.gate.contact_matrix_attribute or (policy.grouping.attributes[0]
                                                    if policy.grouping.attributes else None)


def evaluate_gate(policy, metrics: dict, *, basis: str, unknown_fails: bool = True) -> dict:
    """Check every threshold set in ``policy.gate`` (``None`` = not checked) against a metrics table.

    A threshold passes when ``value <= allowed``. A figure the table does not
    have (``None``) fails when ``unknown_fails`` (the release: the board cannot
    sign off a number that does not exist) and is reported as not predicted
    otherwise (the pre-flight, which cannot predict a figure without the public
    assumptions it needs).

    Parameters
    ----------
    policy : ReleasePolicy
    metrics : dict
        Metric name -> value or ``None``; ``why`` maps a metric to the reason it is ``None``.
    basis : str
        How the figures were obtained (shown in the report and messages).

    Returns
    -------
    dict
        ``passed``, ``failed`` (gate keys), ``checked``, ``unknown``, ``basis``, and for each set
        threshold ``{"allowed", "value", "passed", "excess", "measures"}``.
    """
    gate = policy.gate
    why = metrics.get("why", {})
    out = {"passed": True, "failed": [], "unknown": [], "basis": basis,
           "contact_matrix_attribute": metrics.get("contact_matrix_attribute", gate_attribute(policy))}
    for key, (metric, what) in GATE_METRICS.items():
        allowed = getattr(gate, key)
        if allowed is None:
            continue
        value = metrics.get(metric)
        entry = {"allowed": float(allowed), "measures": what, "metric": metric}
        if value is None or (isinstance(value, float) and math.isnan(value)):
            entry.update(value=None, passed=not unknown_fails, excess=None,
                         reason=f"not {'measurable' if unknown_fails else 'predicted'}: "
                                f"{why.get(metric, 'no figure')}")
            out["unknown"].append(key)
        else:
            entry.update(value=float(value), passed=bool(value <= allowed),
                         excess=float(max(0.0, value - allowed)))
        if key == "max_contact_matrix_median_relative_error":
            entry["attribute"] = out["contact_matrix_attribute"]
        out[key] = entry
        if not entry["passed"]:
            out["passed"] = False
            out["failed"].append(key)
    out["checked"] = [k for k in GATE_METRICS if k in out]
    return out


def gate_failure_message(gate: dict, *, charged: bool, epsilon=None, report_path=None) -> str:
    """One plain message naming every failed threshold, its figure against what is allowed."""
    parts = []
    for key in gate["failed"]:
        e = gate[key]
        if e["value"] is None:
            parts.append(f"[gate] {key} = {e['allowed']:g}: {e['reason']}")
        else:
            parts.append(f"[gate] {key}: expected {e['value']:.4g} > allowed {e['allowed']:.4g} "
                         f"(over by {e['excess']:.4g})")
    text = f"release refused ({gate['basis']}): " + "; ".join(parts) + ". No bundle was written."
    if charged:
        text += (" The privacy budget of this attempt" + (f" (epsilon {epsilon:g})" if epsilon is not None else "")
                 + " counts as spent: the noise was drawn on the private data.")
    else:
        text += " No noise was drawn and nothing was charged."
    if report_path is not None:
        text += f" Confidential audit report: {report_path}"
    return text
