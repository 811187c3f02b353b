"""The sparse release (:mod:`aggpub.noise.sparse`) has the law of "noise every cell, then threshold".

Sources of the expected values:

* [CPST12] G. Cormode, C. Procopiuc, D. Srivastava, T. T. L. Tran, "Differentially
  private summaries for sparse data", ICDT 2012: the target output is the
  noisy table thresholded at theta; zero cells pass independently with
  probability P(Z >= theta), so their number is Binomial(n_zero, P(Z >= theta)).
* [GRS09] A. Ghosh, T. Roughgarden, M. Sundararajan, "Universally
  utility-maximizing privacy mechanisms", STOC 2009: the discrete Laplace pmf
  P(Z = z) = (1-a)/(1+a) a^|z|, a = exp(-epsilon/sensitivity). Summing it gives
  P(Z >= k) = a^k/(1+a) for k >= 1 (derived here and checked numerically below).
* [SCIPY] ``scipy.stats.chisquare``, ``chi2_contingency``, ``binom``, ``kstest``.
* [COCHRAN] expected counts of at least 5 per chi-square cell (W. G. Cochran,
  Biometrics, 1954; recalled from memory).

Every statistical test uses a seeded source and is therefore deterministic; the
acceptance level 1e-3 (after a Bonferroni correction over cells) is what a
correct implementation would fail with by chance, the rejection level 1e-6 is
what the deliberately wrong variants must reach.
"""

from __future__ import annotations

import math

import networkx as nx
import numpy as np
import pyarrow as pa
import pytest
import scipy.stats as st

from aggpub import cells as comp
from aggpub import released
from aggpub.bundle import check_bundle
from aggpub.noise import sparse
from aggpub.noise.mechanisms import GeometricMechanism
from aggpub.noise.sampler import SeededRandomSource, SystemRandomSource
from aggpub.pipeline import publish, release_tables

from .conftest import graph_tables, simple_policy

ALPHA_LOG = -1.0  # epsilon / sensitivity = 1
MECH = GeometricMechanism(epsilon=1.0, sensitivity=1.0)
THETA = 2
# 15 cells (5 supernodes): 8 zeros, the rest small and large counts
COUNTS = np.array([0, 3, 0, 1, 0, 0, 7, 2, 0, 0, 0, 4, 0, 0, 1], dtype=np.int64)
RUNS = 12_000
TOP = 10  # categories: absent, theta, ..., theta+TOP-1, >= theta+TOP


def _cdf(k, log_alpha=ALPHA_LOG):
    """P(Z <= k) for the discrete Laplace law [GRS09] (summed in closed form)."""
    a = math.exp(log_alpha)
    k = np.asarray(k, dtype=np.float64)
    return np.where(k < 0, a ** (-k) / (1 + a), 1 - a ** (k + 1) / (1 + a))


def _exact_probs(c):
    """Outcome law of one cell of true count c under noise-then-threshold."""
    absent = _cdf(THETA - 1 - c)
    values = MECH.pmf(np.arange(THETA, THETA + TOP) - c)
    top = 1 - _cdf(THETA + TOP - 1 - c)
    return np.concatenate([[absent], values, [top]])


def _category(values):
    """Map outcomes (-1 = absent, else the kept value) to category indices."""
    return np.where(values < 0, 0, 1 + np.minimum(values - THETA, TOP))


def _sparse_outcomes(runs, seed, nz_flat=None, counts=COUNTS):
    """(runs, cells) matrix of outcomes of the sparse release: -1 absent, else the value."""
    src = SeededRandomSource(seed)
    nz = np.flatnonzero(counts) if nz_flat is None else nz_flat
    out = np.full((runs, len(counts)), -1, dtype=np.int64)
    for r in range(runs):
        cells = sparse.sparse_threshold_release(nz, counts[nz], len(counts), MECH, THETA, src)
        out[r, cells.flat] = cells.value
    return out


def _dense_outcomes(runs, seed, counts=COUNTS):
    noisy = counts + MECH.noise((runs, len(counts)), SeededRandomSource(seed))
    return np.where(noisy >= THETA, noisy, -1)


def _gof_pvalue(obs_counts, probs):
    """Chi-square goodness of fit, categories with expected count < 5 pooled [COCHRAN]."""
    n = obs_counts.sum()
    exp = probs * n
    big = exp >= 5
    obs = np.append(obs_counts[big], obs_counts[~big].sum())
    ex = np.append(exp[big], exp[~big].sum())
    if ex[-1] < 5:  # pool the rare bucket into the smallest kept category
        j = np.argmin(ex[:-1])
        obs[j] += obs[-1]
        ex[j] += ex[-1]
        obs, ex = obs[:-1], ex[:-1]
    ex = ex * obs.sum() / ex.sum()
    return st.chisquare(obs, ex).pvalue


def _per_cell_pvalues(outcomes, counts=COUNTS):
    k = TOP + 2
    return np.array([_gof_pvalue(np.bincount(_category(outcomes[:, i]), minlength=k), _exact_probs(c))
                     for i, c in enumerate(counts)])


def _bonferroni_min(pvalues):
    return min(1.0, float(np.min(pvalues)) * len(pvalues))


def test_tail_formula_matches_the_pmf():
    """P(Z >= k) = a^k/(1+a) [derived from GRS09] against a direct sum of the pmf and against scipy's dlaplace."""
    for k in (1, 2, 5, 11):
        direct = float(np.sum(MECH.pmf(np.arange(k, k + 400))))
        assert sparse.pass_probability(k, ALPHA_LOG) == pytest.approx(direct, rel=1e-12)
        # scipy.stats.dlaplace(a) has pmf tanh(a/2) exp(-a|k|), the same law with a = epsilon/sensitivity
        assert sparse.pass_probability(k, ALPHA_LOG) == pytest.approx(st.dlaplace.sf(k - 1, 1.0), rel=1e-10)


def test_sparse_cells_fit_the_exact_outcome_law():
    """Each cell's outcome (absent or value) under the sparse method fits the dense-then-threshold law."""
    p = _per_cell_pvalues(_sparse_outcomes(RUNS, seed=11))
    assert _bonferroni_min(p) > 1e-3, p


def test_dense_then_threshold_fits_the_same_law():
    """The reference itself (dense noise then threshold) fits: the harness is calibrated."""
    p = _per_cell_pvalues(_dense_outcomes(RUNS, seed=12))
    assert _bonferroni_min(p) > 1e-3, p


def test_sparse_and_dense_agree_cell_by_cell_and_in_total():
    s = _sparse_outcomes(RUNS, seed=13)
    d = _dense_outcomes(RUNS, seed=14)
    pvals = []
    k = TOP + 2
    for i in range(len(COUNTS)):
        table = np.vstack([np.bincount(_category(s[:, i]), minlength=k),
                           np.bincount(_category(d[:, i]), minlength=k)])
        table = table[:, table.sum(axis=0) >= 10]
        pvals.append(st.chi2_contingency(table).pvalue)
    # joint property: number of cells kept per run
    ks, kd = (s >= 0).sum(axis=1), (d >= 0).sum(axis=1)
    m = len(COUNTS) + 1
    table = np.vstack([np.bincount(ks, minlength=m), np.bincount(kd, minlength=m)])
    table = table[:, table.sum(axis=0) >= 10]
    pvals.append(st.chi2_contingency(table).pvalue)
    assert _bonferroni_min(pvals) > 1e-3, pvals


def test_zero_cells_pass_independently():
    """Two zero cells are kept together with probability p^2 (independence), and their count is Binomial."""
    s = _sparse_outcomes(RUNS, seed=15)
    zeros = np.flatnonzero(COUNTS == 0)
    kept = s[:, zeros] >= 0
    p = sparse.pass_probability(THETA, ALPHA_LOG)
    k = kept.sum(axis=1)
    pmf = st.binom.pmf(np.arange(len(zeros) + 1), len(zeros), p)
    assert _gof_pvalue(np.bincount(k, minlength=len(zeros) + 1), pmf) > 1e-3
    both = np.bincount(kept[:, 0] * 2 + kept[:, 1], minlength=4)
    law = np.array([(1 - p) ** 2, (1 - p) * p, p * (1 - p), p * p])
    assert _gof_pvalue(both, law) > 1e-3


# ----------------------------------------------------------------------------- power: wrong variants are caught

def _forget_zero_cells(monkeypatch):
    monkeypatch.setattr(sparse, "_zero_cell_ranks", lambda n, p, src: np.empty(0, dtype=np.int64))


def _wrong_tail(monkeypatch):  # zero cells' values from a tail twice as steep (rate s/2^k doubled)
    real = sparse._zero_cell_values
    monkeypatch.setattr(sparse, "_zero_cell_values",
                        lambda theta, rate, n, src: real(theta, (2 * rate[0], rate[1]), n, src))


def _tail_without_normaliser(monkeypatch):  # P(Z >= t) taken as a^t, forgetting 1/(1+a)
    def bounds(theta, s, k, bits):
        return sparse.exp_neg_bounds(theta * sparse.Fraction(s, 1 << k), bits)

    monkeypatch.setattr(sparse, "_pass_probability_bounds", bounds)


def _threshold_off_by_one(monkeypatch):  # zero cells start at theta + 1
    real = sparse._zero_cell_values
    monkeypatch.setattr(sparse, "_zero_cell_values", lambda theta, rate, n, src: real(theta, rate, n, src) + 1)


@pytest.mark.parametrize("variant", [_forget_zero_cells, _wrong_tail, _tail_without_normaliser,
                                     _threshold_off_by_one])
def test_harness_rejects_wrong_variants(monkeypatch, variant):
    variant(monkeypatch)
    p = _per_cell_pvalues(_sparse_outcomes(RUNS, seed=11))
    assert _bonferroni_min(p) < 1e-6


# ----------------------------------------------------------------------------- at scale

N_GROUPS = 4472  # 4472 * 4473 / 2 = 10,001,628 cells


@pytest.fixture(scope="module")
def big_table():
    n_cells = N_GROUPS * (N_GROUPS + 1) // 2
    rng = np.random.default_rng(7)
    nz = np.unique(rng.integers(0, n_cells, 3000))
    counts = rng.geometric(0.2, len(nz)).astype(np.int64)
    return n_cells, nz, counts


def test_binomial_count_of_zero_cells_on_a_ten_million_cell_table(big_table):
    """[CPST12]: the number of zero cells kept is Binomial(n_zero, P(Z >= theta)); 300 releases."""
    n_cells, nz, counts = big_table
    theta = sparse.default_threshold(n_cells, N_GROUPS, ALPHA_LOG)
    src = SeededRandomSource(21)
    ks, positions = [], []
    for _ in range(300):
        cells = sparse.sparse_threshold_release(nz, counts, n_cells, MECH, theta, src)
        zero_flat = cells.flat[~np.isin(cells.flat, nz)]
        assert len(zero_flat) == cells.n_zero_kept
        ks.append(cells.n_zero_kept)
        positions.append(zero_flat)
        assert np.all(np.diff(cells.flat) > 0) and np.all(cells.value >= theta)
    n_zero, p = n_cells - len(nz), sparse.pass_probability(theta, ALPHA_LOG)
    law = st.binom(n_zero, p)
    edges = law.ppf(np.linspace(0, 1, 11)[1:-1])  # 10 bins of about equal probability
    bins = np.concatenate([[-1], edges, [n_zero]])
    obs = np.histogram(ks, bins=bins + 0.5)[0]
    probs = np.diff(law.cdf(bins))
    assert _gof_pvalue(obs, probs / probs.sum()) > 1e-3
    # positions are uniform over the table (the non-zero cells are 0.03% of it)
    pos = np.concatenate(positions)
    assert st.kstest(pos / n_cells, "uniform").pvalue > 1e-3


def test_wrong_count_is_caught_at_scale(big_table, monkeypatch):
    n_cells, nz, counts = big_table
    _tail_without_normaliser(monkeypatch)
    theta = 8
    src = SeededRandomSource(22)
    ks = [sparse.sparse_threshold_release(nz, counts, n_cells, MECH, theta, src).n_zero_kept for _ in range(30)]
    law = st.binom(n_cells - len(nz), math.exp(theta * ALPHA_LOG) / (1 + math.exp(ALPHA_LOG)))
    z = (np.mean(ks) - law.mean()) / (law.std() / math.sqrt(len(ks)))
    assert z > 10


def test_exact_selection_bounds_and_candidate_rate():
    """The rigorous bounds on p = a^theta / (1 + a) [GRS09] bracket an independent high-precision value
    (Python's decimal, whose exp is correctly rounded); the candidate probability 1 - exp(-lambda) of the
    exact skip walk is at least p and only slightly above it (the thinning keeps almost every candidate)."""
    from decimal import Decimal, localcontext

    for eps, sens, theta in ((1.0, 1.0, 2), (0.1, 1.0, 40), (0.1, 100.0, 3000), (3.0, 1.0, 9), (1.0, 1.0, 400)):
        rate = GeometricMechanism(eps, sens).rate
        s, k = rate.numerator, rate.denominator.bit_length() - 1
        lo, hi = sparse._pass_probability_bounds(theta, s, k, 100)
        with localcontext() as ctx:
            ctx.prec = 60
            g = Decimal(s) / Decimal(2 ** k)
            ref = (-theta * g).exp() / (1 + (-g).exp())
            assert Decimal(lo.numerator) / Decimal(lo.denominator) <= ref * (1 + Decimal(10) ** -50)
            assert Decimal(hi.numerator) / Decimal(hi.denominator) >= ref * (1 - Decimal(10) ** -50)
        lam_s, lam_k = sparse._candidate_rate(theta, s, k, sparse._pass_probability_bounds)
        q_lo, _ = sparse.one_minus_exp_neg_bounds(sparse.Fraction(lam_s, 2 ** lam_k), 100)
        assert q_lo >= hi
        if float(hi) > 1e-15:  # above the smallest candidate rate 2**-54
            assert float(q_lo / hi) < 1 + 1e-6


def test_flat_to_pair_inverts_cell_index():
    for n in (1, 2, 7, 50):
        a, b = comp.all_cells(n)
        ra, rb = sparse.flat_to_pair(np.arange(len(a)), n)
        assert np.array_equal(ra, a) and np.array_equal(rb, b)


def test_default_threshold_is_the_smallest_meeting_its_rule():
    for n in (10, 300, 4472, 20000):
        cells = n * (n + 1) // 2
        for la in (-0.1, -0.5, -1.0, -3.0):
            t = sparse.default_threshold(cells, n, la)
            assert cells * sparse.pass_probability(t, la) <= n
            assert t == 1 or cells * sparse.pass_probability(t - 1, la) > n


def test_edge_cases():
    src = SeededRandomSource(3)
    empty = sparse.sparse_threshold_release([], [], 0, MECH, 1, src)
    assert len(empty.flat) == 0
    only_zeros = sparse.sparse_threshold_release([], [], 10, MECH, 1, src)
    assert set(only_zeros.flat) <= set(range(10))
    with pytest.raises(ValueError):
        sparse.sparse_threshold_release([], [], 10, MECH, 0, src)
    with pytest.raises(ValueError):
        sparse.sparse_threshold_release([3, 3], [1, 1], 10, MECH, 2, src)
    # a huge threshold: p ~ e^-400 / 2, no zero cell passes, nothing overflows
    far = sparse.sparse_threshold_release([1], [1], 10 ** 12, MECH, 400, src)
    assert far.n_zero_kept == 0
    assert sparse.choose_method("auto", 10, 10) == "sparse" and sparse.choose_method("auto", 9, 10) == "dense"


def test_secure_source_works_and_is_os_entropy():
    src = SystemRandomSource()
    cells = sparse.sparse_threshold_release(np.array([0, 5]), np.array([50, 50]), 100, MECH, 2, src)
    assert {0, 5} <= set(cells.flat.tolist())  # counts of 50 are kept except with probability ~e^-48


# ----------------------------------------------------------------------------- in the release path

def _network():
    G = nx.gnm_random_graph(400, 900, seed=5)
    return graph_tables(G, {"g": {v: v % 40 for v in G}})  # 40 supernodes, 820 cells


def test_release_path_uses_sparse_without_the_dense_table(monkeypatch, tmp_path):
    edges, people = _network()
    policy = simple_policy(["g"], min_size=5, components={
        "superedge_counts": {"method": "sparse", "sparse_threshold": 2.5}})

    def boom(*a, **k):
        raise AssertionError("the sparse release must not build the dense table")

    monkeypatch.setattr(released, "dense_truth", boom)
    monkeypatch.setattr(comp, "all_cells", boom)
    release = release_tables(edges, people, policy, seed=4)
    m = release.manifest
    assert m["superedges_sparse"] is True and m["superedges_sparse_threshold"] == 3
    assert m["superedge_cells"] == 820
    se = release.superedges
    c, cap = se.column("edge_count").to_numpy(), se.column("possible_pairs").to_numpy()
    assert np.all(c >= np.minimum(3, cap)) and se.num_rows < 820
    assert release.truth["superedges"].complete is False
    path = publish(release, tmp_path / "bundle")
    res = check_bundle(path)
    assert res.ok, res.problems


def test_auto_switches_at_sparse_above_cells():
    edges, people = _network()
    dense = release_tables(edges, people, simple_policy(["g"], min_size=5), seed=4)
    assert "superedges_sparse" not in dense.manifest and dense.superedges.num_rows == 820
    auto = release_tables(edges, people, simple_policy(["g"], min_size=5, components={
        "superedge_counts": {"method": "auto", "sparse_above_cells": 820}}), seed=4)
    assert auto.manifest["superedges_sparse"] is True
    # default threshold rule: expected chance cells at most one per supernode
    t = auto.manifest["superedges_sparse_threshold"]
    assert t == sparse.default_threshold(820, 40, -0.5)  # issue 13: half of epsilon beside the default views


def test_check_flags_sparse_rows_below_the_threshold():
    from aggpub.bundle.check import CheckResult, _check_invariants

    sn = pa.table({"supernode": pa.array([0, 1], pa.int64()), "size": pa.array([5, 5], pa.int64())})
    se = pa.table({"supernode_a": pa.array([0, 0], pa.int64()), "supernode_b": pa.array([0, 1], pa.int64()),
                   "edge_count": pa.array([1, 4], pa.int64()), "possible_pairs": pa.array([10, 25], pa.int64())})
    manifest = {"min_size": 5, "components": [], "superedges_sparse": True, "superedges_sparse_threshold": 3}
    res = CheckResult(path=None)
    _check_invariants(manifest, {"supernodes": sn, "superedges": se}, res)
    assert any("below the sparse threshold" in p for p in res.problems)
    res = CheckResult(path=None)
    del manifest["superedges_sparse_threshold"]
    _check_invariants(manifest, {"supernodes": sn, "superedges": se}, res)
    assert any("superedges_sparse_threshold" in p for p in res.problems)
