"""Ingest: formats, dense ids, self-loops, duplicates, unknown people."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from aggpub import load_network
from aggpub.errors import InputError

PEOPLE_CSV = "node,age_band,area\np1,0-4,a1\np2,0-4,a1\np3,5-9,a2\np4,5-9,a2\n"
EDGES_CSV = "source,target\np1,p2\np2,p1\np2,p3\np3,p3\np4,p1\np1,p2\n"


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_csv_string_ids_self_loops_and_duplicates(tmp_path):
    net = load_network(write(tmp_path, "e.csv", EDGES_CSV), write(tmp_path, "p.csv", PEOPLE_CSV))
    r = net.report
    assert (r.edge_rows, r.edges, r.self_loops_dropped, r.duplicate_rows_collapsed) == (6, 3, 1, 2)
    assert net.n_people == 4 and net.people.column_names == ["age_band", "area"]
    u, v = net.engine.edge_arrays()
    assert sorted(zip(u.tolist(), v.tolist())) == [(0, 1), (0, 3), (1, 2)]  # dense ids in file order
    assert net.engine.degrees(4).tolist() == [2, 2, 1, 1]


def test_tsv_and_parquet_and_integer_ids(tmp_path):
    write(tmp_path, "e.tsv", "a\tb\n1\t2\n2\t3\n")
    pq.write_table(pa.table({"id": [1, 2, 3], "g": ["x", "y", "x"]}), tmp_path / "p.parquet")
    net = load_network(tmp_path / "e.tsv", tmp_path / "p.parquet", source="a", target="b", node="id")
    assert net.n_edges == 2
    pq.write_table(pa.table({"source": [3, 1], "target": [1, 2]}), tmp_path / "e.parquet")
    net = load_network(tmp_path / "e.parquet", tmp_path / "p.parquet", node="id")
    assert net.n_edges == 2 and net.report.people == 3


def test_unknown_people_error_or_drop(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target\np1,p2\np1,zz\nyy,p2\n")
    people = write(tmp_path, "p.csv", PEOPLE_CSV)
    with pytest.raises(InputError, match="2 edge row\\(s\\) name people missing"):
        load_network(edges, people)
    net = load_network(edges, people, drop_unknown=True)
    assert net.n_edges == 1 and net.report.unknown_person_rows_dropped == 2


def test_missing_column_suggests(tmp_path):
    with pytest.raises(InputError, match="no column 'src'"):
        load_network(write(tmp_path, "e.csv", EDGES_CSV), write(tmp_path, "p.csv", PEOPLE_CSV), source="src")
    with pytest.raises(InputError, match="did you mean 'node'"):
        load_network(write(tmp_path, "e.csv", EDGES_CSV), write(tmp_path, "p.csv", PEOPLE_CSV), node="nod")


def test_conflicting_duplicate_person_rows(tmp_path):
    people = write(tmp_path, "p.csv", PEOPLE_CSV + "p2,5-9,a1\n")
    with pytest.raises(InputError, match="conflicting attributes") as exc:
        load_network(write(tmp_path, "e.csv", EDGES_CSV), people)
    assert "p2" not in str(exc.value)  # names rows, not private ids
    same = write(tmp_path, "q.csv", PEOPLE_CSV + "p2,0-4,a1\n")
    net = load_network(write(tmp_path, "e.csv", EDGES_CSV), same)
    assert net.n_people == 4 and net.report.duplicate_person_rows_collapsed == 1


def test_weights_summed_over_duplicates(tmp_path):
    edges = write(tmp_path, "e.csv", "source,target,w\np1,p2,5\np2,p1,7\np3,p4,1.5\n")
    net = load_network(edges, write(tmp_path, "p.csv", PEOPLE_CSV), weight="w")
    a, b, t = net.engine.weight_totals([0, 0, 1, 1], clip=100)
    assert dict(zip(zip(a.tolist(), b.tolist()), t.tolist())) == {(0, 0): 12, (1, 1): 2}
    bad = write(tmp_path, "b.csv", "source,target,w\np1,p2,-5\n")
    with pytest.raises(InputError, match="negative"):
        load_network(bad, write(tmp_path, "p.csv", PEOPLE_CSV), weight="w")


@pytest.mark.parametrize("content, message", [
    ("", "is empty"),
    ("source,target\n", "no rows"),
    ("source,target\np1,p1\n", "no contacts left"),
    ("source,target\np1,\n", "empty 'source' or 'target'"),
])
def test_bad_edge_files(tmp_path, content, message):
    with pytest.raises(InputError, match=message):
        load_network(write(tmp_path, "e.csv", content), write(tmp_path, "p.csv", PEOPLE_CSV))


def test_missing_files(tmp_path):
    with pytest.raises(InputError, match="edge file not found"):
        load_network(tmp_path / "nope.csv", write(tmp_path, "p.csv", PEOPLE_CSV))
    with pytest.raises(InputError, match="person file not found"):
        load_network(write(tmp_path, "e.csv", EDGES_CSV), tmp_path / "nope.csv")


def test_degrees_are_kept_per_load_and_forgotten_on_reload(tmp_path):
    from aggpub.engines import make_engine

    engine = make_engine("duckdb")
    people = write(tmp_path, "p.csv", PEOPLE_CSV)
    load_network(write(tmp_path, "e.csv", EDGES_CSV), people, engine=engine)
    first = engine.degrees(4)
    first[:] = 99  # callers get a copy; the kept value is not changed
    assert engine.degrees(4).tolist() == [2, 2, 1, 1]
    load_network(write(tmp_path, "f.csv", "source,target\np3,p4\n"), people, engine=engine)
    assert engine.degrees(4).tolist() == [0, 0, 1, 1]


@pytest.mark.parametrize("offset", [0, 100, -5])
def test_contiguous_integer_ids_map_like_the_join(tmp_path, offset):
    # Native integer ids offset, offset + 1, ... in file order take the arithmetic path of the DuckDB
    # engine; the same people listed out of order take the join. Both must give the same contacts, the
    # same report (unknown, self-loop, duplicate rows) and the same dense ids per person.
    import numpy as np

    rng = np.random.default_rng(offset + 10)
    n = 40
    src = rng.integers(offset - 3, offset + n + 3, 300)  # some ends outside the ids: unknown people
    tgt = rng.integers(offset - 3, offset + n + 3, 300)
    edges = pa.table({"source": pa.array(src, pa.int64()), "target": pa.array(tgt, pa.int64())})
    pq.write_table(edges, tmp_path / "e.parquet")
    ids = np.arange(offset, offset + n)
    pq.write_table(pa.table({"node": ids, "g": ["x"] * n}), tmp_path / "p_in_order.parquet")
    perm = rng.permutation(n)
    pq.write_table(pa.table({"node": ids[perm], "g": ["x"] * n}), tmp_path / "p_shuffled.parquet")
    a = load_network(tmp_path / "e.parquet", tmp_path / "p_in_order.parquet", drop_unknown=True)
    b = load_network(tmp_path / "e.parquet", tmp_path / "p_shuffled.parquet", drop_unknown=True)
    assert a.report == b.report
    assert a.report.unknown_person_rows_dropped > 0
    ua, va = a.engine.edge_arrays()
    ub, vb = b.engine.edge_arrays()
    # person of dense id i: ids[i] in file order, ids[perm[i]] when shuffled
    pa_ = {tuple(sorted((int(ids[x]), int(ids[y])))) for x, y in zip(ua, va)}
    pb_ = {tuple(sorted((int(ids[perm[x]]), int(ids[perm[y]])))) for x, y in zip(ub, vb)}
    assert pa_ == pb_ and len(pa_) == a.n_edges
    # the reference: distinct unordered pairs of known, different people, computed in Python
    known = set(ids.tolist())
    ref = {tuple(sorted((int(x), int(y)))) for x, y in zip(src, tgt) if x in known and y in known and x != y}
    assert pa_ == ref
