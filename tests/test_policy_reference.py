"""docs/policy.md against the policy key table and the strict parser (issues 14.2 and 16.6).

The reference is generated from ``aggpub.policy.POLICY_KEYS``. These tests
check that the committed document is the generated one, that it documents
exactly the keys the parser accepts (each documented key's example is parsed by
the strict parser and read back; each key with a typo is refused with a
suggestion naming it; every field of the policy dataclasses is documented), and
that its stated defaults are what the parser applies. Outside references: the
standard library's ``tomllib`` decodes every TOML fragment of the document and
``dataclasses.fields`` lists the policy objects' fields.
"""

from __future__ import annotations

import dataclasses
import importlib.util
import re
import tomllib
from pathlib import Path

import pytest

from aggpub import policy as P
from aggpub.errors import PolicyError

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "policy.md"
BASE = {"privacy": {"unit": "edge", "epsilon": 1.0},
        "grouping": {"method": "attributes", "attributes": ["age_band", "neighbourhood"], "min_size": 20}}


def documented_keys(text: str) -> set[str]:
    """Keys named by a ``### `key``` heading of the reference."""
    return set(re.findall(r"^### `([^`]+)`$", text, flags=re.M))


def table_keys(text: str) -> set[str]:
    """Keys listed in the reference's "All keys" table."""
    part = text.split("## All keys", 1)[1].split("\n## ", 1)[0]
    return set(re.findall(r"^\| `([^`]+)` \|", part, flags=re.M))


def merge(base, extra):
    out = {k: (dict(v) if isinstance(v, dict) else v) for k, v in base.items()}
    for k, v in extra.items():
        out[k] = merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def section_object(policy, section):
    if section == "":
        return policy
    if section.startswith("components."):
        return getattr(policy.components, section.split(".", 1)[1])
    return getattr(policy, section)


def lookup(data, path):
    for part in path.split("."):
        data = data[part]
    return data


def load_script():
    spec = importlib.util.spec_from_file_location("policy_reference_script", ROOT / "scripts" / "policy_reference.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


# --------------------------------------------------------------------------- the document is the generated one


def test_committed_reference_is_the_generated_one():
    assert DOC.read_text(encoding="utf-8") == P.policy_reference(), (
        "docs/policy.md is out of date: run python scripts/policy_reference.py --write")


def test_reference_lists_every_table_key_once_in_both_places():
    text = DOC.read_text(encoding="utf-8")
    paths = [k.path for k in P.POLICY_KEYS]
    assert len(paths) == len(set(paths))
    assert documented_keys(text) == set(paths)
    assert table_keys(text) == set(paths)
    for s in P.POLICY_SECTIONS:
        assert (f"## `[{s.name}]`" if s.name else "## Top level") in text


def test_a_key_added_to_the_table_without_regenerating_fails_the_comparison(monkeypatch, capsys):
    new = P.PolicyKey("input", "delimiter", "string", ",", "field delimiter of CSV inputs", "", '[input]\ndelimiter = ";"\n')
    grown = P.policy_reference(keys=P.POLICY_KEYS + (new,))
    assert "input.delimiter" in documented_keys(grown) and "input.delimiter" in table_keys(grown)
    assert grown != DOC.read_text(encoding="utf-8")
    script = load_script()
    assert script.main(["--check"]) == 0
    monkeypatch.setattr(P, "POLICY_KEYS", P.POLICY_KEYS + (new,))
    monkeypatch.setattr(script, "policy_reference", P.policy_reference)
    assert script.main(["--check"]) == 1
    assert "input.delimiter" in capsys.readouterr().out


# --------------------------------------------------------------------------- documented keys = parsed keys


@pytest.mark.parametrize("key", P.POLICY_KEYS, ids=lambda k: k.path)
def test_each_documented_example_parses_strictly_and_sets_the_key(key, tmp_path):
    text = DOC.read_text(encoding="utf-8")
    block = text.split(f"### `{key.path}`\n", 1)[1].split("\n### ", 1)[0].split("\n## ", 1)[0]
    fragments = re.findall(r"```toml\n(.*?)\n```", block, flags=re.S)
    assert fragments, f"no example for {key.path}"
    example = tomllib.loads(fragments[-1])
    policy = P.parse_policy(merge(BASE, example), base_dir=tmp_path)
    if key.section == "grouping.hierarchies.<attribute>":
        (attr, spec), = example["grouping"]["hierarchies"].items()
        assert policy.grouping.hierarchies[attr] == tuple(spec["levels"])
        return
    if key.section == "domains.<attribute>":  # issue 13: declared view domains
        (attr, spec), = example["domains"].items()
        assert policy.domains[attr] == tuple(spec["values"])
        return
    written = lookup(example, key.path)
    got = getattr(section_object(policy, key.section), key.field)
    expected = {"path": lambda v: tmp_path / v, "strings": tuple}.get(key.kind, lambda v: v)(written)
    if key.name == "merge_order":  # completed with the attributes it leaves out
        assert got[:len(expected)] == expected
    else:
        assert got == expected


@pytest.mark.parametrize("key", P.POLICY_KEYS, ids=lambda k: k.path)
def test_each_key_with_a_typo_is_refused_naming_the_key(key, tmp_path):
    example = tomllib.loads(key.example)
    parent = lookup(example, key.section.replace("<attribute>", "age_band")) if key.section else example
    typo = key.name[:-1] + ("x" if key.name[-1] != "x" else "y")
    parent[typo] = parent.pop(key.name)
    with pytest.raises(PolicyError, match=re.escape(f"(did you mean '{key.name}'?)")):
        P.parse_policy(merge(BASE, example), base_dir=tmp_path)


def test_every_dataclass_field_is_a_documented_key():
    """The policy objects hold nothing the document does not explain (``dataclasses.fields`` as the source)."""
    text = DOC.read_text(encoding="utf-8")
    documented = documented_keys(text)
    internal = {("GroupingPolicy", "seed_note"), ("GroupingPolicy", "hierarchies"), ("ComponentPolicy", "name"),
                ("ReleasePolicy", "source_path")}
    sections = {P.PrivacyPolicy: "privacy", P.GroupingPolicy: "grouping", P.LedgerPolicy: "ledger",
                P.GatePolicy: "gate", P.InputPolicy: "input", P.AssumptionsPolicy: "assumptions",
                P.LayersPolicy: "layers"}
    for cls, section in sections.items():
        for f in dataclasses.fields(cls):
            if (cls.__name__, f.name) in internal:
                continue
            key = next(k for k in P.POLICY_KEYS if k.section == section and k.field == f.name)
            assert key.path in documented
    for f in dataclasses.fields(P.ReleasePolicy):
        if f.name in {"privacy", "grouping", "components", "ledger", "gate", "input", "assumptions", "layers",
                      "domains"}:
            assert f"## `[{f.name}]`" in text
        elif ("ReleasePolicy", f.name) not in internal:
            assert f.name in documented
    for name in P.COMPONENT_NAMES:
        assert f"## `[components.{name}]`" in text
        assert f"components.{name}.enabled" in documented and f"components.{name}.share" in documented
    own = {f"components.{n}.{k}" for n, ks in {"superedge_counts": ("method", "sparse_threshold",
                                                                   "sparse_above_cells"),
                                              "degree_histograms": ("max_degree",),
                                              "weight_totals": ("column", "clip")}.items() for k in ks}
    assert own <= documented
    assert "grouping.hierarchies.<attribute>.levels" in documented


def test_undocumented_keys_are_refused_in_every_section(tmp_path):
    for s in P.POLICY_SECTIONS:
        data = merge(BASE, {"ledger": {"path": "l.ledger", "dataset": "d", "lifetime_epsilon": 1.0}})
        where = s.name.replace("<attribute>", "age_band")
        if where.startswith("grouping.hierarchies"):
            data["grouping"]["hierarchies"] = {"age_band": {"levels": [{"a": "b"}]}}
        target = data
        for part in where.split(".") if where else ():
            target = target.setdefault(part, {})
        target["undocumented_key"] = 1
        with pytest.raises(PolicyError, match="unknown key '.*undocumented_key'"):
            P.parse_policy(data, base_dir=tmp_path)


def test_documented_defaults_are_what_the_parser_applies(tmp_path):
    """Read each key's "- default:" line back from the document and compare it with a parsed minimal policy."""
    text = DOC.read_text(encoding="utf-8")
    policy = P.parse_policy({"privacy": {"epsilon": 1.0}, "grouping": {"attributes": ["age_band"], "min_size": 20}},
                            base_dir=tmp_path)
    checked = 0
    for key in P.POLICY_KEYS:
        if key.path == "grouping.attributes":  # set above; its default [] is checked with method "structure"
            continue
        block = text.split(f"### `{key.path}`\n", 1)[1]
        default = re.search(r"^- default: (.*)$", block, flags=re.M).group(1)
        if key.section in ("ledger", "grouping.hierarchies.<attribute>", "domains.<attribute>"):
            assert default == "required"
            continue
        value = getattr(section_object(policy, key.section), key.field)
        if default == "required":
            assert key.path in ("privacy.epsilon", "grouping.min_size")
        elif default == "not set":
            assert value is None, key.path
        elif default.startswith("`"):
            expected = tomllib.loads(f"v = {default.strip('`')}")["v"]
            assert value == (tuple(expected) if isinstance(expected, list) else expected), key.path
            checked += 1
    assert checked >= 15
    assert policy.grouping.merge_order == ("age_band",)  # "the reverse of `attributes`"
    assert policy.grouping.epsilon_share == 0.0
    structure = P.parse_policy({**BASE, "grouping": {"method": "structure", "min_size": 20}}, base_dir=tmp_path)
    assert structure.grouping.epsilon_share == 0.3  # "0.3 when grouping.method is "structure" ..."
    assert structure.grouping.attributes == ()


def test_complete_example_parses_and_covers_every_section(tmp_path):
    text = DOC.read_text(encoding="utf-8")
    block = text.split("## A complete example", 1)[1]
    example = re.search(r"```toml\n(.*?)\n```", block, flags=re.S).group(1)
    assert example + "\n" == P.EXAMPLE_POLICY
    (tmp_path / "policy.toml").write_text(example, encoding="utf-8")
    policy = P.read_policy(tmp_path / "policy.toml")
    data = tomllib.loads(example)
    for s in P.POLICY_SECTIONS:
        if s.name:  # the example declares the domain of "role" (issue 13)
            attr = "role" if s.name.startswith("domains") else "age_band"
            assert lookup(data, s.name.replace("<attribute>", attr)) is not None
    assert policy.ledger.path == tmp_path / "quennet-vale.ledger"
    assert P.epsilon_shares(policy) == pytest.approx({"superedge_counts": 0.3, "degree_histograms": 0.1,
                                                      "weight_totals": 0.1, "contact_views": 0.2,
                                                      "degree_sequences": 0.2, "triangle_count": 0.1})


def test_rules_are_documented_and_each_can_fail(tmp_path):
    """Every rule of the table appears in the document, and each one refuses some policy."""
    text = DOC.read_text(encoding="utf-8")
    for rule in P.POLICY_RULES:
        assert f"- {rule.text}" in text
    breaking = [
        {"grouping": {"attributes": ["a", "a"], "min_size": 2}},
        {"grouping": {"attributes": ["a"], "min_size": 2, "merge_order": ["b"]}},
        {"grouping": {"method": "structure", "min_size": 2, "epsilon_share": 0.0}},
        {"grouping": {"attributes": ["a"], "min_size": 2, "hierarchies": {"b": {"levels": [{"x": "y"}]}}}},
        {"components": {"superedge_counts": {"enabled": False}}},
        {"components": {"supernode_sizes": {"share": 0.5}}},
        {"components": {"degree_histograms": {"share": 0.5}}},
        {"privacy": {"unit": "person", "epsilon": 1.0, "max_contacts": 5},
         "components": {"supernode_sizes": {"enabled": False}}},
        {"components": {"superedge_counts": {"share": 0.5}, "degree_sequences": {"share": 0.3},
                        "triangle_count": {"share": 0.1}}},
        {"gate": {"contact_matrix_attribute": "zone"}},
        {"privacy": {"unit": "person", "epsilon": 1.0, "max_contacts": 5},
         "components": {"triangle_count": {"enabled": True}}},
        # issue 13: layers declared without values; a combination of one attribute; a value listed twice
        {"layers": {"column": "setting"}},
        {"components": {"contact_views": {"combinations": ["age_band"]}}},
        {"domains": {"age_band": {"values": ["a", "a"]}}},
    ]
    assert len(breaking) == len(P.POLICY_RULES)
    for extra in breaking:
        with pytest.raises(PolicyError):
            P.parse_policy(merge(BASE, extra), base_dir=tmp_path)
