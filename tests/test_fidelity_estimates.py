"""The estimates every derived view reads (issue 12): consistent non-negative superedge estimates and degree
estimates (:mod:`aggpub.estimates.counts`, :mod:`aggpub.estimates.degrees`).

Outside references: the generalised least-squares estimate written with an explicit matrix and
``numpy.linalg.solve`` (Hay, Rastogi, Miklau, Suciu, PVLDB 2010, constrained inference); the constrained
least-squares projection solved by ``scipy.optimize.minimize`` (method ``trust-constr``); scikit-learn's
``IsotonicRegression`` (pool adjacent violators); simulation with the project's own discrete Laplace sampler
for unbiasedness; networkx's classic networks for the no-noise path.
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

import aggpub
from aggpub.cells import all_cells, possible_pairs
from aggpub.estimates import degrees as dest
from aggpub.cells import CellRows
from aggpub.estimates.counts import blue_cells, consistent_counts, degree_totals, project_cells
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import SeededRandomSource

from .conftest import graph_tables, simple_policy


def _matrix(n, a, b):
    """``M`` written out: ``(M x)_A = 2 x_AA + sum_{B != A} x_AB``."""
    M = np.zeros((n, len(a)))
    for c, (i, j) in enumerate(zip(a, b)):
        M[i, c] += 1
        M[j, c] += 1
    return M


def test_blue_equals_the_explicit_generalised_least_squares_solution():
    """x = y + v_s M^T (v_s M M^T + V_z)^{-1} (z - M y), with the n x n system solved by numpy."""
    rng = np.random.default_rng(1)
    for n in (1, 2, 5, 9):
        a, b = all_cells(n)
        M = _matrix(n, a, b)
        assert np.allclose(M @ M.T, (n + 2) * np.eye(n) + 1.0)  # the structure blue_cells uses
        y = rng.normal(5, 3, len(a))
        z = rng.normal(20, 5, n)
        v_s, v_z = 2.5, rng.uniform(5, 50, n)
        S = v_s * M @ M.T + np.diag(v_z)
        ref = y + v_s * M.T @ np.linalg.solve(S, z - M @ y)
        np.testing.assert_allclose(blue_cells(y, v_s, a, b, n, z, v_z), ref, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(degree_totals(y, a, b, n), M @ y, rtol=1e-12)


def test_projection_equals_scipy_constrained_least_squares():
    """min |x - x0|^2 s.t. M x = r, 0 <= x <= cap: our semismooth Newton against scipy's trust-constr."""
    from scipy.optimize import Bounds, LinearConstraint, minimize

    rng = np.random.default_rng(2)
    for _ in range(6):
        n = int(rng.integers(2, 5))
        sizes = rng.integers(3, 8, n)
        a, b = all_cells(n)
        cap = possible_pairs(sizes, a, b).astype(float)
        x0 = rng.normal(1.0, 3.0, len(a))
        r = degree_totals(np.clip(rng.normal(2.0, 1.0, len(a)), 0, cap), a, b, n)
        ours = project_cells(x0, a, b, n, r, cap)
        M = _matrix(n, a, b)
        ref = minimize(lambda x: 0.5 * ((x - x0) ** 2).sum(), np.clip(x0, 0, cap), jac=lambda x: x - x0,
                       hess=lambda x: np.eye(len(x)), method="trust-constr",
                       constraints=[LinearConstraint(M, r, r)], bounds=Bounds(0, cap),
                       options={"gtol": 1e-12, "xtol": 1e-14, "maxiter": 5000})
        assert ours.max_violation < 1e-6
        np.testing.assert_allclose(ours.x, ref.x, atol=1e-4)
        assert (ours.x >= 0).all() and (ours.x <= cap).all()


@pytest.mark.parametrize("seed", [0, 3])
def test_projection_does_not_crawl_when_the_dual_cannot_measure_the_last_step(seed):
    # Regression (found on a 2,001,000-cell release that took 64 s instead of 0.6): a Newton step that lands
    # just above the goal needs, for the next one, an ascent of the dual (a sum over every cell) below the
    # dual's rounding; the Armijo test then rejected the full step, accepted tiny ones and crawled through
    # all 100 Newton steps with 40 halvings each. Reproduced small: the goal set just below the violation of
    # the first step that brings it under 1e-3 (these seeds crawled to 100 steps before the fix). The full
    # step must be taken on the violation it leaves, and the result must still be the projection.
    rng = np.random.default_rng(seed)
    n = 60
    sizes = rng.integers(20, 40, n)
    a, b = all_cells(n)
    cap = possible_pairs(sizes, a, b)
    y = rng.binomial(cap, 0.02) + rng.laplace(0, 30, len(a))
    xb = blue_cells(y, 1800.0, a, b, n)
    r = CellRows(a, b, n).totals(xb)  # the totals as consistent_counts computes them (their rounding matters here)
    scale = max(1.0, float(np.abs(np.clip(r, 0, degree_totals(cap, a, b, n))).max()))
    vs = [project_cells(xb, a, b, n, r, cap, max_newton=k).max_violation for k in range(1, 6)]
    k = next(i for i, v in enumerate(vs) if v < 1e-3)
    goal = vs[k] / 3
    res = project_cells(xb, a, b, n, r, cap, tol=goal / scale)
    assert res.newton_steps <= k + 3 and res.max_violation <= goal
    ref = project_cells(xb, a, b, n, r, cap)  # the default goal: the same cells
    np.testing.assert_allclose(res.x, ref.x, rtol=0, atol=1e-6)


def test_no_noise_returns_the_true_cells_exactly():
    rng = np.random.default_rng(3)
    sizes = np.array([4, 9, 15, 7])
    a, b = all_cells(4)
    cap = possible_pairs(sizes, a, b)
    x = np.minimum(rng.poisson(3, len(a)), cap).astype(float)
    x[[0, 5]] = 0.0
    res = consistent_counts(x, sizes, 12.5, a, b, z=degree_totals(x, a, b, 4), v_z=sizes * 50.0)
    np.testing.assert_array_equal(res.x, x)
    assert res.newton_steps == 0


def test_estimates_are_non_negative_and_their_sums_unbiased():
    """Over 400 noisy releases (the project's discrete Laplace sampler): every estimate in [0, cap]; the mean of
    the whole-table sum of the estimates is the true total within sampling error, that of the clamped cells is
    not (clamping lifts every empty cell)."""
    rng = np.random.default_rng(4)
    src = SeededRandomSource(4)
    sizes = np.array([12, 15, 20, 11, 30])
    n = len(sizes)
    a, b = all_cells(n)
    cap = possible_pairs(sizes, a, b)
    x = np.minimum(rng.poisson(2, len(a)), cap)
    x[[1, 4, 7]] = 0
    cells = GeometricMechanism(epsilon=0.4, sensitivity=1.0)
    seqs = GeometricMechanism(epsilon=0.4, sensitivity=2.0)
    true_totals = degree_totals(x, a, b, n)
    est_sum, clamp_sum = [], []
    for _ in range(400):
        y = cells.randomise(x, src)
        z = true_totals + np.array([seqs.noise(int(s), src).sum() for s in sizes])
        res = consistent_counts(y, sizes, cells.variance(), a, b, z=z, v_z=sizes * seqs.variance())
        assert (res.x >= 0).all() and (res.x <= cap).all()
        if res.max_violation < 1e-6:
            est_sum.append(res.x.sum())
        clamp_sum.append(np.clip(y, 0, cap).sum())
    est_sum, clamp_sum = np.array(est_sum), np.array(clamp_sum)
    assert len(est_sum) > 380
    assert abs(est_sum.mean() - x.sum()) < 4 * est_sum.std() / np.sqrt(len(est_sum))
    assert clamp_sum.mean() - x.sum() > 4 * clamp_sum.std() / np.sqrt(len(clamp_sum))


def test_isotonic_fit_matches_scikit_learn():
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(5)
    group = np.repeat(np.arange(4), [7, 12, 3, 9])
    noisy = np.sort(rng.integers(0, 20, len(group))) + rng.normal(0, 4, len(group))
    ours = dest.isotonic_by_group(noisy, group)
    for k in range(4):
        m = group == k
        ref = IsotonicRegression().fit_transform(np.arange(m.sum()), noisy[m])
        np.testing.assert_allclose(ours[m], ref, atol=1e-9)


def test_degree_estimates_sorted_rescaled_deterministic():
    rng = np.random.default_rng(6)
    sizes = np.array([30, 50, 20, 40])
    group = np.repeat(np.arange(4), sizes)
    true = np.concatenate([np.sort(rng.pareto(2.0, s) * 4).round() for s in sizes])
    noisy = true + rng.integers(-6, 7, len(true))
    fit = dest.fit_sorted_degrees(noisy, group, 140, 12.0)
    assert np.array_equal(fit, dest.fit_sorted_degrees(noisy, group, 140, 12.0))  # seeded by the released values
    same = group[1:] == group[:-1]
    assert (np.diff(fit)[same] >= -1e-9).all() and fit.min() >= 0 and fit.max() <= 139
    totals = np.array([100.0, 400.0, 0.0, 250.0])
    target = dest.degree_targets(fit, group, sizes, totals)
    np.testing.assert_allclose(np.bincount(group, weights=target), totals)
    # shrinkage only lowers a top, never below the block under it
    iso = dest.isotonic_by_group(noisy, group)
    shrunk = dest.shrink_tops(iso, group, 12.0)
    assert (shrunk <= iso + 1e-12).all() and (np.diff(shrunk)[same] >= -1e-9).all()


def test_bootstrap_replicates_from_the_public_number_of_people():
    assert dest.bootstrap_replicates(1000) == 20
    assert dest.bootstrap_replicates(100_000) == 20
    assert dest.bootstrap_replicates(1_000_000) == 2
    assert dest.bootstrap_replicates(10 ** 8) == 2


# --------------------------------------------------------------------------- in a release


@pytest.mark.parametrize("graph", ["karate", "lesmis", "florentine"])
def test_release_estimates_agree_across_tables(graph, tmp_path):
    """In a release: every supernode's degree estimates add up to the degree total of its superedge estimates;
    both are within their bounds; the bundle checks."""
    g = {"karate": nx.karate_club_graph, "lesmis": nx.les_miserables_graph,
         "florentine": nx.florentine_families_graph}[graph]()
    g = nx.convert_node_labels_to_integers(g)
    edges, people = graph_tables(g, {"k": {v: v % 3 for v in g}})
    rel = aggpub.release_tables(edges, people, simple_policy(["k"], min_size=3), seed=7)
    se, ds = rel.tables["superedges"], rel.tables["degree_sequences"]
    n = rel.supernodes.num_rows
    a, b = se.column("supernode_a").to_numpy(), se.column("supernode_b").to_numpy()
    est = se.column("edge_count_estimate").to_numpy()
    assert (est >= 0).all() and (est <= se.column("possible_pairs").to_numpy() + 1e-9).all()
    totals = degree_totals(est, a, b, n)
    per = np.bincount(ds.column("supernode").to_numpy(), weights=ds.column("degree_estimate").to_numpy(),
                      minlength=n)
    np.testing.assert_allclose(per, totals, rtol=1e-6, atol=1e-6)
    assert rel.manifest["superedge_estimates_max_total_gap"] < 1e-6
    assert aggpub.check_bundle(aggpub.publish(rel, tmp_path / "b")).ok


def test_sparse_release_keeps_clamped_estimates():
    rng = np.random.default_rng(8)
    n = 200
    people = {"node": [str(i) for i in range(n)], "g": [str(i % 40) for i in range(n)]}
    iu, iv = np.triu_indices(n, 1)
    keep = rng.random(len(iu)) < 0.03
    import pyarrow as pa

    edges = pa.table({"source": [str(x) for x in iu[keep]], "target": [str(x) for x in iv[keep]]})
    rel = aggpub.release_tables(edges, pa.table(people), simple_policy(
        ["g"], min_size=5, components={"superedge_counts": {"method": "sparse"}}), seed=3)
    se = rel.superedges
    assert rel.manifest["superedges_sparse"] is True
    np.testing.assert_array_equal(se.column("edge_count_estimate").to_numpy(), se.column("edge_count").to_numpy())
    assert "sparse" in rel.manifest["superedge_estimates"]


def test_capped_rescaling_keeps_the_total_and_the_order():
    """A supernode whose fit puts everything on one member: the rescaled values never pass N - 1, stay sorted,
    and still add up to the total (the total is possible: at most size x (N - 1))."""
    group = np.repeat([0, 1], [5, 4])
    fit = np.array([0.0, 0.0, 0.0, 0.1, 3.0, 1.0, 1.0, 2.0, 2.0])
    totals = np.array([30.0, 12.0])
    out = dest.degree_targets(fit, group, np.array([5, 4]), totals, cap=9.0)
    assert out.max() <= 9.0 and (out >= 0).all()
    np.testing.assert_allclose(np.bincount(group, weights=out), totals)
    same = group[1:] == group[:-1]
    assert (np.diff(out)[same] >= -1e-12).all()
    np.testing.assert_allclose(out[5:], fit[5:] * 2.0)  # nobody near the cap: plain rescaling


def test_degree_estimates_at_a_huge_epsilon_are_the_truth():
    """epsilon 1e6: the noise is (almost surely) 0 and its variance about 1e-434, far below double precision's
    smallest steps: the estimates are the true sorted degrees, with no overflow in the bootstrap's law."""
    g = nx.convert_node_labels_to_integers(nx.les_miserables_graph())
    edges, people = graph_tables(g, {"k": {v: v % 3 for v in g}})
    rel = aggpub.release_tables(edges, people, simple_policy(["k"], min_size=3, epsilon=1e6), seed=2)
    ds = rel.tables["degree_sequences"]
    est = ds.column("degree_estimate").to_numpy()
    assert np.isfinite(est).all()
    np.testing.assert_allclose(est, rel.truth["degree_sequences"].values, atol=1e-6)
