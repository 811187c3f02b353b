"""The gate reads released values only: invariance to the truth, no concentration on the truth under
retries, and reference checks of its figures against the noise law.

Outside references: the discrete Laplace pmf and E|Z| = 2a/(1-a^2) (Ghosh, Roughgarden, Sundararajan,
"Universally utility-maximizing privacy mechanisms", STOC 2009); scipy.stats.binomtest for the
concentration test; networkx's Les Miserables network (Knuth, The Stanford GraphBase, 1993) as data.
"""

from __future__ import annotations

import dataclasses

import networkx as nx
import numpy as np
import pytest
from scipy import stats

import aggpub
from aggpub.audit import audit_release
from aggpub.gate import evaluate_gate, gate_failure_message
from aggpub.gate.released import released_metrics
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import SeededRandomSource
from aggpub.pipeline import release_gate
from aggpub.policy import parse_policy
from tests.conftest import graph_tables, simple_policy


def _policy(**gate):
    return parse_policy(simple_policy(["band"], gate=gate))


# --------------------------------------------------------------------------- evaluate_gate on a metrics table


def test_gate_pass_fail_and_unmeasurable():
    metrics = {"degree_ks": 0.04, "degree_wasserstein1": 0.3, "contact_matrix_median_relative_error": 0.12,
               "superedge_median_relative_error": 0.0, "why": {}}
    g = evaluate_gate(_policy(max_degree_ks=0.05, max_contact_matrix_median_relative_error=0.10), metrics,
                      basis="test")
    assert not g["passed"] and g["failed"] == ["max_contact_matrix_median_relative_error"]
    assert g["max_degree_ks"]["value"] == 0.04 and g["max_degree_ks"]["passed"]
    assert g["max_contact_matrix_median_relative_error"]["excess"] == pytest.approx(0.02)
    msg = gate_failure_message(g, charged=True, epsilon=1.0, report_path="R")
    assert "max_contact_matrix_median_relative_error: expected 0.12 > allowed 0.1 (over by 0.02)" in msg
    assert "No bundle was written" in msg and "counts as spent" in msg
    assert "nothing was charged" in gate_failure_message(g, charged=False)
    # a figure that is not there fails after the noise, and is only reported before it
    missing = dict(metrics, contact_matrix_median_relative_error=None,
                   why={"contact_matrix_median_relative_error": "no superedges"})
    pol = _policy(max_degree_wasserstein=1.0, max_contact_matrix_median_relative_error=0.5)
    g = evaluate_gate(pol, missing, basis="after")
    assert g["failed"] == ["max_contact_matrix_median_relative_error"]
    assert "not measurable: no superedges" in g["max_contact_matrix_median_relative_error"]["reason"]
    pre = evaluate_gate(pol, missing, basis="before", unknown_fails=False)
    assert pre["passed"] and pre["unknown"] == ["max_contact_matrix_median_relative_error"]
    # the boundary passes (value <= allowed), zero tolerance fails any error
    assert evaluate_gate(_policy(max_degree_ks=0.04), metrics, basis="t")["passed"]
    assert not evaluate_gate(_policy(max_degree_ks=0.0), metrics, basis="t")["passed"]


# --------------------------------------------------------------------------- invariance to the truth


@pytest.fixture(scope="module")
def lesmis():
    G = nx.les_miserables_graph()
    nodes = sorted(G)
    band = {n: f"b{i % 5}" for i, n in enumerate(nodes)}
    edges, people = graph_tables(G, {"band": band})
    return G, band, edges, people


def _gated_policy():
    return parse_policy(simple_policy(["band"], min_size=10, gate={
        "max_degree_ks": 0.5, "max_contact_matrix_median_relative_error": 0.5,
        "max_superedge_median_relative_error": 5.0}))


def test_the_decision_is_the_same_for_two_truths_behind_the_same_release(lesmis):
    """Two different true networks, one released table: the gate must decide the same way.

    The release built on the true Les Miserables network is set beside the same public tables attached
    to another true network (the edges shuffled among the same people). The gate's figures depend on
    the public tables only, so they are identical; the audit's true-against-released figures, which the
    old gate read, differ -- which is what made that gate a leak.
    """
    G, band, edges, people = lesmis
    pol = _gated_policy()
    rel = aggpub.release_tables(edges, people, pol, seed=3)
    H = nx.gnm_random_graph(G.number_of_nodes(), G.number_of_edges(), seed=11)
    H = nx.relabel_nodes(H, dict(enumerate(sorted(G))))
    e2, p2 = graph_tables(H, {"band": band})
    other_truth = aggpub.release_tables(e2, p2, pol, seed=3)
    twin = dataclasses.replace(other_truth, tables=rel.tables, manifest=rel.manifest)
    g1, g2 = release_gate(rel), release_gate(twin)
    assert g1 == g2
    # the figures the old gate judged (true against released) do tell the two truths apart
    a1 = audit_release(rel, monte_carlo=0, structure_samples=0, source=SeededRandomSource(1))
    a2 = audit_release(twin, monte_carlo=0, structure_samples=0, source=SeededRandomSource(1))
    assert a1["degree_distribution"]["ks"] != a2["degree_distribution"]["ks"]


# --------------------------------------------------------------------------- retries do not find the truth


def _retry_until_pass(true_count, mech, rng, limit, retries, judge):
    """Draw noisy copies of one cell until ``judge`` lets one through; return it (or None)."""
    for _ in range(retries):
        noisy = true_count + int(rng.geometric(1 - mech.alpha) - rng.geometric(1 - mech.alpha))
        if judge(noisy):
            return noisy
    return None


@pytest.mark.heavy
def test_retrying_a_tight_gate_does_not_publish_the_truth():
    """With a tight gate and many retries, how often is the published count exactly the truth?

    A gate on released values lets a draw through when its *released* value lies in a region the
    gate fixes (here: E|Z| / max(released, s) <= limit, i.e. released >= r0). What is published is
    then exactly the noise law conditioned on that public region: the truth is hit with probability
    q = P(Z = 0) / P(T + Z >= r0), a figure of the noise law alone -- each retry is a fresh, charged
    release, and nothing steers the published value towards the truth. A gate on the true error (the
    old one) lets through only draws close to the truth and publishes the truth almost every time.
    Binomial tests (scipy.stats.binomtest): the released-value gate matches q; the true-error gate is
    far above it (the test has power).
    """
    mech = GeometricMechanism(epsilon=0.5, sensitivity=1.0)
    rng = np.random.default_rng(20261202)
    true_count, limit, trials = 40, 0.05, 4000
    e_abs = mech.expected_abs()
    r0 = int(np.ceil(e_abs / limit))  # the released-value gate passes exactly when released >= r0

    def released_gate(noisy):  # the gate's own figure: E|Z| / max(released, s), s = 1
        return e_abs / max(noisy, 1) <= limit

    def true_gate(noisy):  # the old gate: the true relative error
        return abs(noisy - true_count) / true_count <= limit / 10

    new = [_retry_until_pass(true_count, mech, rng, limit, 50, released_gate) for _ in range(trials)]
    old = [_retry_until_pass(true_count, mech, rng, limit, 50, true_gate) for _ in range(trials)]
    z = np.arange(r0 - true_count, 2000)
    q = float(mech.pmf(0) / mech.pmf(z).sum())  # P(Z = 0 | T + Z >= r0), from the pmf
    published = [x for x in new if x is not None]
    assert all(x >= r0 for x in published)
    new_hits = sum(1 for x in published if x == true_count)
    old_hits = sum(1 for x in old if x == true_count)
    assert stats.binomtest(new_hits, len(published), q).pvalue > 1e-3
    assert stats.binomtest(old_hits, trials, q, alternative="greater").pvalue < 1e-12
    assert old_hits > 0.9 * trials  # the old gate is an exact oracle


# --------------------------------------------------------------------------- the figures themselves


def test_superedge_figure_is_the_noise_laws_mean_over_the_released_magnitude(lesmis):
    G, band, edges, people = lesmis
    pol = _gated_policy()
    rel = aggpub.release_tables(edges, people, pol, seed=4)
    m = released_metrics(rel.tables, rel.manifest, pol)
    se = rel.tables["superedges"]
    est = se.column("edge_count_unclamped").to_numpy().astype(float)
    mech = GeometricMechanism(epsilon=rel.mechanisms["superedge_counts"].epsilon, sensitivity=1.0)
    z = np.arange(-400, 401)
    e_abs_pmf = float(np.sum(np.abs(z) * mech.pmf(z)))  # E|Z| from the pmf (Ghosh et al. 2009)
    s = max(1.0, 0.001 * est.sum())
    assert m["sanity_bound"] == pytest.approx(s)
    assert m["superedge_median_relative_error"] == pytest.approx(np.median(e_abs_pmf / np.maximum(est, s)))


def test_contact_matrix_figure_uses_the_exact_law_of_a_sum():
    """E|Z_1 + ... + Z_m| from the exact law, checked against a large simulation of the law itself."""
    mech = GeometricMechanism(epsilon=0.7, sensitivity=1.0)
    rng = np.random.default_rng(5)
    for m in (2, 7, 40):
        draws = (rng.geometric(1 - mech.alpha, (200_000, m)) - rng.geometric(1 - mech.alpha, (200_000, m))).sum(1)
        assert mech.expected_abs_sum([m])[0] == pytest.approx(np.abs(draws).mean(), rel=0.01)


def test_degree_figure_is_deterministic_and_grows_with_the_noise(lesmis):
    G, band, edges, people = lesmis
    figs = []
    for eps in (0.5, 8.0):
        pol = parse_policy(simple_policy(["band"], min_size=10, epsilon=eps))
        rel = aggpub.release_tables(edges, people, pol, seed=5)
        m1 = released_metrics(rel.tables, rel.manifest, pol)
        m2 = released_metrics(rel.tables, rel.manifest, pol)
        assert m1["degree_ks"] == m2["degree_ks"]  # a function of the released values
        figs.append(m1["degree_wasserstein1"])
    assert figs[0] > figs[1]
