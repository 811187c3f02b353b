"""The free pre-flight (``aggpub plan``): what a release would form and how the gate is expected to judge it.

No noise is drawn, nothing is charged, nothing is written, and nothing private
is read: under unit ``edge`` the person table (public there) forms the
supernodes exactly as the release will; under unit ``person`` only the policy is
read (with its ``[assumptions]``). The contacts are never read. Grids of epsilon
and ``min_size`` let a steward choose parameters before touching private data;
the confidential sweep (:mod:`aggpub.sweep`), which compares releases with
the truth, is a different tool, and choosing by it is a data-dependent step.
"""

from __future__ import annotations

__all__ = ["PlanRow", "PlanResult", "run_plan", "plan_policy_at"]

import dataclasses
from dataclasses import dataclass, field

from .errors import PrivacyError
from .gate import GATE_METRICS, evaluate_gate
from .gate.predicted import predicted_metrics
from .policy import ReleasePolicy, read_policy
from .progress import silent


@dataclass
class PlanRow:
    """One setting: the supernodes it forms, each component's noise and the gate's predicted figures."""

    epsilon: float
    min_size: int
    supernodes: dict
    noise: list
    metrics: dict
    gate: dict

    @property
    def verdict(self) -> str:
        """``expected to pass``, ``expected to fail``, ``not predicted`` (some figure needs an assumption),
        or ``no thresholds``."""
        if "error" in self.supernodes:
            return "no grouping: " + self.supernodes["error"]
        if not self.gate["checked"]:
            return "no thresholds"
        if not self.gate["passed"]:
            return "expected to fail"
        return "not predicted" if self.gate["unknown"] else "expected to pass"


@dataclass
class PlanResult:
    """Every setting of the grid, with the notes that say what the prediction rests on."""

    rows: list
    unit: str
    notes: list = field(default_factory=list)

    @property
    def any_expected_to_pass(self) -> bool:
        return any(r.verdict in ("expected to pass", "no thresholds", "not predicted") for r in self.rows)

    def as_dict(self) -> dict:
        return {"unit": self.unit, "notes": self.notes,
                "rows": [dict(dataclasses.asdict(r), verdict=r.verdict) for r in self.rows]}


def plan_policy_at(policy: ReleasePolicy, epsilon: float, min_size: int) -> ReleasePolicy:
    """The policy with another total epsilon and minimum supernode size (and no ledger: nothing is charged)."""
    return policy.replace(privacy=dataclasses.replace(policy.privacy, epsilon=float(epsilon)),
                          grouping=dataclasses.replace(policy.grouping, min_size=int(min_size)), ledger=None)


def run_plan(policy, people=None, *, epsilons=None, min_sizes=None, node=None, progress=None,
             debug: bool = False) -> PlanResult:
    """Predict, for each setting of a grid, the supernodes, the noise and the gate (no noise, no charge).

    Parameters
    ----------
    policy : ReleasePolicy or path
    people : path or pyarrow.Table, optional
        The person table; read only under unit ``edge`` (public there), ignored under ``person``.
    epsilons, min_sizes : sequence, optional
        The grid (default: the policy's own epsilon and min_size).
    node : str, optional
        The person id column (default: the policy's ``input.node``).

    Returns
    -------
    PlanResult
    """
    progress = progress or silent
    if not isinstance(policy, ReleasePolicy):
        policy = read_policy(policy)
    unit = policy.privacy.unit
    notes = []
    table = None
    if unit == "edge":
        if people is None:
            from .errors import UsageError

            raise UsageError("the plan under unit 'edge' needs the person file (--nodes); it is public under "
                             "this unit and is the only input read")
        from .ingest import load_people, policy_attributes

        progress("reading the person table (public under unit 'edge'; the contacts are not read)")
        table = load_people(people, node=node or policy.input.node, attributes=policy_attributes(policy),
                            debug=debug)
    elif people is not None:
        notes.append("the person file was not read: under unit 'person' who is in the data is private; the "
                     "plan uses only the policy and its [assumptions]")
    rows = []
    for eps in sorted(set(epsilons or [policy.privacy.epsilon])):
        for k in sorted(set(min_sizes or [policy.grouping.min_size])):
            pol = plan_policy_at(policy, eps, k)
            try:
                metrics = predicted_metrics(pol, table)
            except PrivacyError as exc:  # no supernodes of min_size can be formed (public inputs only)
                metrics = {"supernodes": {"count": 0, "error": str(exc)}, "noise": [], "notes": [],
                           "why": {m: str(exc) for m, _ in GATE_METRICS.values()}}
            gate = evaluate_gate(pol, metrics, basis="predicted before any noise from the policy and public inputs",
                                 unknown_fails=False)
            if "error" in metrics["supernodes"]:
                gate.update(passed=False, failed=list(gate["checked"]) or ["grouping"])
            rows.append(PlanRow(epsilon=float(eps), min_size=int(k), supernodes=metrics["supernodes"],
                                noise=metrics["noise"], gate=gate,
                                metrics={m: metrics.get(m) for m, _ in GATE_METRICS.values()}))
            for n in metrics.get("notes", []):
                if n not in notes:
                    notes.append(n)
            by_reason = {}
            for m, why in metrics.get("why", {}).items():
                by_reason.setdefault(why, []).append(m)
            for why, names in by_reason.items():
                line = f"not predicted ({', '.join(names)}): {why}"
                if line not in notes:
                    notes.append(line)
            count = rows[-1].supernodes.get("count")
            progress(f"epsilon {eps:g}, min_size {k}: "
                     + (f"{count:,} supernodes" if count is not None else "supernodes not formed (private sizes)")
                     + f"; gate {rows[-1].verdict}")
    return PlanResult(rows=rows, unit=unit, notes=notes)
