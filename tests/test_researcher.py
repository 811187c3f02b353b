"""Tests for the researcher view (:mod:`aggpub.estimates` and :mod:`aggpub.synthesis`) and ``aggpub sample``.

Outside references: networkx (graph construction, ``quotient_graph``, subgraph edge
counts), scipy (``scipy.stats.dlaplace`` as the discrete Laplace law, ``chisquare`` for
uniformity), the standard library's ``itertools.combinations`` (pair order), and
simulation with the project's own noise sampler for interval coverage.
"""

from __future__ import annotations

import itertools
import math
import tomllib
import types

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy import stats

import aggpub
from aggpub import cells as comp
from aggpub.cells import unrank_pairs
from aggpub.estimates.intervals import sum_noise_pmf
from aggpub.synthesis._distinct import distinct_per_cell
from aggpub.cli import main
from aggpub.demo import demo_policy_text, generate_town
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import SeededRandomSource


# --------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def town_bundle(tmp_path_factory):
    """A seeded release of a 3,000-person demo town, written and read back as a bundle."""
    edges, people = generate_town(3000, seed=11)
    policy = aggpub.parse_policy(tomllib.loads(demo_policy_text()))
    release = aggpub.release_tables(edges, people, policy, seed=5)
    path = tmp_path_factory.mktemp("rs") / "bundle"
    aggpub.publish(release, path)
    return path


@pytest.fixture(scope="module")
def bundle(town_bundle):
    return aggpub.read_bundle(town_bundle)


def fake_release(sizes, counts=None, *, scale=1.0, cells=None, sparse=False):
    """A release-like object holding only public tables (supernodes, superedges, manifest)."""
    sizes = np.asarray(sizes, dtype=np.int64)
    n = len(sizes)
    a, b = comp.all_cells(n) if cells is None else (np.asarray(cells[0]), np.asarray(cells[1]))
    cap = comp.possible_pairs(sizes, a, b)
    counts = np.asarray(counts if counts is not None else cap // 3, dtype=np.int64)
    superedges = pa.table({"supernode_a": a.astype(np.int64), "supernode_b": b.astype(np.int64),
                           "edge_count": counts, "possible_pairs": cap.astype(np.int64),
                           "noise_scale": np.full(len(a), float(scale)),
                           "ci95_half_width": np.zeros(len(a), dtype=np.int64)})
    supernodes = pa.table({"supernode": np.arange(n, dtype=np.int64), "size": sizes})
    return types.SimpleNamespace(tables={"supernodes": supernodes, "superedges": superedges},
                                 manifest={"superedges_sparse": sparse, "privacy_unit": "edge"})


def block_counts_networkx(edges: pa.Table, people: pa.Table):
    """Edges per supernode pair counted by networkx: quotient graph off the diagonal, subgraphs on it."""
    g = nx.Graph()
    g.add_nodes_from(people.column("person").to_pylist())
    g.add_edges_from(zip(edges.column("source").to_pylist(), edges.column("target").to_pylist()))
    sn = people.column("supernode").to_numpy()
    blocks = [set(np.flatnonzero(sn == s).tolist()) for s in range(int(sn.max()) + 1)]
    q = nx.quotient_graph(g, blocks, relabel=True)  # weight = number of edges between two blocks
    out = {}
    for u, v, d in q.edges(data=True):
        out[(min(u, v), max(u, v))] = d["weight"]
    for s, block in enumerate(blocks):
        inside = g.subgraph(block).number_of_edges()
        if inside:
            out[(s, s)] = inside
    return g, out


# --------------------------------------------------------------------------- sampling


def small_release():
    """Eight supernodes of 2 to 30 people; counts from empty to full cells."""
    rng = np.random.default_rng(21)
    sizes = np.array([2, 5, 9, 12, 17, 20, 25, 30])
    a, b = comp.all_cells(len(sizes))
    cap = comp.possible_pairs(sizes, a, b)
    counts = np.floor(cap * rng.choice([0.0, 0.05, 0.3, 0.7, 1.0], size=len(cap))).astype(np.int64)
    return fake_release(sizes, counts)


def test_sample_reproduces_every_released_count_networkx():
    rel = small_release()
    edges = aggpub.sample_network(rel, seed=1)
    people = aggpub.synthetic_people(rel)
    g, counted = block_counts_networkx(edges, people)
    se = rel.tables["superedges"]
    released = {(a, b): c for a, b, c in zip(se.column("supernode_a").to_pylist(),
                                             se.column("supernode_b").to_pylist(),
                                             se.column("edge_count").to_pylist()) if c}
    assert counted == released
    # networkx collapses duplicate edges: same number of edges means no duplicates; no self-loops.
    assert g.number_of_edges() == edges.num_rows == sum(released.values())
    assert nx.number_of_selfloops(g) == 0
    assert g.number_of_nodes() == int(rel.tables["supernodes"].column("size").to_numpy().sum())


def test_sample_is_seed_reproducible_and_seeds_differ(bundle):
    one = aggpub.sample_network(bundle, seed=3)
    assert one.equals(aggpub.sample_network(bundle, seed=3))
    assert not one.equals(aggpub.sample_network(bundle, seed=4))
    src, tgt = one.column("source").to_numpy(), one.column("target").to_numpy()
    assert (src < tgt).all()
    assert len(np.unique(src * (tgt.max() + 1) + tgt)) == len(src)


def test_sample_from_in_memory_release_matches_counts():
    edges, people = generate_town(3000, seed=2)
    policy = aggpub.parse_policy(tomllib.loads(demo_policy_text()))
    release = aggpub.release_tables(edges, people, policy, seed=1)
    sample = aggpub.sample_network(release, seed=0)
    sn = aggpub.synthetic_people(release).column("supernode").to_numpy()
    a = sn[sample.column("source").to_numpy()]
    b = sn[sample.column("target").to_numpy()]
    n = release.supernodes.num_rows
    got = np.bincount(np.minimum(a, b) * n + np.maximum(a, b), minlength=n * n)
    se = release.superedges
    key = se.column("supernode_a").to_numpy() * n + se.column("supernode_b").to_numpy()
    # issue 12: every cell gets its consistent estimate, rounded without bias (floor or ceiling)
    est = se.column("edge_count_estimate").to_numpy()
    assert np.all((got[key] == np.floor(est)) | (got[key] == np.ceil(est)))


def test_dense_and_full_cells():
    # supernode sizes 3 and 4: cells (0,0) 3 pairs, (0,1) 12 pairs, (1,1) 6 pairs; ask for all / most / none.
    rel = fake_release([3, 4], [3, 11, 0])
    t = aggpub.sample_network(rel, seed=2)
    pairs = set(zip(t.column("source").to_pylist(), t.column("target").to_pylist()))
    assert {(0, 1), (0, 2), (1, 2)} <= pairs  # the full diagonal cell of supernode 0
    between = {(s, d) for s, d in pairs if s < 3 <= d}
    assert len(between) == 11 and len(pairs) == 14
    assert not any(s >= 3 and d >= 3 for s, d in pairs)


def test_sparse_bundle_missing_cells_are_zero():
    rel = fake_release([30, 40, 50], [100, 7], cells=([0, 1], [2, 1]), sparse=True)
    t = aggpub.sample_network(rel, seed=9)
    sn = aggpub.synthetic_people(rel).column("supernode").to_numpy()
    a = sn[t.column("source").to_numpy()]
    b = sn[t.column("target").to_numpy()]
    cells = sorted(zip(np.minimum(a, b).tolist(), np.maximum(a, b).tolist()))
    assert cells.count((0, 2)) == 100 and cells.count((1, 1)) == 7 and len(cells) == 107


def test_sample_refuses_count_above_possible_pairs():
    rel = fake_release([3, 4], [4, 1, 1])  # cell (0,0) has only 3 possible pairs
    with pytest.raises(aggpub.BundleError, match="possible pairs"):
        aggpub.sample_network(rel, seed=0)


@pytest.mark.parametrize("space,k", [(6, 2), (6, 5), (10, 5), (7, 3)])
def test_distinct_subsets_are_uniform_chisquare(space, k):
    """Every k-subset of range(space) equally likely (chi-square against the uniform law)."""
    cells = 40_000
    cell, val = distinct_per_cell(np.full(cells, space), np.full(cells, k), np.random.default_rng(123))
    assert np.array_equal(np.bincount(cell, minlength=cells), np.full(cells, k))
    val = val.reshape(cells, k)
    assert (np.diff(val, axis=1) > 0).all()  # distinct (and sorted) within a cell
    code = (val * space ** np.arange(k)).sum(axis=1)
    subsets = list(itertools.combinations(range(space), k))
    index = {sum(v * space ** i for i, v in enumerate(s)): j for j, s in enumerate(subsets)}
    obs = np.bincount([index[c] for c in code.tolist()], minlength=len(subsets))
    assert stats.chisquare(obs).pvalue > 1e-4


def test_distinct_large_spaces_mixed():
    rng = np.random.default_rng(4)
    space = rng.integers(1, 10**9, size=2000)
    k = np.minimum(rng.integers(0, 300, size=2000), space)
    k[:10] = space[:10] = 5  # full cells
    cell, val = distinct_per_cell(space, k, rng)
    assert np.array_equal(np.bincount(cell, minlength=len(space)), k)
    assert (val >= 0).all() and (val < space[cell]).all()
    key = cell * (10**9) + val
    assert len(np.unique(key)) == len(key)


def test_unrank_pairs_matches_itertools_combinations_order():
    s = 40
    expected = sorted(itertools.combinations(range(s), 2), key=lambda p: (p[1], p[0]))
    i, j = unrank_pairs(np.arange(s * (s - 1) // 2))
    assert list(zip(i.tolist(), j.tolist())) == expected
    # huge supernodes: exact at the boundaries where the float square root could round
    j_big = np.array([10**6, 3 * 10**7, 123_456_789])
    r = np.concatenate([j_big * (j_big - 1) // 2, j_big * (j_big - 1) // 2 - 1])
    ii, jj = unrank_pairs(r)
    assert np.array_equal(jj * (jj - 1) // 2 + ii, r) and (ii < jj).all() and (ii >= 0).all()


# --------------------------------------------------------------------------- intervals


@pytest.mark.parametrize("scale,m", [(1.0, 1), (1.0, 4), (2.5, 3), (0.5, 7)])
def test_sum_pmf_matches_scipy_dlaplace_convolution(scale, m):
    """scipy.stats.dlaplace(a) has pmf tanh(a/2) exp(-a|k|): the discrete Laplace law with a = 1/scale."""
    ks = np.arange(-400, 401)
    one = stats.dlaplace.pmf(ks, 1.0 / scale)
    ref = one
    for _ in range(m - 1):
        ref = np.convolve(ref, one)
    centre = len(ref) // 2
    pmf = sum_noise_pmf([scale], [m])
    np.testing.assert_allclose(pmf[:60], ref[centre:centre + 60], rtol=1e-9, atol=1e-15)
    assert abs(pmf[0] + 2 * pmf[1:].sum() - 1.0) < 1e-12


def test_sum_pmf_mixed_scales_variance():
    pmf = sum_noise_pmf([1.0, 3.0], [5, 2])
    k = np.arange(len(pmf))
    var = 2 * (k[1:] ** 2 * pmf[1:]).sum()
    expect = 5 * stats.dlaplace.var(1.0) + 2 * stats.dlaplace.var(1 / 3.0)
    assert abs(var - expect) / expect < 1e-9


@pytest.mark.parametrize("m,scale", [(1, 1.0), (6, 2.0), (300, 1.0)])
def test_interval_coverage_by_simulation(m, scale):
    """Simulated noise sums fall inside the interval with the computed (>= 95 %) probability."""
    sizes = [60] * 40
    n_cells = 40 * 41 // 2
    rel = fake_release(sizes, np.full(n_cells, 500), scale=scale)
    res = aggpub.interval(rel, np.arange(m))
    assert res.method == "exact" and res.cells == m and res.estimate == 500 * m
    pmf = sum_noise_pmf([scale], [m])
    cover = pmf[0] + 2 * pmf[1:res.half_width + 1].sum()
    below = pmf[0] + 2 * pmf[1:res.half_width].sum() if res.half_width else 0.0
    assert cover >= 0.95 > below  # the smallest such half-width
    reps = 4000
    mech = GeometricMechanism(epsilon=1.0 / scale, sensitivity=1.0)
    noise = mech.noise((reps, m), SeededRandomSource(77)).sum(axis=1)
    inside = np.mean(np.abs(noise) <= res.half_width)
    se = math.sqrt(cover * (1 - cover) / reps)
    assert abs(inside - cover) < 4 * se + 1e-9
    assert inside > 0.93


def test_interval_normal_approximation_agrees_for_many_cells():
    rel = fake_release([100] * 60, scale=1.5)
    mask = np.ones(rel.tables["superedges"].num_rows, dtype=bool)
    exact = aggpub.interval(rel, mask, 0.9)
    normal = aggpub.interval(rel, mask, 0.9, method="normal")
    assert exact.method == "exact" and normal.method == "normal"
    assert abs(exact.half_width - normal.half_width) <= 0.01 * exact.half_width + 1


def test_interval_cell_forms_agree_and_cut_mask(bundle):
    se = bundle.superedges
    a, b = se.column("supernode_a").to_numpy(), se.column("supernode_b").to_numpy()
    left, right = [0, 1, 2], [5, 7]
    mask = aggpub.cell_mask(bundle, left, right)
    manual = (np.isin(a, left) & np.isin(b, right)) | (np.isin(b, left) & np.isin(a, right))
    assert np.array_equal(mask, manual)
    pairs = np.array([[x, y] for y in right for x in left])[:, ::-1]  # reversed order on purpose
    by_mask = aggpub.interval(bundle, mask)
    by_pairs = aggpub.interval(bundle, pairs)
    by_rows = aggpub.interval(bundle, np.flatnonzero(mask))
    assert by_mask == by_pairs == by_rows
    assert by_mask.estimate == int(se.column("edge_count_unclamped").to_numpy()[mask].sum())
    assert "unclamped" in by_mask.note


def test_interval_on_unclamped_counts_covers_empty_cells():
    """With the unclamped column, sums of empty cells are unbiased and the 95% interval covers 0."""
    sizes = [30] * 20
    n_cells = 20 * 21 // 2
    mech = GeometricMechanism(epsilon=1.0, sensitivity=1.0)
    covered = 0
    for seed in range(200):
        noisy = mech.noise(n_cells, SeededRandomSource(seed))  # true counts all 0
        rel = fake_release(sizes, np.clip(noisy, 0, None))
        se = rel.tables["superedges"].append_column("edge_count_unclamped", pa.array(noisy.astype(np.int64)))
        rel.tables["superedges"] = se
        res = aggpub.interval(rel, np.ones(n_cells, dtype=bool))
        covered += res.estimate - res.half_width <= 0 <= res.estimate + res.half_width
    # binomial(200, 0.95): at least 0.90 with overwhelming probability (sd about 0.015)
    assert covered / 200 >= 0.90


def test_interval_misses_on_tiny_cells_as_documented():
    """Clamping at zero biases sums of empty cells upward: the note's caveat is real."""
    sizes = [30] * 20
    n_cells = 20 * 21 // 2
    mech = GeometricMechanism(epsilon=1.0, sensitivity=1.0)
    released = np.clip(mech.noise(n_cells, SeededRandomSource(3)), 0, None)  # true counts all 0
    rel = fake_release(sizes, released)
    res = aggpub.interval(rel, np.ones(n_cells, dtype=bool))
    assert res.low > 0  # the true sum, 0, is outside: approximate for tiny cells
    assert "approximate" in res.note


def test_interval_sparse_counts_omitted_cells():
    rel = fake_release([30, 40, 50], [100, 7], cells=([0, 1], [2, 1]), sparse=True)
    res = aggpub.interval(rel, np.array([[0, 2], [0, 0]]))
    assert res.cells == 1 and res.omitted_cells == 1 and res.estimate == 100
    dense = fake_release([30, 40, 50], [1] * 6)
    with pytest.raises(aggpub.UsageError):
        aggpub.interval(dense, np.array([[0, 3]]))


# --------------------------------------------------------------------------- supergraph


def test_supergraph_matches_tables(bundle):
    g = aggpub.supergraph(bundle)
    sn, se = bundle.supernodes, bundle.superedges
    assert isinstance(g, nx.Graph) and g.number_of_nodes() == sn.num_rows
    assert [g.nodes[i]["size"] for i in range(sn.num_rows)] == sn.column("size").to_pylist()
    assert [g.nodes[i]["age_band"] for i in range(sn.num_rows)] == sn.column("age_band").to_pylist()
    c = se.column("edge_count").to_numpy()
    est = se.column("edge_count_estimate").to_numpy()
    a, b = se.column("supernode_a").to_numpy(), se.column("supernode_b").to_numpy()
    # issue 12: the supergraph's edges are the cells with a positive consistent estimate
    assert g.number_of_edges() == int((est > 0).sum())
    assert nx.number_of_selfloops(g) == int(((a == b) & (est > 0)).sum())
    assert g.size(weight="edge_count_estimate") == pytest.approx(est.sum())
    i = int(np.argmax(c))
    assert g.edges[int(a[i]), int(b[i])]["edge_count"] == int(c[i])
    assert aggpub.supergraph(bundle, include_zero=True).number_of_edges() == se.num_rows


# --------------------------------------------------------------------------- command line


def test_cli_sample_writes_refuses_overwrite_and_reproduces(town_bundle, tmp_path, capsys):
    out = tmp_path / "net.parquet"
    people = tmp_path / "people.parquet"
    assert main(["sample", str(town_bundle), "--out", str(out), "--seed", "8", "--people", str(people),
                 "--quiet"]) == 0
    t = pq.read_table(out)
    assert t.column_names == ["source", "target"]
    assert t.select(["source", "target"]).equals(
        aggpub.sample_network(aggpub.read_bundle(town_bundle), seed=8).select(["source", "target"]))
    pt = pq.read_table(people)
    assert pt.column_names == ["person", "supernode"]
    sizes = aggpub.read_bundle(town_bundle).supernodes.column("size").to_numpy()
    assert np.array_equal(np.bincount(pt.column("supernode").to_numpy()), sizes)
    assert main(["sample", str(town_bundle), "--out", str(out), "--quiet"]) == 7
    assert main(["sample", str(town_bundle), "--out", str(out), "--overwrite", "--quiet"]) == 0
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no temporary left behind


def test_cli_sample_refuses_a_failing_bundle(town_bundle, tmp_path):
    import shutil

    broken = tmp_path / "broken"
    shutil.copytree(town_bundle, broken)
    with open(broken / "superedges.parquet", "r+b") as fh:
        fh.seek(100)
        fh.write(b"\x00\x01\x02\x03")
    out = tmp_path / "x.parquet"
    assert main(["sample", str(broken), "--out", str(out), "--quiet"]) == 8
    assert not out.exists()


def test_single_cell_interval_matches_released_half_width(bundle):
    """One cell: the exact law is one discrete Laplace draw, so the half-width is the bundle's own column."""
    se = bundle.superedges
    row = int(np.argmax(se.column("edge_count").to_numpy()))
    res = aggpub.interval(bundle, np.array([row]))
    assert res.half_width == se.column("ci95_half_width").to_numpy()[row]
    assert res.estimate == se.column("edge_count").to_numpy()[row]
