"""The malformed-input battery (issue 7, items 1, 2, 6 and 7).

Every case runs the real command line (``aggpub.cli.main``) in process and
asserts: the exit code of the error class, exactly one ``aggpub:`` error line
naming the file, row, column or policy key, no traceback, no planted private
value (person ids and attribute values all contain ``MARK``) anywhere in the
output, and an unchanged tree: the inputs byte-identical, no bundle and no
temporary folder written. A few cases also run as a separate process to prove
no traceback reaches the terminal.

Decisions recorded here (and in the report):

* a UTF-8 byte-order mark is accepted transparently, in CSV and TSV headers;
* ids are text: CSV ids are read verbatim (``007`` stays ``007``; ids beyond 64
  bits are fine); Parquet/Arrow id columns must be integers (any width, signed or
  unsigned, so a ``uint64`` id above 2**63 is fine) or strings; float, boolean,
  decimal, date, list and other types are refused;
* an id that is empty or spells a missing value (``NaN``, ``NA``, ``N/A``,
  ``null``, ``None``, any case) is refused, in the person and the edge file;
* an output (bundle or report) folder that would hold an input file, or that is
  an input's own folder, is refused; a new folder beside the inputs is fine.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pyarrow as pa
import pytest

from aggpub.bundle import check_bundle
from aggpub.cli import main
from aggpub.errors import AggpubError, InputError
from tests._badinput import (MARK, no_plots, POLICY_TEXT, Scenario, edge_rows, edges_table, error_lines, people_rows,
                             people_table, person_id, tree_snapshot)

pytestmark = pytest.mark.usefixtures("no_plots")

USAGE, INPUT, POLICY, PRIVACY, OUTPUT = 2, 3, 4, 5, 7


@dataclass
class Case:
    name: str
    code: int
    names: tuple  # substrings the error line must contain (file, row, column or key)
    setup: Callable[[Scenario], None]


def _rows_with(rows, index, row):
    rows = [list(r) for r in rows]
    rows[index] = row
    return rows


def _policy_replace(old, new):
    def setup(s):
        assert old in POLICY_TEXT
        s.write_policy(POLICY_TEXT.replace(old, new))
    return setup


def _extra(*args):
    def setup(s):
        s.extra += list(args)
    return setup


def _weight_case(value):
    def setup(s):
        s.write_edges(_rows_with(edge_rows(), 9, [person_id(1), person_id(2), value]))
        s.extra += ["--weight-column", "weight"]
    return setup


def _edges_raw(data: bytes, name="edges.csv"):
    def setup(s):
        s.edges = s.root / "in" / name
        s.edges.write_bytes(data)
    return setup


def _people_raw(data: bytes, name="people.csv"):
    def setup(s):
        s.people = s.root / "in" / name
        s.people.write_bytes(data)
    return setup


def _csv_text(header, rows, delimiter=","):
    return (delimiter.join(header) + "\n" + "".join(delimiter.join(r) + "\n" for r in rows)).encode()


def _parquet_edges(**columns):
    def setup(s):
        base = edges_table()
        cols = {name: base.column(name) for name in base.column_names}
        cols.update({k: pa.array(v) if not isinstance(v, pa.Array) else v for k, v in columns.items()})
        s.edges_parquet(pa.table(cols))
    return setup


def _parquet_people(**columns):
    def setup(s):
        base = people_table()
        cols = {name: base.column(name) for name in base.column_names}
        cols.update({k: pa.array(v) if not isinstance(v, pa.Array) else v for k, v in columns.items()})
        s.people_parquet(pa.table(cols))
    return setup


def _damaged_parquet(how):
    def setup(s):
        path = s.edges_parquet(edges_table())
        data = bytearray(path.read_bytes())
        if how == "truncated":
            data = data[: len(data) // 2]
        elif how == "bad_magic":
            data[-4:] = b"XXXX"
        elif how == "footer":  # scribble over the Thrift footer metadata, keep the magic bytes
            footer_len = int.from_bytes(data[-8:-4], "little")
            start = len(data) - 8 - footer_len
            for i in range(start, len(data) - 8, 3):
                data[i] ^= 0xA5
        elif how == "random":
            data = bytearray(os.urandom(3000))
        path.write_bytes(bytes(data))
    return setup


def _existing_bundle(s):
    assert main(["release", "--policy", str(s.policy), "--edges", str(s.edges), "--nodes", str(s.people),
                 "--out", str(s.out), "--quiet", "--seed", "1"]) == 0


def _nonbundle_folder(s):
    s.out.mkdir()
    (s.out / "notes.txt").write_text("someone's work\n")
    s.extra.append("--overwrite")


def _out_is_file(s):
    s.out.write_text("a file\n")


def _out_parent_is_file(s):
    (s.root / "out" / "afile").write_text("x\n")
    s.out = s.root / "out" / "afile" / "bundle"


def _out_parent_missing(s):
    s.out = s.root / "out" / "no" / "such" / "bundle"


def _out_is_input_folder(s):
    s.out = s.root / "in"


def _out_holds_inputs(s):
    s.out = s.root


def _out_under_proc(s):
    s.out = Path("/proc/aggpub-bundle-test")


def _edges_folder(s):
    s.edges = s.root / "in" / "afolder"
    s.edges.mkdir()


def _policy_folder(s):
    s.policy = s.root / "policy" / "afolder"
    s.policy.mkdir()


P = people_rows()
E = edge_rows()
PH = ["node", "age_band", "district"]
EH = ["source", "target", "weight"]

CASES = [
    # ---------------------------------------------------------------- files: missing, empty, wrong kind
    Case("edges_missing", INPUT, ("nope.csv", "not found"), lambda s: setattr(s, "edges", s.root / "in" / "nope.csv")),
    Case("people_missing", INPUT, ("nope.csv", "not found"),
         lambda s: setattr(s, "people", s.root / "in" / "nope.csv")),
    Case("policy_missing", INPUT, ("nope.toml", "not found"),
         lambda s: setattr(s, "policy", s.root / "policy" / "nope.toml")),
    Case("edges_is_folder", INPUT, ("afolder", "folder"), _edges_folder),
    Case("policy_is_folder", INPUT, ("afolder", "policy"), _policy_folder),
    Case("edges_empty_file", INPUT, ("edges.csv", "empty"), _edges_raw(b"")),
    Case("people_empty_file", INPUT, ("people.csv", "empty"), _people_raw(b"")),
    Case("edges_header_only", INPUT, ("edges.csv", "no rows"), _edges_raw(b"source,target,weight\n")),
    Case("people_header_only", INPUT, ("people.csv", "no rows"), _people_raw(b"node,age_band,district\n")),
    Case("edges_only_blank_line", INPUT, ("edges.csv",), _edges_raw(b"\n")),
    # ---------------------------------------------------------------- CSV structure
    Case("edges_ragged_long_row", INPUT, ("edges.csv", "line 6", "expected 3 fields, found 4"),
         _edges_raw(_csv_text(EH, _rows_with(E, 4, E[4] + ["extra" + MARK])))),
    Case("people_ragged_short_row", INPUT, ("people.csv", "line 4", "expected 3 fields, found 2"),
         _people_raw(_csv_text(PH, _rows_with(P, 2, P[2][:2])))),
    Case("edges_unterminated_quote", INPUT, ("edges.csv", "line", "never closed"),
         _edges_raw(_csv_text(EH, _rows_with(E, 3, ['"' + E[3][0], E[3][1], E[3][2]])))),
    Case("edges_semicolon_delimited", INPUT, ("edges.csv", "'source'", "';'-delimited"),
         _edges_raw(_csv_text(EH, E, delimiter=";"))),
    Case("edges_tab_in_csv", INPUT, ("edges.csv", "'source'", "delimited"),
         _edges_raw(_csv_text(EH, E, delimiter="\t"))),
    Case("edges_commas_in_tsv", INPUT, ("edges.tsv", "'source'", "delimited"),
         _edges_raw(_csv_text(EH, E), name="edges.tsv")),
    Case("people_pipe_delimited", INPUT, ("people.csv", "'node'", "'|'-delimited"),
         _people_raw(_csv_text(PH, P, delimiter="|"))),
    Case("edges_no_header", INPUT, ("edges.csv", "'source'", "is the first line a header"),
         _edges_raw(_csv_text(E[0], E[1:]))),
    Case("people_no_header", INPUT, ("people.csv", "'node'", "is the first line a header"),
         _people_raw(_csv_text(P[0], P[1:]))),
    Case("people_empty_header_field", INPUT, ("people.csv", "header field 2"),
         _people_raw(_csv_text(["node", "", "district"], P))),
    Case("people_repeated_header", INPUT, ("people.csv", "header fields 2 and 3"),
         _people_raw(_csv_text(["node", "age_band", "age_band"], P))),
    # ---------------------------------------------------------------- encodings
    Case("edges_latin1_value", INPUT, ("edges.csv", "line 9", "UTF-8"),
         _edges_raw(_csv_text(EH, E[:7]) + f"{MARK}\xe9,{E[7][1]},3\n".encode("latin-1") + _csv_text(EH, E[8:])[21:])),
    Case("people_latin1_header", INPUT, ("people.csv", "line 1", "UTF-8"),
         _people_raw("node,\xe2ge_band,district\n".encode("latin-1") + _csv_text(PH, P)[23:])),
    Case("people_utf16", INPUT, ("people.csv", "UTF-8"),
         _people_raw(_csv_text(PH, P).decode().encode("utf-16"))),
    Case("edges_binary_file", INPUT, ("edges.csv",), _edges_raw(b"\x1f\x8b\x08\x00" + bytes(range(256)) * 4)),
    # ---------------------------------------------------------------- ids
    Case("people_empty_id", INPUT, ("people.csv", "'node'", "data row 5"),
         _people_raw(_csv_text(PH, _rows_with(P, 4, ["", P[4][1], P[4][2]])))),
    Case("people_nan_id", INPUT, ("people.csv", "'node'", "data row 8"),
         _people_raw(_csv_text(PH, _rows_with(P, 7, ["NaN", P[7][1], P[7][2]])))),
    Case("people_null_id", INPUT, ("people.csv", "'node'", "data row 3"),
         _people_raw(_csv_text(PH, _rows_with(P, 2, ["NULL", P[2][1], P[2][2]])))),
    Case("people_space_id", INPUT, ("people.csv", "'node'", "data row 1"),
         _people_raw(_csv_text(PH, _rows_with(P, 0, ["   ", P[0][1], P[0][2]])))),
    Case("edges_empty_target", INPUT, ("edges.csv", "'target'", "data row 7"),
         _edges_raw(_csv_text(EH, _rows_with(E, 6, [E[6][0], "", E[6][2]])))),
    Case("edges_nan_source", INPUT, ("edges.csv", "'source'", "data row 12"),
         _edges_raw(_csv_text(EH, _rows_with(E, 11, ["nan", E[11][1], E[11][2]])))),
    Case("edges_unknown_people", INPUT, ("edges.csv", "people.csv", "data row 4", "--drop-unknown"),
         _edges_raw(_csv_text(EH, _rows_with(E, 3, [MARK + "ghost", E[3][1], E[3][2]])))),
    Case("edges_all_unknown_dropped", INPUT, ("edges.csv", "no contacts left"),
         lambda s: (_edges_raw(_csv_text(EH, [[MARK + "g1", MARK + "g2", "1"]]))(s), s.extra.append("--drop-unknown"))),
    Case("edges_self_loops_only", INPUT, ("edges.csv", "self-loops"),
         _edges_raw(_csv_text(EH, [[person_id(i), person_id(i), "1"] for i in range(10)]))),
    Case("people_conflicting_duplicate", INPUT, ("people.csv", "conflicting", "data row 61"),
         _people_raw(_csv_text(PH, P + [[P[4][0], P[5][1], P[4][2]]]))),
    Case("people_empty_attribute", INPUT, ("people.csv", "'age_band'", "data row 10"),
         _people_raw(_csv_text(PH, _rows_with(P, 9, [P[9][0], "", P[9][2]])))),
    # ---------------------------------------------------------------- columns
    Case("edges_missing_target_column", INPUT, ("edges.csv", "'target'"),
         _edges_raw(_csv_text(["source", "dest", "weight"], E))),
    Case("people_missing_id_column", INPUT, ("people.csv", "'node'"),
         _people_raw(_csv_text(["id", "age_band", "district"], P))),
    Case("people_missing_attribute_column", INPUT, ("people.csv", "'district'"),
         _people_raw(_csv_text(["node", "age_band"], [r[:2] for r in P]))),
    Case("weight_column_missing", INPUT, ("edges.csv", "'minutes'"), _extra("--weight-column", "minutes")),
    # ---------------------------------------------------------------- weights
    Case("weight_negative", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("-3")),
    Case("weight_nan", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("NaN")),
    Case("weight_infinite", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("inf")),
    Case("weight_minus_infinite", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("-Infinity")),
    Case("weight_text", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case(MARK + "heavy")),
    Case("weight_empty", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("")),
    Case("weight_overflow_double", INPUT, ("edges.csv", "'weight'", "data row 10"), _weight_case("1e999")),
    # ---------------------------------------------------------------- Parquet
    Case("parquet_edges_float_ids", INPUT, ("edges.parquet", "'source'", "DOUBLE"),
         _parquet_edges(source=[float(i) for i in range(200)])),
    Case("parquet_edges_bool_ids", INPUT, ("edges.parquet", "'target'", "BOOLEAN"),
         _parquet_edges(target=[i % 2 == 0 for i in range(200)])),
    Case("parquet_edges_list_ids", INPUT, ("edges.parquet", "'source'", "ids must be"),
         _parquet_edges(source=[[person_id(i % 60)] for i in range(200)])),
    Case("parquet_people_float_ids", INPUT, ("people.parquet", "'node'", "DOUBLE"),
         _parquet_people(node=[float(i) for i in range(60)])),
    Case("parquet_people_decimal_ids", INPUT, ("people.parquet", "'node'", "DECIMAL"),
         _parquet_people(node=pa.array([i for i in range(60)], pa.decimal128(38, 0)))),
    Case("parquet_edges_bool_weight", INPUT, ("edges.parquet", "'weight'", "not numeric"),
         lambda s: (_parquet_edges(weight=[True] * 200)(s), s.extra.extend(["--weight-column", "weight"]))),
    Case("parquet_edges_text_weight", INPUT, ("edges.parquet", "'weight'", "data row 1"),
         lambda s: (_parquet_edges(weight=[MARK + "x"] * 200)(s), s.extra.extend(["--weight-column", "weight"]))),
    Case("parquet_edges_nan_weight", INPUT, ("edges.parquet", "'weight'", "data row 3"),
         lambda s: (_parquet_edges(weight=[1.0, 2.0, math.nan] + [1.0] * 197)(s),
                    s.extra.extend(["--weight-column", "weight"]))),
    Case("parquet_edges_null_ids", INPUT, ("edges.parquet", "data row 2"),
         _parquet_edges(source=[person_id(0), None] + [person_id(i % 60) for i in range(2, 200)])),
    Case("parquet_empty_table", INPUT, ("edges.parquet", "no rows"),
         lambda s: s.edges_parquet(edges_table().slice(0, 0))),
    Case("parquet_truncated", INPUT, ("edges.parquet", "Parquet"), _damaged_parquet("truncated")),
    Case("parquet_bad_magic", INPUT, ("edges.parquet", "Parquet"), _damaged_parquet("bad_magic")),
    Case("parquet_corrupt_footer", INPUT, ("edges.parquet",), _damaged_parquet("footer")),
    Case("parquet_random_bytes", INPUT, ("edges.parquet",), _damaged_parquet("random")),
    Case("parquet_name_csv_content", INPUT, ("edges.parquet", "Parquet"),
         _edges_raw(_csv_text(EH, E), name="edges.parquet")),
    # ---------------------------------------------------------------- policy
    Case("policy_toml_syntax", POLICY, ("policy.toml", "TOML syntax error", "line 3"),
         lambda s: s.write_policy("[privacy]\nunit = \"edge\"\nepsilon = = 1\n")),
    Case("policy_not_utf8", POLICY, ("policy.toml", "UTF-8"),
         lambda s: s.policy.write_bytes(POLICY_TEXT.encode().replace(b"edge", b"\xe9dge"))),
    Case("policy_empty", POLICY, ("[privacy]",), lambda s: s.write_policy("")),
    Case("policy_unknown_key", POLICY, ("'privacy.epsilom'", "did you mean 'epsilon'"),
         _policy_replace("epsilon = 1.0", "epsilon = 1.0\nepsilom = 2.0")),
    Case("policy_unknown_section", POLICY, ("'grupping'", "did you mean 'grouping'"),
         lambda s: s.write_policy(POLICY_TEXT + "\n[grupping]\nmin_size = 3\n")),
    Case("policy_misspelt_min_size", POLICY, ("'grouping.minsize'", "did you mean 'min_size'"),
         _policy_replace("min_size = 5", "min_size = 5\nminsize = 5")),
    Case("policy_section_not_table", POLICY, ("privacy",), lambda s: s.write_policy(
        "privacy = 3\n" + POLICY_TEXT.split("\n\n", 1)[1])),
    Case("epsilon_zero", POLICY, ("'privacy.epsilon'", "> 0"), _policy_replace("epsilon = 1.0", "epsilon = 0")),
    Case("epsilon_negative", POLICY, ("'privacy.epsilon'", "> 0"),
         _policy_replace("epsilon = 1.0", "epsilon = -0.5")),
    Case("epsilon_nan", POLICY, ("'privacy.epsilon'", "finite"), _policy_replace("epsilon = 1.0", "epsilon = nan")),
    Case("epsilon_infinite", POLICY, ("'privacy.epsilon'", "finite"),
         _policy_replace("epsilon = 1.0", "epsilon = inf")),
    Case("epsilon_string", POLICY, ("'privacy.epsilon'", "must be a number"),
         _policy_replace("epsilon = 1.0", 'epsilon = "1.0"')),
    Case("epsilon_boolean", POLICY, ("'privacy.epsilon'", "must be a number"),
         _policy_replace("epsilon = 1.0", "epsilon = true")),
    Case("epsilon_missing", POLICY, ("'privacy.epsilon'",), _policy_replace("epsilon = 1.0\n", "")),
    Case("unit_unknown", POLICY, ("'privacy.unit'", "must be one of"),
         _policy_replace('unit = "edge"', 'unit = "node"')),
    Case("min_size_zero", POLICY, ("'grouping.min_size'", ">= 1"), _policy_replace("min_size = 5", "min_size = 0")),
    Case("min_size_negative", POLICY, ("'grouping.min_size'",), _policy_replace("min_size = 5", "min_size = -4")),
    Case("min_size_float", POLICY, ("'grouping.min_size'", "integer"),
         _policy_replace("min_size = 5", "min_size = 5.5")),
    Case("min_size_string", POLICY, ("'grouping.min_size'", "integer"),
         _policy_replace("min_size = 5", 'min_size = "5"')),
    Case("min_size_above_population", PRIVACY, ("'grouping.min_size'", "population"),
         _policy_replace("min_size = 5", "min_size = 61")),
    Case("attributes_not_a_list", POLICY, ("'grouping.attributes'", "list of strings"),
         _policy_replace('attributes = ["age_band", "district"]', 'attributes = "age_band"')),
    Case("attributes_repeated", POLICY, ("'grouping.attributes'", "twice"),
         _policy_replace('attributes = ["age_band", "district"]', 'attributes = ["age_band", "age_band"]')),
    Case("attribute_not_in_people", INPUT, ("people.csv", "'zone'"),
         _policy_replace('attributes = ["age_band", "district"]', 'attributes = ["age_band", "zone"]')),
    # ---------------------------------------------------------------- output
    Case("out_is_a_file", OUTPUT, ("bundle", "not a folder"), _out_is_file),
    Case("out_parent_is_a_file", OUTPUT, ("afile", "not a folder"), _out_parent_is_file),
    Case("out_parent_missing", OUTPUT, ("such", "does not exist"), _out_parent_missing),
    Case("out_existing_bundle", OUTPUT, ("bundle", "already exists", "--overwrite"), _existing_bundle),
    Case("out_foreign_folder_overwrite", OUTPUT, ("bundle", "not a bundle"), _nonbundle_folder),
    Case("out_is_the_input_folder", OUTPUT, ("in", "would be the folder of input"), _out_is_input_folder),
    Case("out_holds_the_inputs", OUTPUT, ("lies inside the bundle folder", "--overwrite"), _out_holds_inputs),
    Case("report_holds_the_inputs", OUTPUT, ("lies inside the report folder",),
         _extra("--report", "REPLACED")),
    Case("out_unwritable_proc", OUTPUT, ("/proc",), _out_under_proc),
    Case("out_is_the_edge_file", OUTPUT, ("edges.csv",), lambda s: setattr(s, "out", s.edges)),
    # ---------------------------------------------------------------- command line
    Case("usage_unknown_option", USAGE, ("--bogus",), _extra("--bogus")),
    Case("usage_seed_not_integer", USAGE, ("--seed",), _extra("--seed", "abc")),
    Case("usage_unknown_engine", USAGE, ("--engine",), _extra("--engine", "abacus")),
]


def test_normal_release_logs_no_private_values(tmp_path, capsys):
    """Progress lines, the summary and the check output of a successful release name no id or value."""
    s = Scenario(tmp_path)
    rc, out, err = _run(capsys, s.argv() + ["--seed", "1"])
    assert rc == 0 and "reading edges and people" in err
    rc2, out2, err2 = _run(capsys, ["check", str(s.out)])
    assert rc2 == 0
    assert MARK not in out + err + out2 + err2


def _run(capsys, argv):
    rc = main(argv)
    out, err = capsys.readouterr()
    return rc, out, err


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_malformed_input(case, tmp_path, capsys):
    s = Scenario(tmp_path)
    case.setup(s)
    s.extra = [str(s.root) if a == "REPLACED" else a for a in s.extra]
    capsys.readouterr()
    before = tree_snapshot(tmp_path)
    rc, out, err = _run(capsys, s.argv())
    lines = error_lines(err)
    assert rc == case.code, (rc, err)
    assert len(lines) == 1, err
    assert "Traceback" not in out + err
    for name in case.names:
        assert name in lines[0], (name, lines[0])
    if case.code == POLICY:
        assert s.policy.name in lines[0]
    assert MARK not in out + err, "a private value leaked into the output"
    assert tree_snapshot(tmp_path) == before, "something was written or an input changed"


def test_battery_size():
    """Issue 7 asks for at least 40 malformed inputs."""
    assert len(CASES) >= 40
    assert len({c.name for c in CASES}) == len(CASES)


def test_missing_required_argument(capsys):
    rc = main(["release", "--edges", "e.csv"])
    _, err = capsys.readouterr()
    assert rc == USAGE and "--policy" in err and len(error_lines(err)) == 1


def test_no_command_prints_help(capsys):
    assert main([]) == USAGE
    assert "exit codes" in capsys.readouterr().out


def test_help_documents_exit_codes(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["release", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    for code, word in ((2, "usage"), (3, "input"), (4, "policy"), (5, "privacy"), (6, "gate"), (7, "output"),
                       (8, "bundle"), (9, "internal")):
        assert f"{code} {word}" in text


def test_read_only_mount(tmp_path, capsys):
    """A folder on a read-only file system (needs root to mount; skipped otherwise)."""
    ro = tmp_path / "ro"
    ro.mkdir()
    if os.geteuid() != 0 or subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=64k", "tmpfs", str(ro)],
                                           capture_output=True).returncode:
        pytest.skip("cannot mount a read-only tmpfs here")
    try:
        s = Scenario(tmp_path / "case")
        s.out = ro / "bundle"
        before = tree_snapshot(tmp_path / "case")
        rc, out, err = _run(capsys, s.argv())
        assert rc == OUTPUT and len(error_lines(err)) == 1, err
        assert str(ro) in error_lines(err)[0]
        assert os.listdir(ro) == []
        assert tree_snapshot(tmp_path / "case") == before
    finally:
        subprocess.run(["umount", str(ro)], check=False)


# --------------------------------------------------------------------------- accepted inputs (decisions)


def _release_ok(s, capsys, *extra):
    before = {p: tree_snapshot(p.parent)[p.name] for p in (s.edges, s.people, s.policy)}
    rc, out, err = _run(capsys, s.argv() + ["--quiet", "--seed", "3", *extra])
    assert rc == 0, err
    assert MARK not in err
    res = check_bundle(s.out)
    assert res.ok, res.problems
    after = {p: tree_snapshot(p.parent)[p.name] for p in (s.edges, s.people, s.policy)}
    assert after == before, "an input file was modified"
    return res


def test_bom_is_accepted(tmp_path, capsys):
    s = Scenario(tmp_path)
    s.edges.write_bytes(b"\xef\xbb\xbf" + s.edges.read_bytes())
    s.people.write_bytes(b"\xef\xbb\xbf" + s.people.read_bytes())
    _release_ok(s, capsys)


def test_bom_tsv_and_crlf_are_accepted(tmp_path, capsys):
    s = Scenario(tmp_path)
    s.write_edges(edge_rows(), name="edges.tsv", delimiter="\t", newline="\r\n")
    s.edges.write_bytes(b"\xef\xbb\xbf" + s.edges.read_bytes())
    _release_ok(s, capsys, "--weight-column", "weight")


def test_ids_beyond_64_bits_as_text(tmp_path, capsys):
    """CSV ids are text: 2**64 and -(2**63)-1 are ordinary ids."""
    s = Scenario(tmp_path)
    big = {person_id(i): str(2 ** 64 + i) if i % 2 else str(-(2 ** 63) - 1 - i) for i in range(60)}
    s.write_people([[big[r[0]], r[1], r[2]] for r in people_rows()])
    s.write_edges([[big[r[0]], big[r[1]], r[2]] for r in edge_rows()])
    res = _release_ok(s, capsys)
    assert res.ok


def test_uint64_parquet_ids_join_csv_text_ids(tmp_path, capsys):
    """A Parquet uint64 id above 2**63 matches the same digits in a CSV person file."""
    s = Scenario(tmp_path)
    ids = {person_id(i): 2 ** 64 - 1 - i for i in range(60)}
    s.write_people([[str(ids[r[0]]), r[1], r[2]] for r in people_rows()])
    e = edge_rows()
    s.edges_parquet(pa.table({"source": pa.array([ids[r[0]] for r in e], pa.uint64()),
                              "target": pa.array([ids[r[1]] for r in e], pa.uint64())}))
    _release_ok(s, capsys)


def test_leading_zeros_are_kept(tmp_path):
    """'007' and '7' are different people (ids are text, never re-typed)."""
    from aggpub.ingest import load_network

    s = Scenario(tmp_path)
    s.write_people([["007", "a", "x"], ["7", "a", "x"], ["8", "a", "x"]], header=("node", "age_band", "district"))
    s.write_edges([["007", "7", "1"], ["7", "8", "1"]])
    net = load_network(s.edges, s.people)
    assert net.n_people == 3 and net.n_edges == 2


def test_identical_duplicate_people_are_collapsed(tmp_path, capsys):
    s = Scenario(tmp_path)
    s.write_people(people_rows() + people_rows()[:5])
    _release_ok(s, capsys)


def test_bundle_beside_its_inputs_is_fine(tmp_path, capsys):
    """The README's layout: inputs and the new bundle folder side by side in one folder (issue 14.1)."""
    s = Scenario(tmp_path)
    s.out = s.root / "in" / "bundle"
    _release_ok(s, capsys)


def test_demo_writes_inputs_beside_not_inside(tmp_path, capsys):
    """``aggpub demo`` puts its invented inputs in a sibling folder, never around the bundle."""
    out = tmp_path / "demo" / "bundle"
    out.parent.mkdir()
    assert main(["demo", "--out", str(out), "--people", "2000", "--seed", "1", "--quiet"]) == 0
    inputs = tmp_path / "demo" / "bundle-inputs"
    assert inputs.is_dir() and check_bundle(out).ok
    assert sorted(p.name for p in out.iterdir()) == sorted(
        ["manifest.json", "README.md"] + [n for n in os.listdir(out) if n.endswith(".parquet")])
    assert out not in inputs.parents and inputs not in out.parents


# --------------------------------------------------------------------------- debug and subprocess


def test_debug_shows_the_private_detail(tmp_path, capsys):
    """With --debug the exception (and so the private detail) reaches the developer."""
    s = Scenario(tmp_path)
    s.write_edges(_rows_with(edge_rows(), 4, edge_rows()[4] + ["extra" + MARK]))
    with pytest.raises(InputError) as exc:
        main(s.argv() + ["--debug"])
    assert MARK in str(exc.value)


# one per error class; each starts a Python process (seconds, mostly importing scikit-learn)
SUBPROCESS_CASES = ["people_conflicting_duplicate", "policy_unknown_key", "out_parent_is_a_file",
                    "usage_unknown_option"]


@pytest.mark.heavy
@pytest.mark.parametrize("name", SUBPROCESS_CASES)
def test_subprocess_no_traceback(name, tmp_path):
    case = next(c for c in CASES if c.name == name)
    s = Scenario(tmp_path)
    case.setup(s)
    before = tree_snapshot(tmp_path)
    proc = subprocess.run([sys.executable, "-m", "aggpub", *s.argv()], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == case.code, proc.stderr
    assert "Traceback" not in proc.stderr + proc.stdout
    assert len(error_lines(proc.stderr)) == 1
    assert MARK not in proc.stderr + proc.stdout
    assert tree_snapshot(tmp_path) == before


def test_unexpected_exception_is_one_line(tmp_path, capsys, monkeypatch):
    """A bug (not an AggpubError) still gives one line and exit 9, no traceback, no private value."""
    import aggpub.pipeline as pipeline

    def boom(*a, **k):
        raise ValueError(f"internal detail {MARK}")

    monkeypatch.setattr(pipeline, "build_release", boom)
    s = Scenario(tmp_path)
    rc, out, err = _run(capsys, s.argv())
    assert rc == 9 and len(error_lines(err)) == 1 and "ValueError" in err
    assert MARK not in err and "Traceback" not in err


def test_every_error_class_has_a_distinct_documented_code():
    from aggpub import errors

    classes = [getattr(errors, n) for n in errors.__all__ if isinstance(getattr(errors, n), type)]
    assert all(issubclass(c, AggpubError) for c in classes)
    codes = {c.__name__: c.exit_code for c in classes}
    assert codes == {"AggpubError": 9, "UsageError": 2, "InputError": 3, "PolicyError": 4, "PrivacyError": 5,
                     "BudgetError": 5, "GateError": 6, "OutputError": 7, "BundleError": 8}
    for c in classes:
        assert f"``{c.__name__}``" in errors.__doc__
