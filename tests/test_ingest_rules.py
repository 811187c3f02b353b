"""Ingest rules written once (issue 16) and missing-column messages (issue 14.5).

* A missing column names the columns found when they are column names (a CSV
  header, a Parquet or Arrow schema) and never when a CSV "header" may be a data
  line (a headerless file: its fields are private ids); the header heuristic
  decides, and ``debug`` shows them anyway.
* The dense numbering of people (person ``i`` is the ``i``-th distinct id in
  order of first appearance, an identical repeat collapsed, a conflicting one
  refused naming both rows) checked against a plain-Python reference on random
  tables.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from aggpub.engines.interface import PeopleColumns
from aggpub.errors import InputError
from aggpub.ingest import load_network
from aggpub.ingest._columns import looks_like_header
from aggpub.ingest._people import dense_people, missing_id_mask

PEOPLE_CSV = "node,age_band\np17,a\np42,b\np99,a\n"


def _write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


def _error(edges, people, **kw) -> str:
    with pytest.raises(InputError) as info:
        load_network(edges, people, **kw)
    return str(info.value)


# ------------------------------------------------------------------------------------- missing columns


def test_a_real_header_is_named_when_a_column_is_missing(tmp_path):
    edges = _write(tmp_path, "e.csv", "source,dest,minutes\np17,p42,3\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))
    assert msg == (f"{edges}: no column 'target' (columns found: 'source', 'dest', 'minutes'); "
                   "name the right one with --target-column or [input] target")


def test_a_near_miss_header_is_named_with_the_suggestion(tmp_path):
    edges = _write(tmp_path, "e.csv", "sourc,targt\np17,p42\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))
    assert msg == (f"{edges}: no column 'source' (did you mean 'sourc'?) (columns found: 'sourc', 'targt'); "
                   "name the right one with --source-column or [input] source")


def test_a_headerless_file_keeps_its_first_line_private(tmp_path):
    edges = _write(tmp_path, "e.csv", "p17,p42\np42,p99\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))
    assert msg == (f"{edges}: no column 'source' (none of the 2 header fields is an expected column: "
                   "is the first line a header?); name the right one with --source-column or [input] source")
    assert "p17" not in msg and "p42" not in msg
    # a near miss of the asked name holding digits reads as an id, not as a column name
    edges = _write(tmp_path, "f.csv", "source1,p42\np42,p99\n")
    assert "source1" not in _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))


def test_debug_names_the_first_line_anyway(tmp_path):
    edges = _write(tmp_path, "e.csv", "p17,p42\np42,p99\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV), debug=True)
    assert "columns found: 'p17', 'p42'" in msg


def test_a_headerless_person_file_keeps_its_first_line_private(tmp_path):
    people = _write(tmp_path, "p.csv", "p17,a\np42,b\n")
    msg = _error(_write(tmp_path, "e.csv", "source,target\np17,p42\n"), people)
    assert msg == (f"{people}: no id column 'node' (none of the 2 header fields is an expected column: "
                   "is the first line a header?); name the right one with --node-column or [input] node")


def test_a_missing_attribute_names_the_person_header(tmp_path):
    people = _write(tmp_path, "p.csv", PEOPLE_CSV)
    msg = _error(_write(tmp_path, "e.csv", "source,target\np17,p42\n"), people, attributes=["area"])
    assert msg == f"{people}: no attribute column 'area' (columns found: 'node', 'age_band')"


def test_parquet_and_arrow_column_names_are_always_named(tmp_path):
    """Schema names are column names even when none is expected (a CSV header could be data)."""
    table = pa.table({"from": ["p17"], "to": ["p42"]})
    pq.write_table(table, tmp_path / "e.parquet")
    people = _write(tmp_path, "p.csv", PEOPLE_CSV)
    hint = "; name the right one with --source-column or [input] source"
    assert _error(tmp_path / "e.parquet", people) == \
        f"{tmp_path / 'e.parquet'}: no column 'source' (columns found: 'from', 'to')" + hint
    assert _error(table, people) == "edge table: no column 'source' (columns found: 'from', 'to')" + hint


def test_a_long_header_is_cut_after_twenty_names(tmp_path):
    names = [f"col{i}" for i in range(25)] + ["source"]
    edges = _write(tmp_path, "e.csv", ",".join(names) + "\n" + ",".join("x" * len(names)) + "\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))
    assert msg.endswith("'col18', 'col19' and 6 more); name the right one with --target-column or [input] target")
    assert "'col20'" not in msg


def test_the_delimiter_hint_is_kept_for_a_single_field_first_line(tmp_path):
    edges = _write(tmp_path, "e.csv", "p17;p42\n")
    msg = _error(edges, _write(tmp_path, "p.csv", PEOPLE_CSV))
    assert "';'-delimited" in msg and "p17" not in msg


@pytest.mark.parametrize("asked, found, expected, header", [
    ("target", ["source", "dest"], ["source", "target"], True),    # an expected column is present
    ("source", ["sourc", "targt"], ["source", "target"], True),    # near miss, no digit
    ("source", ["p17", "p42"], ["source", "target"], False),       # ids
    ("source", ["source1", "x"], ["source", "target"], False),     # near miss with a digit
    ("source", ["from", "to"], ["source", "target"], False),       # cannot tell: kept private
])
def test_header_heuristic(asked, found, expected, header):
    assert looks_like_header(asked, found, expected) is header


# ------------------------------------------------------------------------------------- dense people


def _reference(ids, attrs):
    """Plain-Python reference: first-appearance order, identical repeats collapsed, conflicts found."""
    first, order = {}, []
    for row, (i, a) in enumerate(zip(ids, attrs)):
        if i not in first:
            first[i] = row
            order.append(i)
        elif attrs[first[i]] != a:
            return None
    return order, [attrs[first[i]] for i in order]


@pytest.mark.parametrize("integer", [False, True])
@pytest.mark.parametrize("seed", range(40))
def test_dense_people_against_a_plain_python_reference(seed, integer):
    """Text ids, and integer ids (the engine's native integers beside their text: the path that checks
    repeats on the integers), with and without repeats, against a plain-Python reference."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 40))
    if seed % 2:  # repeats likely
        numbers = rng.integers(0, max(1, n // 2 + 1), n)
    else:  # all distinct, in file order or not, negative and large ids among them
        numbers = rng.permutation(n) * (2 ** 40) - 7 if seed % 4 else np.arange(n) + 1
    ids = [str(int(x)) if integer else f"p{x}" for x in numbers]
    band = {i: f"b{rng.integers(0, 3)}" for i in set(ids)}
    attrs = [(band[i], "x") for i in ids]
    if seed % 3 == 0:  # now and then a conflicting repeat
        row = int(rng.integers(0, n))
        attrs[row] = (attrs[row][0] + "!", "x")
    read = PeopleColumns(ids=pa.array(ids), native_ids=pa.array(numbers, pa.int64()) if integer else None,
                         attributes=pa.table({"band": [a[0] for a in attrs], "k": [a[1] for a in attrs]}))
    ref = _reference(ids, attrs)
    if ref is None:
        with pytest.raises(InputError, match="conflicting attributes"):
            dense_people("people.csv", "node", read)
        return
    people = dense_people("people.csv", "node", read)
    assert people.ids.to_pylist() == ref[0]
    assert list(zip(*[people.attributes.column(c).to_pylist() for c in ("band", "k")])) == ref[1]
    assert people.id_table.column("idx").to_pylist() == list(range(len(ref[0])))
    assert people.rows == n
    if integer:
        assert people.id_table.column("nid").to_pylist() == [int(i) for i in ref[0]]


def test_a_missing_integer_id_is_refused_like_a_missing_text_id():
    """The integer path reads nulls from the engine's integers: the same refusal, the same row."""
    attrs = pa.table({"band": ["1", "2", "3"]})
    for native in (pa.array([5, None, 7], pa.int64()), None):
        read = PeopleColumns(ids=pa.array(["5", None, "7"]), native_ids=native, attributes=attrs)
        with pytest.raises(InputError, match=r"1 row\(s\) have an empty or missing id .* data row 2\)"):
            dense_people("people.csv", "node", read)


def test_conflicting_repeat_names_its_first_row_and_the_first_differing_row():
    ids = ["a", "b", "c", "b", "a", "b", "a"]
    band = ["1", "2", "3", "2", "1", "9", "7"]
    read = PeopleColumns(ids=pa.array(ids), native_ids=None, attributes=pa.table({"band": band}))
    with pytest.raises(InputError) as info:
        dense_people("people.csv", "node", read)
    # b conflicts at data row 6 and a at row 7; a appears first (row 1), so its rows are named;
    # two ids conflict: two more distinct (id, attributes) pairs than ids
    assert str(info.value) == ("people.csv: 2 person id(s) appear more than once with conflicting attributes "
                               "(first at data row 1, again with other attributes at data row 7)")


def test_people_without_attributes_keep_their_row_count():
    read = PeopleColumns(ids=pa.array(["a", "b", "a"]), native_ids=pa.array([1, 2, 1]),
                         attributes=pa.table({"_": [None] * 3}).select([]))
    people = dense_people("people.csv", "node", read)
    assert people.attributes.num_rows == 2 and people.attributes.num_columns == 0
    assert people.id_table.column("nid").to_pylist() == [1, 2]


def test_missing_id_spellings():
    """Only spaces (U+0020) are trimmed, as in both engines' SQL."""
    ids = pa.array(["", " ", "NaN", " n/a ", "NULL", "None", "na", None, "nan1", "0", "\tnan", "\u00a0nan"])
    assert missing_id_mask(ids).tolist() == [True, True, True, True, True, True, True, True,
                                             False, False, False, False]
