"""The one synthetic-network sampler (issue 12): degree-corrected block model with affinity blocks, its uniform
block fallback for older bundles, ``aggpub sample`` end to end, and ``aggpub check`` on the new tables.

Outside references: the expected degrees and block totals of the degree-corrected stochastic block model
(Karrer and Newman, "Stochastic blockmodels and community structure in networks", Phys. Rev. E 83, 016107,
2011: with ``theta`` summing to 1 in every group, ``E[k_i] = theta_i kappa_{g_i}`` and the expected number of
edges between groups ``r != s`` is ``omega_rs``, inside ``r`` it is ``omega_rr / 2``); networkx's classic
networks (Zachary's karate club, Zachary 1977; Les Miserables, Knuth 1993; the Florentine families, Padgett and
Ansell 1993) and its ``quotient``-style block counts; networkx's triangle counts.
"""

from __future__ import annotations

import json

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import aggpub
from aggpub.bundle.check import CheckResult, _check_invariants
from aggpub.cells import all_cells, cell_index, n_cells
from aggpub.cli import main
from aggpub.synthesis import (SynthesisInputs, draw_network, fit_affinity, inputs_from_release, inputs_from_truth,
                              sample_degree_corrected)
from aggpub.synthesis.degree_corrected import karrer_newman_expected

from .conftest import graph_tables, simple_policy


def _cells_of(u, v, group, n_groups):
    ga, gb = group[u], group[v]
    return np.bincount(cell_index(np.minimum(ga, gb), np.maximum(ga, gb), n_groups), minlength=n_cells(n_groups))


# --------------------------------------------------------------------------- the model's formulas


def test_karrer_newman_expected_degrees_and_block_totals():
    """Karrer and Newman (2011), degree-corrected model: E[k_i] = theta_i kappa_g, E[edges r-s] = omega_rs
    (r != s) and omega_rr / 2 inside r, for theta summing to 1 in every group."""
    rng = np.random.default_rng(1)
    group = np.repeat(np.arange(3), [5, 7, 4])
    theta = rng.random(len(group)) + 0.1
    theta /= np.bincount(group, weights=theta)[group]
    omega = np.array([[10.0, 4.0, 2.0], [4.0, 20.0, 6.0], [2.0, 6.0, 8.0]])
    deg, blocks = karrer_newman_expected(theta, group, omega)
    kappa = omega.sum(axis=1)
    np.testing.assert_allclose(deg, theta * kappa[group], rtol=1e-12)
    np.testing.assert_allclose(np.diag(blocks), np.diag(omega) / 2.0, rtol=1e-12)
    np.testing.assert_allclose(blocks[np.triu_indices(3, 1)], omega[np.triu_indices(3, 1)], rtol=1e-12)


def test_sampler_honours_block_totals_and_tracks_the_expected_degrees():
    """Every cell gets exactly its count (a simple graph: no self-loop, no repeat), and the mean degrees over 30
    draws follow the Karrer-Newman expectation theta_i kappa_g when the targets add up to kappa_g."""
    rng = np.random.default_rng(2)
    sizes = np.array([40, 60, 50])
    a, b = all_cells(3)
    counts = np.array([150, 60, 30, 300, 90, 200])
    kappa = np.bincount(a, weights=counts, minlength=3) + np.bincount(b, weights=counts, minlength=3)
    group = np.repeat(np.arange(3), sizes)
    w = np.concatenate([np.sort(rng.pareto(3.0, s) + 1.0) for s in sizes])
    target = w * (kappa / np.bincount(group, weights=w))[group]
    theta = target / kappa[group]
    omega = np.zeros((3, 3))
    omega[a, b] = counts
    omega[b, a] = counts
    omega[np.diag_indices(3)] *= 2
    expected, _ = karrer_newman_expected(theta, group, omega)
    np.testing.assert_allclose(expected, target, rtol=1e-9)
    total = np.zeros(len(group))
    for _ in range(30):
        u, v = sample_degree_corrected(sizes, a, b, counts, target, 0.0, rng)
        np.testing.assert_array_equal(_cells_of(u, v, group, 3), counts)
        assert (u < v).all() and len(np.unique(u * len(group) + v)) == len(u)
        total += np.bincount(u, minlength=len(group)) + np.bincount(v, minlength=len(group))
    mean = total / 30
    big = target >= 5
    assert np.median(np.abs(mean[big] / target[big] - 1.0)) < 0.15
    assert np.corrcoef(mean, target)[0, 1] > 0.95


def test_affinity_blocks_raise_clustering_and_keep_the_cells():
    """rho = 1 adds triangles (BTER's first phase, Seshadhri, Kolda, Pinar 2012) without changing a cell."""
    rng = np.random.default_rng(3)
    sizes = np.array([60, 60])
    a, b = all_cells(2)
    counts = np.array([300, 40, 300])
    group = np.repeat(np.arange(2), sizes)
    target = np.full(120, 0.0)
    kappa = np.array([640.0, 640.0])
    target[:] = (kappa / 60)[group]
    tri = {}
    for rho in (0.0, 1.0):
        u, v = sample_degree_corrected(sizes, a, b, counts, target, rho, rng)
        np.testing.assert_array_equal(_cells_of(u, v, group, 2), counts)
        g = nx.Graph(list(zip(u.tolist(), v.tolist())))
        tri[rho] = sum(nx.triangles(g).values()) // 3
    assert tri[1.0] > 3 * tri[0.0]


# --------------------------------------------------------------------------- the no-noise path


def _release(graph, seed=3, **components):
    g = {"karate": nx.karate_club_graph, "lesmis": nx.les_miserables_graph,
         "florentine": nx.florentine_families_graph}[graph]()
    g = nx.convert_node_labels_to_integers(g)
    edges, people = graph_tables(g, {"k": {v: v % 3 for v in g}})
    pol = simple_policy(["k"], min_size=3, **({"components": components} if components else {}))
    return g, aggpub.release_tables(edges, people, pol, seed=seed)


@pytest.mark.parametrize("graph", ["karate", "lesmis", "florentine"])
def test_no_noise_path_reproduces_the_true_block_totals(graph):
    """The sampler fed the true aggregate (the audit's "grouping alone"): every draw has exactly the true
    number of contacts between and within supernodes (networkx's subgraph counts), every synthetic person of a
    supernode the true sorted degrees as targets, and the true triangle count as the affinity target."""
    g, rel = _release(graph)
    inputs = inputs_from_truth(rel)
    assert inputs.sampler == "degree_corrected"
    group_of = {v: int(rel.grouping.assignment[i]) for i, v in enumerate(sorted(g))}
    n = rel.grouping.n_supernodes
    true = np.zeros(n_cells(n), dtype=np.int64)
    for x, y in g.edges():
        ga, gb = sorted((group_of[x], group_of[y]))
        true[cell_index(ga, gb, n)] += 1
    np.testing.assert_array_equal(inputs.cells, true)
    deg = dict(g.degree())
    expected = np.concatenate([np.sort([deg[v] for v in sorted(g) if group_of[v] == s]) for s in range(n)])
    np.testing.assert_array_equal(inputs.degrees, expected)
    assert inputs.triangles == sum(nx.triangles(g).values()) // 3
    group = np.repeat(np.arange(n), inputs.sizes)
    rng = np.random.default_rng(4)
    for rho in (0.0, 0.7, None):
        u, v = draw_network(inputs, rng, rho)
        np.testing.assert_array_equal(_cells_of(u, v, group, n), true)


def _triangle_mean(inputs, rho, rng, draws=6):
    out = []
    for _ in range(draws):
        u, v = draw_network(inputs, rng, rho)
        h = nx.Graph(list(zip(u.tolist(), v.tolist())))
        out.append(sum(nx.triangles(h).values()) // 3)
    return float(np.mean(out))


def test_affinity_is_fitted_to_the_triangle_target():
    """A target halfway between what rho = 0 and rho = 1 give: the fitted density is inside (0, 1), synthetic
    networks drawn with it have about the target number of triangles (networkx's count), and the fit is
    deterministic (seeded by the inputs' digest)."""
    rng = np.random.default_rng(6)
    sizes = np.array([80, 70, 50])
    a, b = all_cells(3)
    cells = np.array([400.0, 60.0, 30.0, 350.0, 40.0, 200.0])
    kappa = np.bincount(a, weights=cells, minlength=3) + np.bincount(b, weights=cells, minlength=3)
    group = np.repeat(np.arange(3), sizes)
    w = np.concatenate([np.sort(rng.pareto(3.0, s) + 1.0) for s in sizes])
    degrees = w * (kappa / np.bincount(group, weights=w))[group]
    base = SynthesisInputs(sizes=sizes, a=a, b=b, cells=cells, degrees=degrees, triangles=None,
                           sampler="degree_corrected")
    t0, t1 = _triangle_mean(base, 0.0, rng), _triangle_mean(base, 1.0, rng)
    assert t1 > 2 * t0
    target = (t0 + t1) / 2.0
    inputs = SynthesisInputs(**{**base.__dict__, "triangles": target})
    rho = fit_affinity(inputs)
    assert 0.0 < rho < 1.0 and fit_affinity(inputs) == rho
    assert abs(_triangle_mean(inputs, rho, rng, 10) - target) < 0.15 * target
    assert fit_affinity(base) == 0.0  # no triangle target: no affinity blocks


def test_sample_network_records_the_sampler_and_the_fitted_affinity():
    g, rel = _release("lesmis")
    inputs = inputs_from_release(rel)
    meta = json.loads(aggpub.sample_network(rel, seed=1).schema.metadata[b"aggpub.sample"])
    assert meta["sampler"] == "degree_corrected" and meta["affinity"] == pytest.approx(fit_affinity(inputs))
    fixed = json.loads(aggpub.sample_network(rel, seed=1, affinity=0.25).schema.metadata[b"aggpub.sample"])
    assert fixed["affinity"] == 0.25


# --------------------------------------------------------------------------- aggpub sample, end to end


def _old_style_bundle(rel, path):
    """The bundle an earlier aggpub wrote: no estimate column, no degree sequences, no triangle count."""
    tables = {k: v for k, v in rel.tables.items() if k in ("supernodes", "superedges")}
    se = tables["superedges"]
    tables["superedges"] = se.drop_columns(["edge_count_estimate"])
    manifest = {k: v for k, v in rel.manifest.items()
                if k not in ("triangle_count", "superedge_estimates", "superedge_estimates_max_total_gap",
                             "view_domains", "views")}
    manifest["components"] = [c for c in manifest["components"] if c["name"] == "superedge_counts"]
    manifest["rows"] = {k: t.num_rows for k, t in tables.items()}
    from aggpub.bundle.guide import render_guide
    from aggpub.bundle.write import write_bundle

    return write_bundle(path, tables, manifest, render_guide(manifest))


def test_cli_sample_with_and_without_the_new_tables(tmp_path, capsys):
    g, rel = _release("lesmis", seed=9)
    new = aggpub.publish(rel, tmp_path / "new")
    old = _old_style_bundle(rel, tmp_path / "old")
    assert main(["check", str(new)]) == 0 and main(["check", str(old)]) == 0
    group = np.repeat(np.arange(rel.grouping.n_supernodes), rel.supernodes.column("size").to_numpy())
    n = rel.grouping.n_supernodes
    for path, kind in ((new, "degree_corrected"), (old, "uniform_block")):
        out = tmp_path / f"{path.name}.parquet"
        assert main(["sample", str(path), "--out", str(out), "--seed", "3", "--quiet"]) == 0
        t = pq.read_table(out)
        meta = json.loads(t.schema.metadata[b"aggpub.sample"])
        assert meta["sampler"] == kind
        u, v = t.column("source").to_numpy(), t.column("target").to_numpy()
        got = _cells_of(u, v, group, n)
        se = aggpub.read_bundle(path).superedges
        if kind == "uniform_block":  # exactly the clamped counts, as before
            np.testing.assert_array_equal(got, se.column("edge_count").to_numpy())
        else:  # the consistent estimates, rounded without bias
            est = se.column("edge_count_estimate").to_numpy()
            assert ((got == np.floor(est)) | (got == np.ceil(est))).all()
            deg = np.bincount(u, minlength=len(group)) + np.bincount(v, minlength=len(group))
            target = aggpub.read_bundle(path).tables["degree_sequences"].column("degree_estimate").to_numpy()
            assert np.corrcoef(deg, target)[0, 1] > 0.7  # people get their supernode's estimated degrees


def test_sample_needs_the_full_table_for_degree_correction():
    """A sparse release (absent cells unknown) is sampled by the uniform block sampler."""
    rng = np.random.default_rng(10)
    n = 120
    iu, iv = np.triu_indices(n, 1)
    keep = rng.random(len(iu)) < 0.05
    edges = pa.table({"source": [str(x) for x in iu[keep]], "target": [str(x) for x in iv[keep]]})
    people = pa.table({"node": [str(i) for i in range(n)], "g": [str(i % 20) for i in range(n)]})
    rel = aggpub.release_tables(edges, people, simple_policy(
        ["g"], min_size=5, components={"superedge_counts": {"method": "sparse"}}), seed=2)
    assert inputs_from_release(rel).sampler == "uniform_block"
    with pytest.raises(ValueError, match="every cell"):
        sample_degree_corrected([5, 5], np.array([0]), np.array([1]), np.array([3]), np.ones(10), 0.0, rng)


# --------------------------------------------------------------------------- aggpub check on the new tables


def _problems(manifest, tables):
    res = CheckResult(path=None)
    _check_invariants(manifest, tables, res)
    return res


def test_check_validates_the_new_tables():
    g, rel = _release("karate")
    assert _problems(dict(rel.manifest), dict(rel.tables)).ok
    assert any(c.startswith("degree sequences") for c in _problems(rel.manifest, rel.tables).checked)
    assert any(c.startswith("triangle count") for c in _problems(rel.manifest, rel.tables).checked)
    ds = rel.tables["degree_sequences"]

    def with_col(table, name, values):
        return table.set_column(table.column_names.index(name), name, pa.array(values))

    est = ds.column("degree_estimate").to_numpy()
    cases = {
        "degree_estimate decreases": with_col(ds, "degree_estimate", est[::-1].copy()),
        "degree_estimate not within": with_col(ds, "degree_estimate", np.where(np.arange(len(est)) == 0, -1.0, est)),
        "expected one per member": ds.slice(1),
        "positions are not": with_col(ds, "position", np.zeros(len(est), dtype=np.int64)),
    }
    for message, broken in cases.items():
        res = _problems(rel.manifest, {**rel.tables, "degree_sequences": broken})
        assert any(message in p for p in res.problems), (message, res.problems)
    se = rel.tables["superedges"]
    bad = with_col(se, "edge_count_estimate", -se.column("edge_count_estimate").to_numpy() - 1)
    assert any("edge_count_estimate" in p for p in _problems(rel.manifest, {**rel.tables, "superedges": bad}).problems)
    m = dict(rel.manifest, triangle_count=1.5)
    assert any("not an integer" in p for p in _problems(m, rel.tables).problems)
    m = dict(rel.manifest, components=[c for c in rel.manifest["components"] if c["name"] != "triangle_count"])
    assert any("without its spend" in p for p in _problems(m, rel.tables).problems)
    m = {k: v for k, v in rel.manifest.items() if k != "triangle_count"}
    assert any("no 'triangle_count' value" in p for p in _problems(m, rel.tables).problems)
    m = dict(rel.manifest, components=[c for c in rel.manifest["components"] if c["name"] != "degree_sequences"])
    assert any("no 'degree_sequences' spend" in p for p in _problems(m, rel.tables).problems)


def test_inputs_reject_a_degree_table_that_misses_people():
    g, rel = _release("karate")
    tables = dict(rel.tables)
    tables["degree_sequences"] = tables["degree_sequences"].slice(1)
    fake = type("R", (), {"tables": tables, "manifest": rel.manifest})()
    with pytest.raises(aggpub.BundleError, match="every member"):
        inputs_from_release(fake)


def test_uniform_inputs_for_a_release_without_degree_sequences():
    g, rel = _release("karate", degree_sequences={"enabled": False})
    inputs = inputs_from_release(rel)
    assert inputs.sampler == "uniform_block" and inputs.degrees is None
    est = rel.superedges.column("edge_count_estimate").to_numpy()
    np.testing.assert_array_equal(inputs.cells, est)  # the estimates, not the clamped counts
    assert isinstance(inputs, SynthesisInputs)


# --------------------------------------------------------------------------- the reader's guide


def test_reader_guide_figures_are_the_committed_benchmark_results():
    """The figures the reader's guide quotes are the release rows of benchmarks/results/fidelity-2026-12-02.json
    (lowest and highest over the networks), not numbers typed by hand."""
    from pathlib import Path

    from aggpub.bundle.synthesis_guide import FIDELITY_REFERENCE

    rows = json.loads((Path(__file__).resolve().parents[1] / "benchmarks" / "results"
                       / "fidelity-2026-12-02.json").read_text())
    kinds = {"before": "uniform_block", "sequences": "degree_corrected", "after": "degree_corrected_affinity"}
    for method, kind in kinds.items():
        for eps, figures in FIDELITY_REFERENCE[kind].items():
            rs = [r for r in rows if r["method"] == method and r["epsilon"] == eps and r["kind"] == "release"]
            assert len(rs) == 7
            for name, (lo, hi, nlo, nhi) in figures.items():
                values = sorted((round(r[name], 3), r["network"]) for r in rs)
                assert (lo, nlo) == values[0] and (hi, nhi) == values[-1], (kind, eps, name)


def test_reader_guide_follows_the_manifest():
    from aggpub.bundle.guide import render_guide

    g, rel = _release("karate")
    text = render_guide(rel.manifest)
    assert "## Which column to use for what" in text and "edge_count_estimate" in text
    assert "with the degree-corrected sampler with affinity blocks" in text
    assert "local clustering, through blocks" in text
    g, rel = _release("karate", triangle_count={"enabled": False})
    text = render_guide(rel.manifest)
    assert "(no triangle count released, so no affinity blocks)" in text and "Loses:" in text
    g, rel = _release("karate", degree_sequences={"enabled": False}, triangle_count={"enabled": False})
    text = render_guide(rel.manifest)
    assert "uniform block sampler" in text and "degree heterogeneity" in text
    old = {k: v for k, v in rel.manifest.items() if k != "superedge_estimates"}
    assert "sum of the unbiased" not in render_guide(old) and "uniform block sampler" in render_guide(old)


# --------------------------------------------------------------------------- the audit draws with the same sampler


def test_audit_uses_the_researchers_sampler_and_reports_fidelity(tmp_path, monkeypatch):
    """The confidential audit draws through aggpub.synthesis (the functions sample_network uses) for both the
    release and the true aggregate, and its report shows the fidelity figures for both."""
    from aggpub import synthesis
    from aggpub.audit import audit_release, write_report

    g, rel = _release("lesmis", seed=11)
    seen = []
    real = synthesis.draw_network
    monkeypatch.setattr(synthesis, "draw_network", lambda inputs, rng, affinity=None:
                        seen.append(inputs.sampler) or real(inputs, rng, affinity))
    out = audit_release(rel, monte_carlo=0, structure_samples=2, seed=1)
    assert seen == ["degree_corrected"] * 4  # 2 from the release, 2 from the true aggregate
    fid = out["structure"]["fidelity"]
    assert fid["grouping_alone"]["contacts_ratio"]["mean"] == 1.0
    assert 0.9 < fid["release"]["contacts_ratio"]["mean"] < 1.1
    assert "degree-corrected" in out["structure"]["sampler"]
    assert 0 <= out["degree_distribution"]["from_degree_sequences"]["ks"] <= 1
    html = (write_report(tmp_path / "r", out) / "report.html").read_text(encoding="utf-8")
    assert "Can researchers simulate on the synthetic networks?" in html and "epidemic final size" in html


def test_false_position_finds_the_root_scipy_finds():
    """The affinity fit's root finder (Illinois variant of regula falsi; Dowell, Jarratt, BIT 11, 1971) against
    scipy.optimize.brentq on smooth increasing functions shaped like the triangle count (flat, then steep);
    the ends are returned when the root lies outside [0, 1]; the stopping rule is |f| <= tolerance."""
    from scipy.optimize import brentq

    from aggpub.synthesis.sampler import _false_position

    for f in (lambda x: 2000 + 78000 * x ** 3 - 55000, lambda x: np.expm1(3 * x) - 4.0, lambda x: x - 0.3):
        calls = []

        def counted(x, f=f):
            calls.append(x)
            return f(x)

        root = _false_position(counted, 1e-9, 60)
        assert root == pytest.approx(brentq(f, 0.0, 1.0), abs=1e-7)
        assert len(calls) <= 14  # plain regula falsi needs 19 and 40 trials on the two convex ones (one end stays)
    assert _false_position(lambda x: x + 0.1, 1e-6, 5) == 0.0
    assert _false_position(lambda x: x - 1.5, 1e-6, 5) == 1.0
    # a loose tolerance stops at the first trial inside it: here the first, at 1/2
    seen = []
    root = _false_position(lambda x: seen.append(x) or (x - 0.5), 0.2, 5)
    assert root == 0.5 and seen == [0.5]
    # the first trial at 1/2, then the end on the root's side, then false-position points inside that half
    for true_root in (0.8, 0.2):
        seen = []
        _false_position(lambda x, r=true_root: seen.append(x) or (x - r), 1e-9, 5)
        assert seen[:2] == ([0.5, 1.0] if true_root > 0.5 else [0.5, 0.0])
        assert all(min(seen[:2]) <= x <= max(seen[:2]) for x in seen[2:])
    # beyond an end: that end, after the trial at 1/2 and the end itself
    seen = []
    assert _false_position(lambda x: seen.append(x) or (x + 0.1), 1e-6, 5) == 0.0 and seen == [0.5, 0.0]


# --------------------------------------------------------------------------- the sampler's sorting helpers
# Reference: numpy's own searchsorted, unique and lexsort (the slower forms these helpers replace).

def test_run_starts_equals_searchsorted():
    from aggpub.synthesis.degree_corrected import _run_starts

    rng = np.random.default_rng(3)
    for n in (0, 1, 2, 50, 5000):
        x = np.sort(rng.integers(0, max(n // 4, 1), n))
        assert np.array_equal(_run_starts(x), np.searchsorted(x, x, side="left"))


def test_new_first_occurrences_equals_dropping_present_keys_then_numpy_unique():
    from aggpub.synthesis.degree_corrected import _new_first_occurrences

    rng = np.random.default_rng(4)
    for n in (0, 1, 30, 20000):
        keys = rng.integers(0, max(n // 2, 1), n)
        cell = rng.integers(0, 99, n)
        chosen = np.unique(rng.integers(0, max(n // 2, 1), n // 5))
        extra = np.unique(rng.integers(0, max(n // 2, 1), n // 20))
        gone = np.isin(keys, chosen) | np.isin(keys, extra)
        kept = np.flatnonzero(~gone)
        _, first = np.unique(keys[kept], return_index=True)  # numpy: first occurrence of each value
        idx = np.sort(kept[first])
        got_keys, got_cell = _new_first_occurrences(keys, cell, chosen, extra)
        assert np.array_equal(got_keys, keys[idx]) and np.array_equal(got_cell, cell[idx])


@pytest.mark.parametrize("packed", [True, False])
def test_shuffled_order_sorts_by_the_keys_and_breaks_ties_uniformly(monkeypatch, packed):
    """Sorted by the keys (as numpy.lexsort sorts them); each of the 3! orders of three tied items equally likely
    (chi-square, 5 degrees of freedom), through the packed key and through the lexsort fallback alike."""
    from scipy import stats

    import aggpub.synthesis.degree_corrected as dc

    if not packed:
        monkeypatch.setattr(dc, "_PACK_LIMIT", 1)
    rng = np.random.default_rng(5)
    major = np.array([2, 0, 1, 0, 2, 0, 1])
    minor = np.array([5, 1, 0, 1, 5, 1, 3])
    seen = {}
    for _ in range(3000):
        order = dc._shuffled_order(7, rng, major, minor)
        assert np.array_equal(np.lexsort((minor[order], major[order])), np.arange(7))  # already sorted
        tied = tuple(int(i) for i in order if major[i] == 0)  # items 1, 3, 5: equal on both keys
        seen[tied] = seen.get(tied, 0) + 1
    assert sorted(seen) == sorted([(1, 3, 5), (1, 5, 3), (3, 1, 5), (3, 5, 1), (5, 1, 3), (5, 3, 1)])
    assert stats.chisquare(list(seen.values())).pvalue > 1e-4
    # the two paths give the same order for the same generator state
    a = dc._shuffled_order(7, np.random.default_rng(9), major, minor)
    monkeypatch.setattr(dc, "_PACK_LIMIT", 1 if packed else 2 ** 62)
    assert np.array_equal(a, dc._shuffled_order(7, np.random.default_rng(9), major, minor))


def test_the_samplers_merge_of_sorted_keys_is_their_sorted_union():
    """``_merge`` (one stable sort of two sorted runs) against numpy's ``union1d`` on disjoint sorted keys,
    empty sides included."""
    from aggpub.synthesis.degree_corrected import _merge

    rng = np.random.default_rng(5)
    for n_a, n_b in ((0, 0), (0, 7), (9, 0), (1, 1), (500, 3), (40, 4000)):
        keys = rng.permutation(np.unique(rng.integers(0, 10 ** 9, 3 * (n_a + n_b) + 1)))[: n_a + n_b]
        a, b = np.sort(keys[:n_a]), np.sort(keys[n_a:])
        got = _merge(a, b)
        assert got.dtype == keys.dtype and np.array_equal(got, np.union1d(a, b))
