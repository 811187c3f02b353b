"""The pre-flight: the gate's figures predicted from the policy and public inputs, before any noise.

A release whose gate is expected to fail should be stopped before noise is
drawn and budget spent. The prediction may read only what is public:

* under unit ``edge`` the person table (who is in the data, their attributes):
  the supernodes are formed exactly as the release will form them (for the
  public grouping methods);
* under unit ``person`` nothing but the policy: the people are a stand-in of
  ``assumptions.people`` persons spread evenly over the declared domains.

The contacts are never read. They are a stand-in too: ``assumptions.contacts_per_person``
contacts per person (a public planning figure: the survey's design, a published
study), spread over the supernode pairs in proportion to their possible pairs
(homogeneous mixing). The prediction is the figure :func:`aggpub.gate.released.released_metrics`
computes on that stand-in release: what the gate is expected to find if the
network looks like the assumptions say. Without the assumptions the relative
errors and degree distances cannot be predicted, and the pre-flight says so.
"""

from __future__ import annotations

__all__ = ["Assumptions", "StandIn", "stand_in_release", "predicted_metrics"]

from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from ..budget import sensitivity
from ..cells import all_cells, possible_pairs
from ..errors import PolicyError
from .released import released_metrics


@dataclass(frozen=True)
class Assumptions:
    """Public planning figures the prediction may use (``[assumptions]`` in a policy)."""

    people: int | None = None
    contacts_per_person: float | None = None


def _assumptions(policy) -> Assumptions:
    a = getattr(policy, "assumptions", None)
    if a is None:
        return Assumptions()
    return Assumptions(people=getattr(a, "people", None), contacts_per_person=getattr(a, "contacts_per_person", None))


@dataclass
class StandIn:
    """A release built from public inputs and assumptions: what the pre-flight judges."""

    tables: dict
    manifest: dict
    n_people: int
    notes: list = field(default_factory=list)
    grouping_exact: bool = True  # the supernodes are the ones the release will form


def _stand_in_people(policy, assumptions: Assumptions):
    """Person unit: ``assumptions.people`` persons spread evenly over the declared domains (public)."""
    from ..grouping.noisy_cells import domain_rows, declared_domains

    if assumptions.people is None:
        raise PolicyError("the pre-flight under unit 'person' needs 'assumptions.people' (a public figure for "
                          "the population size, e.g. from a census); the person file is private and is not read")
    g = policy.grouping
    cells = domain_rows(g.attributes, declared_domains(policy))
    reps = np.full(cells.num_rows, assumptions.people // max(cells.num_rows, 1), dtype=np.int64)
    reps[: assumptions.people - int(reps.sum())] += 1
    return cells.take(pa.array(np.repeat(np.arange(cells.num_rows), reps)))


def _stand_in_grouping(policy, people: pa.Table | None, assumptions: Assumptions):
    """Sizes and labels of the supernodes, from public information only; and whether they are exact."""
    from ..grouping import group_by_attributes

    g = policy.grouping
    unit = policy.privacy.unit
    notes = []
    if unit == "person":
        people = _stand_in_people(policy, assumptions)
        notes.append(f"people: a stand-in of {people.num_rows:,} persons (assumptions.people) spread evenly over "
                     "the declared attribute domains; the person file is private under unit 'person' and was "
                     "not read")
    elif people is None:
        raise PolicyError("the pre-flight under unit 'edge' needs the person table (public under that unit)")
    if g.method in ("attributes", "attributes+structure"):
        grouping = group_by_attributes(people.select(list(g.attributes)), g.attributes, g.min_size,
                                       g.hierarchies, g.merge_order)
        sizes, labels = grouping.sizes(), grouping.labels
        exact = unit == "edge" and g.method == "attributes"
    else:  # given / random / structure: the same number of people in groups of about min_size
        n = people.num_rows
        k = max(1, n // max(g.min_size, 1))
        sizes = np.full(k, n // k, dtype=np.int64)
        sizes[: n - int(sizes.sum())] += 1
        labels = pa.table({"supernode": pa.array(np.arange(k, dtype=np.int64))})
        exact = False
    if g.method == "attributes+structure":  # private split of each attribute cell into degree tiers
        parts = np.minimum(g.tiers, np.maximum(1, sizes // g.min_size))
        new_sizes = np.concatenate([np.full(p, s // p) + (np.arange(p) < s % p) for s, p in zip(sizes, parts)])
        labels = labels.take(pa.array(np.repeat(np.arange(len(sizes)), parts)))
        labels = labels.set_column(0, "supernode", pa.array(np.arange(len(new_sizes), dtype=np.int64)))
        sizes = new_sizes.astype(np.int64)
    if not exact:
        notes.append(f"supernodes: grouping method '{g.method}' under unit '{unit}' reads private data (or "
                     "draws at random); the pre-flight uses a stand-in of the same number of people in groups "
                     "of about min_size")
    return sizes.astype(np.int64), labels, exact, people, notes


def stand_in_release(policy, people: pa.Table | None = None) -> StandIn:
    """The stand-in release the pre-flight judges (no noise; public inputs and assumptions only).

    Parameters
    ----------
    policy : ReleasePolicy
    people : pyarrow.Table, optional
        The person table (unit ``edge`` only: it is public there).
    """
    from ..policy import epsilon_shares

    assumptions = _assumptions(policy)
    # people: the public person table under unit edge, the stand-in spread over the declared domains under person
    sizes, labels, exact, people, notes = _stand_in_grouping(policy, people, assumptions)
    n_people = people.num_rows
    unit, D = policy.privacy.unit, policy.privacy.max_contacts
    # the split the release will use: it depends on the number of people (whether an unset triangle count
    # is on), which is public under unit edge only; under person the release splits without it (None)
    public_people = n_people if unit == "edge" else None
    shares = epsilon_shares(policy, public_people)
    comps = []
    for name in ("superedge_counts", "degree_histograms"):
        option = getattr(policy.components, name)
        if option.enabled:
            comps.append({"name": name, "epsilon": shares[name], "sensitivity": sensitivity(unit, name, D)})
    tables = {"supernodes": labels.add_column(1, "size", pa.array(sizes))}
    manifest = {"components": comps, "max_contacts": D}
    c = assumptions.contacts_per_person
    if c is not None:
        a, b = all_cells(len(sizes))
        cap = possible_pairs(sizes, a, b)
        expected = c * n_people / 2.0 * cap / max(float(cap.sum()), 1.0)
        counts = np.rint(expected).astype(np.int64)
        tables["superedges"] = pa.table({"supernode_a": a, "supernode_b": b, "edge_count": counts,
                                         "edge_count_unclamped": counts, "possible_pairs": cap})
        notes.append(f"contacts: {c:g} per person (assumptions.contacts_per_person), spread over supernode pairs "
                     "in proportion to their possible pairs; the edge file is never read")
        if policy.components.degree_histograms.enabled:
            tables["degree_histograms"] = _stand_in_histograms(sizes, c, policy.components.degree_histograms.max_degree)
        _stand_in_view(policy, people, c, n_people, public_people, tables, manifest, notes)
    return StandIn(tables=tables, manifest=manifest, n_people=int(n_people), notes=notes, grouping_exact=exact)


def _stand_in_view(policy, people, c, n_people, public_people, tables, manifest, notes) -> None:
    """The released view of the gate's attribute, when the release will have one: homogeneous mixing.

    The release's gate reads the contact matrix from that view (:func:`aggpub.gate.released.released_metrics`),
    so the pre-flight predicts it from the same table: ``c * n / 2`` contacts spread over the pairs of values
    in proportion to their possible pairs, split evenly over the declared layers, and the view's own noise.
    """
    from ..policy import view_names
    from ..released.contact_views import view_codes, view_domains
    from . import gate_attribute

    option = policy.components.contact_views
    attr = gate_attribute(policy)
    if people is None or not option.enabled or attr not in view_names(option):
        return
    noise = {x["name"]: x for x in _noise_of(policy, public_people)}
    spend = noise.get(f"contact_views:{attr}")
    if spend is None:
        return
    from ..estimates.views import view_cells, view_table

    domains = view_domains(policy, people)
    (code,), (k,) = view_codes(people, [attr], domains)
    per = np.bincount(code[code >= 0], minlength=k).astype(np.float64)
    a, b = view_cells(k)
    pairs = np.where(a == b, per[a] * (per[a] - 1) / 2.0, per[a] * per[b])
    expected = c * n_people / 2.0 * pairs / max(float(pairs.sum()), 1.0)
    layers = list(policy.layers.values or ())
    n_layers = max(1, len(layers))
    counts = np.rint(np.tile(expected / n_layers, (n_layers, 1))).astype(np.int64)
    tables["contact_views"] = view_table(attr, domains[attr], counts, spend["scale"], layers or None)
    manifest["components"].append({k2: spend[k2] for k2 in ("name", "epsilon", "sensitivity")})
    manifest["layers"] = {"values": layers}
    notes.append(f"contact matrix by '{attr}': predicted from its released view (its people per value from "
                 "the person table under unit 'edge', the declared domain under 'person'; contacts spread over "
                 "the pairs of values in proportion to their possible pairs)")


def _stand_in_histograms(sizes, c: float, cap: int) -> pa.Table:
    """Every supernode's members with Poisson(c) contacts, binned 0..cap-1 and 'cap or more'."""
    from scipy import stats

    pmf = stats.poisson.pmf(np.arange(cap), c)
    pmf = np.append(pmf, max(0.0, 1.0 - pmf.sum()))
    people = np.floor(np.outer(sizes, pmf)).astype(np.int64)
    people[:, int(np.argmax(pmf))] += sizes - people.sum(axis=1)  # rows add up to the sizes
    g, nb = people.shape
    return pa.table({"supernode": np.repeat(np.arange(g), nb), "degree_bin": np.tile(np.arange(nb), g),
                     "people": people.reshape(-1)})


def _noise_of(policy, n_people: int | None = None) -> list:
    """Every budgeted statistic's noise as the release will draw it: name, mechanism, epsilon, sensitivity, scale.

    Reads the policy and, under unit ``edge``, the public number of people ``n_people`` (it decides whether
    an unset triangle count is on, and so the split); ``None`` under ``person``, as the release does. The
    names are the manifest's spend names (one ``contact_views:<view>`` per view). The private grouping's
    own rounds (``grouping.epsilon_share``) are not listed.
    """
    from ..budget import equal_split
    from ..noise.ladder import LadderMechanism
    from ..noise.mechanisms import GeometricMechanism
    from ..policy import epsilon_shares, view_names

    unit, D = policy.privacy.unit, policy.privacy.max_contacts
    shares = epsilon_shares(policy, n_people)
    out = []

    def add(name, eps, sens):
        m = GeometricMechanism(epsilon=eps, sensitivity=sens)
        out.append({"name": name, "mechanism": m.name, "epsilon": eps, "sensitivity": float(sens),
                    "scale": float(m.scale)})

    for name, eps in shares.items():
        option = getattr(policy.components, name, None)
        if option is None:  # "grouping": the private grouping's rounds
            continue
        if name == "contact_views":
            names = view_names(option)
            grouping_attrs = set(policy.grouping.attributes)
            jobs = [("contact_views", n) for n in names]
            if option.weighted:
                jobs += [("contact_view_weights", n) for n in names]
            if unit == "person":
                jobs += [("view_people", n) for n in names if "," not in n and n not in grouping_attrs]
            for (kind, view), part in zip(jobs, equal_split(eps, len(jobs))):
                add(f"{kind}:{view}", part, sensitivity(unit, kind, D, option.clip))
        elif name == "triangle_count":
            m = LadderMechanism(epsilon=eps)
            out.append({"name": name, "mechanism": "ladder", "epsilon": eps, "sensitivity": float(m.sensitivity),
                        "scale": float(m.scale)})
        else:
            add(name, eps, sensitivity(unit, name, D, option.clip if name == "weight_totals" else None))
    return out


def predicted_metrics(policy, people: pa.Table | None = None) -> dict:
    """The gate's figures predicted before any noise (see the module docstring).

    Returns
    -------
    dict
        A metrics table (:func:`aggpub.gate.released.released_metrics`) with ``notes``,
        ``supernodes`` (count and sizes of the stand-in), ``grouping_exact`` and ``noise``.
    """
    from . import gate_attribute

    if policy.privacy.unit == "person" and _assumptions(policy).people is None:
        why = ("needs 'assumptions.people' (a public figure for the population, e.g. a census): under unit "
               "'person' the person file is private and is not read before the noise")
        out = {k: None for k in ("superedge_median_relative_error", "contact_matrix_median_relative_error",
                                 "degree_ks", "degree_wasserstein1")}
        out.update(why={k: why for k in out}, contact_matrix_attribute=gate_attribute(policy),
                   supernodes={"count": None, "note": "not formed: the sizes are private under unit 'person'"},
                   grouping_exact=False, notes=[], noise=_noise_of(policy))
        return out
    stand = stand_in_release(policy, people)
    if "superedges" in stand.tables:
        out = released_metrics(stand.tables, stand.manifest, policy)
    else:
        why = ("needs 'assumptions.contacts_per_person' (a public planning figure); the contacts are private "
               "and are never read before the noise")
        out = {k: None for k in ("superedge_median_relative_error", "contact_matrix_median_relative_error",
                                 "degree_ks", "degree_wasserstein1")}
        out["why"] = {k: why for k in out}
        out["contact_matrix_attribute"] = gate_attribute(policy)
    sizes = np.asarray(stand.tables["supernodes"].column("size").to_numpy())
    out["supernodes"] = {"count": int(len(sizes)), "size_min": int(sizes.min()), "size_median": float(np.median(sizes)),
                         "size_max": int(sizes.max()), "people": stand.n_people}
    out["grouping_exact"] = stand.grouping_exact
    out["notes"] = stand.notes
    out["noise"] = _noise_of(policy, stand.n_people if policy.privacy.unit == "edge" else None)
    return out
