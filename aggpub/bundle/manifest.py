"""The manifest of a bundle: what was released, under which guarantee, with which spends.

Built from public values only: the policy as applied, the budget's spends, the
grouping's public description and the row counts of the released tables.
"""

from __future__ import annotations

__all__ = ["build_manifest", "public_policy", "applied_policy", "grouping_labels"]

from datetime import datetime, timezone

from .._version import BUNDLE_FORMAT, __version__
from .guide import CAUTIONS, DEFERENCE


def applied_policy(policy, *, source=None, target=None, node=None, weight=None, drop_unknown=None):
    """The policy with the command line's input options in its ``[input]`` section (they override it).

    The manifest records the policy as applied (:func:`public_policy`), so the
    options given on the command line appear there, not only the file's.
    """
    import dataclasses

    from ..ingest import policy_weight_column

    inp = policy.input
    applied = dataclasses.replace(inp, source=source or inp.source, target=target or inp.target,
                                  node=node or inp.node,
                                  weight=policy_weight_column(policy, weight or inp.weight),
                                  drop_unknown=inp.drop_unknown if drop_unknown is None else drop_unknown)
    return policy if applied == inp else policy.replace(input=applied)


def public_policy(policy) -> dict:
    """The policy as applied, as the manifest records it: no internal file path.

    The ledger appears as its dataset id and lifetime cap (its file stays with the
    steward); a given person -> supernode map as its file name only; the policy
    file's own location not at all.
    """
    from pathlib import Path

    from ..policy import policy_to_dict

    d = policy_to_dict(policy)
    if d.get("ledger"):
        d["ledger"] = {"dataset": d["ledger"]["dataset"], "lifetime_epsilon": d["ledger"]["lifetime_epsilon"]}
    if d.get("grouping", {}).get("map_path"):
        d["grouping"]["map_path"] = Path(d["grouping"]["map_path"]).name
    return d


def grouping_labels(grouping, attributes) -> dict:
    """Each grouping attribute's distinct values in the supernode labels, in supernode order.

    The labels are released in ``supernodes.parquet`` (public values or values the
    grouping chose from noisy counts), so this repeats released values only; the
    reader's guide names them.
    """
    labels = grouping.labels
    out = {}
    for a in attributes:
        if a in labels.column_names:
            out[a] = list(dict.fromkeys(str(v) for v in labels.column(a).to_pylist()))
    return out


def build_manifest(policy, grouping, budget, source, tables: dict, *, sizes_exact: bool, extra: dict,
                   ledger_charge=None, uncharged: str = "") -> dict:
    """The manifest dict of a release (without ``files`` and ``manifest_sha256``, added when written).

    Parameters
    ----------
    policy : ReleasePolicy
    grouping : Grouping
    budget : ReleaseBudget
        After every spend of the release.
    source : RandomSource
        The release's randomness (``seeded`` marks a test bundle as not private).
    tables : dict
        Name -> released Arrow table.
    sizes_exact : bool
        True when the sizes are public (unit ``edge``), False when they are noisy.
    extra : dict
        Fields added by a statistic (the sparse release's threshold).
    ledger_charge : Charge, optional
        The lifetime ledger's charge of this release.
    uncharged : str
        Why no ledger was charged (when ``ledger_charge`` is ``None``).
    """
    unit = policy.privacy.unit
    manifest = {
        "format": BUNDLE_FORMAT,
        "tool_version": __version__,
        "created_utc": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "title": policy.title,
        # the dataset whose lifetime budget this release belongs to (the policy's [ledger]), or None
        "dataset": policy.ledger.dataset if policy.ledger is not None else None,
        "policy": public_policy(policy),
        "privacy_unit": unit,
        "max_contacts": policy.privacy.max_contacts,
        "epsilon_total": policy.privacy.epsilon,
        "epsilon_spent": budget.spent(),
        "delta": 0.0,
        "min_size": policy.grouping.min_size,
        "seeded": source.seeded,
        "randomness": source.description,
        "components": [s.as_dict() for s in budget.spends],
        "sizes_exact": bool(sizes_exact),
        "grouping_method": grouping.method,
        "grouping_attributes": list(policy.grouping.attributes),
        "grouping_public": grouping.public,
        "grouping_notes": list(grouping.notes),
        "grouping_labels": grouping_labels(grouping, policy.grouping.attributes),
        "rows": {name: t.num_rows for name, t in tables.items()},
        "cautions": CAUTIONS + " " + DEFERENCE,
    }
    manifest.update(extra)
    if source.seeded:
        manifest["warning"] = "seeded: reproducible noise, NOT private; for tests only"
    if ledger_charge is not None:
        manifest["ledger"] = ledger_charge.as_dict()
        manifest["accounting"] = {"charged": True, "dataset": ledger_charge.dataset}
    else:
        manifest["accounting"] = {"charged": False, "why": uncharged}
    return manifest
