"""Attribute grouping under unit ``person``: every size decision on noisy fine-cell counts.

Under ``person`` the number of people with given attribute values is private
(one person can be the only one with a value), so the fine cells are the full
product of the declared domains (the first level of each hierarchy), present in
the data or not, and every cell's count is noised before the grouping decides
anything (``docs/privacy.md`` section 4).
"""

from __future__ import annotations

__all__ = ["public_domain", "group_by_noisy_cells", "MAX_PUBLIC_CELLS"]

import dataclasses

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..budget import Spend, sensitivity
from ..errors import PolicyError
from ..released.sizes import release_cell_counts
from ._common import Grouping
from .attributes import group_by_attributes

#: Most fine attribute cells a public domain may have under unit ``person`` (every cell gets noise).
MAX_PUBLIC_CELLS = 1_000_000


def public_domain(people: pa.Table, policy) -> list:
    """The public value domain of each grouping attribute: the first level of its hierarchy.

    Under unit ``person`` the set of values present in the data is itself private
    (one person can be the only one with a value), so the fine cells are the full
    product of declared domains, present in the data or not.

    Raises
    ------
    PolicyError
        An attribute has no declared hierarchy, or the data hold values outside it
        (only the count of such people is given).
    """
    g = policy.grouping
    domains = []
    for a in g.attributes:
        levels = g.hierarchies.get(a)
        if not levels:
            raise PolicyError(f"'grouping.hierarchies.{a}': under unit 'person' every grouping attribute needs "
                              "a declared hierarchy, whose first level lists every possible value (the values "
                              "present in the data are private); an identity level mapping each value to itself will do")
        domain = list(levels[0])
        inside = pc.is_in(people.column(a), value_set=pa.array(domain, type=pa.string()))
        outside = people.num_rows - int(pc.sum(inside).as_py() or 0)
        if outside:
            raise PolicyError(f"'grouping.hierarchies.{a}.levels[0]' does not list the value of attribute '{a}' "
                              f"of {outside:,} person(s); the first level must cover every possible value")
        domains.append(domain)
    n_cells = float(np.prod([float(len(d)) for d in domains]))
    if n_cells > MAX_PUBLIC_CELLS:
        raise PolicyError(f"'grouping.attributes': {n_cells:.0f} fine cells under unit 'person' (the product of the "
                          f"declared domains); at most {MAX_PUBLIC_CELLS:,} are supported")
    return domains


def _domain_rows(attributes, domains) -> pa.Table:
    """One row for every combination of domain values (the public fine cells)."""
    grids = np.meshgrid(*[np.arange(len(d)) for d in domains], indexing="ij")
    return pa.table({a: pa.array(np.asarray(d, dtype=object)[grid.reshape(-1)], type=pa.string())
                     for a, d, grid in zip(attributes, domains, grids)})


def group_by_noisy_cells(network, policy, budget, source, epsilon: float) -> Grouping:
    """Attribute grouping for unit ``person``: every size decision on noisy fine-cell counts.

    Every fine cell of the public domain (:func:`public_domain`) gets a noisy count
    (discrete Laplace, sensitivity 1, the ``supernode_sizes`` share); the grouping
    merges on those counts only, and the released sizes are sums of them
    (post-processing). One spend, ``supernode_sizes``, is recorded.
    """
    g = policy.grouping
    people = network.people.select(list(g.attributes))
    domains = public_domain(people, policy)
    # The public cells go first, so the cell order (first appearance) is the domain's, not the data's.
    domain_rows = _domain_rows(g.attributes, domains).cast(people.schema)
    padded = pa.concat_tables([domain_rows, people])
    sens = sensitivity("person", "supernode_sizes")
    planned = Spend(name="supernode_sizes", epsilon=epsilon, sensitivity=sens, mechanism="discrete_laplace",
                    scale=sens / epsilon)
    budget.check(planned)  # check before any noise is drawn
    spends = []

    def noisy_counts(padded_counts):
        # every public cell appears once among the padding rows: subtract it to get the true counts
        noisy, spend, _ = release_cell_counts(np.asarray(padded_counts, dtype=np.int64) - 1, epsilon,
                                              source, sens)
        spends.append(spend)
        return noisy

    grouping = group_by_attributes(padded, g.attributes, g.min_size, g.hierarchies, g.merge_order,
                                   cell_counts=noisy_counts)
    return dataclasses.replace(grouping, assignment=grouping.assignment[domain_rows.num_rows:], spends=spends,
                               public=False)
