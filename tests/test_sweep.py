"""Tests for the trade-off explorer (:mod:`aggpub.sweep`, ``aggpub sweep``) on a small demo town.

Outside references: separate releases audited by the auditor (``aggpub.audit.audit_release``,
another engineer's code path) for agreement within sampling error; ``scipy.stats.dlaplace``
for the discrete Laplace law behind the analytic curves; matplotlib's PNG reader and the
standard ``csv`` module for the written files.
"""

from __future__ import annotations

import csv
import dataclasses
import math
import tomllib

import matplotlib.image as mpimg
import numpy as np
import pytest
from scipy import stats

import aggpub
from aggpub import sweep as S
from aggpub.audit import audit_release
from aggpub.cli import main
from aggpub.demo import demo_policy_text, generate_town, write_demo_inputs
from aggpub.ingest import load_network
from aggpub.pipeline import build_release


@pytest.fixture(scope="module")
def town():
    edges, people = generate_town(3000, seed=11)
    data = tomllib.loads(demo_policy_text())
    # the sweep simulates the superedge counts and histograms; the demo's default contact views (issue 13) are
    # switched off so that these figures keep their whole epsilon, as before views existed
    data.setdefault("components", {})["contact_views"] = {"enabled": False}
    policy = aggpub.parse_policy(data)
    network = load_network(edges, people, attributes=["age_band", "neighbourhood"])
    return policy, network


def with_gate(policy, **thresholds):
    return policy.replace(gate=dataclasses.replace(policy.gate, **thresholds))


@pytest.fixture(scope="module")
def small_sweep(town):
    policy, network = town
    return S.run_sweep(policy, network=network, epsilons=[0.5, 1, 2], min_sizes=[20, 40], draws=3, seed=4)


# --------------------------------------------------------------------------- the grid


def test_grid_rows_and_truth_counted_once_per_grouping(town, monkeypatch):
    policy, network = town
    calls = []
    real = network.engine.superedge_counts
    monkeypatch.setattr(network.engine, "superedge_counts", lambda a: calls.append(1) or real(a))
    res = S.run_sweep(policy, network=network, epsilons=[0.5, 1, 2, 4], min_sizes=[20, 40], draws=2, seed=1)
    assert len(res.rows) == 8
    assert {(r["min_size"], r["epsilon"]) for r in res.rows} == {(k, e) for k in (20, 40) for e in (0.5, 1, 2, 4)}
    assert len(calls) == 2 and res.timings["groupings"] == 2  # edge unit, public grouping: once per min_size
    for r in res.rows:
        # edge unit, sensitivity 1; issue 12: the default split gives superedge counts 0.4 of epsilon
        assert r["noise_scale"] == pytest.approx(1.0 / (0.4 * r["epsilon"]))
        assert r["draws"] == 2


def test_errors_fall_with_epsilon(small_sweep):
    for k in (20, 40):
        rs = sorted((r for r in small_sweep.rows if r["min_size"] == k), key=lambda r: r["epsilon"])
        for col in ("superedge_mean_absolute_error", "expected_superedge_mean_absolute_error",
                    "expected_contact_matrix_median_relative_error"):
            vals = [r[col] for r in rs]
            assert vals == sorted(vals, reverse=True), col


def test_expected_abs_error_formula_matches_scipy_dlaplace(small_sweep):
    """E|Z| = 2a/(1-a^2) for the discrete Laplace law (from its pmf; Ghosh, Roughgarden,
    Sundararajan, STOC 2009), against scipy.stats.dlaplace with a = 1/scale."""
    for r in small_sweep.rows:
        ref = stats.dlaplace(1.0 / r["noise_scale"]).expect(abs)
        assert r["expected_superedge_mean_absolute_error"] == pytest.approx(ref, rel=1e-8)


@pytest.mark.parametrize("true,cap,scale", [(0, 10**6, 1.0), (2, 10**6, 2.0), (50, 52, 1.5), (0, 3, 4.0),
                                            (500, 10**6, 1.0)])
def test_clamped_error_moments_match_scipy(true, cap, scale):
    """Moments of clip(T + Z, 0, cap) - T against scipy.stats.dlaplace expectations."""
    m, v, a = S._clamped_error_moments(scale, np.array([true]), np.array([cap]))
    law = stats.dlaplace(1.0 / scale)
    err = lambda z: np.clip(z, -true, cap - true)  # noqa: E731
    ref_m = law.expect(err, lb=-2000, ub=2000)
    ref_2 = law.expect(lambda z: err(z) ** 2, lb=-2000, ub=2000)
    ref_a = law.expect(lambda z: np.abs(err(z)), lb=-2000, ub=2000)
    assert m[0] == pytest.approx(ref_m, abs=1e-9)
    assert v[0] == pytest.approx(ref_2 - ref_m ** 2, rel=1e-7, abs=1e-9)
    assert a[0] == pytest.approx(ref_a, rel=1e-8)


def test_analytic_clamped_curve_tracks_the_draws(town, small_sweep):
    """The exact expectation lies within four standard errors of the mean over the draws.

    The standard error comes from the exact law too: per cell, the variance of |clip(T + Z, 0, cap) - T|
    is E[e^2] - E|e|^2 (``_clamped_error_moments``), and the draws average over every cell.
    """
    from aggpub.grouping import make_grouping
    from aggpub.released import dense_truth, released_sizes
    from aggpub.cells import possible_pairs

    policy, network = town
    for r in small_sweep.rows:
        pol = S._policy_at(policy, "edge", r["epsilon"], r["min_size"], None)
        g = make_grouping(network, pol, None, None, {})
        st = dense_truth(g.n_supernodes, *network.engine.superedge_counts(g.assignment))
        cap = possible_pairs(released_sizes(g), st.a, st.b)
        mean, var, absm = S._clamped_error_moments(r["noise_scale"], st.count, cap)
        per_cell_var = var + mean ** 2 - absm ** 2
        se = math.sqrt(per_cell_var.sum()) / len(st.count) / math.sqrt(r["draws"])
        assert absm.mean() == pytest.approx(r["expected_superedge_mean_absolute_error_clamped"])
        assert abs(r["expected_superedge_mean_absolute_error_clamped"] - r["superedge_mean_absolute_error"]) \
            <= 4 * se


@pytest.mark.parametrize("histograms", [False, True])
def test_sweep_agrees_with_separate_releases(town, histograms):
    """The sweep's figures at (epsilon 1, min_size 20) match audited separate releases within sampling error.

    With degree histograms released, the degree figures come from the noisy histograms (as the audit does).
    """
    policy, network = town
    if histograms:
        comps = policy.components
        policy = policy.replace(components=dataclasses.replace(
            comps, degree_histograms=dataclasses.replace(comps.degree_histograms, enabled=True, max_degree=30)))
    res = S.run_sweep(policy, network=network, epsilons=[1.0], min_sizes=[20], draws=6, seed=2)
    row = res.rows[0]
    assert row["degree_basis"] == ("histograms" if histograms else "block_model")
    # issue 12: degree sequences and the triangle count share the budget by default (weights 2, 2, 1)
    assert row["superedge_epsilon"] == pytest.approx(2 / 7 if histograms else 0.4)
    pol = S._policy_at(policy, "edge", 1.0, 20, None)
    figs = {"contact_matrix_median_relative_error": [], "degree_ks": [], "degree_wasserstein1": [],
            "superedge_mean_absolute_error": []}
    for seed in range(6):
        release = build_release(network, pol, seed=100 + seed)
        audit = audit_release(release, monte_carlo=0, structure_samples=0, seed=seed)
        assert release.supernodes.num_rows == row["supernodes"]
        figs["contact_matrix_median_relative_error"].append(audit["queries"]["contact_matrix:age_band"]
                                                            ["median_relative_error"])
        figs["degree_ks"].append(audit["degree_distribution"]["ks"])
        figs["degree_wasserstein1"].append(audit["degree_distribution"]["wasserstein1"])
        figs["superedge_mean_absolute_error"].append(audit["queries"]["superedge_cells"]["mean_absolute_error"])
    for k, vals in figs.items():
        vals = np.asarray(vals)
        sd = max(vals.std(ddof=1), 1e-3 * abs(vals.mean()))
        # both are means of 6 independent draws of the same law: difference sd ~ sd * sqrt(2/6)
        assert abs(row[k] - vals.mean()) < 4 * sd * math.sqrt(2 / 6), (k, row[k], vals)


# --------------------------------------------------------------------------- gate and cheapest setting


def test_cheapest_setting_is_smallest_passing_epsilon(town):
    policy, network = town
    probe = S.run_sweep(policy, network=network, epsilons=[0.5, 1, 2, 4], min_sizes=[20], draws=2, seed=3)
    by_eps = {r["epsilon"]: r["contact_matrix_median_relative_error"] for r in probe.rows}
    limit = (by_eps[1] + by_eps[2]) / 2  # between the errors at epsilon 1 and 2: 2 and 4 pass
    gated = with_gate(policy, max_contact_matrix_median_relative_error=limit)
    res = S.run_sweep(gated, network=network, epsilons=[0.5, 1, 2, 4], min_sizes=[20], draws=2, seed=3)
    assert res.cheapest is not None and res.cheapest["epsilon"] == 2
    for r in res.rows:
        assert r["gate_passed"] == (r["contact_matrix_median_relative_error"] <= limit)
        if not r["gate_passed"]:
            assert r["gate_failed"] == "max_contact_matrix_median_relative_error"


def test_impossible_threshold_has_no_cheapest(town):
    policy, network = town
    res = S.run_sweep(with_gate(policy, max_degree_ks=0.0), network=network, epsilons=[1, 8], min_sizes=[20],
                      draws=1, seed=0)
    assert res.cheapest is None
    assert all(not r["gate_passed"] and "max_degree_ks" in r["gate_failed"] for r in res.rows)


def test_person_unit_needs_cap_and_uses_its_sensitivity(town):
    policy, network = town
    with pytest.raises(aggpub.PolicyError, match="max_contacts"):
        S.run_sweep(policy, network=network, epsilons=[1], min_sizes=[20], units=["person"])
    cap = int(network.engine.degrees(network.n_people).max())
    res = S.run_sweep(policy, network=network, epsilons=[1, 4], min_sizes=[40], units=["edge", "person"],
                      max_contacts=cap, draws=1, seed=5)
    person = [r for r in res.rows if r["unit"] == "person"]
    assert len(person) == 2
    for r in person:  # sensitivity D; the sizes take their share of epsilon
        assert r["superedge_epsilon"] < r["epsilon"]
        assert r["noise_scale"] == pytest.approx(cap / r["superedge_epsilon"])
    # the person grouping is noisy: counted once per (min_size, epsilon); edge once per min_size
    assert res.timings["groupings"] == 1 + 2
    with pytest.raises(aggpub.PrivacyError, match="max_contacts"):
        S.run_sweep(policy, network=network, epsilons=[1], min_sizes=[40], units=["person"], max_contacts=2)


# --------------------------------------------------------------------------- files and command line


def test_write_sweep_files_and_overwrite_rules(small_sweep, tmp_path):
    out = S.write_sweep(small_sweep, tmp_path / "sw")
    names = sorted(p.name for p in out.iterdir())
    assert names == ["README.txt", "errors_vs_epsilon.png", "sweep.csv", "sweep.json"]
    readme = (out / "README.txt").read_text()
    assert "INTERNAL PLANNING AID" in readme and "data-dependent step" in readme and "fresh noise" in readme
    with open(out / "sweep.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(small_sweep.rows)
    assert float(rows[0]["epsilon"]) == small_sweep.rows[0]["epsilon"]
    img = mpimg.imread(out / "errors_vs_epsilon.png")
    assert img.ndim == 3 and img.shape[0] > 300 and img.std() > 0.01  # a real picture, not blank
    with pytest.raises(aggpub.OutputError, match="already exists"):
        S.write_sweep(small_sweep, out)
    S.write_sweep(small_sweep, out, overwrite=True)
    other = tmp_path / "other"
    other.mkdir()
    (other / "keep.txt").write_text("x")
    with pytest.raises(aggpub.OutputError, match="not a sweep folder"):
        S.write_sweep(small_sweep, other, overwrite=True)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]


def test_parse_grid():
    assert S.parse_grid("2, 0.5,1,1", float, "--epsilons") == [0.5, 1.0, 2.0]
    assert S.parse_grid("20,10", int, "--min-sizes") == [10, 20]
    for bad, kind in (("0,1", float), ("x", float), ("0", int), ("nobody", str), ("", float)):
        with pytest.raises(aggpub.UsageError):
            S.parse_grid(bad, kind, "--opt")


def test_cli_sweep(tmp_path, capsys):
    paths = write_demo_inputs(tmp_path / "in", n_people=3000)
    out = tmp_path / "sweep"
    args = ["sweep", "--policy", str(paths["policy"]), "--edges", str(paths["edges"]), "--nodes",
            str(paths["people"]), "--epsilons", "0.5,2", "--min-sizes", "20", "--draws", "1", "--out", str(out),
            "--seed", "1"]
    assert main(args) == 0
    cap = capsys.readouterr()
    assert "INTERNAL PLANNING AID" in cap.out and "cheapest setting" in cap.out
    assert "min_size 20, epsilon 0.5" in cap.err  # progress on stderr
    assert (out / "sweep.csv").is_file() and not (out / "manifest.json").exists()
    assert main(args) == 7  # refuses to overwrite
    assert "already exists" in capsys.readouterr().err
    assert main(args + ["--overwrite", "--quiet"]) == 0
    assert capsys.readouterr().err == ""
    assert main(args[:-2] + ["--units", "person", "--overwrite"]) == 4  # no max_contacts: policy error
    assert main(args[:8] + ["0,1"] + args[9:]) == 2


def test_sweep_charges_no_ledger(town, tmp_path):
    from aggpub.policy import LedgerPolicy

    policy, network = town
    ledger = tmp_path / "ledger.sqlite"
    pol = policy.replace(ledger=LedgerPolicy(path=ledger, dataset="quennet-vale", lifetime_epsilon=1.0))
    res = S.run_sweep(pol, network=network, epsilons=[0.5, 2], min_sizes=[20], draws=1, seed=0)
    assert len(res.rows) == 2  # epsilon 2 exceeds the lifetime budget, yet nothing is charged or refused
    assert not ledger.exists() and list(tmp_path.iterdir()) == []
