"""Tests for the auditor (:mod:`aggpub.audit`).

Outside references: scipy (``ks_2samp``, ``wasserstein_distance``, ``cityblock``,
``binom`` for sums of binomials, ``chisquare`` for uniform sampling), networkx
(clustering, transitivity, assortativity, components, ``cut_size``, degrees on its
shipped example graphs: Zachary's karate club, Les Miserables, Florentine families,
Davis southern women), worked examples of the published formulas, and the discrete
Laplace pmf for the exact expected error under clamping.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path
import math

import networkx as nx

import numpy as np
import pytest
from scipy import sparse, stats
from scipy.spatial.distance import cityblock

import aggpub
from aggpub import cells as comp
from aggpub.audit import (
    audit_release,
    distribution_distances,
    error_summary,
    implied_degree_pmf,
    ks_distance,
    l1_distance,
    relative_errors,
    structure_statistics,
    wasserstein1_distance,
)
from aggpub.audit import queries as qw
from aggpub.synthesis import sample_block_network
from aggpub.noise.sampler import SeededRandomSource
from aggpub.policy import parse_policy

from .conftest import graph_tables, simple_policy

# --------------------------------------------------------------------------- distribution metrics


@pytest.mark.parametrize("seed", range(5))
def test_ks_and_wasserstein_match_scipy_on_integer_samples(seed):
    rng = np.random.default_rng(seed)
    x = rng.poisson(rng.uniform(1, 12), size=rng.integers(50, 400))
    y = rng.negative_binomial(3, 0.3, size=rng.integers(50, 400))
    hx, hy = np.bincount(x), np.bincount(y)
    # scipy.stats.ks_2samp: two-sample KS statistic = sup |F_x - F_y| over the empirical CDFs
    assert ks_distance(hx, hy) == pytest.approx(stats.ks_2samp(x, y).statistic, abs=1e-12)
    # scipy.stats.wasserstein_distance: first Wasserstein distance between the samples
    assert wasserstein1_distance(hx, hy) == pytest.approx(stats.wasserstein_distance(x, y), rel=1e-10)
    # weighted form on the common support
    k = np.arange(max(len(hx), len(hy)))
    px = np.pad(hx, (0, len(k) - len(hx))) / hx.sum()
    py = np.pad(hy, (0, len(k) - len(hy))) / hy.sum()
    assert wasserstein1_distance(px, py) == pytest.approx(
        stats.wasserstein_distance(k, k, u_weights=px + 1e-300, v_weights=py + 1e-300), rel=1e-9)
    assert l1_distance(hx, hy) == pytest.approx(cityblock(px, py), abs=1e-12)


def test_distances_are_zero_for_identical_and_maximal_for_disjoint():
    p = [0, 3, 5, 2]
    d = distribution_distances(p, np.array(p) * 7)  # normalisation: counts and shares alike
    assert d == {"ks": pytest.approx(0), "wasserstein1": pytest.approx(0), "l1": pytest.approx(0)}
    d = distribution_distances([1, 0, 0, 0], [0, 0, 0, 1])
    assert d["ks"] == pytest.approx(1.0) and d["l1"] == pytest.approx(2.0)
    assert d["wasserstein1"] == pytest.approx(3.0)  # all mass moved by 3 degrees
    with pytest.raises(ValueError):
        ks_distance([0, 0], [1])


def test_relative_error_with_sanity_bound_worked_example():
    # Xiao, Wang, Gehrke, "Differential privacy via wavelet transforms", ICDE 2010:
    # relative error |x_hat - x| / max(x, s).  With s = 10:
    true = [0, 5, 100]
    est = [2, 4, 130]
    np.testing.assert_allclose(relative_errors(true, est, 10), [2 / 10, 1 / 10, 30 / 100])
    s = error_summary(true, est, 10)
    assert s["mean_absolute_error"] == pytest.approx((2 + 1 + 30) / 3)
    assert s["mean_signed_error"] == pytest.approx((2 - 1 + 30) / 3)
    assert s["median_relative_error"] == pytest.approx(0.2)
    assert s["p90_relative_error"] == pytest.approx(np.percentile([0.2, 0.1, 0.3], 90))
    with pytest.raises(ValueError):
        relative_errors(true, est, 0)


def test_error_summary_equals_numpy_on_both_paths():
    """The error figures are numpy's own (numpy.percentile on the unsorted errors, mean, sqrt of mean square),
    whether every true value is at most the sanity bound (the relative errors then come from the sorted
    absolute errors, one sort) or not (two sorts); the definitions of Xiao, Wang, Gehrke (ICDE 2010)."""
    rng = np.random.default_rng(21)
    for top, s in ((8, 10.0), (500, 10.0), (10, 10.0)):  # all below s, many above, the largest equal to s
        true = rng.integers(0, top + 1, 50_001).astype(float)
        true[0] = top
        est = np.clip(true + rng.integers(-6, 7, len(true)), 0, None) + rng.random(len(true)) * (top > 100)
        got = error_summary(true, est, s)
        abs_err = np.abs(est - true)
        rel = abs_err / np.maximum(true, s)
        want = {"mean_absolute_error": abs_err.mean(), "rmse": np.sqrt(np.mean(abs_err ** 2)),
                "mean_signed_error": np.mean(est - true),
                "max_absolute_error": abs_err.max(), "mean_relative_error": rel.mean(),
                "median_absolute_error": np.percentile(abs_err, 50), "p90_absolute_error": np.percentile(abs_err, 90),
                "median_relative_error": np.percentile(rel, 50), "p90_relative_error": np.percentile(rel, 90),
                "p99_relative_error": np.percentile(rel, 99)}
        for k, v in want.items():
            assert got[k] == float(v), (top, k, got[k], v)


def test_percentiles_by_sorting_equal_numpy_percentile():
    """The audit's quantiles (sort, then numpy's selection) are numpy.percentile's numbers exactly: integer
    and continuous values, ties, odd and even lengths, NaN; the caller's array is kept unless it is given up."""
    from aggpub.audit.metrics import percentiles

    rng = np.random.default_rng(12)
    for n in (1, 2, 5, 10, 1001, 100_000):
        for x in (rng.integers(0, 7, n).astype(float), rng.normal(size=n), np.abs(rng.standard_cauchy(n))):
            q = [0, 5, 50, 90, 99, 100]
            kept = x.copy()
            assert np.array_equal(percentiles(x, q), np.percentile(kept, q))
            assert np.array_equal(x, kept)
            assert np.array_equal(percentiles(x, q, overwrite=True), np.percentile(kept, q))
            assert np.array_equal(np.sort(x), np.sort(kept))  # reordered, the same values
    assert np.isnan(percentiles([1.0, np.nan, 3.0], 50)) and np.isnan(np.percentile([1.0, np.nan, 3.0], 50))


# --------------------------------------------------------------------------- block-model degrees


def test_implied_degree_pmf_is_the_sum_of_binomials():
    sizes = np.array([5, 7, 4])
    a, b = comp.all_cells(3)
    counts = np.array([4, 10, 0, 6, 9, 3])  # (0,0) (0,1) (0,2) (1,1) (1,2) (2,2)
    pmf, method = implied_degree_pmf(a, b, counts, sizes)
    assert method == "binomial"
    P = comp.possible_pairs(sizes, a, b)
    p = dict(zip(zip(a.tolist(), b.tolist()), counts / P))

    def binom(n, q):
        return stats.binom.pmf(np.arange(n + 1), n, q)

    ref = np.zeros(80)
    for g in range(3):
        member = np.array([1.0])
        for h in range(3):
            q = p[(min(g, h), max(g, h))]
            member = np.convolve(member, binom(sizes[h] - (g == h), q))  # scipy.stats.binom, convolved
        ref[: len(member)] += sizes[g] / sizes.sum() * member
    np.testing.assert_allclose(pmf, ref[: len(pmf)], atol=1e-12)
    assert ref[len(pmf):].sum() < 1e-12
    # Poisson approximation keeps the mean (sum of count_ab / size_a, diagonal twice)
    pp, m2 = implied_degree_pmf(a, b, counts, sizes, method="poisson")
    assert m2 == "poisson"
    assert np.dot(np.arange(len(pp)), pp) == pytest.approx(np.dot(np.arange(len(pmf)), pmf), rel=1e-9)
    # and is the size-weighted mixture of scipy.stats.poisson laws with those means
    rates = (np.bincount(a, weights=counts, minlength=3) + np.bincount(b, weights=counts, minlength=3)) / sizes
    ref_p = sum(sizes[g] / sizes.sum() * stats.poisson.pmf(np.arange(len(pp)), rates[g]) for g in range(3))
    np.testing.assert_allclose(pp, ref_p, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("seed", range(4))
def test_implied_degree_pmf_support_holds_the_whole_law(seed):
    """The pmf's support (mean + 12 sqrt(mean) + 20 per member) holds all the mass of the sum of binomials:
    each member's variance (scipy.stats.binom.var, summed over cells) is at most its mean, and the law beyond
    the support (scipy.stats.binom pmfs convolved, up to every trial) is below 1e-12. Random tables from
    empty to full cells."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(2, 9, size=4)
    a, b = comp.all_cells(4)
    cap = comp.possible_pairs(sizes, a, b)
    counts = np.minimum(cap, np.where(rng.random(len(a)) < 0.3, cap, rng.integers(0, cap + 1)))
    pmf, method = implied_degree_pmf(a, b, counts, sizes)
    assert method == "binomial"
    p = dict(zip(zip(a.tolist(), b.tolist()), counts / cap))
    ref = np.zeros(int(sizes.sum()) + 100)  # every possible degree, and zeros past it
    for g in range(4):
        member, mean, var = np.array([1.0]), 0.0, 0.0
        for h in range(4):
            n, q = int(sizes[h] - (g == h)), p[(min(g, h), max(g, h))]
            member = np.convolve(member, stats.binom.pmf(np.arange(n + 1), n, q))
            mean, var = mean + stats.binom.mean(n, q), var + stats.binom.var(n, q)
        assert var <= mean + 1e-12
        ref[: len(member)] += sizes[g] / sizes.sum() * member
    assert ref[len(pmf):].sum() < 1e-12
    np.testing.assert_allclose(pmf, ref[: len(pmf)], atol=1e-12)


def test_poisson_pmf_helper_matches_scipy():
    """The audit's log-space Poisson pmf against scipy.stats.poisson.pmf, rate 0 included."""
    from aggpub.audit.degrees import _poisson_pmf

    k = np.arange(200)[None, :]
    lam = np.array([0.0, 1e-9, 0.3, 1.0, 7.5, 60.0, 150.0])[:, None]
    np.testing.assert_allclose(_poisson_pmf(k, lam), stats.poisson.pmf(k, lam), rtol=1e-10, atol=1e-300)


def test_grouping_loss_is_zero_on_a_graph_that_is_exactly_a_block_model():
    # Complete multipartite graph (networkx): every member of a part has the same degree and the
    # parts as supernodes hold full or empty cells, so the aggregate loses nothing.
    G = nx.complete_multipartite_graph(3, 5, 8)
    part = {n: d["subset"] for n, d in G.nodes(data=True)}
    edges, people = graph_tables(G, {"part": part})
    rel = aggpub.release_tables(edges, people, simple_policy(["part"]), seed=1)
    out = audit_release(rel, monte_carlo=0, structure_samples=0, source=SeededRandomSource(2))
    g = out["degree_distribution"]["grouping_only"]
    assert g["ks"] == pytest.approx(0, abs=1e-9) and g["wasserstein1"] == pytest.approx(0, abs=1e-9)
    assert out["degree_distribution"]["true_mean_degree"] == pytest.approx(
        np.mean([d for _, d in G.degree()]))


# --------------------------------------------------------------------------- sampler and structure


def test_sampler_places_exactly_the_counts_on_distinct_pairs():
    rng = np.random.default_rng(3)
    sizes = np.array([6, 9, 40, 3])
    a, b = comp.all_cells(4)
    P = comp.possible_pairs(sizes, a, b)
    counts = np.minimum(P, np.array([15, 54, 2, 36, 300, 27, 600, 100, 120, 3]))  # dense and sparse cells
    u, v = sample_block_network(a, b, counts, sizes, rng)
    group = np.repeat(np.arange(4), sizes)
    assert (u < v).all()
    assert len(set(zip(u.tolist(), v.tolist()))) == len(u) == counts.sum()
    got = np.zeros(len(a), dtype=np.int64)
    np.add.at(got, comp.cell_index(group[u], group[v], 4), 1)
    np.testing.assert_array_equal(got, counts)


def test_sampler_is_uniform_over_pairs_of_a_cell():
    # 2 of the 15 pairs of a 6-member supernode, many times: each pair equally often (chi-square).
    rng = np.random.default_rng(4)
    freq = np.zeros(15)
    pair_id = {p: i for i, p in enumerate(itertools.combinations(range(6), 2))}
    for _ in range(3000):
        u, v = sample_block_network([0], [0], [2], [6], rng)
        for x, y in zip(u, v):
            freq[pair_id[(x, y)]] += 1
    assert stats.chisquare(freq).pvalue > 1e-3


def test_sampled_degrees_follow_the_implied_distribution():
    rng = np.random.default_rng(5)
    sizes = np.array([300, 500, 200])
    a, b = comp.all_cells(3)
    counts = np.array([900, 1500, 100, 2500, 800, 300])
    pmf, _ = implied_degree_pmf(a, b, counts, sizes)
    u, v = sample_block_network(a, b, counts, sizes, rng)
    deg = np.bincount(np.concatenate([u, v]), minlength=sizes.sum())
    assert ks_distance(np.bincount(deg), pmf) < 0.03


@pytest.mark.parametrize("name", ["karate", "lesmis", "florentine", "davis", "union"])
def test_structure_statistics_match_networkx(name):
    if name == "karate":
        G = nx.karate_club_graph()
    elif name == "lesmis":
        G = nx.les_miserables_graph()
    elif name == "florentine":
        G = nx.florentine_families_graph()
    elif name == "davis":
        G = nx.davis_southern_women_graph()
    else:  # disconnected: the largest component is not everyone
        G = nx.disjoint_union(nx.karate_club_graph(), nx.florentine_families_graph())
    G = nx.convert_node_labels_to_integers(G, label_attribute="orig")
    e = np.array(list(G.edges()))
    n = G.number_of_nodes()
    cat = {n_: (d.get("club") or str(d.get("bipartite", n_ % 3))) for n_, d in G.nodes(data=True)}
    _, codes = np.unique([str(cat[i]) for i in range(n)], return_inverse=True)
    nx.set_node_attributes(G, {i: int(codes[i]) for i in range(n)}, "cat")
    st = structure_statistics(e[:, 0], e[:, 1], n, {"cat": codes})
    assert st["average_clustering"] == pytest.approx(nx.average_clustering(G), abs=1e-12)
    assert st["transitivity"] == pytest.approx(nx.transitivity(G), abs=1e-12)
    assert st["degree_assortativity"] == pytest.approx(nx.degree_assortativity_coefficient(G), abs=1e-9)
    assert st["assortativity:cat"] == pytest.approx(nx.attribute_assortativity_coefficient(G, "cat"), abs=1e-9)
    lcc = max(len(c) for c in nx.connected_components(G)) / n
    assert st["largest_component_fraction"] == pytest.approx(lcc)


# --------------------------------------------------------------------------- workloads


@pytest.fixture(scope="module")
def lesmis_release():
    G = nx.les_miserables_graph()
    deg = dict(G.degree())
    band = {n: ("low" if d <= 2 else "mid" if d <= 8 else "high") for n, d in deg.items()}
    group = {n: i % 4 for i, n in enumerate(sorted(G))}
    edges, people = graph_tables(G, {"band": band, "group": group})
    rel = aggpub.release_tables(edges, people, simple_policy(["band", "group"], min_size=1), seed=7)
    return G, band, group, rel


def test_released_cells_copy_path_equals_the_scatter(lesmis_release):
    """A dense bundle in cell order is copied, any other order scattered: the same arrays either way, and a
    shuffled table (rows in another order) is recognised and scattered back into cell order."""
    from types import SimpleNamespace

    from aggpub.audit.truth import released_cells

    _, _, _, rel = lesmis_release
    n = rel.grouping.n_supernodes
    cells = comp.all_cells(n)
    t = rel.tables["superedges"]
    shuffled = t.take(np.random.default_rng(2).permutation(t.num_rows))
    for column in ("edge_count", "edge_count_unclamped", "edge_count_estimate"):
        plain = released_cells(rel, n, column)
        copied = released_cells(rel, n, column, cells=cells)
        assert copied.dtype == plain.dtype and np.array_equal(copied, plain)
        other = SimpleNamespace(tables={"superedges": shuffled})
        assert np.array_equal(released_cells(other, n, column, cells=cells), plain)
    a = np.asarray(t.column("supernode_a").to_numpy())
    b = np.asarray(t.column("supernode_b").to_numpy())
    assert np.array_equal(a, cells[0]) and np.array_equal(b, cells[1])  # the copy path is the one taken


def test_a_contact_matrix_of_one_value_per_supernode_is_answered_by_the_cells():
    """When every supernode holds its own value, in value order, each contact-matrix query is one cell in
    cell order: the workload says so and answers with the cells themselves, the same numbers as its matrix.
    Any other labelling (values shuffled, repeated, or generalised) keeps the matrix product."""
    from aggpub.cells import all_cells

    n = 12
    a, b = all_cells(n)
    x = np.random.default_rng(0).integers(0, 50, len(a)).astype(np.float64)
    labellings = {
        "one value each, in order": ([f"v{i:02d}" for i in range(n)], True),
        "one value each, shuffled": ([f"v{i:02d}" for i in np.random.default_rng(1).permutation(n)], False),
        "a value shared": ([f"v{min(i, 10):02d}" for i in range(n)], False),
        "a generalised label": ([f"v{i:02d}" for i in range(n - 1)] + ["*"], False),  # '*' sorts first
    }
    for what, (values, expected) in labellings.items():
        w = qw.contact_matrix_workload(a, b, values, "band")
        assert w.cell_by_cell is expected, what
        if expected:  # the matrix really is the identity
            assert w.matrix.shape == (len(a), len(a)) and (w.matrix != sparse.identity(len(a))).nnz == 0
        assert np.array_equal(w.answer(x), w.matrix @ x), what  # the shortcut never changes an answer


def test_audit_figures_computed_once_for_workloads_that_are_the_cells(lesmis_release, monkeypatch):
    """The superedge cells and a contact matrix of one value per supernode get the same error figures from
    one computation (the cache is keyed on the very arrays), and figures of other workloads are untouched:
    the audit's JSON with the cache equals the one computed call by call. Les Miserables (Knuth, 1993)."""
    from aggpub.audit import core
    from aggpub.audit.truth import truth_of_release

    G, band, group, _ = lesmis_release
    edges, people = graph_tables(G, {"group": group})
    rel = aggpub.release_tables(edges, people, simple_policy(["group"], min_size=1), seed=7)
    shared = [w.name for w in truth_of_release(rel).workloads if w.cell_by_cell]
    assert shared == ["contact_matrix:group"]  # four supernodes, one group each: the case the cache serves

    def audit():
        out = audit_release(rel, monte_carlo=3, structure_samples=0, seed=2, source=SeededRandomSource(5))
        return json.dumps({k: v for k, v in out.items() if k not in ("created_utc",) and not k.startswith("_")},
                          sort_keys=True, default=str)

    cached = audit()
    calls = []

    class Each:  # no sharing: every call computed
        def __init__(self, f):
            self.f = f

        def __call__(self, *args):
            calls.append(1)
            return self.f(*args)

    monkeypatch.setattr(core, "_Once", Each)
    assert audit() == cached and calls


def test_workloads_match_networkx_counts(lesmis_release):
    G, band, group, rel = lesmis_release
    st = rel.truth["superedges"]
    n = rel.grouping.n_supernodes
    labels = rel.grouping.labels
    sn_band = labels.column("band").to_pylist()
    # person -> supernode: the release's own assignment, indexed like the person table
    names = [str(x) for x in G.nodes()]
    sn_of = dict(zip(names, rel.grouping.assignment.tolist()))
    # contact matrix by band: networkx edge counts by the pair of attribute values
    w = qw.contact_matrix_workload(st.a, st.b, sn_band, "band")
    got = dict(zip(w.labels, w.answer(st.count)))
    ref = {}
    for x, y in G.edges():
        key = tuple(sorted((band[x], band[y])))
        ref[key] = ref.get(key, 0) + 1
    assert {k: v for k, v in got.items() if v} == ref
    # cut queries: networkx.cut_size between the people of the two supernode sets
    rng = np.random.default_rng(0)
    cw = qw.cut_workload(st.a, st.b, n, 25, rng)
    rng = np.random.default_rng(0)
    side = rng.integers(0, 3, size=(25, n))
    answers = cw.answer(st.count)
    for q in range(25):
        S = [p for p in names if side[q, sn_of[p]] == 0]
        T = [p for p in names if side[q, sn_of[p]] == 1]
        assert answers[q] == nx.cut_size(G, S, T)
    # degree totals: sum of networkx degrees of each supernode's members
    dw = qw.degree_totals_workload(st.a, st.b, n)
    tot = np.zeros(n)
    for p, d in G.degree():
        tot[sn_of[p]] += d
    np.testing.assert_array_equal(dw.answer(st.count), tot)
    # noise variance of a sum of k independent cells is k times the cell variance; k counted by hand
    crossing = [sum(1 for x, y in zip(st.a, st.b) if {side[q, x], side[q, y]} == {0, 1}) for q in range(25)]
    np.testing.assert_allclose(cw.noise_variance(2.0), 2.0 * np.array(crossing))


def test_degree_totals_by_runs_equal_the_sparse_matrix_form(lesmis_release):
    """Per-supernode degree totals summed over runs of cells answer as the sparse matrix of the definition
    (scipy: 2 on the diagonal cell, 1 at both ends of any other cell): the same numbers for whole-number tables,
    within rounding for others, one table or several; the noise variance is the row sums of the squared
    weights. On the whole table, on a list of cells in another order, and on a list without the last rows."""
    _, _, _, rel = lesmis_release
    st = rel.truth["superedges"]
    n = rel.grouping.n_supernodes
    rng = np.random.default_rng(5)
    keep_all = np.ones(len(st.a), bool)
    for keep, order in ((keep_all, np.arange(len(st.a))), (keep_all, rng.permutation(len(st.a))),
                        (st.a < n - 2, None)):
        a, b = st.a[keep], st.b[keep]
        if order is not None:
            a, b = a[order], b[order]
        diag = a == b
        cols = np.arange(len(a))
        m = sparse.csr_matrix((np.concatenate([np.where(diag, 2.0, 1.0), np.ones(int((~diag).sum()))]),
                               (np.concatenate([a, b[~diag]]), np.concatenate([cols, cols[~diag]]))),
                              shape=(n, len(a)))
        w = qw.degree_totals_workload(a, b, n)
        assert w.n_queries == n and not w.single_cell
        whole = rng.integers(0, 50, size=(3, len(a))).astype(float)
        frac = rng.normal(3.0, 2.0, size=(3, len(a)))
        assert np.array_equal(w.answer(whole[0]), m @ whole[0])
        assert np.array_equal(w.answer(whole), (m @ whole.T).T)
        np.testing.assert_allclose(w.answer(frac), (m @ frac.T).T, rtol=1e-12, atol=1e-9)
        assert np.array_equal(w.noise_variance(1.7), np.asarray(m.multiply(m).sum(axis=1)).ravel() * 1.7)


def test_workloads_built_by_column_answer_like_their_row_form(lesmis_release):
    """The contact-matrix workload stays in the column-wise form it is built in; its answers (one table and
    several) and noise variances are the very numbers of the row-wise (CSR) form."""
    from dataclasses import replace

    _, _, _, rel = lesmis_release
    st = rel.truth["superedges"]
    rng = np.random.default_rng(5)
    tables = rng.normal(3.0, 2.0, size=(3, len(st.a)))
    built = [qw.contact_matrix_workload(st.a, st.b, rel.grouping.labels.column("band").to_pylist(), "band")]
    for w in built:
        assert w.matrix.format == "csc"
        rows = replace(w, matrix=w.matrix.tocsr())
        assert np.array_equal(w.answer(tables[0]), rows.answer(tables[0]))
        assert np.array_equal(w.answer(tables), rows.answer(tables))
        assert np.array_equal(w.noise_variance(1.7), rows.noise_variance(1.7))


def test_contact_matrix_of_own_values_is_the_cells_in_order():
    """Every supernode holding its own value, in value order, on the whole table in row order: the workload is
    the identity, its labels each cell's pair of values; the same queries as the general path gives for the
    same cells listed in another order (which cannot take the short cut)."""
    n = 12
    a, b = comp.all_cells(n)
    values = [f"v{i:02d}" for i in range(n)]
    w = qw.contact_matrix_workload(a, b, values, "x")
    assert w.cell_by_cell and w.n_queries == len(a)
    assert (w.matrix != sparse.identity(len(a), format="csc")).nnz == 0
    assert list(w.labels) == [(values[i], values[j]) for i, j in zip(a, b)]
    perm = np.random.default_rng(4).permutation(len(a))
    wp = qw.contact_matrix_workload(a[perm], b[perm], values, "x")
    assert not wp.cell_by_cell and list(wp.labels) == list(w.labels)
    table = np.random.default_rng(5).poisson(3.0, len(a)).astype(np.float64)
    assert np.array_equal(wp.answer(table[perm]), w.answer(table))
    assert np.array_equal(wp.noise_variance(1.5), w.noise_variance(1.5))
    assert w.notes == wp.notes


def test_cut_queries_dense_and_sparse_paths_agree(monkeypatch):
    """The dense-matrix evaluation (few supernodes) and the sparse one (many) give the same cuts, on the whole
    table and on a table listing only some cells (the dense matrix then starts from zeros)."""
    rng = np.random.default_rng(3)
    n = 30
    a_all, b_all = comp.all_cells(n)
    for keep in (np.ones(len(a_all), dtype=bool), rng.random(len(a_all)) < 0.6):
        a, b = a_all[keep], b_all[keep]
        tables = rng.poisson(4.0, size=(3, len(a))).astype(np.float64)
        with monkeypatch.context() as mp:
            dense = qw.cut_workload(a, b, n, 40, np.random.default_rng(9))
            assert isinstance(dense, qw.CutWorkload)
            mp.setattr(qw, "DENSE_CUT_MAX_GROUPS", 0)
            sparse_w = qw.cut_workload(a, b, n, 40, np.random.default_rng(9))
        assert sparse_w.matrix is not None and sparse_w.n_queries == dense.n_queries == 40
        np.testing.assert_allclose(dense.answer(tables), sparse_w.answer(tables))
        np.testing.assert_allclose(dense.answer(tables[0]), sparse_w.answer(tables[0]))
        np.testing.assert_allclose(dense.answer(tables[1]), sparse_w.answer(tables[1]))  # the matrix is reused
        np.testing.assert_allclose(dense.noise_variance(1.5), sparse_w.noise_variance(1.5))


def test_monte_carlo_matches_the_exact_clamped_error(lesmis_release):
    """The Monte Carlo mean absolute error of single cells against its exact value.

    Exact: E|clip(t + Z, 0, cap) - t| with Z discrete Laplace, from the pmf
    (1 - alpha) / (1 + alpha) alpha^|z| (Ghosh, Roughgarden, Sundararajan, STOC 2009).
    """
    _, _, _, rel = lesmis_release
    out = audit_release(rel, monte_carlo=200, structure_samples=0, source=SeededRandomSource(11))
    cells = out["queries"]["superedge_cells"]
    mech = rel.mechanisms["superedge_counts"]
    st = rel.truth["superedges"]
    cap = comp.possible_pairs(rel.truth["sizes"], st.a, st.b)
    z = np.arange(-300, 301)  # wide enough for the scale of the default split (issue 12: 2/7 of epsilon here)
    pz = mech.pmf(z)
    exact = np.mean([(pz * np.abs(np.clip(t + z, 0, c) - t)).sum() for t, c in zip(st.count, cap)])
    mc = cells["monte_carlo"]["mean_absolute_error"]
    assert abs(mc["mean"] - exact) < 4 * mc["sd"] / np.sqrt(mc["draws"]) + 1e-9
    # before clamping: RMSE from the variance 2 alpha / (1 - alpha)^2 and E|Z| = 2 alpha / (1 - alpha^2)
    al = mech.alpha
    assert cells["expected_rmse"] == pytest.approx(np.sqrt(2 * al / (1 - al) ** 2))
    assert cells["expected_mean_absolute_error"] == pytest.approx(2 * al / (1 - al ** 2))
    assert (pz * np.abs(z)).sum() == pytest.approx(2 * al / (1 - al ** 2), rel=1e-9)


def test_audit_figures_and_decomposition(lesmis_release):
    _, _, _, rel = lesmis_release
    out = audit_release(rel, monte_carlo=5, structure_samples=2, source=SeededRandomSource(3), seed=1)
    dd = out["degree_distribution"]
    for k in ("ks", "wasserstein1", "l1"):
        assert dd[k] == pytest.approx(dd["grouping_loss"][k] + dd["noise_added"][k])
        assert 0 <= dd[k]
    for name in ("superedge_cells", "contact_matrix:band", "contact_matrix:group", "cut_queries",
                 "supernode_degree_totals"):
        w = out["queries"][name]
        assert {"mean_absolute_error", "median_relative_error", "p90_relative_error", "p99_relative_error",
                "expected_rmse", "monte_carlo"} <= set(w)
    # the released answers: recompute one workload from the public table
    st = rel.truth["superedges"]
    released = rel.tables["superedges"].column("edge_count").to_numpy()
    assert out["queries"]["superedge_cells"]["mean_absolute_error"] == pytest.approx(
        np.mean(np.abs(released - st.count)))
    s = out["structure"]
    assert s["true"]["contacts"] == rel.network.n_edges
    assert s["sampled_from_true_aggregate"]["contacts"]["mean"] == rel.network.n_edges
    # issue 12: the researchers' sampler gives every cell its consistent estimate, rounded without bias
    est = rel.tables["superedges"].column("edge_count_estimate").to_numpy()
    assert np.floor(est).sum() <= s["sampled_from_release"]["contacts"]["mean"] <= np.ceil(est).sum()
    fid = s["fidelity"]
    for which in ("grouping_alone", "release"):
        assert set(fid[which]) == {"contacts_ratio", "degree_ks", "largest_degree_ratio", "clustering_ratio",
                                   "final_size_ratio"}
    assert fid["grouping_alone"]["contacts_ratio"]["mean"] == 1.0  # true cells, exactly
    assert "gate" not in out  # the audit decides nothing: the gate reads released values (aggpub.gate)


def test_audit_uses_released_degree_histograms_when_present():
    G = nx.karate_club_graph()
    club = {n: d["club"] for n, d in G.nodes(data=True)}
    edges, people = graph_tables(G, {"club": club})
    pol = simple_policy(["club"], components={"degree_histograms": {"enabled": True, "max_degree": 10}})
    rel = aggpub.release_tables(edges, people, pol, seed=2)
    out = audit_release(rel, monte_carlo=3, structure_samples=0, source=SeededRandomSource(1))
    dd = out["degree_distribution"]
    assert dd["basis"].startswith("released per-supernode degree histograms")
    deg = np.minimum([d for _, d in G.degree()], 10)
    released = aggpub.audit.degrees.released_histogram_degrees(rel.tables["degree_histograms"], 11)
    assert dd["ks"] == pytest.approx(ks_distance(np.bincount(deg, minlength=11), released))
    assert dd["monte_carlo"]["ks"]["draws"] == 3


def test_audit_of_a_sparse_release_reads_absent_cells_as_zero():
    # Cormode, Procopiuc, Srivastava, Tran (ICDT 2012): cells below the threshold are not published.
    G = nx.les_miserables_graph()
    group = {n: i % 6 for i, n in enumerate(sorted(G))}
    edges, people = graph_tables(G, {"group": group})
    pol = simple_policy(["group"], components={"superedge_counts": {"method": "sparse", "sparse_threshold": 2}})
    rel = aggpub.release_tables(edges, people, pol, seed=4)
    assert rel.manifest.get("superedges_sparse")
    out = audit_release(rel, monte_carlo=20, structure_samples=1, source=SeededRandomSource(5))
    n = rel.grouping.n_supernodes
    t = rel.tables["superedges"]
    released = np.zeros(n * (n + 1) // 2)
    released[comp.cell_index(t.column("supernode_a").to_numpy(), t.column("supernode_b").to_numpy(), n)] = \
        t.column("edge_count").to_numpy()
    st = rel.truth["superedges"]
    true = np.zeros(n * (n + 1) // 2)
    true[comp.cell_index(st.a, st.b, n)] = st.count
    assert out["queries"]["superedge_cells"]["mean_absolute_error"] == pytest.approx(np.mean(np.abs(released - true)))
    assert any("sparse superedge release" in note for note in out["notes"])
    assert out["structure"]["sampled_from_release"]["contacts"]["mean"] == released.sum()


def test_audit_under_the_person_unit_uses_the_noisy_sizes_and_the_cap_d():
    import tomllib

    from aggpub.demo import demo_policy_text, generate_town

    edges, people = generate_town(1500, seed=3)
    raw = tomllib.loads(demo_policy_text())
    raw["privacy"] = {"unit": "person", "epsilon": 1.0, "max_contacts": 40}
    rel = aggpub.release_tables(edges, people, parse_policy(raw), seed=6)
    out = audit_release(rel, monte_carlo=3, structure_samples=1, source=SeededRandomSource(8))
    mech = rel.mechanisms["superedge_counts"]
    assert mech.sensitivity == 40
    assert out["queries"]["superedge_cells"]["expected_rmse"] == pytest.approx(np.sqrt(mech.variance()))
    noisy_sizes = rel.tables["supernodes"].column("size").to_numpy()
    # the grouping-only side uses the true sizes, the released side the noisy ones
    assert not np.array_equal(noisy_sizes, rel.truth["sizes"])
    # issue 12: sampled from the consistent estimates (rounded without bias), on the noisy sizes
    est = rel.tables["superedges"].column("edge_count_estimate").to_numpy()
    mean_degree = out["structure"]["sampled_from_release"]["mean_degree"]["mean"]
    assert 2 * np.floor(est).sum() / noisy_sizes.sum() <= mean_degree <= 2 * np.ceil(est).sum() / noisy_sizes.sum()


def test_monte_carlo_noise_follows_the_discrete_laplace_pmf():
    # The audit's fast Monte Carlo noise (difference of two geometrics) against the two-sided geometric pmf
    # (1 - a) / (1 + a) a^|z| of Ghosh, Roughgarden, Sundararajan (STOC 2009): a chi-square goodness-of-fit
    # test (scipy) and the variance 2 a / (1 - a)^2, at three scales; fixed seed, deterministic.
    from scipy import stats

    from aggpub.audit.draws import draw_noise
    from aggpub.noise.mechanisms import GeometricMechanism

    for epsilon, sensitivity in ((1.0, 1.0), (0.25, 1.0), (1.0, 4.0)):
        mech = GeometricMechanism(epsilon=epsilon, sensitivity=sensitivity)
        z = draw_noise(mech, 400_000, np.random.default_rng(7))
        a = math.exp(-epsilon / sensitivity)
        top = int(np.ceil(math.log(1e-4) / math.log(a)))  # bins |z| <= top, then one tail bin each side
        edges = np.arange(-top, top + 1)
        pmf = (1 - a) / (1 + a) * a ** np.abs(edges)
        tail = a ** (top + 1) / (1 + a)  # P(Z > top) = P(Z < -top)
        expected = np.concatenate([[tail], pmf, [tail]]) * len(z)
        observed = np.concatenate([[np.sum(z < -top)], np.bincount(z[np.abs(z) <= top] + top, minlength=len(edges)),
                                   [np.sum(z > top)]])
        p = stats.chisquare(observed, expected).pvalue
        assert p > 1e-4, (epsilon, sensitivity, p)
        assert abs(z.var() / mech.variance() - 1) < 0.02
        # a scale 30% too small is rejected by the same test (the check has power)
        wrong = draw_noise(GeometricMechanism(epsilon=epsilon * 1.3, sensitivity=sensitivity), 400_000,
                           np.random.default_rng(7))
        obs_w = np.concatenate([[np.sum(wrong < -top)],
                                np.bincount(wrong[np.abs(wrong) <= top] + top, minlength=len(edges)),
                                [np.sum(wrong > top)]])
        assert stats.chisquare(obs_w, expected).pvalue < 1e-6


def test_monte_carlo_noise_as_float_is_the_same_whole_numbers():
    # The audit adds its noise to float tables: the float form must be the very integers of the int form.
    from aggpub.audit.draws import draw_noise
    from aggpub.noise.mechanisms import GeometricMechanism

    mech = GeometricMechanism(epsilon=0.5, sensitivity=1.0)
    zi = draw_noise(mech, 50_000, np.random.default_rng(3))
    zf = draw_noise(mech, 50_000, np.random.default_rng(3), as_float=True)
    assert zi.dtype == np.int64 and zf.dtype == np.float64
    assert np.array_equal(zf, zi) and np.all(zf == np.floor(zf)) and zi.std() > 1


def test_triangles_per_node_match_networkx_on_random_graphs():
    # degree-ordered counting against networkx.triangles on Erdos-Renyi and power-law-ish graphs (ties in degree)
    from aggpub.audit.network_stats import adjacency, triangles_per_node

    for seed, G in enumerate([nx.gnp_random_graph(60, 0.15, seed=1), nx.barabasi_albert_graph(80, 4, seed=2),
                              nx.complete_graph(7), nx.empty_graph(5)]):
        u = np.array([e[0] for e in G.edges()], dtype=np.int64)
        v = np.array([e[1] for e in G.edges()], dtype=np.int64)
        got = triangles_per_node(adjacency(u, v, G.number_of_nodes()))
        want = nx.triangles(G)
        assert got.tolist() == [want[i] for i in range(G.number_of_nodes())], seed


def _structure_json(out):
    return json.dumps(out["structure"], sort_keys=True, default=str)


def test_structure_figures_are_the_same_in_a_helper_process(lesmis_release, monkeypatch):
    """The structure section's tasks shared with a helper interpreter give the same figures as all in process
    (every network seeded by its own child of its side's seed); a helper that cannot start, that fails a task or
    that dies after some answers hands its work back, and the figures stay the same. Les Miserables
    co-appearances (Knuth, The Stanford GraphBase, 1993, as networkx ships it)."""
    from aggpub.audit import sampled
    from aggpub.audit.core import _start_structure
    from aggpub.audit.truth import truth_of_release
    from aggpub.synthesis import sampler

    rel = lesmis_release[3]

    def audit(parallel):
        sampler._AFFINITY_CACHE.clear()  # the helper has no cache either
        return _structure_json(audit_release(rel, monte_carlo=0, structure_samples=2, seed=4,
                                             source=SeededRandomSource(1), parallel_structure=parallel))

    here = audit(False)
    assert "sampled_from_release" in here and here == audit(False)
    assert audit(True) == here

    def work(parallel=True):
        sampler._AFFINITY_CACHE.clear()
        return _start_structure(rel, truth_of_release(rel), 2, np.random.default_rng(0), parallel=parallel)["beside"]

    # the helper really answered: every task done by one side or the other, the same values either way
    alone = work(False)
    assert alone.proc is None
    want = alone.result()
    handle = work()
    try:
        assert handle.proc is not None
        got = handle.result()
        assert handle.helper_tasks >= 1
    finally:
        handle.close()
    assert handle.proc.poll() is not None  # ended
    assert json.dumps(got, sort_keys=True, default=str) == json.dumps(want, sort_keys=True, default=str)
    assert got["true"]["stats"]["contacts"] == rel.network.n_edges
    assert [len(got[s]["runs"]) for s in ("release", "grouping_alone")] == [2, 2]
    # a helper that exits at once, one that fails every task, one that dies after its first answer
    real_run = sampled.run_task
    for child in ("import sys; sys.exit(3)",
                  "import aggpub.audit.sampled as s; s.run_task = lambda *a: 1 / 0; s._serve()",
                  "import os, aggpub.audit.sampled as s; r = s.run_task; "
                  "s.run_task = lambda *a: (r(*a), os._exit(0) if a[2][0] == 'fit' else None)[0]; s._serve()"):
        monkeypatch.setattr(sampled, "_CHILD", child)
        assert audit(True) == here, child
    assert sampled.run_task is real_run
    # another seed gives other networks (the comparison above can fail)
    sampler._AFFINITY_CACHE.clear()
    other = audit_release(rel, monte_carlo=0, structure_samples=2, seed=5,
                          source=SeededRandomSource(1), parallel_structure=False)
    assert _structure_json(other) != here


def test_structure_work_reports_a_failed_task_and_keeps_each_networks_stream(lesmis_release, monkeypatch):
    """An error in a task is raised by ``result()`` (not swallowed); network ``i`` of a side draws from the
    ``i``-th child of the side's seed whatever order the tasks run in (computed alone, it gives the same figures).
    Les Miserables co-appearances (Knuth, The Stanford GraphBase, 1993, as networkx ships it)."""
    from aggpub.audit import sampled
    from aggpub.audit.core import _start_structure
    from aggpub.audit.truth import truth_of_release
    from aggpub.synthesis import fit_affinity

    rel = lesmis_release[3]
    work = _start_structure(rel, truth_of_release(rel), 3, np.random.default_rng(0), parallel=False)["beside"]
    got = work.result()
    job = work.sides["release"]
    rho = fit_affinity(job.inputs)
    for i in (2, 0):  # out of order
        stats, figure = sampled.network_figures_of(job, i, rho)
        assert stats == got["release"]["runs"][i]
        assert np.array_equal(figure["degrees"], got["release"]["figures"][i]["degrees"])
    assert got["release"]["runs"][0] != got["release"]["runs"][1]  # separate streams, not one repeated

    def broken(sides, true_job, task):
        if task[0] == "true":
            raise RuntimeError("no true network")
        return real(sides, true_job, task)

    real = sampled.run_task
    monkeypatch.setattr(sampled, "run_task", broken)
    work = _start_structure(rel, truth_of_release(rel), 1, np.random.default_rng(0), parallel=False)["beside"]
    with pytest.raises(RuntimeError, match="no true network"):
        work.result()


def test_an_audit_that_fails_ends_its_structure_helper(lesmis_release, monkeypatch):
    """An audit section that fails while the helper works on the structure tasks: the error reaches the caller,
    the helper process is ended and the feeding thread has stopped. Les Miserables co-appearances (Knuth, The
    Stanford GraphBase, 1993, as networkx ships it)."""
    from aggpub.audit import core, sampled

    made = []
    real_start = sampled.start_work

    def start(*args, **kwargs):
        made.append(real_start(*args, **kwargs))
        return made[-1]

    def fail(*args, **kwargs):
        raise RuntimeError("a section failed")

    monkeypatch.setattr(sampled, "start_work", start)
    monkeypatch.setattr(core, "_audit_sections", fail)
    with pytest.raises(RuntimeError, match="a section failed"):
        audit_release(lesmis_release[3], monte_carlo=0, structure_samples=2, seed=4, parallel_structure=True)
    work = made[0]
    assert work.proc is not None and work.proc.poll() is not None
    assert not work.thread.is_alive()


def test_a_spare_helper_is_used_or_ended(lesmis_release, monkeypatch):
    """A helper started ahead (``start_spare``) is the one the audit shares its tasks with; one not used is ended;
    none is started below ``PARALLEL_MIN_CONTACTS`` or above ``MAX_STRUCTURE_EDGES``. Les Miserables
    co-appearances (Knuth, The Stanford GraphBase, 1993, as networkx ships it)."""
    from aggpub.audit import sampled
    from aggpub.audit.core import _start_structure
    from aggpub.audit.truth import truth_of_release

    monkeypatch.setattr(sampled.os, "cpu_count", lambda: 2)
    for contacts in (sampled.PARALLEL_MIN_CONTACTS - 1, sampled.MAX_STRUCTURE_EDGES + 1):
        sampled.start_spare(contacts)
        assert sampled._SPARE == []
    sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS)
    sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS)  # at most one
    assert len(sampled._SPARE) == 1
    spare = sampled._SPARE[0]
    rel = lesmis_release[3]
    plan = _start_structure(rel, truth_of_release(rel), 1, np.random.default_rng(0), parallel=True)
    try:
        assert plan["beside"].proc is spare and sampled._SPARE == []
        done = plan["beside"].result()
        assert len(done["release"]["runs"]) == 1 and plan["beside"].helper_tasks >= 1
    finally:
        plan["beside"].close()
    assert spare.poll() is not None
    # a spare nobody takes is ended, and so is one when the tasks run in this process
    sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS)
    spare = sampled._SPARE[0]
    sampled.discard_spare()
    assert sampled._SPARE == [] and spare.poll() is not None
    sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS)
    spare = sampled._SPARE[0]
    plan = _start_structure(rel, truth_of_release(rel), 1, np.random.default_rng(0), parallel=False)
    assert plan["beside"].proc is None and plan["beside"].thread is None
    assert sampled._SPARE == [] and spare.poll() is not None


def test_a_release_ends_its_spare_helper(tmp_path, monkeypatch):
    """``run_release`` starts a spare helper once the inputs are read and leaves none behind, whether the audit
    took it or the release failed before the audit. Zachary's karate club (Zachary 1977, as networkx ships it),
    with the helper's threshold lowered to its 78 contacts."""
    import pyarrow.parquet as pq

    from aggpub.audit import sampled
    from aggpub.pipeline import run_release

    from .conftest import graph_tables, simple_policy

    G = nx.karate_club_graph()
    edges, people = graph_tables(G, {"club": {n: G.nodes[n]["club"] for n in G}})
    ep, pp = tmp_path / "e.parquet", tmp_path / "p.parquet"
    pq.write_table(edges, ep)
    pq.write_table(people, pp)
    monkeypatch.setattr(sampled, "PARALLEL_MIN_CONTACTS", 10)
    monkeypatch.setattr(sampled.os, "cpu_count", lambda: 2)
    started = []
    real_spawn = sampled._spawn
    monkeypatch.setattr(sampled, "_spawn", lambda: started.append(real_spawn()) or started[-1])
    policy = parse_policy(simple_policy(["club"], min_size=5))
    run_release(policy, ep, pp, tmp_path / "out", seed=1)
    assert len(started) == 1 and sampled._SPARE == [] and started[0].poll() is not None

    def fail(*args, **kwargs):
        raise RuntimeError("stop before the audit")

    import aggpub.pipeline as pipeline
    monkeypatch.setattr(pipeline, "build_release", fail)
    with pytest.raises(RuntimeError):
        run_release(policy, ep, pp, tmp_path / "out2", seed=1)
    assert len(started) == 2 and sampled._SPARE == [] and started[1].poll() is not None


def test_contact_rows_estimate_reads_little_and_is_close(tmp_path):
    """The estimate that starts the helper before reading: exact on a small text file (its lines less the
    header, with or without a final line end), within a few rows on a large one (the lines of its first MiB
    scaled to its size), a Parquet file's own row count, an Arrow table's rows; unknown for compressed text,
    a missing file or no path."""
    import gzip

    import pyarrow as pa
    import pyarrow.parquet as pq

    from aggpub.audit.sampled import ESTIMATE_BYTES, contact_rows_estimate

    small = tmp_path / "small.csv"
    small.write_text("source,target\n" + "".join(f"p{i},p{i + 1}\n" for i in range(1000)))
    assert contact_rows_estimate(small) == 1000
    small.write_text("source,target\n" + "\n".join(f"p{i},p{i + 1}" for i in range(1000)))  # no final line end
    assert contact_rows_estimate(small) == 1000
    rng = np.random.default_rng(3)
    ids = rng.integers(0, 10 ** rng.integers(1, 7, 300_000), 300_000)  # rows of uneven lengths
    big = tmp_path / "big.csv"
    big.write_text("source,target,setting\n" + "".join(f"{a},{a + 7},home\n" for a in ids))
    assert big.stat().st_size > 3 * ESTIMATE_BYTES
    assert abs(contact_rows_estimate(big) - 300_000) < 0.01 * 300_000
    table = pa.table({"source": pa.array(ids), "target": pa.array(ids + 7)})
    pq.write_table(table, tmp_path / "e.data")  # recognised by its first bytes, not its name
    assert contact_rows_estimate(tmp_path / "e.data") == 300_000
    assert contact_rows_estimate(table) == 300_000
    packed = tmp_path / "e.csv.gz"
    packed.write_bytes(gzip.compress(small.read_bytes()))
    assert contact_rows_estimate(packed) is None
    assert contact_rows_estimate(tmp_path / "missing.csv") is None and contact_rows_estimate(None) is None


def test_a_spare_started_from_an_estimate_is_kept_or_ended_by_the_count(tmp_path, monkeypatch):
    """``start_spare_for`` starts the helper from the file's estimate alone; once the contacts are counted,
    ``start_spare`` keeps it when they are in the helper's range and ends it when they are not (a wrong
    estimate costs time only); an estimate outside the range starts nothing."""
    from aggpub.audit import sampled

    monkeypatch.setattr(sampled.os, "cpu_count", lambda: 2)
    edges = tmp_path / "e.csv"
    edges.write_text("source,target\n" + "".join(f"{i},{i + 1}\n" for i in range(sampled.PARALLEL_MIN_CONTACTS)))
    try:
        sampled.start_spare_for(edges)
        assert len(sampled._SPARE) == 1
        spare = sampled._SPARE[0]
        with monkeypatch.context() as mp:  # a second call (run_release after the command) reads nothing again
            mp.setattr(sampled, "contact_rows_estimate", lambda e: pytest.fail("the input was read again"))
            sampled.start_spare_for(edges)
        assert sampled._SPARE == [spare]
        sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS + 5)  # counted: in range, the same helper kept
        assert sampled._SPARE == [spare] and spare.poll() is None
        sampled.start_spare(sampled.PARALLEL_MIN_CONTACTS - 1)  # counted: too few, ended
        assert sampled._SPARE == [] and spare.poll() is not None
        edges.write_text("source,target\n1,2\n")
        sampled.start_spare_for(edges)
        assert sampled._SPARE == []
    finally:
        sampled.discard_spare()


def test_structure_figures_do_not_depend_on_the_engines_row_order(lesmis_release, monkeypatch):
    """A seeded audit gives the same structure figures whatever order the engine returns the contacts in (a
    parallel DuckDB scan's order varies between runs; the percolations draw per contact). Les Miserables
    co-appearances (Knuth, The Stanford GraphBase, 1993, as networkx ships it)."""
    from aggpub.synthesis import sampler

    rel = lesmis_release[3]
    engine = rel.network.engine

    def audit():
        sampler._AFFINITY_CACHE.clear()
        return _structure_json(audit_release(rel, monte_carlo=0, structure_samples=1, seed=4,
                                             source=SeededRandomSource(1), parallel_structure=False))

    here = audit()
    u, v = engine.edge_arrays()
    shuffled = np.random.default_rng(0).permutation(len(u))
    assert not np.array_equal(u[shuffled], u)  # the order really changes
    monkeypatch.setattr(engine, "edge_arrays", lambda: (u[shuffled], v[shuffled]))
    assert audit() == here


def test_the_helper_fits_and_draws_without_pyarrow_or_duckdb(lesmis_release):
    """The helper's tasks (an affinity fit, a synthetic network, the true network's figures) need numpy and scipy
    only: a helper that answered them has imported neither pyarrow nor duckdb (each costs its start-up time on
    every release with a helper). Les Miserables co-appearances (Knuth, The Stanford GraphBase, 1993, as networkx
    ships it)."""
    import io
    import pickle
    import subprocess
    import sys

    from aggpub.audit.core import _start_structure
    from aggpub.audit.truth import truth_of_release

    rel = lesmis_release[3]
    work = _start_structure(rel, truth_of_release(rel), 1, np.random.default_rng(0), parallel=False)["beside"]
    assert work.sides["release"].inputs.triangles is not None  # the fit counts triangles
    requests = io.BytesIO()
    for item in (("define", work.sides, work.true_job), ("fit", "release"), ("network", "release", 0, 0.5),
                 ("true",)):
        pickle.dump(item, requests, protocol=pickle.HIGHEST_PROTOCOL)
    root = Path(__file__).resolve().parents[1]
    probe = ("import sys; from aggpub.audit.sampled import _serve; _serve(); "
             "print(sorted(m for m in sys.modules if m.split('.')[0] in ('pyarrow', 'duckdb')), file=sys.stderr)")
    res = subprocess.run([sys.executable, "-c", probe], input=requests.getvalue(), capture_output=True, cwd=root,
                         timeout=300)
    assert res.returncode == 0, res.stderr.decode()[-2000:]
    answers = io.BytesIO(res.stdout)
    got = [pickle.load(answers) for _ in range(3)]
    assert [status for status, _ in got] == ["ok", "ok", "ok"]
    assert 0.0 <= got[0][1] <= 1.0 and got[2][1]["stats"]["contacts"] == rel.network.n_edges
    assert res.stderr.decode().strip().splitlines()[-1] == "[]"


def test_the_helper_process_does_not_run_the_callers_script_again(tmp_path):
    """A steward's script without a ``__main__`` guard that audits with the helper process runs once (the
    helper interpreter imports aggpub only, never the caller's main module)."""
    import subprocess
    import sys

    log = tmp_path / "runs.txt"
    script = tmp_path / "steward.py"
    root = Path(__file__).resolve().parents[1]
    script.write_text(
        f"import sys; sys.path.insert(0, {str(root)!r})\n"
        "import networkx as nx\n"
        "from aggpub.audit import audit_release\n"
        "from tests.conftest import graph_tables, simple_policy\n"
        "import aggpub\n"
        f"open({str(log)!r}, 'a').write('run\\n')\n"
        "G = nx.les_miserables_graph()\n"
        "e, p = graph_tables(G, {'group': {n: i % 3 for i, n in enumerate(sorted(G))}})\n"
        "rel = aggpub.release_tables(e, p, simple_policy(['group'], min_size=5), seed=2, charge_ledger=False)\n"
        "out = audit_release(rel, monte_carlo=0, structure_samples=1, seed=1, parallel_structure=True)\n"
        "print(out['structure']['sampled_from_release']['contacts']['mean'])\n")
    res = subprocess.run([sys.executable, str(script)], cwd=root, capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-2000:]
    assert float(res.stdout.strip().splitlines()[-1]) > 0
    assert log.read_text() == "run\n"


def test_member_rates_by_runs_equal_the_weighted_bincount():
    """The block model's per-member rates summed over each supernode's run of cells (``CellRows``, reduceat)
    are numpy's weighted ``bincount`` sums: equal for whole-number counts, within rounding for others, in row
    order and in any other order of the cells, with supernodes that have no cell."""
    from aggpub.audit.degrees import _per_member_rates
    from aggpub.cells import CellRows

    rng = np.random.default_rng(2)
    n = 40
    a, b = comp.all_cells(n)
    sizes = rng.integers(1, 50, n)
    counts = rng.integers(0, 1000, len(a)).astype(np.float64)
    fractional = rng.random(len(a)) * 7
    for keep in (np.ones(len(a), bool), a != 7, a < n - 1, rng.random(len(a)) < 0.5):
        for order in (np.arange(keep.sum()), rng.permutation(int(keep.sum()))):
            ka, kb = a[keep][order], b[keep][order]
            kc, kf = counts[keep][order], fractional[keep][order]
            rows = CellRows(ka, kb, n)
            reference = (np.bincount(ka, weights=kc, minlength=n) + np.bincount(kb, weights=kc, minlength=n)) / sizes
            assert np.array_equal(_per_member_rates(ka, kb, kc, sizes, rows), reference)
            np.testing.assert_allclose(_per_member_rates(ka, kb, kf, sizes, rows),
                                       _per_member_rates(ka, kb, kf, sizes), rtol=1e-12)


def test_cut_queries_of_whole_numbers_in_single_precision_are_exact():
    """Cut queries of a table the caller marks as whole numbers (absolute sum below 2**24) are multiplied in
    single precision; the answers are the very numbers of the double-precision product and of numpy's dense
    product, for counts, signed whole numbers, several tables at once, and above 2**24 (double precision)."""
    rng = np.random.default_rng(11)
    n = 60
    a, b = comp.all_cells(n)
    cut = qw.cut_workload(a, b, n, 40, rng)
    first, second = cut._layout()[:2]

    def by_numpy(table):
        m = np.zeros((n, n))
        m[a, b] = table
        m[b, a] = table
        return np.einsum("qi,qi->q", first @ m, second)

    counts = rng.integers(0, 900, len(a)).astype(np.float64)
    for table in (counts, counts - 450.0, counts * 10_000.0):  # the last adds up to more than 2**24
        assert np.array_equal(cut.answer(table, whole=True), by_numpy(table))
        assert np.array_equal(cut.answer(table, whole=True), cut.answer(table))
    both = np.vstack([counts, counts - 450.0])
    assert np.array_equal(cut.answer(both, whole=True), np.vstack([by_numpy(counts), by_numpy(counts - 450.0)]))
