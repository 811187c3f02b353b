"""Every bundle is accounted (issue 11.6): the Python route charges the lifetime ledger like the command,
a release that is not charged says so in its manifest and ``aggpub check`` prints it, and renaming a
dataset id does not start a fresh budget for the same people."""

from __future__ import annotations

import sqlite3

import networkx as nx
import pytest

import aggpub
from aggpub.cli import main
from aggpub.errors import BudgetError
from tests.conftest import graph_tables, simple_policy


@pytest.fixture
def karate(tmp_path):
    G = nx.karate_club_graph()  # Zachary (1977), as networkx ships it
    edges, people = graph_tables(G, {"club": {n: G.nodes[n]["club"] for n in G}})
    return edges, people


def _policy(tmp_path, dataset="karate-2026", cap=2.0):
    return simple_policy(["club"], min_size=5, ledger={"path": str(tmp_path / "karate.ledger"),
                                                        "dataset": dataset, "lifetime_epsilon": cap})


def _rows(tmp_path):
    with sqlite3.connect(tmp_path / "karate.ledger") as con:
        return con.execute("SELECT dataset, epsilon, status, privacy_unit FROM spends ORDER BY id").fetchall()


def test_the_python_route_charges_the_policys_ledger(tmp_path, karate):
    edges, people = karate
    rel = aggpub.release_tables(edges, people, _policy(tmp_path), seed=1)
    assert rel.manifest["accounting"] == {"charged": True, "dataset": "karate-2026"}
    assert rel.manifest["ledger"]["spent_after"] == pytest.approx(1.0)
    assert _rows(tmp_path) == [("karate-2026", 1.0, "published", "edge")]
    aggpub.release_tables(edges, people, _policy(tmp_path), seed=2)
    with pytest.raises(BudgetError, match="only 0 is left"):  # the cap of 2 is spent
        aggpub.release_tables(edges, people, _policy(tmp_path), seed=3)


def test_an_uncharged_release_says_so_and_check_prints_it(tmp_path, karate, capsys):
    edges, people = karate
    rel = aggpub.release_tables(edges, people, _policy(tmp_path), seed=1, charge_ledger=False)
    assert rel.manifest["accounting"]["charged"] is False
    assert "charge_ledger=False" in rel.manifest["accounting"]["why"]
    assert not (tmp_path / "karate.ledger").exists() or _rows(tmp_path) == []
    path = aggpub.publish(rel, tmp_path / "bundle")
    assert main(["check", str(path)]) == 0
    assert "not charged to a lifetime ledger" in capsys.readouterr().err
    no_ledger = aggpub.release_tables(edges, people, simple_policy(["club"], min_size=5), seed=1)
    assert no_ledger.manifest["accounting"] == {"charged": False, "why": "the policy has no [ledger] section"}


def test_a_renamed_dataset_keeps_its_budget_unless_declared_new(tmp_path, karate, capsys):
    import pyarrow.csv as pacsv

    edges, people = karate
    pacsv.write_csv(edges, tmp_path / "contacts.csv")
    pacsv.write_csv(people, tmp_path / "people.csv")

    def release(dataset, out, *extra):
        text = f'''[privacy]
unit = "edge"
epsilon = 1.0
[grouping]
method = "attributes"
attributes = ["club"]
min_size = 5
[ledger]
path = "karate.ledger"
dataset = "{dataset}"
lifetime_epsilon = 2.0
'''
        (tmp_path / "policy.toml").write_text(text, encoding="utf-8")
        return main(["release", "--policy", str(tmp_path / "policy.toml"), "--edges", str(tmp_path / "contacts.csv"),
                     "--nodes", str(tmp_path / "people.csv"), "--out", str(tmp_path / out), "--quiet", *extra])

    assert release("karate-2026", "b1") == 0
    assert release("karate-renamed", "b2") == 5  # the same people under a new name: refused
    err = capsys.readouterr().err
    assert "karate-2026" in err and "--new-dataset" in err
    assert release("karate-wave-2", "b3", "--new-dataset") == 0  # declared new: charged to its own budget
    assert [r[0] for r in _rows(tmp_path)] == ["karate-2026", "karate-wave-2"]
