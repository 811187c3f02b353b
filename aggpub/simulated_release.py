"""Simulated releases of the supernode table and views, for tests and benchmarks.

:func:`simulate_release` runs, in memory and in numpy, what the pipeline will
run for contact views: the attribute grouping, the true supernode table and
true views, discrete Laplace noise with the stated epsilon split. It is a
stand-in for the pipeline wiring (which counts in the engine and charges a
budget accountant); with a seeded random source its output is not private.
"""

from __future__ import annotations

__all__ = ["SimulatedRelease", "simulate_release", "attribute_codes"]

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from .cells import all_cells, cell_index, possible_pairs
from .released import SuperedgeTruth, release_superedge_counts
from .grouping import group_by_attributes
from .noise.mechanisms import GeometricMechanism
from .estimates.views import combine_codes, true_view_table, view_sensitivity, view_table


def attribute_codes(people: pa.Table, attribute: str, domain=None):
    """``(codes, domain)`` of a person attribute; the domain defaults to its sorted values."""
    col = [str(x) for x in people.column(attribute).to_pylist()]
    domain = sorted(set(col)) if domain is None else [str(x) for x in domain]
    pos = {v: i for i, v in enumerate(domain)}
    try:
        return np.array([pos[x] for x in col], dtype=np.int64), domain
    except KeyError:
        raise ValueError(f"attribute {attribute!r} has a value outside its domain") from None


@dataclass
class SimulatedRelease:
    """The public pieces of a simulated release and the truth they estimate (confidential)."""

    supernodes: pa.Table
    superedges: pa.Table | None
    views: pa.Table
    domains: dict
    layers: list | None
    true_views: dict = field(default_factory=dict)   # view name -> (n_layers, cells) true table
    true_fine: np.ndarray | None = None
    assignment: np.ndarray | None = None
    codes: dict = field(default_factory=dict)
    epsilon: dict = field(default_factory=dict)      # component -> epsilon


def simulate_release(people: pa.Table, u, v, grouping_attributes, view_names, *, min_size: int,
                     hierarchies=None, merge_order=None, layer=None, layers=None, layered_views: bool = True,
                     weights=None, clip=None, epsilon_fine: float | None = 0.5, epsilon_views: float = 0.5,
                     unit: str = "edge", max_contacts=None, source, domains=None) -> SimulatedRelease:
    """Group, count and noise a network the way a release with views would.

    Parameters
    ----------
    people : pyarrow.Table
        One row per person (person ``i`` is row ``i``) with the attribute columns.
    u, v : array_like of int
        Endpoints of every distinct contact.
    grouping_attributes : sequence of str
        Attributes of the supernode grouping (:func:`aggpub.grouping.group_by_attributes`).
    view_names : sequence of str
        Views to release: an attribute, or attributes joined by ``,``.
    min_size, hierarchies, merge_order
        Passed to the grouping.
    layer : array_like of int, optional
        Layer code of every contact (one layer per contact); with ``layers`` (names).
    layered_views : bool
        Release the views per layer (when ``layer`` is given).
    weights : array_like of int, optional
        Clipped integer weights (weighted release: weight totals instead of counts).
    clip : int, optional
        ``w_max`` of the weights (the sensitivity).
    epsilon_fine : float or None
        Epsilon of the supernode table (``None``: not released).
    epsilon_views : float
        Epsilon of all views together, split equally among them.
    unit : {"edge", "person"}
    max_contacts : int, optional
        ``D`` under unit ``person``.
    source : RandomSource
    domains : mapping, optional
        Declared values per attribute (default: the sorted values present).
    """
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    grouping = group_by_attributes(people, grouping_attributes, min_size, hierarchies, merge_order)
    g = np.asarray(grouping.assignment, dtype=np.int64)
    n_groups = grouping.n_supernodes
    weighted = weights is not None
    w = None if weights is None else np.asarray(weights, dtype=np.int64)
    sens = view_sensitivity(unit, max_contacts=max_contacts, clip=clip if weighted else None)
    fine_table = None
    true_fine = None
    eps = {}
    if epsilon_fine:
        ga, gb = g[u], g[v]
        cell = cell_index(np.minimum(ga, gb), np.maximum(ga, gb), n_groups)
        n_cells = n_groups * (n_groups + 1) // 2
        true_fine = np.rint(np.bincount(cell, weights=None if w is None else w.astype(np.float64),
                                        minlength=n_cells)).astype(np.int64)
        ca, cb = all_cells(n_groups)
        if not weighted:
            fine_table, _, _ = release_superedge_counts(SuperedgeTruth(ca, cb, true_fine), grouping.sizes(),
                                                        epsilon_fine, sens, source)
        else:
            mech = GeometricMechanism(epsilon=epsilon_fine, sensitivity=sens)
            noisy = mech.randomise(true_fine, source)
            cap = possible_pairs(grouping.sizes(), ca, cb) * int(clip)
            fine_table = pa.table({"supernode_a": ca, "supernode_b": cb,
                                   "weight_total": np.clip(noisy, 0, cap), "weight_total_unclamped": noisy,
                                   "max_weight_total": cap, "noise_scale": np.full(len(ca), mech.scale)})
        eps["supernode_table"] = float(epsilon_fine)
    domains = dict(domains or {})
    codes = {}
    needed = list(dict.fromkeys(a for name in view_names for a in name.split(",")))
    for a in needed:
        codes[a], domains[a] = attribute_codes(people, a, domains.get(a))
    eps_each = float(epsilon_views) / len(view_names)
    tables, truth = [], {}
    n_layers = len(layers) if layer is not None else 1
    for name in view_names:
        attrs = name.split(",")
        code, k = combine_codes([codes[a] for a in attrs], [len(domains[a]) for a in attrs])
        if layer is not None and layered_views:
            true = true_view_table(code, u, v, k, layer=layer, n_layers=n_layers, weights=w)
        else:
            true = true_view_table(code, u, v, k, weights=w)
        mech = GeometricMechanism(epsilon=eps_each, sensitivity=sens)
        noisy = mech.randomise(true, source)
        values = [""]
        for a in attrs:
            values = [f"{p}|{x}" if p else x for p in values for x in domains[a]]
        tables.append(view_table(name, values, noisy, mech.scale,
                                 layers if true.shape[0] > 1 else None,
                                 column="weight_total" if weighted else "contacts"))
        truth[name] = true
        eps[f"view:{name}"] = eps_each
    return SimulatedRelease(supernodes=grouping.labels, superedges=fine_table, views=pa.concat_tables(tables),
                            domains=domains, layers=list(layers) if layers is not None else None,
                            true_views=truth, true_fine=true_fine, assignment=g, codes=codes, epsilon=eps)
