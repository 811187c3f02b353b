"""True view tables and their sensitivities (``aggpub.estimates.views``, ``docs/contact-matrices.md``).

Outside references
------------------
* networkx's ``attribute_mixing_matrix`` (Newman's mixing matrix: M. E. J. Newman, "Mixing patterns in
  networks", Physical Review E 67, 026126, 2003). For an undirected graph networkx yields every edge
  twice, once per direction (``node_attribute_xy``: "each edge is produced twice ... with the exception
  of self-loop edges"), so ``M[a, b] = n(a, b)`` for ``a != b`` and ``M[a, a] = 2 n(a, a)``, where
  ``n`` is our count of contacts per unordered pair of values (checked below, not assumed).
* networkx's ``quotient_graph`` and ``Graph.size(weight=...)`` for weight totals.
* DuckDB ``GROUP BY`` over the edges: the engine path the pipeline will use for the true views.
* Brute force over every neighbour of small random networks for the sensitivities (the bound holds
  and is attained), as in ``tests/test_sensitivity.py``.

Networks: W. W. Zachary, "An information flow model for conflict and fission in small groups",
Journal of Anthropological Research 33(4), 1977 (karate club, 34 nodes, 78 edges); D. E. Knuth,
"The Stanford GraphBase", 1993 (Les Misérables co-appearances, 77 nodes, 254 edges, weighted).
"""

from __future__ import annotations

import duckdb
import networkx as nx
import numpy as np
import pyarrow as pa
import pytest

from aggpub.estimates.views import (clip_weights, combine_codes, one_layer_per_contact, true_view_table,
                                    view_cell_count, view_cell_index, view_cells, view_sensitivity, view_table)

CLIP = 3


# --------------------------------------------------------------------------- helpers


def _graph_arrays(G, attr_values):
    """Person codes of an invented or shipped attribute, and edge endpoints as indices."""
    nodes = list(G)
    pos = {n: i for i, n in enumerate(nodes)}
    values = sorted({attr_values[n] for n in nodes})
    codes = np.array([values.index(attr_values[n]) for n in nodes])
    u = np.array([pos[a] for a, b in G.edges()])
    v = np.array([pos[b] for a, b in G.edges()])
    return nodes, values, codes, u, v


def _mixing_reference(G, attr_values, values):
    H = G.copy()
    nx.set_node_attributes(H, attr_values, "x")
    return nx.attribute_mixing_matrix(H, "x", normalized=False, mapping={x: i for i, x in enumerate(values)})


def _as_square(row, k):
    a, b = view_cells(k)
    m = np.zeros((k, k))
    m[a, b] = row
    m[b, a] = row
    return m


def _invented(G, name, k, seed):
    rng = np.random.default_rng(seed)
    return {n: f"{name}{int(rng.integers(k))}" for n in G}


# --------------------------------------------------------------------------- true tables vs networkx


def test_networkx_counts_each_undirected_edge_twice_and_the_diagonal_double():
    # A three-person example settles how networkx counts: one edge inside group x, one between x and y.
    G = nx.Graph([(0, 1), (1, 2)])
    M = _mixing_reference(G, {0: "x", 1: "x", 2: "y"}, ["x", "y"])
    assert M.tolist() == [[2.0, 1.0], [1.0, 0.0]]
    table = true_view_table([0, 0, 1], [0, 1], [1, 2], 2)
    assert table.tolist() == [[1, 1, 0]]  # cells (x,x), (x,y), (y,y): each contact counted once


@pytest.mark.parametrize("graph, attribute, k, seed", [
    ("karate", "club", None, None), ("karate", None, 4, 1), ("lesmis", None, 5, 2), ("lesmis", None, 9, 3)])
def test_true_view_table_matches_networkx_mixing_matrix(graph, attribute, k, seed):
    G = nx.karate_club_graph() if graph == "karate" else nx.les_miserables_graph()
    attr = ({n: G.nodes[n][attribute] for n in G} if attribute else _invented(G, "g", k, seed))
    _, values, codes, u, v = _graph_arrays(G, attr)
    M = _mixing_reference(G, attr, values)
    ours = _as_square(true_view_table(codes, u, v, len(values))[0], len(values))
    # off the diagonal networkx counts each contact once per direction: M[a, b] = n(a, b);
    # on it both directions land in the same cell: M[a, a] = 2 n(a, a)
    assert np.array_equal(M - np.diag(np.diag(M)), ours - np.diag(np.diag(ours)))
    assert np.array_equal(np.diag(M), 2 * np.diag(ours))
    assert ours[np.triu_indices(len(values))].sum() == G.number_of_edges()


@pytest.mark.parametrize("graph", ["karate", "lesmis"])
def test_layered_view_matches_networkx_per_layer_subgraph(graph):
    G = nx.karate_club_graph() if graph == "karate" else nx.les_miserables_graph()
    attr = _invented(G, "a", 4, 11)
    nodes, values, codes, u, v = _graph_arrays(G, attr)
    rng = np.random.default_rng(5)
    layer = rng.integers(0, 3, len(u))  # invented settings: home, work, elsewhere
    table = true_view_table(codes, u, v, len(values), layer=layer, n_layers=3)
    total = np.zeros(view_cell_count(len(values)), dtype=np.int64)
    for lay in range(3):
        sub = nx.Graph()
        sub.add_nodes_from(G)
        sub.add_edges_from((nodes[a], nodes[b]) for a, b in zip(u[layer == lay], v[layer == lay]))
        M = _mixing_reference(sub, attr, values)
        ref = np.where(np.eye(len(values), dtype=bool), M / 2, M)[np.triu_indices(len(values))]
        assert np.array_equal(table[lay], ref)
        total += table[lay]
    assert np.array_equal(total, true_view_table(codes, u, v, len(values))[0])


def test_combination_view_matches_networkx_on_the_combined_attribute():
    G = nx.les_miserables_graph()
    a1, a2 = _invented(G, "p", 3, 21), _invented(G, "q", 2, 22)
    nodes, v1, c1, u, v = _graph_arrays(G, a1)
    _, v2, c2, _, _ = _graph_arrays(G, a2)
    code, k = combine_codes([c1, c2], [len(v1), len(v2)])
    both = {n: f"{a1[n]}|{a2[n]}" for n in G}
    names = [f"{x}|{y}" for x in v1 for y in v2]  # combined-code order: first attribute most significant
    M = _mixing_reference(G, both, names)
    ref = np.where(np.eye(k, dtype=bool), M / 2, M)[np.triu_indices(k)]
    assert np.array_equal(true_view_table(code, u, v, k)[0], ref)


def test_weighted_view_matches_networkx_quotient_graph_weights():
    # Les Misérables carries co-appearance counts as 'weight' (1 to 31); clip them at CLIP.
    G = nx.les_miserables_graph()
    attr = _invented(G, "b", 4, 31)
    nodes, values, codes, u, v = _graph_arrays(G, attr)
    raw = np.array([G.edges[nodes[a], nodes[b]]["weight"] for a, b in zip(u, v)], dtype=float)
    w = clip_weights(raw, CLIP)
    H = G.copy()
    for (a, b), x in zip(zip(u, v), w):
        H.edges[nodes[a], nodes[b]]["clipped"] = int(x)
    blocks = [{n for n in G if attr[n] == x} for x in values]
    Q = nx.quotient_graph(H, blocks, relabel=True, weight="clipped")
    ref = np.zeros((len(values), len(values)))
    for i, j, data in Q.edges(data=True):
        ref[i, j] = ref[j, i] = data["weight"]
    for i, block in enumerate(blocks):
        ref[i, i] = H.subgraph(block).size(weight="clipped")
    ours = _as_square(true_view_table(codes, u, v, len(values), weights=w)[0], len(values))
    assert np.array_equal(ours, ref)


def test_clip_weights_rounds_like_the_engine():
    # DuckDB's round() takes halves away from zero (the engine's SQL); numpy's rint would give 2 for 2.5.
    con = duckdb.connect()
    w = [-1.0, 0.4, 0.5, 1.5, 2.5, 2.6, 3.0, 7.2]
    sql = [con.execute(f"SELECT CAST(round(least(greatest({x}, 0), {CLIP}.0)) AS BIGINT)").fetchone()[0]
           for x in w]
    assert clip_weights(w, CLIP).tolist() == sql == [0, 0, 1, 2, 3, 3, 3, 3]


@pytest.mark.parametrize("weighted", [False, True])
def test_true_view_table_matches_duckdb_group_by(weighted):
    """The SQL the pipeline will run (one GROUP BY over the contacts) gives the same table."""
    rng = np.random.default_rng(7)
    n, m, k, n_layers = 300, 2000, 6, 4
    codes = rng.integers(0, k, n)
    u, v, layer = one_layer_per_contact(rng.integers(0, n, m), rng.integers(0, n, m), rng.integers(0, n_layers, m),
                                        n_layers)
    w = clip_weights(rng.uniform(0, 2 * CLIP, len(u)), CLIP) if weighted else None
    con = duckdb.connect()
    con.register("people", pa.table({"idx": np.arange(n), "x": codes}))
    con.register("contacts", pa.table({"u": u, "v": v, "layer": layer,
                                       "w": w if weighted else np.ones(len(u), dtype=np.int64)}))
    res = con.execute("""
        SELECT least(pu.x, pv.x) AS a, greatest(pu.x, pv.x) AS b, c.layer, sum(c.w) AS t
        FROM contacts c JOIN people pu ON c.u = pu.idx JOIN people pv ON c.v = pv.idx
        GROUP BY ALL""").fetchnumpy()
    ref = np.zeros((n_layers, view_cell_count(k)), dtype=np.int64)
    ref[res["layer"], view_cell_index(res["a"], res["b"], k)] = res["t"]
    assert np.array_equal(true_view_table(codes, u, v, k, layer=layer, n_layers=n_layers, weights=w), ref)


def test_one_layer_per_contact_keeps_the_first_declared_layer():
    u = [3, 1, 2, 1, 4, 5, 5]
    v = [1, 3, 1, 2, 4, 6, 6]
    layer = [2, 0, 3, 1, 0, 2, 2]
    uu, vv, ll = one_layer_per_contact(u, v, layer, 4)
    # reference: a dictionary over the records
    best = {}
    for a, b, x in zip(u, v, layer):
        if a == b:
            continue  # a self-loop is not a contact
        key = (min(a, b), max(a, b))
        best[key] = min(best.get(key, 99), x)
    assert list(zip(uu.tolist(), vv.tolist(), ll.tolist())) == sorted((a, b, x) for (a, b), x in best.items())


def test_view_table_lists_every_cell_with_unclamped_values():
    noisy = np.array([[3, -2, 0], [1, 0, -1]])
    t = view_table("x", ["p", "q"], noisy, 2.0, ["home", "work"])
    assert t.num_rows == 6
    assert t.column("contacts_unclamped").to_pylist() == [3, -2, 0, 1, 0, -1]
    assert t.column("contacts").to_pylist() == [3, 0, 0, 1, 0, 0]
    assert t.column("value_a").to_pylist() == ["p", "p", "q"] * 2
    assert t.column("value_b").to_pylist() == ["p", "q", "q"] * 2
    assert t.column("layer").to_pylist() == ["home"] * 3 + ["work"] * 3


# --------------------------------------------------------------------------- sensitivity: brute force


def _random_network(rng, n, p, max_contacts=None):
    iu, iv = np.triu_indices(n, 1)
    keep = rng.random(len(iu)) < p
    u, v = iu[keep], iv[keep]
    if max_contacts is not None:  # keep the promise D (test input only; a loop over a dozen people)
        deg = np.zeros(n, dtype=int)
        ok = []
        for e in rng.permutation(len(u)):
            if deg[u[e]] < max_contacts and deg[v[e]] < max_contacts:
                deg[u[e]] += 1
                deg[v[e]] += 1
                ok.append(e)
        ok = np.sort(np.array(ok, dtype=int))
        u, v = u[ok], v[ok]
    return u, v


def _tables(codes, u, v, k, layer, n_layers, w):
    return true_view_table(codes, u, v, k, layer=layer, n_layers=n_layers, weights=w)


def _views_of(case, u, v, layer, w):
    """Every released table of the case: single-attribute views and a combination view, counts or weights."""
    codes1, k1, codes2, k2, n_layers = case
    combined, kc = combine_codes([codes1, codes2], [k1, k2])
    return [_tables(c, u, v, k, layer, n_layers, w) for c, k in ((codes1, k1), (codes2, k2), (combined, kc))]


@pytest.mark.parametrize("weighted", [False, True])
def test_view_sensitivity_edge_unit_brute_force(weighted):
    rng = np.random.default_rng(101 + weighted)
    declared = view_sensitivity("edge", clip=CLIP if weighted else None)
    assert declared == (CLIP if weighted else 1)
    seen_max = 0
    for _ in range(30):
        n = int(rng.integers(6, 13))
        k1, k2, n_layers = int(rng.integers(2, 5)), int(rng.integers(2, 4)), int(rng.integers(1, 5))
        case = (rng.integers(0, k1, n), k1, rng.integers(0, k2, n), k2, n_layers)
        u, v = _random_network(rng, n, 0.35)
        layer = rng.integers(0, n_layers, len(u))
        w = clip_weights(rng.uniform(0, 2 * CLIP, len(u)), CLIP) if weighted else None
        base = _views_of(case, u, v, layer, w)
        neighbours = []
        for i in range(len(u)):  # each contact removed
            keep = np.arange(len(u)) != i
            neighbours.append((u[keep], v[keep], layer[keep], None if w is None else w[keep]))
        present = set(zip(u.tolist(), v.tolist()))
        for a in range(n):  # each missing contact added, in every layer, with a weight drawn up to 2 w_max
            for b in range(a + 1, n):
                if (a, b) in present:
                    continue
                for lay in range(n_layers):
                    extra = None if w is None else np.append(w, clip_weights([rng.uniform(0, 2 * CLIP)], CLIP))
                    neighbours.append((np.append(u, a), np.append(v, b), np.append(layer, lay), extra))
        for nu, nv, nl, nw in neighbours:
            for t0, t1 in zip(base, _views_of(case, nu, nv, nl, nw)):
                # one view = all of its layer tables together (layers share one epsilon)
                change = int(np.abs(t1 - t0).sum())
                assert change <= declared
                seen_max = max(seen_max, change)
                if not weighted:
                    # exactly one cell of exactly one layer changes, by exactly 1
                    assert change == 1 and int((t1 != t0).sum()) == 1
    assert seen_max == declared  # tight: a contact of weight >= w_max attains w_max


def _hub_network(rng, n, d):
    """Person 0 with D contacts who have no other contact (the person-unit worst case), plus others."""
    edges = [(0, j) for j in range(1, d + 1)]
    rest = n - d - 1
    if rest >= 2:
        ru, rv = _random_network(rng, rest, 0.5, max_contacts=d)
        edges += [(int(a) + d + 1, int(b) + d + 1) for a, b in zip(ru, rv)]
    e = np.array(edges, dtype=int)
    return e[:, 0], e[:, 1]


@pytest.mark.parametrize("weighted", [False, True])
def test_view_sensitivity_person_unit_brute_force(weighted):
    rng = np.random.default_rng(202 + weighted)
    seen = {}
    for t in range(30):
        d = int(rng.integers(1, 5))
        declared = view_sensitivity("person", max_contacts=d, clip=CLIP if weighted else None)
        assert declared == d * (CLIP if weighted else 1)
        n = int(rng.integers(d + 2, 13))
        k1, k2, n_layers = int(rng.integers(2, 5)), int(rng.integers(2, 4)), int(rng.integers(1, 5))
        case = (rng.integers(0, k1, n), k1, rng.integers(0, k2, n), k2, n_layers)
        u, v = _hub_network(rng, n, d) if t % 2 else _random_network(rng, n, 0.4, max_contacts=d)
        assert np.bincount(np.concatenate([u, v]), minlength=n).max() <= d
        layer = rng.integers(0, n_layers, len(u))
        w = clip_weights(rng.uniform(CLIP, 2 * CLIP, len(u)) if t % 2 else rng.uniform(0, 2 * CLIP, len(u)),
                         CLIP) if weighted else None
        base = _views_of(case, u, v, layer, w)
        worst = 0
        for x in range(n):  # each person removed with all of their contacts (the graph keeps the cap)
            keep = (u != x) & (v != x)
            nb = _views_of(case, u[keep], v[keep], layer[keep], None if w is None else w[keep])
            for t0, t1 in zip(base, nb):
                change = int(np.abs(t1 - t0).sum())
                assert change <= declared
                worst = max(worst, change)
        seen[t] = (worst, declared)
        if t % 2:  # the hub with D contacts of weight >= w_max attains the bound
            assert worst == declared
    assert any(w_ == dcl > 1 for w_, dcl in seen.values())  # a claimed sensitivity of 1 would be caught


def test_view_sensitivity_refuses_what_is_not_derived():
    with pytest.raises(ValueError):
        view_sensitivity("person")
    with pytest.raises(ValueError):
        view_sensitivity("group")
    assert view_sensitivity("person", max_contacts=30) == 30
    assert view_sensitivity("person", max_contacts=30, clip=60) == 1800


def test_listed_views_in_order_of_first_appearance():
    """The view names of a view table, each once, in order of first appearance: the same list as Python's
    ``dict.fromkeys`` over the column, over several chunks, repeated runs, nulls and an empty table."""
    from aggpub.estimates.views import listed_views

    rng = np.random.default_rng(4)
    names = ["age", "area", "age,area", "school"]
    for _ in range(20):
        col = [names[i] for i in rng.integers(0, 4, int(rng.integers(0, 40)))]
        if col and rng.random() < 0.3:
            col[int(rng.integers(0, len(col)))] = None
        cut = int(rng.integers(0, len(col) + 1))
        t = pa.concat_tables([pa.table({"view": pa.array(col[:cut], pa.string())}),
                              pa.table({"view": pa.array(col[cut:], pa.string())})])
        assert listed_views(t) == list(dict.fromkeys(col))
