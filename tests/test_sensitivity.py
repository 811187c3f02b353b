"""Brute-force neighbour tests of every declared L1 sensitivity (``aggpub.budget.SENSITIVITY``).

For many small random networks (6 to 12 people, random attributes and a fixed
public grouping) every neighbour is built -- under unit ``edge`` each contact
removed and each missing contact added; under unit ``person`` each person
removed with all of their contacts, on networks that keep the contact cap D --
and the true component is computed by the project's own code path (the DuckDB
engine over Arrow tables, the pipeline's fine-cell counting for sizes). The
L1 change never exceeds the declared sensitivity, and the largest change seen
equals it (the bound is tight, not padded).

To keep this fast, all neighbours of one network are counted in ONE engine run:
they are laid side by side as a disjoint union, copy ``k`` using supernode ids
``k*G .. k*G+G-1``. No contact crosses copies, so each copy's counts are exactly
what a separate run would give (checked in
``test_disjoint_union_matches_separate_runs``).

Derivations: ``docs/privacy.md``.
"""

from __future__ import annotations

import types

import numpy as np
import pyarrow as pa
import pytest

from aggpub import budget as comp
from aggpub.cells import cell_index
from aggpub.grouping import noisy_cells
from aggpub.engines._duckdb import DuckDBEngine
from aggpub.errors import PrivacyError
from aggpub.ingest import load_network
from aggpub.policy import parse_policy
from aggpub.released.degree_sequences import sorted_sequences

CLIP = 3  # w_max of the weight totals in these tests
N_NETWORKS = 30


# --------------------------------------------------------------------------- helpers


def _network(rng, n_people, p_edge, max_contacts=None):
    """A random undirected network: (edge array (m, 2) u < v, weights (m,))."""
    iu, iv = np.triu_indices(n_people, 1)
    keep = rng.random(len(iu)) < p_edge
    u, v = iu[keep], iv[keep]
    if max_contacts is not None:  # build a network that keeps the promise D (test input only)
        order = rng.permutation(len(u))
        deg = np.zeros(n_people, dtype=int)
        ok = []
        for e in order:
            if deg[u[e]] < max_contacts and deg[v[e]] < max_contacts:
                deg[u[e]] += 1
                deg[v[e]] += 1
                ok.append(e)
        ok = np.sort(np.array(ok, dtype=int))
        u, v = u[ok], v[ok]
    # weights: integers and halves around and above the clip bound, so clipping and rounding both bind
    w = rng.integers(0, 4 * CLIP + 1, len(u)) / 2.0
    return np.stack([u, v], axis=1), w


def _hub_network(rng, n_people, max_contacts):
    """Person 0 with D contacts who have no other contact (the person-unit worst case), plus noise edges."""
    d = min(max_contacts, n_people - 1)
    edges = [(0, j) for j in range(1, d + 1)]
    rest = n_people - d - 1
    if rest >= 2:  # contacts among the others, keeping the cap
        e_rest, _ = _network(rng, rest, 0.5, max_contacts=max_contacts)
        edges += [(int(a) + d + 1, int(b) + d + 1) for a, b in e_rest]
    e = np.array(edges, dtype=int)
    w = rng.integers(CLIP, 2 * CLIP + 1, len(e)).astype(float)
    return e, w


def _union_counts(copies, group, n_groups, cap):
    """Count every copy in one engine run.

    ``copies``: list of (people kept: int array, edges (m, 2), weights (m,)).
    Returns dict of arrays shaped (n_copies, cells): superedge counts, degree
    histograms (flattened), weight totals.
    """
    node, grp, src, dst, wts = [], [], [], [], []
    for k, (kept, e, w) in enumerate(copies):
        node += [f"{k}_{i}" for i in kept]
        grp += [k * n_groups + int(group[i]) for i in kept]
        src += [f"{k}_{i}" for i in e[:, 0]]
        dst += [f"{k}_{i}" for i in e[:, 1]]
        wts += list(map(float, w))
    people = pa.table({"node": node, "g": [str(x) for x in grp]})
    edges = pa.table({"source": src, "target": dst, "w": pa.array(wts, type=pa.float64())})
    net = load_network(edges, people, weight="w", attributes=["g"], engine=DuckDBEngine(threads=1))
    assignment = np.array(grp, dtype=np.int32)
    K, G = len(copies), n_groups
    n_cells = G * (G + 1) // 2

    def scatter(a, b, val):
        out = np.zeros((K, n_cells), dtype=np.int64)
        k = a // G
        assert np.array_equal(k, b // G), "a contact crossed copies"
        out[k, cell_index(a % G, b % G, G)] = val
        return out

    se = scatter(*net.engine.superedge_counts(assignment))
    wt = scatter(*net.engine.weight_totals(assignment, CLIP))
    dh = net.engine.degree_histograms(assignment, K * G, cap).reshape(K, G * (cap + 1))
    out = {"superedge_counts": se, "weight_totals": wt, "degree_histograms": dh}
    if len({len(kept) for kept, _, _ in copies}) == 1:  # same people in every copy (unit edge)
        # every supernode's sorted degrees, by the release's own code (copy k holds supernodes k*G .. k*G+G-1)
        seq = sorted_sequences(net.engine.degrees(len(node)), assignment, K * G)
        out["degree_sequences"] = seq.values.reshape(K, -1)
    net.engine.close()
    return out


def _edge_neighbours(n, e, w, rng):
    """Every network at edge distance 1: each contact removed, each missing contact added."""
    kept = np.arange(n)
    present = {(int(a), int(b)) for a, b in e}
    out = []
    for i in range(len(e)):
        out.append((kept, np.delete(e, i, axis=0), np.delete(w, i)))
    for a in range(n):
        for b in range(a + 1, n):
            if (a, b) not in present:
                new_w = rng.integers(0, 4 * CLIP + 1) / 2.0
                out.append((kept, np.vstack([e, [[a, b]]]), np.append(w, new_w)))
    return out


def _person_neighbours(n, e, w):
    """Every network with one person removed together with all of their contacts."""
    out = []
    for p in range(n):
        keep_edge = (e[:, 0] != p) & (e[:, 1] != p)
        out.append((np.delete(np.arange(n), p), e[keep_edge], w[keep_edge]))
    return out


def _max_l1(base, neighbours):
    return {name: int(np.abs(neighbours[name] - base[name][0]).sum(axis=1).max()) for name in base}


def _declared(unit, component, D=None):
    return comp.sensitivity(unit, component, max_contacts=D, clip=CLIP)


# --------------------------------------------------------------------------- the engine path itself


def test_disjoint_union_matches_separate_runs():
    """The side-by-side trick gives exactly what one engine run per network gives."""
    rng = np.random.default_rng(7)
    n, G, cap = 9, 3, 3
    group = rng.integers(0, G, n)
    e, w = _network(rng, n, 0.4)
    copies = _edge_neighbours(n, e, w, rng)[:5]
    together = _union_counts(copies, group, G, cap)
    for k, c in enumerate(copies):
        alone = _union_counts([c], group, G, cap)
        for name in together:
            assert np.array_equal(together[name][k], alone[name][0]), name


# --------------------------------------------------------------------------- unit edge


@pytest.fixture(scope="module")
def edge_maxima():
    """Largest L1 change per component over N_NETWORKS random networks and all their edge neighbours."""
    rng = np.random.default_rng(20261201)
    seen = {"superedge_counts": 0, "degree_histograms": 0, "weight_totals": 0, "supernode_sizes": 0,
            "degree_sequences": 0}
    per_network = []
    for _ in range(N_NETWORKS):
        n = int(rng.integers(6, 13))
        G = int(rng.integers(1, 5))
        cap = int(rng.integers(1, 6))
        group = rng.integers(0, G, n)
        e, w = _network(rng, n, float(rng.uniform(0.1, 0.7)))
        if len(e) == 0:
            e, w = np.array([[0, 1]]), np.array([1.0])
        neighbours = _edge_neighbours(n, e, w, rng)
        counts = _union_counts([(np.arange(n), e, w)] + neighbours, group, G, cap)
        base = {k: v[:1] for k, v in counts.items()}
        rest = {k: v[1:] for k, v in counts.items()}
        m = _max_l1(base, rest)
        # sizes under unit edge: the grouping is public and people never change, so sizes never move
        sizes = np.bincount(group, minlength=G)
        m["supernode_sizes"] = 0 if all(np.array_equal(np.bincount(group[c[0]], minlength=G), sizes)
                                        for c in neighbours) else 99
        per_network.append((n, len(neighbours), m))
        for k in seen:
            seen[k] = max(seen[k], m[k])
    return seen, per_network


@pytest.mark.parametrize("component", ["superedge_counts", "degree_histograms", "weight_totals",
                                       "supernode_sizes", "degree_sequences"])
def test_edge_unit_bound_holds_and_is_attained(edge_maxima, component):
    seen, per_network = edge_maxima
    declared = _declared("edge", component)
    for n, k, m in per_network:
        assert m[component] <= declared, (component, n, k, m)
    assert seen[component] == declared, f"{component}: largest change seen {seen[component]}, declared {declared}"
    assert sum(k for _, k, _ in per_network) > 1000  # thousands of neighbours were checked
    if component == "degree_sequences":  # every contact moves two sorted positions by one: attained everywhere
        assert all(m[component] == declared for _, _, m in per_network)


# --------------------------------------------------------------------------- unit person


def _person_policy(D):
    return parse_policy({
        "privacy": {"unit": "person", "epsilon": 1.0, "max_contacts": D},
        "grouping": {"method": "attributes", "attributes": ["a", "b"], "min_size": 1,
                     "hierarchies": {"a": {"levels": [{"x": "xy", "y": "xy", "z": "z"}]},
                                     "b": {"levels": [{"p": "p", "q": "q"}]}}},
    })


def _fine_cell_counts(people: pa.Table, policy, monkeypatch):
    """True fine-cell counts exactly as the person-unit pipeline computes them (noise replaced by a probe)."""
    seen = []

    def probe(true_counts, epsilon, source, sens=1.0):
        seen.append(np.asarray(true_counts, dtype=np.int64).copy())
        return np.asarray(true_counts, dtype=np.int64), comp.Spend("supernode_sizes", epsilon, sens, "probe",
                                                                   1.0), None

    monkeypatch.setattr(noisy_cells, "release_cell_counts", probe)
    budget = types.SimpleNamespace(check=lambda spend: None)
    net = types.SimpleNamespace(people=people, n_people=people.num_rows)
    noisy_cells.group_by_noisy_cells(net, policy, budget, None, 0.5)
    return seen[-1]


@pytest.fixture(scope="module")
def person_maxima():
    rng = np.random.default_rng(3141)
    seen = {"superedge_counts": 0, "degree_histograms": 0, "weight_totals": 0}
    per_network = []
    for i in range(N_NETWORKS):
        n = int(rng.integers(6, 13))
        D = int(rng.integers(1, 5))
        G = int(rng.integers(1, 4))
        cap = int(rng.integers(1, 7))
        group = rng.integers(0, G, n)
        if i % 4 == 0:  # a quarter of the networks contain a hub of D people who know only the hub
            e, w = _hub_network(rng, n, D)
            group[: D + 1] = group[0]
        else:
            e, w = _network(rng, n, float(rng.uniform(0.2, 0.9)), max_contacts=D)
        if len(e) == 0:
            e, w = np.array([[0, 1]]), np.array([1.0])
        deg = np.bincount(e.ravel(), minlength=n)
        assert deg.max() <= D  # the promise holds for the network and so for every neighbour
        neighbours = _person_neighbours(n, e, w)
        counts = _union_counts([(np.arange(n), e, w)] + neighbours, group, G, cap)
        m = _max_l1({k: v[:1] for k, v in counts.items()}, {k: v[1:] for k, v in counts.items()})
        per_network.append((n, D, len(neighbours), m))
        for k in seen:
            seen[k] = max(seen[k], m[k] - _declared("person", k, D))  # <= 0 always; == 0 when attained
    return seen, per_network


@pytest.mark.parametrize("component", ["superedge_counts", "degree_histograms", "weight_totals"])
def test_person_unit_bound_holds_and_is_attained(person_maxima, component):
    seen, per_network = person_maxima
    attained = 0
    for n, D, k, m in per_network:
        declared = _declared("person", component, D)
        assert m[component] <= declared, (component, n, D, m)
        attained += m[component] == declared
    assert seen[component] == 0, f"{component}: the bound was never attained"
    assert attained >= 5


def test_person_unit_sizes_change_by_exactly_one(monkeypatch):
    """Fine-cell counts over the public domain: removing a person moves one count by one."""
    rng = np.random.default_rng(99)
    policy = _person_policy(3)
    worst = 0
    for _ in range(30):
        n = int(rng.integers(6, 13))
        a = rng.choice(["x", "y", "z"], n)
        b = rng.choice(["p", "q"], n)
        people = pa.table({"a": a, "b": b})
        base = _fine_cell_counts(people, policy, monkeypatch)
        assert len(base) == 6 and base.sum() == n  # every public cell, empty or not
        for p in range(n):
            keep = np.delete(np.arange(n), p)
            other = _fine_cell_counts(people.take(keep), policy, monkeypatch)
            change = int(np.abs(other - base).sum())
            assert change <= _declared("person", "supernode_sizes")
            worst = max(worst, change)
    assert worst == _declared("person", "supernode_sizes") == 1


# --------------------------------------------------------------------------- constructed worst cases


@pytest.mark.parametrize("D", [1, 2, 5, 30])
def test_declared_person_constants_equal_the_star_worst_case(D):
    """A star: one person with D contacts who know nobody else, all in one supernode, cap >= 1.

    Removing the centre removes D contacts in one cell (superedges: D), removes
    D clipped weights of w_max each (weight totals: D w_max), and moves every
    leaf from bin 1 to bin 0 while the centre leaves its own bin (histograms:
    2D + 1). A wrong constant -- D for the histograms, say, or 2D -- fails here.
    """
    n = D + 1
    e = np.array([(0, j) for j in range(1, n)], dtype=int)
    w = np.full(len(e), 10.0 * CLIP)
    group = np.zeros(n, dtype=int)
    for cap in (1, 2, D + 3):
        counts = _union_counts([(np.arange(n), e, w)] + _person_neighbours(n, e, w)[:1], group, 1, cap)
        m = _max_l1({k: v[:1] for k, v in counts.items()}, {k: v[1:] for k, v in counts.items()})
        assert m["superedge_counts"] == _declared("person", "superedge_counts", D) == D
        assert m["weight_totals"] == _declared("person", "weight_totals", D) == D * CLIP
        assert m["degree_histograms"] == _declared("person", "degree_histograms", D) == 2 * D + 1


def test_declared_edge_constants_equal_the_isolated_contact_worst_case():
    """Adding one heavy contact between two people who had none: 1, 4 and w_max."""
    n = 4
    e = np.array([[2, 3]])
    w = np.array([1.0])
    group = np.array([0, 1, 0, 1])
    added = (np.arange(n), np.vstack([e, [[0, 1]]]), np.append(w, 5.0 * CLIP))
    counts = _union_counts([(np.arange(n), e, w), added], group, 2, 1)
    m = _max_l1({k: v[:1] for k, v in counts.items()}, {k: v[1:] for k, v in counts.items()})
    assert m["superedge_counts"] == _declared("edge", "superedge_counts") == 1
    assert m["degree_histograms"] == _declared("edge", "degree_histograms") == 4
    assert m["weight_totals"] == _declared("edge", "weight_totals") == CLIP


def test_sensitivity_table_covers_every_unit_and_component():
    for unit in ("edge", "person"):
        for component in ("supernode_sizes", "superedge_counts", "degree_histograms", "weight_totals"):
            assert (unit, component) in comp.SENSITIVITY
            value = comp.sensitivity(unit, component, max_contacts=7 if unit == "person" else None, clip=5)
            assert value >= 0
    assert comp.sensitivity("person", "degree_histograms", max_contacts=7) == 15
    with pytest.raises(PrivacyError, match="max_contacts"):
        comp.sensitivity("person", "superedge_counts")
    with pytest.raises(PrivacyError, match="clip"):
        comp.sensitivity("edge", "weight_totals")
    with pytest.raises(PrivacyError, match="no derived sensitivity"):
        comp.sensitivity("household", "superedge_counts")
