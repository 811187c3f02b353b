"""The grouping stage: the policy's method, run (the one place that dispatches on it)."""

from __future__ import annotations

__all__ = ["make_grouping"]

from ..errors import PolicyError, PrivacyError
from ._common import Grouping
from .attributes import group_by_attributes


def make_grouping(network, policy, budget, source, epsilons, on_refusal=None) -> Grouping:
    """Run the policy's grouping method (the grouping stage).

    ``on_refusal()`` runs before a refusal that depends on private data under unit
    ``person`` (a value outside the declared domains); the pipeline charges the ledger.
    """
    g = policy.grouping
    if g.method == "attributes":
        if policy.privacy.unit != "edge":
            from .noisy_cells import group_by_noisy_cells

            return group_by_noisy_cells(network, policy, budget, source, epsilons["supernode_sizes"], on_refusal)
        return group_by_attributes(network.people, g.attributes, g.min_size, g.hierarchies, g.merge_order)
    if g.method in ("structure", "attributes+structure"):  # private: spends the grouping share (issue 5)
        from .structure import group_by_structure

        return group_by_structure(network, g.min_size, epsilons.get("grouping", 0.0), source, tiers=g.tiers,
                                  rounds=g.rounds, unit=policy.privacy.unit,
                                  attributes=g.attributes if g.method == "attributes+structure" else (),
                                  hierarchies=g.hierarchies, merge_order=g.merge_order)
    if g.method in ("given", "random") and policy.privacy.unit != "edge":
        raise PrivacyError(f"grouping method '{g.method}' is only available under privacy unit 'edge': under "
                           "'person' the supernode sizes of the map or partition are private")
    if g.method == "given":
        from .given import group_by_map, read_group_map

        if network.ids is None:
            raise PolicyError("'grouping.map': this engine does not keep person ids, so the map cannot be joined")
        return group_by_map(network.ids, read_group_map(g.map_path), g.min_size, name=str(g.map_path))
    if g.method == "random":
        from .random_groups import group_at_random

        return group_at_random(network.n_people, g.min_size, source)
    raise PolicyError(f"'grouping.method' = '{g.method}' is not available in this version")
