"""Contact views (issue 13): contacts between the values of attributes, every contact by its exact values.

A *view* of attribute ``X`` counts the contacts between people of value ``a`` and
people of value ``b`` for every unordered pair ``a <= b`` of the declared values,
zeros included, per layer when ``[layers]`` is declared
(:mod:`aggpub.estimates.views`). The statistic releases, with the share of
``components.contact_views`` split equally among its noisy tables:

* ``contact_views``: every view (and combination view), one spend ``contact_views:<name>`` each;
* ``contact_view_weights`` (``weighted = true``): clipped weight totals by view,
  spends ``contact_view_weights:<name>``;
* ``view_people``: people per value of each view, the denominators of per-person
  rates. Exact under unit ``edge`` (the person table is public); under ``person``
  the sums of the grouping's noisy fine-cell counts for grouping attributes
  (post-processing) and, for an attribute outside the grouping, a noisy count per
  value (spend ``view_people:<attribute>``, L1 sensitivity 1).

The value domains are public: declared (``[domains]``, or a hierarchy's first
level) or, under unit ``edge`` only, the values of the public person table. The
sensitivities are in :data:`aggpub.budget.SENSITIVITY` and derived in
``docs/privacy.md`` section 3.3.
"""

from __future__ import annotations

__all__ = ["view_domains", "view_codes", "supernode_values", "views_from_superedges", "count_contact_views",
           "release_contact_views", "VIEW_TABLES"]

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..budget import Spend, equal_split, sensitivity
from ..errors import PolicyError
from ..estimates.views import combine_codes, view_table
from ..noise.mechanisms import GeometricMechanism
from ..policy import view_attributes, view_names

#: The bundle tables this statistic writes.
VIEW_TABLES = ("contact_views", "contact_view_weights", "view_people")


def view_domains(policy, people: pa.Table, on_refusal=None) -> dict:
    """The public value domain of every view attribute, in the order the views list them.

    Declared domains first (``[domains.<attribute>]``, then the first level of a grouping
    attribute's hierarchy under unit ``person``); under unit ``edge`` an undeclared attribute's
    domain is the sorted values of the public person table.

    Raises
    ------
    PolicyError
        The data hold a value outside a declared domain. Under unit ``person`` the message gives
        no figure and ``on_refusal()`` runs first (whether anyone holds such a value is private).
    """
    unit = policy.privacy.unit
    out = {}
    for a in view_attributes(policy):
        col = people.column(a)
        if a in policy.domains:
            domain = list(policy.domains[a])
        elif unit == "person":  # the policy rule guarantees a declared hierarchy
            domain = list(policy.grouping.hierarchies[a][0])
        else:  # unit edge: the public person table's values, in the order of a hierarchy's first level if any
            present = set(str(x) for x in pc.unique(col).to_pylist())
            levels = policy.grouping.hierarchies.get(a) or ({},)
            listed = [v for v in levels[0] if v in present]
            out[a] = listed + sorted(present - set(listed), key=_natural_key)
            continue
        inside = pc.is_in(col, value_set=pa.array(domain, type=pa.string()))
        if not bool(pc.all(inside).as_py()):
            where = f"domains.{a}.values" if a in policy.domains else f"grouping.hierarchies.{a}.levels[0]"
            if unit == "person":
                if on_refusal is not None:
                    on_refusal()
                raise PolicyError(f"'{where}' does not list every value of attribute '{a}' found in the data; "
                                  "declare every possible value from a public codebook, never from this data: this "
                                  "refusal is charged to the lifetime ledger like a release")
            outside = int(np.asarray(pc.invert(inside)).sum())
            raise PolicyError(f"'{where}' does not list every value of attribute '{a}': {outside:,} person(s) "
                              "hold another value")
        out[a] = domain
    return out


def _natural_key(text: str):
    """Sort key reading runs of digits as numbers (``5-9`` before ``10-14``)."""
    import re

    return [(0, int(t), "") if t.isdigit() else (1, 0, t) for t in re.findall(r"\d+|\D+", str(text))]


def _value_names(name: str, domains: dict) -> list:
    out = [""]
    for a in name.split(","):
        out = [f"{p}|{x}" if p else str(x) for p in out for x in domains[a]]
    return out


def view_codes(people: pa.Table, names, domains: dict):
    """``(codes, n_values)`` of every view: each person's (combined) value code (inputs validated)."""
    single = {}
    for a in dict.fromkeys(x for n in names for x in n.split(",")):
        pos = pa.array(domains[a], type=pa.string())
        single[a] = np.asarray(pc.index_in(people.column(a), value_set=pos).to_numpy(zero_copy_only=False),
                               dtype=np.int64)
    codes, sizes = [], []
    for n in names:
        attrs = n.split(",")
        code, k = combine_codes([single[a] for a in attrs], [len(domains[a]) for a in attrs])
        codes.append(code)
        sizes.append(k)
    return codes, sizes


def supernode_values(assignment, code, n_supernodes: int):
    """The value of every supernode when each is pure in ``code``, else ``None`` (inputs already validated).

    A supernode is *pure* when all its people hold the same value; a supernode without people
    (none in practice) gets value 0, which changes nothing below since it has no contacts.

    Parameters
    ----------
    assignment : numpy.ndarray of int
        Supernode of every person.
    code : numpy.ndarray of int
        Value code of every person (same length).
    n_supernodes : int

    Returns
    -------
    numpy.ndarray of int64 or None
    """
    assignment = np.asarray(assignment, dtype=np.int64)
    code = np.asarray(code, dtype=np.int64)
    value = np.zeros(int(n_supernodes), dtype=np.int64)
    value[assignment] = code  # one member's value per supernode (whichever numpy writes last)
    return value if np.array_equal(value[assignment], code) else None


def views_from_superedges(superedges, values, n_values):
    """True view counts (one layer) summed from true superedge counts over pure supernodes.

    When every supernode is pure in a view's attribute (:func:`supernode_values`), every contact
    of superedge cell ``{A, B}`` joins a person of value ``values[A]`` and one of value ``values[B]``,
    so view cell ``{values[A], values[B]}`` is the sum of those superedge cells: the same integers
    the engine counts in its own pass over the contacts (an execution path only; inputs already
    validated).

    Parameters
    ----------
    superedges : SuperedgeTruth
        True superedge counts (every cell, or the non-zero ones of a sparse release).
    values : sequence of numpy.ndarray of int64
        Value of every supernode, one array per view.
    n_values : sequence of int
        Number of values of each view.

    Returns
    -------
    list of numpy.ndarray of int64, shape ``(1, K (K + 1) / 2)``
        As :meth:`aggpub.engines._duckdb.DuckDBEngine.view_counts` with one layer.
    """
    from ..cells import cell_index
    from ..estimates.views import view_cell_count, view_cell_index

    a = np.asarray(superedges.a, dtype=np.int64)
    b = np.asarray(superedges.b, dtype=np.int64)
    weight = np.asarray(superedges.count, dtype=np.float64)  # integers far below 2**53: sums are exact
    out = []
    for value, k in zip(values, n_values):
        if len(value) == int(k) and np.array_equal(value, np.arange(int(k))) and bool(np.all(a <= b)):
            # every supernode holds its own value, in value order: the view cell of (A, B) is the cell itself
            cell = cell_index(a, b, int(k))
        else:
            cell = view_cell_index(value[a], value[b], int(k))
        total = np.bincount(cell, weights=weight, minlength=view_cell_count(k))
        out.append(np.rint(total).astype(np.int64).reshape(1, -1))
    return out


def _true_view_counts(ctx, codes, sizes, n_layers: int) -> list:
    """Each view's true counts: summed from the superedge counts when possible, else counted by the engine."""
    superedges = ctx.counted.get("superedges")
    grouping = ctx.grouping
    if n_layers == 1 and superedges is not None:
        values = [supernode_values(grouping.assignment, c, grouping.n_supernodes) for c in codes]
        if all(v is not None for v in values):
            return views_from_superedges(superedges, values, sizes)
    return ctx.network.engine.view_counts(codes, sizes, n_layers)


def count_contact_views(ctx, option, on_refusal=None):
    """The true views (confidential) and the public description of the views for the manifest.

    Without layers, when the superedge counts are already counted and every supernode is pure in
    every view's values (grouping by attributes that include the view's), the views are summed
    from the superedge counts instead of a second pass over the contacts (the same counts:
    :func:`views_from_superedges`).
    """
    policy = ctx.policy
    network = ctx.network
    names = view_names(option)
    domains = view_domains(policy, network.people, on_refusal)
    codes, sizes = view_codes(network.people, names, domains)
    n_layers = max(1, len(network.layers))
    truth = {"counts": dict(zip(names, _true_view_counts(ctx, codes, sizes, n_layers)))}
    if option.weighted:
        if not network.weighted:
            raise PolicyError("'components.contact_views.weighted': the network was read without a weight column")
        truth["weights"] = dict(zip(names, network.engine.view_counts(codes, sizes, n_layers, clip=option.clip)))
    truth["people"] = {n: np.bincount(c, minlength=k).astype(np.int64) for n, c, k in zip(names, codes, sizes)}
    truth["domains"] = domains
    extra = {"views": [{"name": n, "attributes": n.split(","), "values": len(_value_names(n, domains)),
                        "cells_per_layer": k * (k + 1) // 2, "layered": bool(network.layers),
                        "weighted": bool(option.weighted)} for n, k in zip(names, sizes)],
             "view_domains": {a: list(d) for a, d in domains.items()},
             "layers": ({"column": policy.layers.column, "values": list(network.layers),
                         "rule": "a pair recorded in several layers counts once, in the first of its layers "
                                 "in this order"} if network.layers else None)}
    return truth, extra


def _split_within(epsilon: float, parts: int, spent: float) -> list:
    """``epsilon`` in equal parts whose running sum after ``spent`` (as the budget adds them, one by one)
    never passes ``spent + epsilon``: the views never take more than their share through rounding."""
    import math

    out = equal_split(epsilon, parts)

    def running(ps):
        x = spent
        for p in ps:
            x += p
        return x

    while running(out) > spent + epsilon:
        out[-1] = math.nextafter(out[-1], 0.0)
    return out


def _people_from_fine_cells(grouping, policy, name, domains):
    """People per value of a view of grouping attributes under unit ``person``: sums of noisy fine cells."""
    labels, counts = grouping.noisy_fine_cells
    attrs = list(policy.grouping.attributes)
    cols = [attrs.index(a) for a in name.split(",")]
    values = _value_names(name, domains)
    pos = {v: i for i, v in enumerate(values)}
    key = np.array([pos["|".join(str(lab[j]) for j in cols)] for lab in labels], dtype=np.int64)
    people = np.bincount(key, weights=np.asarray(counts, dtype=np.float64), minlength=len(values))
    terms = np.bincount(key, minlength=len(values))
    return np.rint(people).astype(np.int64), terms


def release_contact_views(ctx, truth, option, epsilon: float):
    """Noise on every view (and weighted view, and people count where needed), ``epsilon`` split equally.

    Returns
    -------
    tables : dict
        ``contact_views``, ``view_people`` and, when weighted, ``contact_view_weights``.
    spends : list of Spend
    mechanisms : dict
        Spend name -> GeometricMechanism.
    """
    policy = ctx.policy
    unit, d_cap = policy.privacy.unit, policy.privacy.max_contacts
    names = list(truth["counts"])
    domains = truth["domains"]
    layers = list(ctx.network.layers) or None
    grouping_attrs = set(policy.grouping.attributes)
    # under person, people per value of an attribute outside the grouping are a noisy release of their own
    own_people = [] if unit == "edge" else [n for n in names if "," not in n and n not in grouping_attrs]
    jobs = [("contact_views", n) for n in names]
    if option.weighted:
        jobs += [("contact_view_weights", n) for n in names]
    jobs += [("view_people", n) for n in own_people]
    parts = _split_within(epsilon, len(jobs), ctx.budget.spent() if ctx.budget is not None else 0.0)
    sens = {"contact_views": sensitivity(unit, "contact_views", d_cap),
            "contact_view_weights": (sensitivity(unit, "contact_view_weights", d_cap, option.clip)
                                     if option.weighted else None),
            "view_people": sensitivity(unit, "view_people") if own_people else None}
    tables = {"contact_views": [], "contact_view_weights": []}
    spends, mechs, noisy_people = [], {}, {}
    for (kind, name), eps in zip(jobs, parts):
        mech = GeometricMechanism(epsilon=eps, sensitivity=sens[kind])
        spend_name = f"{kind}:{name}"
        if kind == "view_people":
            noisy_people[name] = (mech.randomise(truth["people"][name], ctx.source), mech.scale)
        else:
            true = truth["counts" if kind == "contact_views" else "weights"][name]
            noisy = mech.randomise(true, ctx.source)
            tables[kind].append(view_table(name, _value_names(name, domains), noisy, mech.scale,
                                           layers if true.shape[0] > 1 else None,
                                           column="contacts" if kind == "contact_views" else "weight_total"))
        spends.append(Spend.of(spend_name, mech))
        mechs[spend_name] = mech
    out = {"contact_views": pa.concat_tables(tables["contact_views"])}
    if tables["contact_view_weights"]:
        out["contact_view_weights"] = pa.concat_tables(tables["contact_view_weights"])
    out["view_people"] = _people_table(ctx, truth, names, domains, noisy_people)
    return out, spends, mechs


def _people_table(ctx, truth, names, domains, noisy_people) -> pa.Table:
    """``view``, ``value``, ``people``, ``noise_scale`` (0: exact), ``noise_terms`` (noisy counts summed)."""
    policy, grouping = ctx.policy, ctx.grouping
    grouping_attrs = set(policy.grouping.attributes)
    rows = {"view": [], "value": [], "people": [], "noise_scale": [], "noise_terms": []}

    def add(name, counts, scale, terms):
        values = _value_names(name, domains)
        rows["view"] += [name] * len(values)
        rows["value"] += values
        rows["people"].append(np.asarray(counts, dtype=np.int64))
        rows["noise_scale"].append(np.full(len(values), float(scale)))
        rows["noise_terms"].append(np.broadcast_to(np.asarray(terms, dtype=np.int64), (len(values),)))

    for name in names:
        if policy.privacy.unit == "edge":
            add(name, truth["people"][name], 0.0, 1)
        elif name in noisy_people:
            counts, scale = noisy_people[name]
            add(name, counts, scale, 1)
        elif set(name.split(",")) <= grouping_attrs and grouping.noisy_fine_cells is not None:
            counts, terms = _people_from_fine_cells(grouping, policy, name, domains)
            size_spend = next(s for s in grouping.spends if s.name == "supernode_sizes")
            add(name, counts, size_spend.scale, terms)
        # else: a combination with an attribute outside the grouping under person: no people counts
    if not rows["view"]:
        return pa.table({"view": pa.array([], pa.string()), "value": pa.array([], pa.string()),
                         "people": pa.array([], pa.int64()), "noise_scale": pa.array([], pa.float64()),
                         "noise_terms": pa.array([], pa.int64())})
    return pa.table({"view": pa.array(rows["view"], pa.string()), "value": pa.array(rows["value"], pa.string()),
                     "people": pa.array(np.concatenate(rows["people"])),
                     "noise_scale": pa.array(np.concatenate(rows["noise_scale"])),
                     "noise_terms": pa.array(np.concatenate(rows["noise_terms"]).astype(np.int64))})
