"""Attribute grouping under unit ``person``: every size decision on noisy fine-cell counts.

Under ``person`` the number of people with given attribute values is private
(one person can be the only one with a value), so the fine cells are the full
product of the declared domains (the first level of each hierarchy), present in
the data or not, and every cell's count is noised before the grouping decides
anything (``docs/privacy.md`` section 4).
"""

from __future__ import annotations

__all__ = ["declared_domains", "public_domain", "group_by_noisy_cells", "MAX_PUBLIC_CELLS"]

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


def declared_domains(policy) -> list:
    """The value domain of each grouping attribute as the policy declares it: the first level of its
    hierarchy (public; no data is read).

    Raises
    ------
    PolicyError
        An attribute has no declared hierarchy, or the domains have too many cells.
    """
    g = policy.grouping
    domains = []
    for a in g.attributes:
        levels = g.hierarchies.get(a)
        if not levels:
            raise PolicyError(f"'grouping.hierarchies.{a}': under unit 'person' every grouping attribute needs "
                              "a declared hierarchy, whose first level lists every possible value (the values "
                              "present in the data are private); an identity level mapping each value to itself will do")
        domains.append(list(levels[0]))
    n_cells = float(np.prod([float(len(d)) for d in domains]))
    if n_cells > MAX_PUBLIC_CELLS:
        raise PolicyError(f"'grouping.attributes': {n_cells:.0f} fine cells under unit 'person' (the product of the "
                          f"declared domains); at most {MAX_PUBLIC_CELLS:,} are supported")
    return domains


def public_domain(people: pa.Table, policy, on_refusal=None) -> list:
    """The declared domains (:func:`declared_domains`), checked against the data.

    Under unit ``person`` the set of values present in the data is itself private
    (one person can be the only one with a value), so the fine cells are the full
    product of declared domains, present in the data or not.

    Raises
    ------
    PolicyError
        The data hold a value outside a declared domain. The message names the
        attribute, never how many people hold such values: whether anyone does is
        private, so ``on_refusal()`` runs first (the pipeline charges the ledger).
    """
    domains = declared_domains(policy)
    for a, domain in zip(policy.grouping.attributes, domains):
        inside = pc.is_in(people.column(a), value_set=pa.array(domain, type=pa.string()))
        if not bool(pc.all(inside).as_py()):
            if on_refusal is not None:
                on_refusal()
            raise PolicyError(f"'grouping.hierarchies.{a}.levels[0]' does not list every value of attribute "
                              f"'{a}' found in the data; the first level must cover every possible value. Take the "
                              "domain from a public codebook (the survey form, a published classification), never "
                              "from this data: this refusal is charged to the lifetime ledger like a release")
    return domains


def domain_rows(attributes, domains) -> pa.Table:
    """One row for every combination of domain values (the public fine cells)."""
    grids = np.meshgrid(*[np.arange(len(d)) for d in domains], indexing="ij")
    return pa.table({a: pa.array(np.asarray(d, dtype=object)[grid.reshape(-1)], type=pa.string())
                     for a, d, grid in zip(attributes, domains, grids)})


def group_by_noisy_cells(network, policy, budget, source, epsilon: float, on_refusal=None) -> Grouping:
    """Attribute grouping for unit ``person``: every size decision on noisy fine-cell counts.

    Every fine cell of the public domain (:func:`public_domain`) gets a noisy count
    (discrete Laplace, sensitivity 1, the ``supernode_sizes`` share); the grouping
    merges on those counts only, and the released sizes are sums of them
    (post-processing). One spend, ``supernode_sizes``, is recorded. A value
    outside the declared domains is refused after ``on_refusal()`` (see
    :func:`public_domain`).
    """
    g = policy.grouping
    people = network.people.select(list(g.attributes))
    domains = public_domain(people, policy, on_refusal)
    # The public cells go first, so the cell order (first appearance) is the domain's, not the data's.
    cells = domain_rows(g.attributes, domains).cast(people.schema)
    padded = pa.concat_tables([cells, people])
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
    return dataclasses.replace(grouping, assignment=grouping.assignment[cells.num_rows:], spends=spends,
                               public=False)
