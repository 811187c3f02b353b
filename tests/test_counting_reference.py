"""Superedge counts against networkx.quotient_graph on classic networks shipped by networkx.

References
----------
W. W. Zachary, "An information flow model for conflict and fission in small groups",
Journal of Anthropological Research 33(4), 1977 (the karate club network: 34 nodes, 78 edges).
D. E. Knuth, "The Stanford GraphBase", 1993 (Les Misérables co-appearance network, 77 nodes, 254 edges).
J. F. Padgett, C. K. Ansell, "Robust action and the rise of the Medici", American Journal of
Sociology 98(6), 1993 (Florentine families marriage network, 15 nodes, 20 edges).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
from networkx.algorithms.community import greedy_modularity_communities

from aggpub import load_network
from aggpub.cells import cell_index
from aggpub.released import dense_truth
from aggpub.engines import _duckdb
from aggpub.pipeline import release_tables

from .conftest import graph_tables, simple_policy


@pytest.fixture(autouse=True, params=["numpy-dense", "sql"])
def counting_path(request, monkeypatch):
    """Every test here runs on both counting paths of the DuckDB engine: the dense numpy table (small
    tables, the default) and the join + GROUP BY in SQL (tables above DENSE_COUNT_MAX_CELLS)."""
    if request.param == "sql":
        monkeypatch.setattr(_duckdb, "DENSE_COUNT_MAX_CELLS", 0)
    return request.param


def quotient_counts(G, blocks):
    """Cell counts {(i, j): edges} from networkx.quotient_graph (the outside reference)."""
    # weight=None: count edges (karate and Les Misérables carry interaction weights in networkx)
    Q = nx.quotient_graph(G, blocks, relabel=True, weight=None)
    counts = {}
    for i in Q.nodes:
        counts[(i, i)] = Q.nodes[i]["nedges"]
    for i, j, data in Q.edges(data=True):
        counts[(min(i, j), max(i, j))] = data["weight"]
    return counts


def engine_counts(G, labels):
    """Cell counts from aggpub's DuckDB engine, indexed by the same block numbers."""
    edges, people = graph_tables(G, {"block": labels})
    net = load_network(edges, people)
    node_order = [str(n) for n in G.nodes()]
    assert people.column("node").to_pylist() == node_order
    assignment = np.array([labels[n] for n in G.nodes()], dtype=np.int32)
    a, b, c = net.engine.superedge_counts(assignment)
    return {(int(x), int(y)): int(z) for x, y, z in zip(a, b, c)}, net


def _blocks_from_labels(G, labels):
    k = max(labels.values()) + 1
    return [{n for n in G if labels[n] == i} for i in range(k)]


def _check(G, labels):
    ours, net = engine_counts(G, labels)
    ref = quotient_counts(G, _blocks_from_labels(G, labels))
    ref = {k: v for k, v in ref.items() if v}
    assert ours == ref
    assert sum(ours.values()) == G.number_of_edges() == net.n_edges
    # degrees (counted in the same pass over the edges on the numpy path) against networkx
    assert net.engine.degrees(net.n_people).tolist() == [d for _, d in G.degree()]


def test_karate_club_by_faction(karate):
    # Zachary (1977): 34 members, 78 contacts; the 'club' attribute shipped by networkx splits it in two.
    assert karate.number_of_nodes() == 34 and karate.number_of_edges() == 78
    clubs = sorted({karate.nodes[n]["club"] for n in karate})
    labels = {n: clubs.index(karate.nodes[n]["club"]) for n in karate}
    _check(karate, labels)


def test_karate_club_by_modularity_communities(karate):
    comms = greedy_modularity_communities(karate)
    labels = {n: i for i, c in enumerate(comms) for n in c}
    _check(karate, labels)


def test_les_miserables_communities():
    G = nx.les_miserables_graph()
    assert G.number_of_nodes() == 77 and G.number_of_edges() == 254
    comms = greedy_modularity_communities(G)
    labels = {n: i for i, c in enumerate(comms) for n in c}
    _check(G, labels)


def test_florentine_families_random_blocks():
    G = nx.florentine_families_graph()
    assert G.number_of_nodes() == 15 and G.number_of_edges() == 20
    rng = np.random.default_rng(7)
    labels = {n: int(rng.integers(0, 4)) for n in G}
    labels = {n: sorted(set(labels.values())).index(v) for n, v in labels.items()}
    _check(G, labels)


def test_pipeline_truth_matches_quotient_graph(karate):
    """The full release path (ingest -> attribute grouping -> counting) against quotient_graph."""
    clubs = {n: karate.nodes[n]["club"] for n in karate}
    parity = {n: ("even" if n % 2 == 0 else "odd") for n in karate}
    edges, people = graph_tables(karate, {"club": clubs, "parity": parity})
    rel = release_tables(edges, people, simple_policy(["club", "parity"], min_size=5), seed=3)
    labels_table = rel.grouping.labels.to_pylist()
    assignment = rel.grouping.assignment
    blocks = [set() for _ in labels_table]
    for i, n in enumerate(karate.nodes()):
        blocks[assignment[i]].add(n)
        lab = labels_table[assignment[i]]
        assert lab["club"] == clubs[n] and lab["parity"] == parity[n]
    ref = quotient_counts(karate, blocks)
    truth = rel.truth["superedges"]
    n = len(blocks)
    for (i, j), v in ref.items():
        assert truth.count[cell_index(i, j, n)] == v
    assert truth.count.sum() == 78
    # every cell is released, zeros included: n(n+1)/2 rows
    assert rel.superedges.num_rows == n * (n + 1) // 2


def test_dense_truth_covers_every_cell():
    t = dense_truth(4, np.array([0, 1, 3]), np.array([2, 1, 3]), np.array([5, 6, 7]))
    assert len(t.a) == 10
    assert dict(zip(zip(t.a.tolist(), t.b.tolist()), t.count.tolist()))[(0, 2)] == 5
    assert t.count.sum() == 18


@pytest.mark.parametrize("n", [1, 2, 7, 50])
def test_cell_index_is_row_major_upper_triangle(n):
    a, b = np.triu_indices(n)
    assert np.array_equal(cell_index(a, b, n), np.arange(len(a)))


@pytest.mark.parametrize("n", [0, 1, 2, 3, 7, 50, 2001])
def test_all_cells_are_numpys_upper_triangle_indices(n):
    """``all_cells`` (built from row lengths) gives numpy.triu_indices's arrays, in int64."""
    from aggpub.cells import all_cells

    a, b = all_cells(n)
    ra, rb = np.triu_indices(n)
    assert a.dtype == b.dtype == np.int64
    assert np.array_equal(a, ra) and np.array_equal(b, rb)


def test_most_supernodes_the_dense_table_takes_and_batches_of_several_sizes(monkeypatch, counting_path):
    """Near the dense table's largest supernode count (its cell positions computed in 32-bit integers, in
    buffers reused across batches of unequal length), every count equals a plain count of the label pairs
    of networkx's edges on a random graph (Erdos-Renyi, networkx's generator); most people are their own
    supernode, the rest fall in random ones."""
    from collections import Counter

    n_groups = 5792  # the largest with n (n + 1) / 2 <= 2**24, the dense table's limit
    assert n_groups * (n_groups + 1) // 2 <= 1 << 24 < (n_groups + 1) * (n_groups + 2) // 2
    if counting_path == "numpy-dense":
        assert _duckdb.DENSE_COUNT_MAX_CELLS == 1 << 24
    monkeypatch.setattr(_duckdb, "EDGE_BATCH_ROWS", 7)  # batches of max(7, people) rows: a shorter last one
    G = nx.gnm_random_graph(n_groups + 40, 12_000, seed=5)
    rng = np.random.default_rng(2)
    labels = {n: (n if n < n_groups else int(rng.integers(0, n_groups))) for n in G.nodes()}
    got, net = engine_counts(G, labels)
    want = Counter((min(labels[x], labels[y]), max(labels[x], labels[y])) for x, y in G.edges())
    assert got == dict(want)
    assert max(a for a, _ in got) > 5700  # the last rows of the table were reached
    assert net.engine.degrees(net.n_people).tolist() == [d for _, d in G.degree()]


@pytest.mark.parametrize("parts", [1, 3])
def test_the_dense_counting_gives_the_same_integers_however_many_threads_share_a_batch(monkeypatch, parts):
    """Batches split among threads (here down to empty shares: 21 contacts in batches of 10, 10 and 1) count
    the same cells and degrees as a plain count of networkx's edges (Erdos-Renyi, networkx's generator)."""
    from collections import Counter

    monkeypatch.setattr(_duckdb, "COUNTING_PARTS", parts)
    monkeypatch.setattr(_duckdb, "EDGE_BATCH_ROWS", 1)  # batches of max(1, people) = 10 rows
    G = nx.gnm_random_graph(10, 21, seed=1)
    labels = {n: n % 3 for n in G.nodes()}
    got, net = engine_counts(G, labels)
    assert got == dict(Counter((min(labels[x], labels[y]), max(labels[x], labels[y])) for x, y in G.edges()))
    assert net.engine.degrees(net.n_people).tolist() == [d for _, d in G.degree()]
