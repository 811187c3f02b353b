"""Released components (sizes, superedges, degree histograms, weight totals) and their post-processing.

Reference checks:

* isotonic regression against ``scipy.optimize.isotonic_regression`` and
  scikit-learn's ``IsotonicRegression`` (pool adjacent violators; Ayer, Brunk,
  Ewing, Reid, Silverman, Annals of Mathematical Statistics 1955), and the
  bounded fit used for cumulative degree counts (Hay, Rastogi, Miklau, Suciu,
  "Boosting the accuracy of differentially private histograms through
  consistency", PVLDB 2010) against a general-purpose solver (SciPy SLSQP);
* the projection onto the simplex (Held, Wolfe, Crowder, Mathematical
  Programming 1974; Duchi, Shalev-Shwartz, Singer, Chandra, ICML 2008) against
  SLSQP and its optimality (KKT) conditions;
* integer rounding with a fixed total against exhaustive search.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pyarrow as pa
import pytest
from scipy.optimize import isotonic_regression as scipy_isotonic
from scipy.optimize import minimize

from aggpub import budget
from aggpub import cells
from aggpub import released
from aggpub.bundle.check import _check_invariants, CheckResult, check_bundle
from aggpub.errors import PolicyError
from aggpub.estimates import consistency as cons
from aggpub.noise.sampler import make_random_source
from aggpub.pipeline import publish, release_tables
from aggpub.policy import parse_policy


# --------------------------------------------------------------------------- consistency: references


def test_isotonic_regression_matches_scipy_and_sklearn():
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(5)
    for _ in range(200):
        n = int(rng.integers(1, 40))
        y = np.cumsum(rng.normal(0.2, 1.0, n)) + rng.normal(0, 3, n)
        w = rng.uniform(0.1, 3.0, n)
        ours = cons.isotonic_regression(y, w)
        assert np.allclose(ours, scipy_isotonic(y, weights=w).x, atol=1e-9)
        sk = IsotonicRegression().fit_transform(np.arange(n), y, sample_weight=w)
        assert np.allclose(ours, sk, atol=1e-9)
        down = cons.isotonic_regression(y, w, increasing=False)
        assert np.allclose(down, scipy_isotonic(y, weights=w, increasing=False).x, atol=1e-9)
        assert np.all(np.diff(ours) >= -1e-12)


def test_clipped_isotonic_fit_is_the_bounded_fit():
    """min ||x - y||^2 s.t. x nondecreasing, lo <= x <= hi: clipping the isotonic fit solves it (SLSQP check)."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(11)
    for _ in range(25):
        n = int(rng.integers(2, 9))
        y = rng.normal(5, 6, n)
        lo, hi = 0.0, 8.0
        ours = np.clip(cons.isotonic_regression(y), lo, hi)
        sk = IsotonicRegression(y_min=lo, y_max=hi).fit_transform(np.arange(n), y)
        cons_ = [{"type": "ineq", "fun": (lambda x, i=i: x[i + 1] - x[i])} for i in range(n - 1)]
        res = minimize(lambda x: ((x - y) ** 2).sum(), np.full(n, 4.0), bounds=[(lo, hi)] * n,
                       constraints=cons_, method="SLSQP", options={"ftol": 1e-12, "maxiter": 500})
        assert ((ours - y) ** 2).sum() <= res.fun + 1e-6
        assert np.allclose(ours, res.x, atol=1e-4)
        assert np.allclose(ours, sk, atol=1e-9)


def test_simplex_projection_matches_a_generic_solver_and_kkt():
    rng = np.random.default_rng(2)
    for _ in range(40):
        b = int(rng.integers(1, 8))
        y = rng.normal(2, 5, b)
        t = float(rng.integers(0, 20))
        x = cons.project_to_simplex(y[None, :], [t])[0]
        assert x.min() >= 0 and x.sum() == pytest.approx(t, abs=1e-9)
        res = minimize(lambda z: ((z - y) ** 2).sum(), np.full(b, t / b), bounds=[(0, None)] * b,
                       constraints=[{"type": "eq", "fun": lambda z: z.sum() - t}], method="SLSQP",
                       options={"ftol": 1e-12, "maxiter": 500})
        assert np.allclose(x, res.x, atol=1e-4)
        if t > 0:  # KKT: x = max(y - theta, 0) with one theta; positive entries share y - x
            pos = x > 1e-12
            theta = (y - x)[pos]
            assert np.allclose(theta, theta[0])
            assert np.all(y[~pos] <= theta[0] + 1e-9)


def test_round_preserving_sum_is_a_closest_integer_point():
    rng = np.random.default_rng(8)
    for _ in range(60):
        b = int(rng.integers(1, 5))
        t = int(rng.integers(0, 7))
        x = cons.project_to_simplex(rng.normal(1, 3, (1, b)), [t])
        r = cons.round_preserving_sum(x, [t])[0]
        assert r.sum() == t and r.min() >= 0
        best = min(((np.array(c) - x[0]) ** 2).sum()
                   for c in itertools.product(range(t + 1), repeat=b) if sum(c) == t)
        assert ((r - x[0]) ** 2).sum() == pytest.approx(best, abs=1e-9)


@pytest.mark.parametrize("method", cons.HISTOGRAM_METHODS)
def test_consistent_histograms_are_nonnegative_integers_with_the_totals(method):
    rng = np.random.default_rng(4)
    noisy = rng.integers(-30, 60, (300, 11))
    totals = rng.integers(0, 200, 300)
    totals[:5] = 0
    h = cons.consistent_histograms(noisy, totals, method=method)
    assert h.dtype == np.int64 and h.shape == noisy.shape
    assert h.min() >= 0
    assert np.array_equal(h.sum(axis=1), totals)
    # already consistent input is left alone
    good = rng.multinomial(50, np.full(11, 1 / 11), size=20)
    assert np.array_equal(cons.consistent_histograms(good, good.sum(axis=1), method=method), good)


def test_cumulative_isotonic_histograms_are_the_isotonic_fit_of_cumulative_counts():
    rng = np.random.default_rng(9)
    noisy = rng.integers(-10, 30, (50, 7)).astype(float)
    totals = rng.integers(10, 80, 50)
    h = cons.cumulative_isotonic_histograms(noisy, totals)
    for i in range(50):
        fit = np.clip(scipy_isotonic(np.cumsum(noisy[i])[:-1]).x, 0, totals[i])
        assert np.array_equal(np.cumsum(h[i])[:-1], np.floor(fit + 0.5).astype(np.int64))


def test_simplex_consistency_reduces_error():
    """The post-processing is not only valid: on a realistic case it lowers the error (common practice)."""
    rng = np.random.default_rng(1)
    deg = rng.poisson(6, (400, 40))
    truth = np.stack([np.bincount(np.minimum(d, 20), minlength=21) for d in deg])
    from aggpub.noise.mechanisms import GeometricMechanism

    noisy = GeometricMechanism(1.0, 4.0).randomise(truth, make_random_source(3))
    fixed = cons.simplex_histograms(noisy, truth.sum(axis=1))
    assert ((fixed - truth) ** 2).mean() < 0.5 * ((noisy - truth) ** 2).mean()


# --------------------------------------------------------------------------- release functions


def test_degree_histogram_release_every_bin_and_consistent():
    truth = np.array([[3, 0, 2, 0], [0, 0, 0, 5]])
    table, spend, mech = released.release_degree_histograms(truth, truth.sum(axis=1), 1.0, 4.0,
                                                        make_random_source(1))
    assert table.num_rows == 8  # zeros included
    assert table.column("degree_bin").to_pylist() == [0, 1, 2, 3] * 2
    people = table.column("people").to_numpy().reshape(2, 4)
    assert np.array_equal(people.sum(axis=1), [5, 5]) and people.min() >= 0
    assert table.schema.field("people").type == pa.int64()
    assert table.schema.field("people_noisy").type == pa.int64()
    assert spend.name == "degree_histograms" and spend.sensitivity == 4 and spend.scale == 4.0


def test_weight_totals_release_every_cell_clamped():
    st = released.dense_truth(3, np.array([0, 1]), np.array([1, 2]), np.array([50, 7]))
    sizes = np.array([4, 1, 2])
    table, spend, _ = released.release_weight_totals(st, sizes, 10, 0.5, 10.0, make_random_source(2))
    assert table.num_rows == 6
    t = table.column("weight_total").to_numpy()
    cap = table.column("max_weight_total").to_numpy()
    assert np.array_equal(cap, 10 * cells.possible_pairs(sizes, st.a, st.b))
    assert (t >= 0).all() and (t <= cap).all() and t.dtype == np.int64
    assert cap[cells.cell_index(1, 1, 3)] == 0 and t[cells.cell_index(1, 1, 3)] == 0
    assert spend.scale == 20.0


def _weighted_inputs(seed=0, n=300):
    rng = np.random.default_rng(seed)
    people = pa.table({"node": [f"q{i}" for i in range(n)], "age": rng.choice(["y", "m", "o"], n),
                       "zone": rng.choice(["n", "s"], n)})
    u = rng.integers(0, n, 1500)
    v = rng.integers(0, n, 1500)
    keep = u != v
    edges = pa.table({"source": [f"q{i}" for i in u[keep]], "target": [f"q{i}" for i in v[keep]],
                      "minutes": rng.integers(0, 240, keep.sum())})
    return edges, people


def _policy(unit="edge", **components):
    pol = {"privacy": {"unit": unit, "epsilon": 3.0},
           "grouping": {"method": "attributes", "attributes": ["age", "zone"], "min_size": 20,
                        "hierarchies": {"age": {"levels": [{"y": "all", "m": "all", "o": "all"}]},
                                        "zone": {"levels": [{"n": "n", "s": "s"}]}}},
           "components": {"degree_histograms": {"enabled": True, "max_degree": 8},
                          "weight_totals": {"enabled": True, "column": "minutes", "clip": 60}}}
    if unit == "person":
        pol["privacy"]["max_contacts"] = 40
    for k, v in components.items():
        pol["components"].setdefault(k, {}).update(v)
    return pol


@pytest.mark.parametrize("unit", ["edge", "person"])
def test_all_components_release_and_bundle_check(unit, tmp_path):
    edges, people = _weighted_inputs()
    r = release_tables(edges, people, _policy(unit), seed=5)  # weight column comes from the policy
    m = r.manifest
    names = [c["name"] for c in m["components"]]
    # issue 13: a policy without shares releases a view of every grouping attribute by default; issue 12: under
    # unit edge degree sequences and the triangle count are on by default too (off under person)
    expected = ["superedge_counts", "degree_histograms", "weight_totals", "contact_views:age", "contact_views:zone"]
    assert names == (["supernode_sizes"] + expected if unit == "person"
                     else expected + ["degree_sequences", "triangle_count"])
    for c in m["components"]:
        assert set(c) == {"name", "epsilon", "sensitivity", "mechanism", "scale"}
        if c["name"] == "triangle_count":  # the ladder mechanism: rung score sensitivity 1, rung scale 2/epsilon
            assert c["mechanism"] == "ladder" and c["scale"] == pytest.approx(2 / c["epsilon"])
            continue
        assert c["mechanism"] == "discrete_laplace" and c["scale"] == pytest.approx(c["sensitivity"] / c["epsilon"])
        D = 40 if unit == "person" else None
        assert c["sensitivity"] == budget.sensitivity(unit, c["name"].split(":")[0], max_contacts=D, clip=60)
    total = sum(c["epsilon"] for c in m["components"])
    assert total <= m["epsilon_total"] and total == pytest.approx(m["epsilon_total"], rel=1e-12)
    assert m["epsilon_spent"] == pytest.approx(m["epsilon_total"], rel=1e-12)
    n = r.grouping.n_supernodes
    assert r.tables["degree_histograms"].num_rows == n * 9
    assert r.tables["weight_totals"].num_rows == n * (n + 1) // 2
    sizes = r.supernodes.column("size").to_numpy()
    dh = r.tables["degree_histograms"]
    assert np.array_equal(np.bincount(dh.column("supernode").to_numpy(), weights=dh.column("people").to_numpy(),
                                      minlength=n), sizes)
    res = check_bundle(publish(r, tmp_path / "b"))
    assert res.ok, res.problems
    assert any(c.startswith("degree histograms") for c in res.checked)
    assert any(c.startswith("weight totals") for c in res.checked)


def test_check_flags_broken_histograms_and_weight_totals():
    edges, people = _weighted_inputs(1)
    r = release_tables(edges, people, _policy(), seed=5)
    manifest = dict(r.manifest)
    tables = dict(r.tables)
    res = CheckResult(path=None)
    _check_invariants(manifest, tables, res)
    assert res.ok, res.problems
    dh = r.tables["degree_histograms"]
    people_col = dh.column("people").to_numpy().copy()
    people_col[0] += 1  # bins no longer add up to the size
    broken = dh.set_column(dh.schema.get_field_index("people"), "people", pa.array(people_col))
    res = CheckResult(path=None)
    _check_invariants(manifest, dict(tables, degree_histograms=broken.slice(1)), res)
    assert any("exactly once" in p for p in res.problems)
    res = CheckResult(path=None)
    _check_invariants(manifest, dict(tables, degree_histograms=broken), res)
    assert any("add up to its size" in p for p in res.problems)
    wt = r.tables["weight_totals"]
    res = CheckResult(path=None)
    _check_invariants(manifest, dict(tables, weight_totals=wt.slice(1)), res)  # a zero cell dropped
    assert any("weight_totals.parquet" in p for p in res.problems)


def test_check_refuses_exact_sizes_under_person():
    edges, people = _weighted_inputs(2)
    r = release_tables(edges, people, _policy("person"), seed=5)
    res = CheckResult(path=None)
    _check_invariants(dict(r.manifest, sizes_exact=True), r.tables, res)
    assert any("sizes_exact" in p for p in res.problems)


def test_weight_column_conflict_and_missing():
    edges, people = _weighted_inputs()
    with pytest.raises(PolicyError, match="weight_totals.column"):
        release_tables(edges, people, _policy(), seed=1, weight="other")
    bad = _policy()
    bad["components"]["weight_totals"]["column"] = "nope"
    from aggpub.errors import InputError

    with pytest.raises(InputError, match="nope"):
        release_tables(edges, people, bad, seed=1)


def test_edge_unit_refuses_a_sizes_share():
    pol = _policy()
    pol["components"]["supernode_sizes"] = {"share": 0.2}
    with pytest.raises(PolicyError, match="supernode_sizes.share"):
        parse_policy(pol)


def test_person_shares_split_across_four_components():
    from aggpub.policy import epsilon_shares

    p = parse_policy(_policy("person"))
    shares = epsilon_shares(p)
    # issue 13: the views are a fifth budgeted component by default
    assert set(shares) == {"supernode_sizes", "superedge_counts", "degree_histograms", "weight_totals",
                           "contact_views"}
    assert sum(shares.values()) <= 3.0 and math.isclose(sum(shares.values()), 3.0)
    p = parse_policy(_policy("person", superedge_counts={"share": 0.7}))
    shares = epsilon_shares(p)
    assert shares["superedge_counts"] == pytest.approx(2.1)
    assert shares["supernode_sizes"] == pytest.approx(0.3)


def test_bins_above_the_promised_cap_are_set_to_zero():
    """Under unit person no degree exceeds D (public), so bins above D are empty by post-processing."""
    truth = np.array([[1, 2, 3, 0, 0, 0], [0, 4, 0, 1, 0, 0]])
    sizes = truth.sum(axis=1)
    table, _, _ = released.release_degree_histograms(truth, sizes, 0.2, 7.0, make_random_source(4),
                                                 max_possible_degree=3)
    people = table.column("people").to_numpy().reshape(2, 6)
    assert (people[:, 4:] == 0).all() and np.array_equal(people.sum(axis=1), sizes)
    noisy = table.column("people_noisy").to_numpy().reshape(2, 6)
    assert (noisy[:, 4:] != 0).any()  # the raw noisy values are kept as drawn


def test_run_release_reads_the_weight_column_named_by_the_policy(tmp_path):
    """The CLI path: no [input] weight and no --weight-column, yet weight totals get their column."""
    import pyarrow.csv as pacsv

    from aggpub.bundle.read import read_bundle
    from aggpub.pipeline import run_release

    edges, people = _weighted_inputs(3)
    pacsv.write_csv(edges, tmp_path / "contacts.csv")
    pacsv.write_csv(people, tmp_path / "people.csv")
    (tmp_path / "policy.toml").write_text("""
[privacy]
unit = "edge"
epsilon = 1.0
[grouping]
method = "attributes"
attributes = ["age", "zone"]
min_size = 20
[components.superedge_counts]
enabled = false
[components.weight_totals]
enabled = true
column = "minutes"
clip = 30
""")
    release, path = run_release(tmp_path / "policy.toml", tmp_path / "contacts.csv", tmp_path / "people.csv",
                                tmp_path / "out", seed=2)
    # issue 13: plus a view of each grouping attribute (the policy sets no share); issue 12: degree sequences and
    # the triangle count are on by default under unit edge
    assert [c["name"] for c in release.manifest["components"]] == ["weight_totals", "contact_views:age",
                                                                    "contact_views:zone", "degree_sequences",
                                                                    "triangle_count"]
    assert release.manifest["components"][0]["sensitivity"] == 30
    assert release.truth["weight_totals"].count.sum() > 0
    bundle = read_bundle(path)
    assert "weight_totals" in bundle.tables and check_bundle(path).ok


def test_share_of_a_disabled_component_is_refused():
    pol = _policy()
    pol["components"]["weight_totals"] = {"enabled": False, "share": 0.3}
    with pytest.raises(PolicyError, match="weight_totals.share' is set but the component is not enabled"):
        parse_policy(pol)
