"""Strict release policies: unknown keys, wrong types and out-of-range values name the key."""

from __future__ import annotations

import math
import warnings

import pytest

from aggpub.errors import InputError, PolicyError
from aggpub.policy import epsilon_shares, parse_policy, read_policy

BASE = """
[privacy]
unit = "edge"
epsilon = 1.0
[grouping]
method = "attributes"
attributes = ["age_band", "district"]
min_size = 20
"""


def write(tmp_path, text):
    p = tmp_path / "policy.toml"
    p.write_text(text)
    return p


def test_minimal_policy(tmp_path):
    p = read_policy(write(tmp_path, BASE))
    assert p.privacy.unit == "edge" and p.privacy.epsilon == 1.0
    assert p.grouping.attributes == ("age_band", "district")
    assert p.grouping.merge_order == ("district", "age_band")
    assert epsilon_shares(p) == {"superedge_counts": 1.0}


@pytest.mark.parametrize("text, key", [
    (BASE.replace("epsilon = 1.0", "epsilom = 1.0"), "did you mean 'epsilon'"),
    (BASE + "\n[grouping.hierarchies.age_band]\nlevel = []\n", "did you mean 'levels'"),
    (BASE.replace("min_size = 20", "minsize = 20"), "did you mean 'min_size'"),
    (BASE + "\n[gates]\n", "did you mean 'gate'"),
])
def test_unknown_key_suggests_closest(tmp_path, text, key):
    with pytest.raises(PolicyError, match=key):
        read_policy(write(tmp_path, text))


@pytest.mark.parametrize("value, message", [
    ("0", "privacy.epsilon' must be a finite number > 0"),
    ("-1.0", "privacy.epsilon' must be a finite number > 0"),
    ("nan", "privacy.epsilon' must be a finite number > 0"),
    ("inf", "privacy.epsilon' must be a finite number > 0"),
    ('"1.0"', "privacy.epsilon' must be a number, got a string"),
    ("true", "privacy.epsilon' must be a number, got a boolean"),
])
def test_bad_epsilon(tmp_path, value, message):
    with pytest.raises(PolicyError, match=message.replace("(", r"\(")):
        read_policy(write(tmp_path, BASE.replace("epsilon = 1.0", f"epsilon = {value}")))


def test_epsilon_above_ten_warns(tmp_path):
    with warnings.catch_warnings(record=True) as w:
        warnings.simplefilter("always")
        read_policy(write(tmp_path, BASE.replace("epsilon = 1.0", "epsilon = 12")))
    assert any("above 10" in str(x.message) for x in w)


@pytest.mark.parametrize("text, message", [
    (BASE.replace("min_size = 20", "min_size = 0"), "grouping.min_size' must be >= 1"),
    (BASE.replace("min_size = 20", "min_size = 2.5"), "grouping.min_size' must be an integer"),
    (BASE.replace('unit = "edge"', 'unit = "node"'), "privacy.unit' must be one of"),
    (BASE.replace('unit = "edge"', 'unit = "person"'), "privacy.max_contacts"),
    (BASE.replace('attributes = ["age_band", "district"]', "attributes = []"), "at least one attribute"),
    (BASE.replace('attributes = ["age_band", "district"]', 'attributes = "age_band"'), "list of strings"),
    (BASE.replace("[privacy]", "[privacy_]"), "unknown key 'privacy_'"),
    ("[grouping]\nattributes=['a']\nmin_size=3\n", "missing section \\[privacy\\]"),
    (BASE + '\n[grouping.hierarchies.age_band]\nlevels = [{ "0-4" = 5 }]\n', "must map to a string"),
    (BASE + '\n[grouping.hierarchies.district]\nlevels = [{ "d1" = "z1" }, { "zz" = "all" }]\n',
     "does not cover 1 value"),
    (BASE + '\n[grouping.hierarchies.zone]\nlevels = [{ "d1" = "z1" }]\n', "unknown key 'grouping.hierarchies.zone'"),
    (BASE.replace("min_size = 20", 'min_size = 20\nmerge_order = ["age"]'), "did you mean 'age_band'"),
    (BASE + "\n[ledger]\npath = 'x.ledger'\ndataset = 'd'\nlifetime_epsilon = 0\n",
     "ledger.lifetime_epsilon' must be a finite number > 0"),
])
def test_bad_values_name_the_key(tmp_path, text, message):
    with pytest.raises(PolicyError, match=message):
        read_policy(write(tmp_path, text))


def test_toml_syntax_error_names_the_file(tmp_path):
    p = write(tmp_path, BASE + "\n[broken\n")
    with pytest.raises(PolicyError, match="TOML syntax error"):
        read_policy(p)


def test_missing_policy_file(tmp_path):
    with pytest.raises(InputError, match="policy file not found"):
        read_policy(tmp_path / "nope.toml")


def test_ledger_path_relative_to_policy_file(tmp_path):
    p = read_policy(write(tmp_path, BASE + "\n[ledger]\npath = 'town.ledger'\ndataset = 'd'\nlifetime_epsilon = 3\n"))
    assert p.ledger.path == tmp_path / "town.ledger"


def test_shares_add_up_to_total_exactly():
    for eps in (0.1, 0.3, 1.0, 2.7, 7.0):
        policy = parse_policy({
            "privacy": {"unit": "edge", "epsilon": eps},
            "grouping": {"attributes": ["a"], "min_size": 2},
            "components": {"superedge_counts": {"share": 0.7},
                           "degree_histograms": {"enabled": True, "share": 0.3}},
        })
        shares = epsilon_shares(policy)
        assert set(shares) == {"superedge_counts", "degree_histograms"}
        assert sum(shares.values()) <= eps
        assert math.isclose(sum(shares.values()), eps, rel_tol=1e-12)
        assert math.isclose(shares["superedge_counts"], 0.7 * eps, rel_tol=1e-12)


def test_explicit_shares_must_add_up_to_one():
    with pytest.raises(PolicyError, match="add up to 1"):
        parse_policy({
            "privacy": {"unit": "edge", "epsilon": 1.0},
            "grouping": {"attributes": ["a"], "min_size": 2},
            "components": {"superedge_counts": {"share": 0.5},
                           "degree_histograms": {"enabled": True, "share": 0.3}},
        })


def test_example_policies_parse():
    from pathlib import Path

    folder = Path(__file__).resolve().parents[1] / "policies"
    files = sorted(folder.glob("*.toml"))
    assert len(files) >= 3
    for f in files:
        read_policy(f)
