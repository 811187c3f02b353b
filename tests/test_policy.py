"""Strict release policies: unknown keys, wrong types and out-of-range values name the key."""

from __future__ import annotations

import dataclasses
import math
import re
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
    # issue 13: views by default; issue 12: degree sequences and the triangle count (weights 2, 2, 2, 1)
    assert epsilon_shares(p) == pytest.approx({"superedge_counts": 2 / 7, "contact_views": 2 / 7,
                                               "degree_sequences": 2 / 7, "triangle_count": 1 / 7})


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
                           "degree_histograms": {"enabled": True, "share": 0.3},
                           "degree_sequences": {"enabled": False}, "triangle_count": {"enabled": False}},
        })


def test_example_policies_parse():
    from pathlib import Path

    folder = Path(__file__).resolve().parents[1] / "policies"
    files = sorted(folder.glob("*.toml"))
    assert len(files) >= 3
    for f in files:
        read_policy(f)


# --------------------------------------------------------------------------- validation when built in Python (16.6)

from aggpub.policy import (ComponentPolicy, ComponentsPolicy, GatePolicy, GroupingPolicy, InputPolicy,  # noqa: E402
                           LedgerPolicy, PrivacyPolicy, ReleasePolicy, policy_to_dict)


def components(**enabled):
    on = {"supernode_sizes": True, "superedge_counts": True, "degree_histograms": False, "weight_totals": False}
    on.update(enabled)
    return ComponentsPolicy(**{n: ComponentPolicy(n, e) for n, e in on.items()})


@pytest.mark.parametrize("build, message", [
    (lambda: PrivacyPolicy(epsilon=-1.0), "'privacy.epsilon' must be a finite number > 0, got -1.0"),
    (lambda: PrivacyPolicy(epsilon=math.nan), "'privacy.epsilon' must be a finite number > 0, got nan"),
    (lambda: PrivacyPolicy(epsilon=math.inf), "'privacy.epsilon' must be a finite number > 0, got inf"),
    (lambda: PrivacyPolicy(epsilon="1.0"), "'privacy.epsilon' must be a number, got a string '1.0'"),
    (lambda: PrivacyPolicy(epsilon=True), "'privacy.epsilon' must be a number, got a boolean True"),
    (lambda: PrivacyPolicy(unit="node"), "'privacy.unit' must be one of 'edge', 'person', got 'node'"),
    (lambda: PrivacyPolicy(unit="person"), "missing key 'privacy.max_contacts'"),
    (lambda: PrivacyPolicy(max_contacts=10), "'privacy.max_contacts' only applies when privacy.unit is \"person\""),
    (lambda: PrivacyPolicy(unit="person", max_contacts=0), "'privacy.max_contacts' must be >= 1, got 0"),
    (lambda: GroupingPolicy(attributes=("a",), min_size=0), "'grouping.min_size' must be >= 1, got 0"),
    (lambda: GroupingPolicy(attributes=("a",), min_size=2.5), "'grouping.min_size' must be an integer, got a number"),
    (lambda: GroupingPolicy(attributes=("a",), min_size=True), "'grouping.min_size' must be an integer, got a boolean"),
    (lambda: GroupingPolicy(attributes=()), "'grouping.attributes' must not be empty"),
    (lambda: GroupingPolicy(attributes="age"), "'grouping.attributes' must be a list of strings"),
    (lambda: GroupingPolicy(method="cluster", attributes=("a",)), "'grouping.method' must be one of"),
    (lambda: GroupingPolicy(method="structure", epsilon_share=1.0), "'grouping.epsilon_share' must be a number in"),
    (lambda: GroupingPolicy(attributes=("a",), epsilon_share=0.2), "only applies to private grouping methods"),
    (lambda: GroupingPolicy(attributes=("a",), hierarchies={"b": [{"x": "y"}]}),
     "unknown key 'grouping.hierarchies.b'"),
    (lambda: GroupingPolicy(attributes=("a",), hierarchies={"a": [{"x": 1}]}), "must map to a string"),
    (lambda: GroupingPolicy(attributes=("a",), hierarchies={"a": [{"x": "y"}, {"z": "w"}]}), "does not cover 1"),
    (lambda: GroupingPolicy(method="given"), "missing key 'grouping.map'"),
    (lambda: GroupingPolicy(attributes=("a",), map_path="m.csv"), "'grouping.map' only applies when"),
    (lambda: ComponentPolicy("bogus", True), "unknown component 'bogus'"),
    (lambda: ComponentPolicy("degree_histograms", True, clip=3), "'components.degree_histograms' has no key 'clip'"),
    (lambda: ComponentPolicy("superedge_counts", True, share=0.0),
     "'components.superedge_counts.share' must be a number in (0, 1], got 0.0"),
    (lambda: ComponentPolicy("superedge_counts", True, method="fast"), "must be one of 'auto', 'dense', 'sparse'"),
    (lambda: ComponentPolicy("weight_totals", True, clip=5), "missing key 'components.weight_totals.column'"),
    (lambda: components(superedge_counts=False), "at least one of superedge_counts"),
    (lambda: LedgerPolicy(path="x.ledger", dataset=" ", lifetime_epsilon=1.0), "'ledger.dataset' must not be empty"),
    (lambda: LedgerPolicy(path="x.ledger", dataset="d", lifetime_epsilon=0), "'ledger.lifetime_epsilon' must be a"),
    (lambda: GatePolicy(max_degree_ks=-0.1), "'gate.max_degree_ks' must be a finite number >= 0, got -0.1"),
    (lambda: InputPolicy(node=""), "'input.node' must not be empty"),
    (lambda: InputPolicy(drop_unknown="yes"), "'input.drop_unknown' must be true or false"),
])
def test_policy_objects_validate_when_built(build, message):
    with pytest.raises(PolicyError, match=re.escape(message)):
        build()


def test_whole_policy_checks_the_rules_across_sections():
    privacy, grouping = PrivacyPolicy(epsilon=1.0), GroupingPolicy(attributes=("a", "b"), min_size=5)
    policy = ReleasePolicy(privacy=privacy, grouping=grouping, components=components())
    with pytest.raises(PolicyError, match="contact_matrix_attribute' must be one of grouping.attributes"):
        policy.replace(gate=GatePolicy(contact_matrix_attribute="c"))
    sized = dataclasses.replace(components(), supernode_sizes=ComponentPolicy("supernode_sizes", True, share=0.5))
    with pytest.raises(PolicyError, match="supernode_sizes.share': under unit 'edge'"):
        policy.replace(components=sized)
    with pytest.raises(PolicyError, match="must be a PrivacyPolicy"):
        policy.replace(privacy={"unit": "edge", "epsilon": 1.0})
    with pytest.raises(PolicyError, match="'privacy.epsilon' must be a finite number > 0, got -2.0"):
        dataclasses.replace(policy.privacy, epsilon=-2.0)


def test_python_built_policy_equals_the_parsed_one():
    """TOML and Python get the same defaults and normalisation from the one table."""
    parsed = parse_policy({"privacy": {"epsilon": 2}, "grouping": {"attributes": ["a", "b"], "min_size": 5,
                                                                   "merge_order": ["a"]},
                           "components": {"degree_histograms": {"enabled": True}}})
    built = ReleasePolicy(privacy=PrivacyPolicy(epsilon=2), grouping=GroupingPolicy(
        attributes=["a", "b"], min_size=5, merge_order=["a"]), components=components(degree_histograms=True))
    assert policy_to_dict(built) == policy_to_dict(parsed)
    assert built.privacy.epsilon == 2.0 and isinstance(built.privacy.epsilon, float)
    assert built.grouping.merge_order == ("a", "b")
    assert built.components.degree_histograms.max_degree == 50
    assert GroupingPolicy(method="structure").epsilon_share == 0.3
    assert epsilon_shares(built) == epsilon_shares(parsed)
