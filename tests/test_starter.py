"""The starting policy (``aggpub draft-policy``, :mod:`aggpub.starter`; issue 14.3).

Acceptance: the policy written for the invented demo town's inputs parses
strictly and releases the town unchanged through ``aggpub.cli.main``. Outside
references: the standard library's ``tomllib`` and ``csv`` modules read the
written policy and the input files independently of aggpub's readers; the demo
generator's own hierarchies (``aggpub.demo``) make the codebook.
"""

from __future__ import annotations

import csv
import re
import tomllib
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from aggpub import demo
from aggpub.cli import main
from aggpub.errors import InputError, UsageError
from aggpub.policy import parse_policy, policy_key, read_policy
from aggpub.starter import draft_policy, read_codebook, write_draft_policy
from tests._badinput import MARK, no_plots  # noqa: F401

pytestmark = pytest.mark.usefixtures("no_plots")


@pytest.fixture(scope="module")
def town(tmp_path_factory):
    """The demo town's inputs (3,000 residents), as ``aggpub demo`` writes them."""
    return demo.write_demo_inputs(tmp_path_factory.mktemp("town-inputs"), n_people=3000)


def csv_column(path, column):
    with open(path, newline="", encoding="utf-8") as fh:
        return [row[column] for row in csv.DictReader(fh)]


def demo_codebook(path: Path) -> Path:
    rows = [["attribute", "value", "broader", "broader_2"]]
    for band in demo.AGE_BANDS:
        decade = demo.AGE_HIERARCHY[0][band]
        rows.append(["age_band", band, decade, demo.AGE_HIERARCHY[1][decade]])
    for hood, zone in demo.ZONES.items():
        rows.append(["neighbourhood", hood, zone])  # a short row: broader_2 left out
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh, lineterminator="\n").writerows(rows)
    return path


def max_degree(edges_csv) -> int:
    """Largest number of distinct contacts of one person (the standard csv module, independent of aggpub)."""
    seen, deg = set(), {}
    with open(edges_csv, newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            a, b = sorted((row["source"], row["target"]))
            if a != b and (a, b) not in seen:
                seen.add((a, b))
                deg[a] = deg.get(a, 0) + 1
                deg[b] = deg.get(b, 0) + 1
    return max(deg.values())


def release(policy, town, out, capsys, *extra):
    code = main(["release", "--policy", str(policy), "--edges", str(town["edges"]), "--nodes", str(town["people"]),
                 "--out", str(out), "--quiet", "--audit-draws", "0", *extra])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    return captured.out


# --------------------------------------------------------------------------- acceptance on the demo town


def test_written_policy_for_the_demo_town_parses_and_releases(town, tmp_path, capsys):
    out = tmp_path / "policy.toml"
    assert main(["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_band,neighbourhood",
                 "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert f"wrote a starting policy to {out}" in printed
    assert "age_band: 17 values found in people.csv" in printed and "neighbourhood: 12 values" in printed
    policy = read_policy(out)  # strict
    assert policy.privacy.unit == "edge" and policy.privacy.epsilon == 1.0 and policy.grouping.min_size == 20
    assert policy.grouping.attributes == ("age_band", "neighbourhood") and policy.ledger is None
    assert policy.gate.max_degree_ks is None and policy.gate.max_contact_matrix_median_relative_error is None
    text = out.read_text(encoding="utf-8")
    for attr in ("age_band", "neighbourhood"):  # every value found, mapped to itself (checked with csv)
        (level,) = policy.grouping.hierarchies[attr]
        assert set(level) == set(csv_column(town["people"], attr))
        assert all(k == v for k, v in level.items())
    assert "map the values to broader" in text and "rather than merged into the" in text
    assert 'Do not switch this file to "person"' in text
    bundle = tmp_path / "bundles" / "drafted"
    bundle.parent.mkdir()
    released = release(out, town, bundle, capsys)
    assert f"to {bundle}" in released and "privacy unit edge, epsilon 1, min_size 20" in released
    assert main(["check", str(bundle), "--quiet"]) == 0


@pytest.mark.heavy
def test_written_policy_releases_the_full_demo_town(tmp_path, capsys):
    """The full town (30,000 residents) as ``aggpub demo`` writes it."""
    town = demo.write_demo_inputs(tmp_path / "demo-release-inputs")
    out = tmp_path / "policy.toml"
    assert main(["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_band,neighbourhood",
                 "--out", str(out)]) == 0
    capsys.readouterr()
    release(out, town, tmp_path / "release", capsys)


def test_policy_keys_are_commented_and_defaults_sensible(town, tmp_path):
    draft = draft_policy(town["people"], ["age_band", "neighbourhood"])
    lines = draft.text.splitlines()
    decoded = tomllib.loads(draft.text)
    assert "ledger" not in decoded and "gate" not in decoded
    assert decoded["privacy"]["epsilon"] == 1.0 and decoded["grouping"]["min_size"] == 20
    assert decoded["input"] == {"node": "node", "source": "source", "target": "target"}
    # every key line, written or commented out, is preceded by its own comment from the key table
    section = ""
    keys_seen = set()
    for i, line in enumerate(lines):
        head = re.match(r"^(?:# )?\[([a-z_.]+)\]$", line)
        if head:
            section = head.group(1)
            continue
        m = re.match(r"^(?:# )?([a-z_]+) = ", line)
        if not m or section.startswith("grouping.hierarchies"):
            continue
        name = m.group(1)
        key = policy_key(f"{section}.{name}" if section else name)
        j = i - 1
        while not lines[j].startswith(f"# {name}: "):
            assert lines[j].startswith("#") and not re.match(r"^(?:# )?[a-z_]+ = ", lines[j]), (name, lines[j])
            j -= 1
        comment = " ".join(x.lstrip("# ") for x in lines[j:i])
        assert key.meaning.replace("`", "") in comment
        for choice in key.choices:
            assert f'"{choice}"' in comment
        keys_seen.add(key.path)
    for path in ("privacy.unit", "privacy.epsilon", "grouping.method", "grouping.min_size", "ledger.path",
                 "ledger.dataset", "ledger.lifetime_epsilon", "gate.max_degree_ks", "input.node",
                 "components.superedge_counts.share", "components.weight_totals.clip"):
        assert path in keys_seen
    text = draft.text
    assert "# [ledger]" in text and "ONE ledger file" in text and "per dataset" in text
    assert "# [gate]" in text and "No thresholds are set" in text
    assert "e^1 = 2.72 times more" in text  # what epsilon 1 means


def test_small_cells_are_counted_from_the_public_person_table(town):
    draft = draft_policy(town["people"], ["age_band", "neighbourhood"])
    counts = {}
    with open(town["people"], newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            key = (row["age_band"], row["neighbourhood"])
            counts[key] = counts.get(key, 0) + 1
    small = [c for c in counts.values() if c < 20]
    note = f"{len(small):,} of {len(counts):,} attribute cells have fewer than 20 people ({sum(small):,} people)"
    assert note in draft.notes[-1] and note in draft.text.replace("\n# ", " ")


# --------------------------------------------------------------------------- unit person: the codebook, values unread


def test_unit_person_takes_the_domains_from_the_codebook_and_releases(town, tmp_path, capsys):
    codebook = demo_codebook(tmp_path / "codebook.csv")
    cap = max_degree(town["edges"])
    out = tmp_path / "person.toml"
    assert main(["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_band,neighbourhood",
                 "--unit", "person", "--codebook", str(codebook), "--max-contacts", str(cap),
                 "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "values present in the person file are private" in printed and "only its header was read" in printed
    policy = read_policy(out)
    assert policy.privacy.unit == "person" and policy.privacy.max_contacts == cap
    assert policy.grouping.hierarchies["age_band"] == tuple(demo.AGE_HIERARCHY)
    assert policy.grouping.hierarchies["neighbourhood"] == (demo.ZONES,)
    assert list(policy.grouping.hierarchies["age_band"][0]) == list(demo.AGE_BANDS)  # the codebook's order
    text = out.read_text(encoding="utf-8")
    assert "were NOT read" in text and "one person can be the only one with a value" in text
    assert "Do not switch" not in text
    bundle = tmp_path / "bundles" / "person"
    bundle.parent.mkdir()
    assert "privacy unit person" in release(out, town, bundle, capsys)


def test_unit_person_reads_only_the_header_of_the_person_file(tmp_path, monkeypatch):
    people = tmp_path / "people.csv"
    people.write_bytes(b"node,age_band,neighbourhood\n" + bytes(range(256)) * 4 + b"\n\xff\xfe,\"unclosed\n")
    codebook = demo_codebook(tmp_path / "codebook.csv")
    with pytest.raises(InputError, match="not UTF-8|more or fewer fields|cannot read"):
        draft_policy(people, ["age_band", "neighbourhood"])  # unit edge reads the values: refused
    import pyarrow.csv as pacsv

    def no_reading(*a, **k):
        raise AssertionError("the person file's values were read under unit person")

    monkeypatch.setattr(pacsv, "read_csv", no_reading)
    monkeypatch.setattr(pq, "read_table", no_reading)
    draft = draft_policy(people, ["age_band", "neighbourhood"], unit="person", codebook=codebook, max_contacts=30)
    assert parse_policy(tomllib.loads(draft.text)).privacy.unit == "person"


def test_unit_person_puts_no_person_value_in_the_output(tmp_path, capsys):
    people = tmp_path / "people.csv"
    people.write_text("node,age_band,neighbourhood\n" + "".join(
        f"{MARK}{i},{MARK}band{i % 3},{MARK}hood{i % 2}\n" for i in range(40)), encoding="utf-8")
    codebook = demo_codebook(tmp_path / "codebook.csv")
    out = tmp_path / "policy.toml"
    assert main(["draft-policy", "--nodes", str(people), "--attributes", "age_band,neighbourhood", "--unit",
                 "person", "--codebook", str(codebook), "--max-contacts", "10", "--out", str(out)]) == 0
    captured = capsys.readouterr()
    assert MARK not in captured.out + captured.err + out.read_text(encoding="utf-8")


@pytest.mark.parametrize("argv, option", [
    (["--unit", "person", "--max-contacts", "30"], "--codebook"),
    (["--unit", "person", "--codebook", "CODEBOOK"], "--max-contacts"),
    (["--max-contacts", "30"], "--max-contacts"),
    (["--epsilon", "0"], "--epsilon"),
    (["--min-size", "0"], "--min-size"),
    (["--unit", "node"], "--unit"),
])
def test_usage_errors_name_the_option(town, tmp_path, capsys, argv, option):
    codebook = demo_codebook(tmp_path / "codebook.csv")
    argv = [str(codebook) if a == "CODEBOOK" else a for a in argv]
    code = main(["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_band",
                 "--out", str(tmp_path / "p.toml"), *argv])
    err = capsys.readouterr().err
    assert code == 2 and option in err and err.count("\n") == 1
    assert not (tmp_path / "p.toml").exists()


def test_unit_person_without_codebook_says_why(town):
    with pytest.raises(UsageError, match="values present in the person file are private"):
        draft_policy(town["people"], ["age_band"], unit="person", max_contacts=10)


# --------------------------------------------------------------------------- the codebook file


def test_codebook_levels_and_short_rows(tmp_path):
    cb = read_codebook(demo_codebook(tmp_path / "codebook.csv"))
    assert cb.levels["age_band"] == tuple(demo.AGE_HIERARCHY)
    assert cb.levels["neighbourhood"] == (demo.ZONES,)  # the unused broader_2 step is dropped
    (tmp_path / "flat.csv").write_text("attribute,value\nrole,pupil\nrole,worker\n", encoding="utf-8")
    assert read_codebook(tmp_path / "flat.csv").levels == {"role": ({"pupil": "pupil", "worker": "worker"},)}
    (tmp_path / "gaps.csv").write_text("\ufeffattribute,value,broader,broader_2\na,x,,\na,y,g,top\n", encoding="utf-8")
    assert read_codebook(tmp_path / "gaps.csv").levels == {"a": ({"x": "x", "y": "g"}, {"x": "x", "g": "top"})}


@pytest.mark.parametrize("text, message", [
    ("attribute,val\na,x\n", "no column 'value' (did you mean 'val'?)"),
    ("attribute,value,broadr\na,x,y\n", "unknown codebook column 'broadr' (did you mean 'broader'?)"),
    ("attribute,value,broader_2\na,x,y\n", "without gaps"),
    ("attribute,value\na,x\na,x\n", "line 3: attribute 'a' lists the same value twice (first on line 2)"),
    ("attribute,value,broader\na,x,g\na,y,g\nb,,h\n", "line 4: empty 'value'"),
    ("attribute,value,broader\n,x,g\n", "line 2: empty 'attribute'"),
    ("attribute,value,broader,broader_2\na,x,,top\n", "line 2: column 'broader_2' is filled but the step before"),
    ("attribute,value,broader,broader_2\na,x,g,top\na,y,g,other\n", "line 3: column 'broader_2' gives a group"),
    ("attribute,value\na,x,extra\n", "line 2 has 3 fields, the header 2"),
    ("attribute,value\n", "the codebook has no rows"),
])
def test_codebook_errors_name_the_line_and_column(tmp_path, text, message):
    path = tmp_path / "codebook.csv"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=re.escape(message)):
        read_codebook(path)


def test_unit_person_needs_every_attribute_in_the_codebook(town, tmp_path):
    codebook = demo_codebook(tmp_path / "codebook.csv")
    with pytest.raises(InputError, match="lists no values of attribute 'role'"):
        draft_policy(town["people"], ["age_band", "role"], unit="person", codebook=codebook, max_contacts=30)


def test_unit_edge_with_a_codebook_adds_values_it_lacks(town, tmp_path):
    path = tmp_path / "codebook.csv"
    path.write_text("attribute,value,broader\nage_band,0-4,0-9\nage_band,5-9,0-9\n", encoding="utf-8")
    draft = draft_policy(town["people"], ["age_band"], codebook=path)
    (level,) = parse_policy(tomllib.loads(draft.text)).grouping.hierarchies["age_band"]
    assert level["0-4"] == "0-9" and level["5-9"] == "0-9" and level["80+"] == "80+"
    assert set(level) == set(csv_column(town["people"], "age_band"))
    assert "15 more found in people.csv" in draft.notes[0]


# --------------------------------------------------------------------------- reading the person file


def test_windows_1252_person_file_is_refused_with_a_clear_message(tmp_path, capsys):
    people = tmp_path / "people.csv"
    people.write_bytes("node,district\n1,Alder\n2,Genève\n".encode("cp1252"))
    code = main(["draft-policy", "--nodes", str(people), "--attributes", "district", "--out",
                 str(tmp_path / "p.toml")])
    err = capsys.readouterr().err
    assert code == 3
    assert "not UTF-8 text: line 3 (byte 6)" in err and "Windows-1252" in err and "Save it as UTF-8" in err
    assert "Gen" not in err and "Alder" not in err


def test_ragged_person_file_message_has_no_value(tmp_path, capsys):
    people = tmp_path / "people.csv"
    people.write_text(f"node,district\n1,{MARK}a\n2,{MARK}b,{MARK}extra\n", encoding="utf-8")
    code = main(["draft-policy", "--nodes", str(people), "--attributes", "district", "--out", str(tmp_path / "p.toml")])
    err = capsys.readouterr().err
    assert code == 3 and "more or fewer fields than its header" in err and MARK not in err


def test_missing_attribute_column_suggests_the_closest(town, tmp_path, capsys):
    code = main(["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_bnd", "--out",
                 str(tmp_path / "p.toml")])
    err = capsys.readouterr().err
    assert code == 3 and "no column 'age_bnd'" in err and "did you mean 'age_band'" in err


def test_parquet_person_file_and_awkward_values(tmp_path):
    people = tmp_path / "people.parquet"
    values = ['say "hi"', "back\\slash", "tab\there", "naïve", "7"]
    pq.write_table(pa.table({"node": [f"p{i}" for i in range(5)], "label": values,
                             "year": pa.array([2001, 2002, 2001, 2003, 2002], pa.int16()),
                             "score": [0.5, 1.0, 1.5, 2.0, 2.5]}), people)
    draft = draft_policy(people, ["label", "year"], min_size=2)
    hier = parse_policy(tomllib.loads(draft.text)).grouping.hierarchies
    assert set(hier["label"][0]) == set(values) and all(k == v for k, v in hier["label"][0].items())
    assert list(hier["year"][0]) == ["2001", "2002", "2003"]
    with pytest.raises(InputError, match="attribute column 'score' has type double"):
        draft_policy(people, ["score"])


def test_empty_attribute_cells_are_reported(tmp_path):
    people = tmp_path / "people.csv"
    people.write_text('node,district\n1,a\n2,\n3,""\n4,b\n', encoding="utf-8")
    draft = draft_policy(people, ["district"], min_size=1)
    assert any("district: 2 row(s) of people.csv have no value" in n for n in draft.notes)
    assert set(parse_policy(tomllib.loads(draft.text)).grouping.hierarchies["district"][0]) == {"a", "b"}


# --------------------------------------------------------------------------- writing


def test_existing_output_is_kept_unless_overwrite(town, tmp_path, capsys):
    out = tmp_path / "policy.toml"
    out.write_text("keep me", encoding="utf-8")
    argv = ["draft-policy", "--nodes", str(town["people"]), "--attributes", "age_band", "--out", str(out)]
    assert main(argv) == 7 and "already exists" in capsys.readouterr().err
    assert out.read_text(encoding="utf-8") == "keep me"
    assert main(argv + ["--overwrite"]) == 0
    assert read_policy(out).grouping.attributes == ("age_band",)
    assert [p.name for p in tmp_path.iterdir()] == ["policy.toml"]  # no temporary file left
    with pytest.raises(Exception, match="would replace an input file"):
        write_draft_policy(town["people"], draft_policy(town["people"], ["age_band"]), overwrite=True,
                           inputs=(town["people"],))


def test_help_shows_the_options_and_exit_codes(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["draft-policy", "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    for option in ("--nodes", "--attributes", "--unit", "--codebook", "--max-contacts", "--out", "--overwrite"):
        assert option in out
    assert "exit codes:" in out and "3 input error" in out and "7 output error" in out


def test_edges_header_names_the_edge_columns_and_a_semicolon_file_is_explained(tmp_path, capsys):
    """An agency export as a steward would bring it (string ids, extra columns, other column names): the
    starting policy names the edge file's id columns from its header alone, and releases as written."""
    from aggpub.cli import main

    people = tmp_path / "clients.csv"
    people.write_text("ClientID,Area,AgeGroup,Phone\n" + "".join(
        f"CL-{i:04d},{['North', 'South'][i % 2]},{['young', 'old'][i // 2 % 2]},+45 {i}\n" for i in range(200)),
        encoding="utf-8")
    edges = tmp_path / "encounters.csv"
    edges.write_text("person_a,person_b,minutes,place\n" + "".join(
        f"CL-{i:04d},CL-{(i * 7 + 3) % 200:04d},{i % 60 + 1},home\n" for i in range(200) if (i * 7 + 3) % 200 != i),
        encoding="utf-8")
    out = tmp_path / "policy.toml"
    assert main(["draft-policy", "--nodes", str(people), "--node-column", "ClientID", "--attributes", "Area,AgeGroup",
                 "--edges", str(edges), "--out", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    assert 'source = "person_a"' in text and 'target = "person_b"' in text
    assert main(["release", "--policy", str(out), "--edges", str(edges), "--nodes", str(people), "--out",
                 str(tmp_path / "release"), "--quiet"]) == 0
    semi = tmp_path / "semicolon.csv"
    semi.write_text("ClientID;Area\nCL-1;North\n", encoding="utf-8")
    assert main(["draft-policy", "--nodes", str(semi), "--node-column", "ClientID", "--attributes", "Area",
                 "--out", str(tmp_path / "p2.toml")]) == 3
    assert "';'-delimited" in capsys.readouterr().err


# --------------------------------------------------------------------------- contact views and layers (issue 13)


def _uncomment(text: str, section: str, keys) -> str:
    """Remove the leading '# ' of ``[section]`` (if commented out) and of the listed keys inside it."""
    out, current = [], None
    for line in text.splitlines():
        head = re.match(r"^(# )?\[([a-z_.]+)\]$", line)
        if head:
            current = head.group(2)
            if current == section:
                line = f"[{section}]"
        elif current == section and any(line.startswith(f"# {k} = ") for k in keys):
            line = line[2:]
        out.append(line)
    return "\n".join(out) + "\n"


def test_draft_mentions_views_and_layers_and_keeps_the_default_views(town, tmp_path, capsys):
    """The views are on by default in the written policy (every key commented out, as docs/policy.md
    documents them), [layers] is commented out, and the release of the demo town carries both views."""
    draft = draft_policy(town["people"], ["age_band", "neighbourhood"], edges=town["edges"])
    text = draft.text
    decoded = tomllib.loads(text)
    assert decoded["components"]["contact_views"] == {} and "layers" not in decoded
    for key in ("enabled", "share", "attributes", "combinations", "weighted", "column", "clip"):
        assert f"# {key} = " in text.split("[components.contact_views]")[1].split("[components.degree_sequences]")[0]
    assert "# [layers]" in text and '# column = "setting"' in text
    assert "Columns of the edge file besides the first two" in text and "setting, minutes" in text
    path = tmp_path / "policy.toml"
    path.write_text(text, encoding="utf-8")
    bundle = tmp_path / "bundles" / "views"
    bundle.parent.mkdir()
    release(path, town, bundle, capsys)
    manifest = read_bundle_manifest(bundle)
    names = [c["name"] for c in manifest["components"]]
    assert "contact_views:age_band" in names and "contact_views:neighbourhood" in names
    assert not manifest.get("layers")


@pytest.mark.parametrize("unit", ["edge", "person"])
def test_uncommented_example_shares_add_up_to_one(town, tmp_path, unit):
    kwargs = {}
    if unit == "person":
        kwargs = {"unit": "person", "codebook": demo_codebook(tmp_path / "codebook.csv"), "max_contacts": 60}
    text = draft_policy(town["people"], ["age_band", "neighbourhood"], **kwargs).text
    for section in ("components.supernode_sizes", "components.superedge_counts", "components.contact_views",
                    "components.degree_sequences", "components.triangle_count"):
        text = _uncomment(text, section, ["share"])
    decoded = tomllib.loads(text)
    shares = [t["share"] for t in decoded["components"].values() if "share" in t]
    assert abs(sum(shares) - 1.0) < 1e-12, shares
    parse_policy(decoded)  # strict: the shares add up to 1 and every share's component is on


def test_uncommented_layers_release_the_demo_town_per_setting(town, tmp_path, capsys):
    text = _uncomment(draft_policy(town["people"], ["age_band", "neighbourhood"]).text, "layers",
                      ["column", "values"])
    path = tmp_path / "policy.toml"
    path.write_text(text, encoding="utf-8")
    bundle = tmp_path / "bundles" / "layers"
    bundle.parent.mkdir()
    release(path, town, bundle, capsys)
    manifest = read_bundle_manifest(bundle)
    assert manifest["layers"]["values"] == list(demo.SETTINGS)


def read_bundle_manifest(bundle):
    import json

    return json.loads((Path(bundle) / "manifest.json").read_text(encoding="utf-8"))
