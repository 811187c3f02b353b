"""Under unit ``person`` no refusal, message or progress line carries an exact private figure.

Distinctive counts are planted in the data (people over the contact cap, people with a value outside the
declared domain, edge rows naming unknown people, rows with a missing id, a population smaller than the
policy's ``min_size``) and every line the command prints is searched for them. Refusals on the person
unit's promises (the cap, the domains) are charged to the lifetime ledger like a release.
"""

from __future__ import annotations

import re
import sqlite3

import pytest

from aggpub.cli import main

PLANTED = {"over_cap": 41, "outside_domain": 73, "unknown_rows": 137, "missing_ids": 53}
N = 600


def _write(tmp_path, *, over_cap=0, outside=0, unknown=0, missing=0, people=N, min_size=10):
    ages = ["young", "mid", "old"]
    rows = ["node,age"]
    for i in range(people):
        age = "elsewhere" if i < outside else ages[i % 3]
        rows.append(f"p{i},{age}")
    rows += [f",{ages[i % 3]}" for i in range(missing)]
    (tmp_path / "people.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    edges = ["source,target"]
    for i in range(people):  # a ring: everyone has two contacts
        edges.append(f"p{i},p{(i + 1) % people}")
    for i in range(over_cap):  # each of the first over_cap people gets 5 more contacts
        edges += [f"p{i},p{(i + 7 + 11 * j) % people}" for j in range(5)]
    edges += [f"p{i % people},ghost{i}" for i in range(unknown)]
    (tmp_path / "contacts.csv").write_text("\n".join(edges) + "\n", encoding="utf-8")
    (tmp_path / "policy.toml").write_text(f"""
[privacy]
unit = "person"
epsilon = 1.0
max_contacts = 4

[grouping]
method = "attributes"
attributes = ["age"]
min_size = {min_size}

[grouping.hierarchies.age]
levels = [ {{ "young" = "young", "mid" = "mid", "old" = "old" }} ]

[ledger]
path = "people.ledger"
dataset = "planted-town"
lifetime_epsilon = 10.0
""", encoding="utf-8")


def _release(tmp_path, capsys):
    code = main(["release", "--policy", str(tmp_path / "policy.toml"), "--edges", str(tmp_path / "contacts.csv"),
                 "--nodes", str(tmp_path / "people.csv"), "--out", str(tmp_path / "bundle")])
    cap = capsys.readouterr()
    # the folder's name holds pytest's run number (pytest-41/...), which is no figure of the data
    return code, (cap.out + cap.err).replace(str(tmp_path), "<tmp>")


def _spends(tmp_path):
    path = tmp_path / "people.ledger"
    if not path.exists():
        return []
    with sqlite3.connect(path) as con:
        return con.execute("SELECT epsilon, status FROM spends").fetchall()


def _no_planted_figure(text):
    numbers = set(re.findall(r"\d[\d,]*", text))
    for n in PLANTED.values():
        assert str(n) not in {x.replace(",", "") for x in numbers}, (n, text)
    assert str(N) not in {x.replace(",", "") for x in numbers}  # not even the population


@pytest.mark.parametrize("case", ["over_cap", "outside_domain"])
def test_a_broken_promise_is_refused_without_figures_and_charged(tmp_path, capsys, case):
    _write(tmp_path, over_cap=PLANTED["over_cap"] if case == "over_cap" else 0,
           outside=PLANTED["outside_domain"] if case == "outside_domain" else 0)
    code, text = _release(tmp_path, capsys)
    assert code in (4, 5) and not (tmp_path / "bundle").exists()
    _no_planted_figure(text)
    assert "public" in text and "charged" in text
    assert _spends(tmp_path) == [(1.0, "failed")]  # probing the promise costs the release's epsilon


@pytest.mark.parametrize("case", ["unknown_rows", "missing_ids"])
def test_input_refusals_count_nothing_under_unit_person(tmp_path, capsys, case):
    _write(tmp_path, unknown=PLANTED["unknown_rows"] if case == "unknown_rows" else 0,
           missing=PLANTED["missing_ids"] if case == "missing_ids" else 0)
    code, text = _release(tmp_path, capsys)
    assert code == 3 and "some" in text
    _no_planted_figure(text)


def test_a_population_below_min_size_is_judged_on_noisy_counts(tmp_path, capsys):
    _write(tmp_path, people=7, min_size=50)
    code, text = _release(tmp_path, capsys)
    assert code == 5 and "noisy cell counts" in text
    assert not re.search(r"\b7\b", text.replace("0.7", ""))
    assert _spends(tmp_path) == [(1.0, "failed")]  # the decision read paid noisy counts: charged


def test_a_successful_person_release_prints_no_private_count(tmp_path, capsys):
    _write(tmp_path)
    code, text = _release(tmp_path, capsys)
    assert code == 0, text
    _no_planted_figure(text)
    assert "withheld" in text
