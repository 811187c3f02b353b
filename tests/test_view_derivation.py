"""Contact views summed from the superedge counts when every supernode is pure (an execution path only).

Without layers, when every supernode holds people of a single value of a view's attribute, the view's true
counts are sums of true superedge cells (:func:`aggpub.released.contact_views.views_from_superedges`); the
release then skips the engine's second pass over the contacts. These tests check that this path gives
exactly the engine's counts and the reference's, and that it is taken only when it may be.

Outside reference: networkx's ``attribute_mixing_matrix`` (M. E. J. Newman, "Mixing patterns in networks",
Phys. Rev. E 67, 026126, 2003) on Zachary's karate club (W. W. Zachary, "An information flow model for
conflict and fission in small groups", J. Anthropological Research 33(4), 1977), with invented attributes.
networkx counts every undirected edge once per direction, so off the diagonal ``M[a, b]`` is the number of
contacts and on it twice that number.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pyarrow as pa
import pytest

from aggpub.engines._duckdb import DuckDBEngine
from aggpub.estimates.views import view_cell_index
from aggpub.pipeline import release_tables
from aggpub.released.contact_views import supernode_values, view_codes, views_from_superedges
from aggpub.released.superedges import SuperedgeTruth, dense_truth

BANDS = ("young", "middle", "old")
AREAS = ("north", "south")


def _karate():
    """Zachary's karate club with two invented attributes (fixed seed)."""
    G = nx.karate_club_graph()
    rng = np.random.default_rng(5)
    for n in G.nodes():
        G.nodes[n]["band"] = BANDS[int(rng.integers(0, 3))]
        G.nodes[n]["area"] = AREAS[int(rng.integers(0, 2))]
        G.nodes[n]["both"] = f"{G.nodes[n]['band']}|{G.nodes[n]['area']}"
    people = pa.table({"node": [f"p{n}" for n in G.nodes()], "band": [G.nodes[n]["band"] for n in G.nodes()],
                       "area": [G.nodes[n]["area"] for n in G.nodes()]})
    edges = pa.table({"source": [f"p{a}" for a, _ in G.edges()], "target": [f"p{b}" for _, b in G.edges()]})
    return G, people, edges


def _networkx_view(G, attribute, values):
    """The view's cells (row-major upper triangle of ``values``) from networkx's mixing matrix."""
    mapping = {v: i for i, v in enumerate(values)}
    M = nx.attribute_mixing_matrix(G, attribute, mapping=mapping, normalized=False)
    k = len(values)
    a, b = np.triu_indices(k)
    out = np.zeros(k * (k + 1) // 2, dtype=np.int64)
    out[view_cell_index(a, b, k)] = np.where(a == b, M[a, b] / 2, M[a, b]).astype(np.int64)
    return out


def _domain(release, attribute):
    return release.manifest["view_domains"][attribute]


class _CountingEngine:
    """Counts calls to ``DuckDBEngine.view_counts`` (the engine's own pass over the contacts)."""

    def __init__(self, monkeypatch):
        self.calls = 0
        self.original = original = DuckDBEngine.view_counts

        def counted(engine, *args, **kwargs):
            self.calls += 1
            return original(engine, *args, **kwargs)

        monkeypatch.setattr(DuckDBEngine, "view_counts", counted)


def test_pure_supernodes_sum_the_superedges_without_a_second_pass(monkeypatch):
    """Grouping by band and area without merges: every view (band, area, band x area) is pure, summed from the
    superedge counts, and equals networkx's mixing matrix and the engine's own count."""
    G, people, edges = _karate()
    engine = _CountingEngine(monkeypatch)
    pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band", "area"], "min_size": 1},
           "components": {"contact_views": {"combinations": ["band,area"]}}}
    r = release_tables(edges, people, pol, seed=3)
    assert engine.calls == 0
    counts = r.truth["contact_views"]["counts"]
    assert set(counts) == {"band", "area", "band,area"}
    for name, attribute in (("band", "band"), ("area", "area"), ("band,area", "both")):
        if name == "band,area":
            values = [f"{b}|{a}" for b in _domain(r, "band") for a in _domain(r, "area")]
        else:
            values = _domain(r, name)
        np.testing.assert_array_equal(counts[name][0], _networkx_view(G, attribute, values))
    # the engine's own pass gives the same integers
    g = r.grouping
    codes, sizes = view_codes(r.network.people, list(counts), r.truth["contact_views"]["domains"])
    for name, table in zip(counts, engine.original(r.network.engine, codes, sizes, 1)):
        np.testing.assert_array_equal(counts[name], table)
    assert all(supernode_values(g.assignment, c, g.n_supernodes) is not None for c in codes)


@pytest.mark.parametrize("case", ["view_outside_grouping", "merged_values"])
def test_impure_supernodes_are_counted_by_the_engine(monkeypatch, case):
    """A view whose values mix inside a supernode (an attribute outside the grouping, or cells merged up to
    ``min_size``) is counted by the engine, and still equals networkx's mixing matrix."""
    G, people, edges = _karate()
    engine = _CountingEngine(monkeypatch)
    if case == "view_outside_grouping":
        pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["area"], "min_size": 1},
               "components": {"contact_views": {"attributes": ["band"]}}}
    else:  # six cells of about six people merged up to 12: some supernode holds two bands
        pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band", "area"], "min_size": 12},
               "components": {"contact_views": {"attributes": ["band"]}}}
    r = release_tables(edges, people, pol, seed=3)
    g = r.grouping
    codes, _ = view_codes(r.network.people, ["band"], r.truth["contact_views"]["domains"])
    assert supernode_values(g.assignment, codes[0], g.n_supernodes) is None
    assert engine.calls == 1
    np.testing.assert_array_equal(r.truth["contact_views"]["counts"]["band"][0],
                                  _networkx_view(G, "band", _domain(r, "band")))


def test_layers_keep_the_engine_path(monkeypatch):
    """With layers the superedge counts do not say the layer of a contact: the engine counts the views."""
    G, people, edges = _karate()
    engine = _CountingEngine(monkeypatch)
    edges = edges.append_column("setting", pa.array(["home", "school"] * (edges.num_rows // 2)
                                                    + ["home"] * (edges.num_rows % 2)))
    pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band"], "min_size": 1},
           "layers": {"column": "setting", "values": ["home", "school"]}}
    r = release_tables(edges, people, pol, seed=3)
    assert engine.calls == 1
    np.testing.assert_array_equal(r.truth["contact_views"]["counts"]["band"].sum(axis=0),
                                  _networkx_view(G, "band", _domain(r, "band")))


def test_sparse_superedge_truth_sums_the_same():
    """The non-zero cells of a sparse release's truth give the same views as the dense table."""
    G, people, edges = _karate()
    pol = {"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["band", "area"], "min_size": 1},
           "components": {"superedge_counts": {"method": "sparse", "sparse_threshold": 2},
                          "contact_views": {"attributes": ["band"]}}}
    r = release_tables(edges, people, pol, seed=3)
    truth = r.truth["superedges"]
    assert not truth.complete
    np.testing.assert_array_equal(r.truth["contact_views"]["counts"]["band"][0],
                                  _networkx_view(G, "band", _domain(r, "band")))
    dense = dense_truth(r.grouping.n_supernodes, truth.a, truth.b, truth.count)
    g = r.grouping
    codes, sizes = view_codes(r.network.people, ["band"], r.truth["contact_views"]["domains"])
    values = [supernode_values(g.assignment, codes[0], g.n_supernodes)]
    np.testing.assert_array_equal(views_from_superedges(dense, values, sizes)[0],
                                  views_from_superedges(truth, values, sizes)[0])


def test_supernode_values_small_cases():
    """Purity by hand: one mixed supernode is enough to refuse; an empty supernode is harmless."""
    assignment = np.array([0, 0, 1, 1, 3])
    np.testing.assert_array_equal(supernode_values(assignment, np.array([2, 2, 0, 0, 1]), 4), [2, 0, 0, 1])
    assert supernode_values(assignment, np.array([2, 1, 0, 0, 1]), 4) is None
    # three supernodes with values 0, 1, 1 (three values): cells {0,0}=4, {0,1}=2, {1,2}=5 contacts
    truth = SuperedgeTruth(a=np.array([0, 0, 1, 2]), b=np.array([0, 1, 2, 2]), count=np.array([4, 2, 5, 7]))
    (view,) = views_from_superedges(truth, [np.array([0, 1, 1])], [3])
    # cells in order {0,0} {0,1} {0,2} {1,1} {1,2} {2,2}: supernodes 1 and 2 both hold value 1
    np.testing.assert_array_equal(view, [[4, 2, 0, 12, 0, 0]])


def test_supernodes_holding_their_own_values_in_order_sum_each_cell_into_itself():
    """Every supernode holding its own value, in value order (grouping by the view's attribute alone): the view
    is the superedge table itself, cell by cell; the same integers as summing through ``view_cell_index`` with
    values that are any permutation (numpy's bincount as the reference)."""
    rng = np.random.default_rng(4)
    k = 30
    a, b = np.triu_indices(k)
    keep = rng.random(len(a)) < 0.7  # the non-zero cells of a table, as the engine lists them
    truth = SuperedgeTruth(a=a[keep].astype(np.int64), b=b[keep].astype(np.int64),
                           count=rng.integers(1, 40, int(keep.sum())))
    own = views_from_superedges(truth, [np.arange(k)], [k])[0][0]
    expect = np.zeros(k * (k + 1) // 2, dtype=np.int64)
    expect[view_cell_index(truth.a, truth.b, k)] = truth.count
    np.testing.assert_array_equal(own, expect)
    perm = rng.permutation(k)
    permuted = views_from_superedges(truth, [perm], [k])[0][0]
    ref = np.bincount(view_cell_index(perm[truth.a], perm[truth.b], k), weights=truth.count,
                      minlength=k * (k + 1) // 2)
    np.testing.assert_array_equal(permuted, ref.astype(np.int64))
