"""Privacy of the statistics added for synthetic-network fidelity (issue 12): the triangle count's ladder
mechanism, and the policy decisions about degree sequences and the triangle count.

The sorted degree sequences' sensitivity 2 is checked by brute force in ``tests/test_sensitivity.py`` (on the
engine's own counts, with the other components). Derivations: ``docs/privacy.md`` sections 3.1 and 3.4.

Outside references: networkx's triangle counts (``networkx.triangles``) on the classic networks it ships
(Zachary's karate club, Zachary 1977: 45 triangles, value from networkx; Les Miserables, Knuth 1993; the
Florentine families, Padgett and Ansell 1993; Davis' southern women, Davis, Gardner and Gardner 1941, a
bipartite network without triangles); brute-force enumeration of every network within ``t`` contact flips for
the local sensitivity at distance ``t`` (Nissim, Raskhodnikova, Smith, STOC 2007); the exact law of the ladder
mechanism (Zhang, Cormode, Procopiuc, Srivastava, Xiao, SIGMOD 2015) against ``scipy.stats.chisquare``.
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import networkx as nx
import numpy as np
import pytest
from scipy import stats

import aggpub
from aggpub import policy as P
from aggpub.budget import sensitivity
from aggpub.errors import PolicyError
from aggpub.noise.ladder import TAIL_BITS, LadderMechanism, rungs_needed
from aggpub.noise.sampler import SeededRandomSource
from aggpub.released.triangles import TriangleTruth, count_triangles, ladder_widths, release_triangle_count

from .conftest import graph_tables, simple_policy


def _edges(g):
    e = np.array(sorted((min(a, b), max(a, b)) for a, b in g.edges()), dtype=np.int64).reshape(-1, 2)
    return e[:, 0], e[:, 1]


def _triangles(g) -> int:
    return sum(nx.triangles(g).values()) // 3


def _second_degree(g) -> int:
    return sorted((d for _, d in g.degree()), reverse=True)[1]


def _neighbours(g):
    """Every network one contact away: each pair of people flipped."""
    for i, j in itertools.combinations(range(g.number_of_nodes()), 2):
        h = g.copy()
        if h.has_edge(i, j):
            h.remove_edge(i, j)
        else:
            h.add_edge(i, j)
        yield h


def _random_graph(rng, n, p):
    g = nx.gnp_random_graph(n, p, seed=int(rng.integers(1 << 30)))
    return nx.convert_node_labels_to_integers(g)


# --------------------------------------------------------------------------- the count itself


@pytest.mark.parametrize("name", ["karate", "lesmis", "florentine", "davis"])
def test_triangle_count_matches_networkx(name):
    g = {"karate": nx.karate_club_graph, "lesmis": nx.les_miserables_graph,
         "florentine": nx.florentine_families_graph, "davis": nx.davis_southern_women_graph}[name]()
    g = nx.convert_node_labels_to_integers(g)
    u, v = _edges(g)
    assert count_triangles(u, v, g.number_of_nodes()) == _triangles(g)
    if name == "karate":
        assert _triangles(g) == 45  # networkx's karate club
    if name == "davis":
        assert _triangles(g) == 0  # bipartite


def test_triangle_count_matches_networkx_on_random_graphs_and_row_batches(monkeypatch):
    from aggpub import graph_counts as T

    rng = np.random.default_rng(1)
    monkeypatch.setattr(T, "ROW_BATCH", 7)  # several batches of rows
    for _ in range(20):
        g = _random_graph(rng, int(rng.integers(3, 60)), float(rng.uniform(0.05, 0.6)))
        u, v = _edges(g)
        assert T.count_triangles(u, v, g.number_of_nodes()) == _triangles(g)


# --------------------------------------------------------------------------- ladder widths, brute force


def test_ladder_widths_are_a_ladder_function_by_brute_force():
    """Zhang et al. (SIGMOD 2015), definition of a ladder function, on every neighbour of 40 random networks:
    I_0(G) >= |q(G) - q(G')| and I_{t+1}(G) >= I_t(G'); and the rung score moves by at most 1, which is the
    sensitivity the SENSITIVITY table declares for the triangle count (attained)."""
    rng = np.random.default_rng(2)
    mech = LadderMechanism(epsilon=1.0)
    declared = sensitivity("edge", "triangle_count")
    assert declared == 1.0
    worst_score, checked = 0, 0
    for _ in range(40):
        n = int(rng.integers(4, 10))
        g = _random_graph(rng, n, float(rng.uniform(0.1, 0.9)))
        q, T = _triangles(g), 12
        I = ladder_widths(_second_degree(g), n, T)
        ks = np.arange(q - int(I.sum()) - 3, q + int(I.sum()) + 4)
        rung = mech.rung_of(ks, q, I)
        for h in _neighbours(g):
            q2 = _triangles(h)
            J = ladder_widths(_second_degree(h), n, T)
            assert abs(q2 - q) <= I[0]
            assert (I[1:] >= J[:-1]).all()
            rung2 = mech.rung_of(ks, q2, J)
            both = (rung >= 0) & (rung2 >= 0)
            diff = np.abs(rung[both] - rung2[both])
            assert diff.max() <= declared
            worst_score = max(worst_score, int(diff.max()))
            checked += 1
    assert worst_score == declared and checked > 500


def _brute_local_sensitivity(g, t):
    """The largest change of the triangle count by one more flip, over every network within t flips of g."""
    n = g.number_of_nodes()
    pairs = list(itertools.combinations(range(n), 2))
    frontier = {frozenset(map(frozenset, g.edges()))}
    seen = set(frontier)
    for _ in range(t):
        nxt = set()
        for es in frontier:
            for p in pairs:
                q = frozenset(p)
                e2 = es - {q} if q in es else es | {q}
                if e2 not in seen:
                    seen.add(e2)
                    nxt.add(e2)
        frontier = nxt
    best = 0
    for es in seen:
        adj = {i: set() for i in range(n)}
        for e in es:
            i, j = tuple(e)
            adj[i].add(j)
            adj[j].add(i)
        best = max(best, max(len(adj[i] & adj[j]) for i, j in pairs))
    return best


def test_ladder_widths_dominate_the_local_sensitivity_at_distance_t():
    """Nissim, Raskhodnikova, Smith (STOC 2007): the local sensitivity at distance t, found by enumerating every
    network within t flips, never exceeds our width I_t (t = 0, 1, 2)."""
    rng = np.random.default_rng(3)
    for _ in range(8):
        n = int(rng.integers(4, 7))
        g = _random_graph(rng, n, float(rng.uniform(0.2, 0.8)))
        I = ladder_widths(_second_degree(g), n, 3)
        for t in range(3):
            assert _brute_local_sensitivity(g, t) <= I[t]


def test_ladder_width_zero_is_attained():
    """Two people with the same d contacts and no contact between them: linking them closes d triangles, and
    d is the second largest degree, so I_0 = d is reached (a larger constant would not be tight)."""
    d = 6
    g = nx.Graph()
    g.add_edges_from((0, k) for k in range(2, 2 + d))
    g.add_edges_from((1, k) for k in range(2, 2 + d))
    h = g.copy()
    h.add_edge(0, 1)
    n = g.number_of_nodes()
    I = ladder_widths(_second_degree(g), n, 2)
    assert _triangles(h) - _triangles(g) == I[0] == d


def test_rungs_needed_leaves_out_less_than_two_to_the_minus_sixty():
    """The bound of :func:`rungs_needed` on the mass beyond T, computed by summing the geometric tail, and T is
    the smallest such number (public inputs only: the largest width and epsilon)."""
    for width, eps in [(1, 0.01), (10, 0.2), (998, 0.1), (10 ** 6, 2.0), (5, 50.0)]:
        T = rungs_needed(width, eps)

        def tail(T):
            return 2.0 * width * math.exp(-eps * (T + 1) / 2.0) / -math.expm1(-eps / 2.0)

        assert tail(T) <= 2.0 ** -TAIL_BITS
        assert T == 1 or tail(T - 1) > 2.0 ** -TAIL_BITS


def test_tiny_networks_release_zero_triangles():
    """With fewer than 3 people (public) no triangle exists: the release is 0 (nothing private is read)."""
    src = SeededRandomSource(1)
    fields, spend, mech = release_triangle_count(TriangleTruth(count=0, second_degree=1, n_people=2), 0.5, src)
    assert fields == {"triangle_count": 0}
    assert spend.mechanism == "ladder" and spend.sensitivity == 1.0 and spend.scale == pytest.approx(4.0)


# --------------------------------------------------------------------------- the sampler's law


@pytest.mark.heavy
def test_ladder_sampler_follows_its_exact_law():
    """8,000 draws on the karate club (45 triangles, second largest degree 16, 34 people) at epsilon 1 (rate
    1/2 per rung, a dyadic: exact): the frequency of every rung up to 8 (and beyond, pooled) against the exact
    law (chi-square), the two signs equally likely, and the values inside rung 1 uniform."""
    g = nx.karate_club_graph()
    q, n = _triangles(g), g.number_of_nodes()
    assert q == 45 and _second_degree(g) == 16
    eps = 1.0
    mech = LadderMechanism(epsilon=eps)
    assert mech.rate == 0.5 and mech.effective_epsilon == eps
    I = ladder_widths(16, n, rungs_needed(n - 2, eps))
    src = SeededRandomSource(20261202)
    width = lambda t: np.minimum(16 + np.asarray(t), n - 2)  # noqa: E731
    draws = np.array([mech.sample(q, width, n - 2, src) for _ in range(8_000)])
    rung = mech.rung_of(draws, q, I)
    w = mech.rung_weights(I)
    p = w / w.sum()
    top = 8
    observed = np.append(np.bincount(np.minimum(rung, top + 1), minlength=top + 2)[:top + 1],
                         (rung > top).sum())
    expected = np.append(p[:top + 1], p[top + 1:].sum()) * len(draws)
    assert stats.chisquare(observed, expected).pvalue > 1e-4
    # exact pmf of single values adds up to the rung masses
    ks = np.arange(q - int(I[:top].sum()), q + int(I[:top].sum()) + 1)
    assert mech.pmf(ks, q, I).sum() == pytest.approx(p[:top + 1].sum(), rel=1e-12)
    assert abs((draws > q).mean() - (draws < q).mean()) < 4 * math.sqrt(1.0 / len(draws))
    inside = draws[rung == 1] - q
    counts = np.bincount(np.abs(inside) - 1 + I[0] * (inside > 0), minlength=2 * I[0])
    assert stats.chisquare(counts).pvalue > 1e-4


def test_ladder_rate_is_dyadic_and_never_above_half_epsilon():
    for eps in (0.1, 0.2, 1.0 / 3.0, 0.5, 2.0, 7.3):
        mech = LadderMechanism(epsilon=eps)
        assert mech.rate <= Fraction(eps) / 2 and mech.rate.denominator & (mech.rate.denominator - 1) == 0
        assert mech.effective_epsilon <= eps and mech.effective_epsilon > eps * (1 - 1e-15)


def test_a_release_publishes_the_ladder_output_and_never_its_widths():
    g = nx.karate_club_graph()
    club = nx.get_node_attributes(g, "club")
    edges, people = graph_tables(g, {"club": club})
    rel = aggpub.release_tables(edges, people, simple_policy(["club"], min_size=5), seed=3)
    spend = next(c for c in rel.manifest["components"] if c["name"] == "triangle_count")
    shares = P.epsilon_shares(P.parse_policy(simple_policy(["club"], min_size=5)), 34)
    assert spend == {"name": "triangle_count", "epsilon": pytest.approx(shares["triangle_count"]),
                     "sensitivity": 1.0, "mechanism": "ladder", "scale": pytest.approx(2 / shares["triangle_count"])}
    assert isinstance(rel.manifest["triangle_count"], int)
    assert rel.truth["triangle_count"].count == 45
    assert not any("second" in k or "width" in k or "ladder" in k for k in rel.manifest)


# --------------------------------------------------------------------------- policy decisions


def _person_policy(**components):
    pol = simple_policy(["club"], min_size=5)
    pol["privacy"] = {"unit": "person", "epsilon": 1.0, "max_contacts": 20}
    pol["grouping"]["hierarchies"] = {"club": {"levels": [{"Mr. Hi": "Mr. Hi", "Officer": "Officer"}]}}
    if components:
        pol["components"] = components
    return pol


@pytest.mark.parametrize("name", ["degree_sequences", "triangle_count"])
@pytest.mark.parametrize("setting", [{"enabled": True}, {"share": 0.2}])
def test_person_unit_refuses_sequences_and_triangles(name, setting):
    with pytest.raises(PolicyError, match=f"'components.{name}.(enabled|share)' is set: no sensitivity is derived"):
        P.parse_policy(_person_policy(**{name: setting}))


def test_person_unit_releases_neither_by_default():
    g = nx.karate_club_graph()
    edges, people = graph_tables(g, {"club": nx.get_node_attributes(g, "club")})
    policy = P.parse_policy(_person_policy())
    assert not P.component_enabled(policy, "degree_sequences") and not P.component_enabled(policy, "triangle_count")
    rel = aggpub.release_tables(edges, people, policy, seed=2)
    assert [c["name"] for c in rel.manifest["components"]] == ["supernode_sizes", "superedge_counts",
                                                                "contact_views:club"]
    assert "degree_sequences" not in rel.tables and "triangle_count" not in rel.manifest
    # explicitly off is fine under person
    P.parse_policy(_person_policy(degree_sequences={"enabled": False}, triangle_count={"enabled": False}))


def test_defaults_depend_on_the_policy_and_the_public_number_of_people(monkeypatch):
    plain = P.parse_policy(simple_policy(["a"], min_size=5))
    limit = P.TRIANGLE_AUTO_MAX_PEOPLE
    # weights 2 for the superedge counts, the default contact view (issue 13) and the degree sequences, 1 for triangles
    assert P.epsilon_shares(plain, limit) == pytest.approx(
        {"superedge_counts": 2 / 7, "contact_views": 2 / 7, "degree_sequences": 2 / 7, "triangle_count": 1 / 7})
    assert P.epsilon_shares(plain, limit + 1) == pytest.approx(
        {"superedge_counts": 1 / 3, "contact_views": 1 / 3, "degree_sequences": 1 / 3})
    assert P.epsilon_shares(plain) == P.epsilon_shares(plain, limit)  # before the person table is read
    forced = P.parse_policy(simple_policy(["a"], min_size=5, components={"triangle_count": {"enabled": True}}))
    assert P.component_enabled(forced, "triangle_count", 10 * limit)
    with_share = P.parse_policy(simple_policy(["a"], min_size=5, components={"triangle_count": {"share": 0.1}}))
    assert P.epsilon_shares(with_share, 10 * limit)["triangle_count"] == pytest.approx(0.1)
    used = P.parse_policy(simple_policy(["a"], min_size=5, components={"superedge_counts": {"share": 1.0}}))
    assert P.epsilon_shares(used, 10) == {"superedge_counts": 1.0}
    # end to end: the same network, the threshold below and above its number of people
    g = nx.karate_club_graph()
    edges, people = graph_tables(g, {"club": nx.get_node_attributes(g, "club")})
    monkeypatch.setattr(P, "TRIANGLE_AUTO_MAX_PEOPLE", 33)
    rel = aggpub.release_tables(edges, people, simple_policy(["club"], min_size=5), seed=4)
    assert [c["name"] for c in rel.manifest["components"]] == ["superedge_counts", "contact_views:club",
                                                                "degree_sequences"]
    assert "triangle_count" not in rel.manifest
    monkeypatch.setattr(P, "TRIANGLE_AUTO_MAX_PEOPLE", 34)
    rel = aggpub.release_tables(edges, people, simple_policy(["club"], min_size=5), seed=4)
    assert [c["name"] for c in rel.manifest["components"]] == ["superedge_counts", "contact_views:club",
                                                                "degree_sequences", "triangle_count"]
