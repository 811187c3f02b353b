"""The free pre-flight: ``aggpub plan`` and the check ``aggpub release`` makes before drawing any noise.

What is checked: no noise is drawn (every random source refuses to be used), nothing is charged or
written, nothing private is read (under unit ``person`` the person file is not opened; under ``edge``
the edge file is not), the grid, the exit codes, and that a release expected to fail is refused before
its ledger is charged. The prediction itself is checked against the released-value figures of
:mod:`aggpub.gate.released`, computed on the stand-in it builds (same code path, different inputs).
"""

from __future__ import annotations

import json
import sqlite3

import pytest

from aggpub.cli import main
from aggpub.demo import write_demo_inputs
from aggpub.noise import sampler
from tests._badinput import tree_snapshot


@pytest.fixture(scope="module")
def town(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("plan-town"), n_people=3000)


@pytest.fixture
def no_noise(monkeypatch):
    """Any attempt to draw randomness fails the test."""
    def refuse(*a, **k):
        raise AssertionError("the pre-flight drew random numbers")

    for cls in (sampler.SystemRandomSource, sampler.SeededRandomSource):
        monkeypatch.setattr(cls, "uniform", refuse)
        monkeypatch.setattr(cls, "random_bytes", refuse)


def _policy(town, tmp_path, extra: str):
    text = open(town["policy"], encoding="utf-8").read() + "\n" + extra + "\n"
    path = tmp_path / "policy.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_plan_reads_no_edges_draws_no_noise_and_writes_nothing(town, tmp_path, capsys, no_noise):
    # 0.75 (was 0.5): issue 12's default split gives the superedge counts 2/7 of epsilon beside the views and the
    # degree sequences, so epsilon 0.5 with min_size 20 predicts about 0.59 on this 3,000-person town
    policy = _policy(town, tmp_path, "[gate]\nmax_contact_matrix_median_relative_error = 0.75\n"
                                     "[assumptions]\ncontacts_per_person = 11.0\n")
    before = tree_snapshot(tmp_path)
    code = main(["plan", "--policy", str(policy), "--nodes", str(town["people"]), "--edges",
                 str(tmp_path / "no-such-edge-file.csv"), "--epsilons", "0.5,1,2", "--min-sizes", "20,40",
                 "--quiet"])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "no noise drawn, nothing charged, nothing private read" in out
    assert out.count("expected to pass") == 6  # the grid: 3 epsilons x 2 minimum sizes
    assert tree_snapshot(tmp_path) == before


def test_plan_exit_6_when_no_setting_is_expected_to_pass(town, tmp_path, capsys, no_noise):
    policy = _policy(town, tmp_path, "[gate]\nmax_contact_matrix_median_relative_error = 0.0\n"
                                     "[assumptions]\ncontacts_per_person = 11.0\n")
    assert main(["plan", "--policy", str(policy), "--nodes", str(town["people"]), "--quiet"]) == 6
    assert "expected to fail" in capsys.readouterr().out


def test_plan_without_assumptions_says_what_it_cannot_predict(town, tmp_path, capsys, no_noise):
    policy = _policy(town, tmp_path, "[gate]\nmax_degree_ks = 0.0\n")
    assert main(["plan", "--policy", str(policy), "--nodes", str(town["people"]), "--json", "--quiet"]) == 0
    plan = json.loads(capsys.readouterr().out)
    assert plan["rows"][0]["verdict"] == "not predicted"
    assert any("assumptions.contacts_per_person" in n for n in plan["notes"])


def test_person_unit_plan_reads_only_the_policy(town, tmp_path, capsys, no_noise):
    hier = open(town["policy"], encoding="utf-8").read()
    text = hier.replace('unit = "edge"', 'unit = "person"\nmax_contacts = 60') + \
        "\n[assumptions]\npeople = 3000\ncontacts_per_person = 11.0\n"
    policy = tmp_path / "person.toml"
    policy.write_text(text, encoding="utf-8")
    garbage = tmp_path / "people.csv"
    garbage.write_bytes(b"\xff\xfe not a person file \x00\x01")
    assert main(["plan", "--policy", str(policy), "--nodes", str(garbage), "--json", "--quiet"]) == 0
    plan = json.loads(capsys.readouterr().out)
    assert plan["unit"] == "person" and plan["rows"][0]["supernodes"]["people"] == 3000
    assert any("was not read" in n for n in plan["notes"])


def test_release_refuses_before_the_noise_and_charges_nothing(town, tmp_path, capsys, no_noise):
    policy = _policy(town, tmp_path, '[ledger]\npath = "town.ledger"\ndataset = "plan-town"\n'
                                     "lifetime_epsilon = 5.0\n"
                                     "[gate]\nmax_contact_matrix_median_relative_error = 0.0\n"
                                     "[assumptions]\ncontacts_per_person = 11.0\n")
    out = tmp_path / "bundle"
    code = main(["release", "--policy", str(policy), "--edges", str(town["edges"]), "--nodes",
                 str(town["people"]), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 6, err
    assert "predicted before any noise" in err and "nothing was charged" in err
    assert not out.exists() and not (tmp_path / "bundle.report").exists()
    ledger = tmp_path / "town.ledger"
    if ledger.exists():
        with sqlite3.connect(ledger) as con:
            assert con.execute("SELECT count(*) FROM spends").fetchone()[0] == 0


def test_predicted_figures_are_the_released_value_figures_of_the_stand_in(town):
    """One definition of each figure: the prediction is released_metrics on the stand-in release."""
    import aggpub
    from aggpub.gate.predicted import predicted_metrics, stand_in_release
    from aggpub.gate.released import released_metrics
    from aggpub.ingest import load_people

    policy = aggpub.read_policy(town["policy"]).replace(
        assumptions=aggpub.policy.AssumptionsPolicy(contacts_per_person=11.0))
    people = load_people(town["people"], attributes=list(policy.grouping.attributes))
    stand = stand_in_release(policy, people)
    direct = released_metrics(stand.tables, stand.manifest, policy)
    pred = predicted_metrics(policy, people)
    for k in ("superedge_median_relative_error", "contact_matrix_median_relative_error", "degree_ks"):
        assert pred[k] == pytest.approx(direct[k])
    # the stand-in spreads 11 contacts per person over the possible pairs, in proportion
    total = sum(stand.tables["superedges"].column("edge_count").to_pylist())
    assert total == pytest.approx(11.0 * people.num_rows / 2, rel=0.01)
