"""Collapsing repeated contacts in numpy (the DuckDB engine's path for inputs without weight or layer that fit
its memory limit) against DuckDB's GROUP BY (the path for the rest) and against a plain Python reference.

The reference is the definition of the ingest report (``aggpub.engines.interface.EdgeCounts``) written
row by row in Python: a row with a missing end is missing; else a row naming an id absent from the person
table is unknown; else equal ends are a self-loop; else the row's unordered pair is a contact, kept once.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import aggpub.engines._duckdb as duck
from aggpub import load_network
from aggpub.engines._duckdb import DuckDBEngine, PairCollapser, _setting_bytes, collapse_pairs
from aggpub.engines.interface import TEXT, ColumnType, EdgeColumns
from aggpub.ingest import MISSING_ID_SPELLINGS, input_source
from aggpub.ingest._people import read_people

#: the ingest rule's definition of a missing id (a null, or one of these spellings after trimming, any case)
MISSING_SPELLINGS = {None, *MISSING_ID_SPELLINGS}


def reference(src, tgt, people):
    """``(rows, missing, unknown, self_loops, duplicates, {distinct unordered pairs of people ids})``."""
    known = set(people)
    missing = unknown = loops = duplicates = 0
    pairs = set()
    for a, b in zip(src, tgt):
        if any(x is None or str(x).strip().lower() in MISSING_SPELLINGS for x in (a, b)):
            missing += 1
        elif a not in known or b not in known:
            unknown += 1
        elif a == b:
            loops += 1
        else:
            pair = tuple(sorted((a, b)))
            duplicates += pair in pairs
            pairs.add(pair)
    return len(src), missing, unknown, loops, duplicates, pairs


def load_both_ways(monkeypatch, edges, people, **kw):
    """The network loaded with the numpy collapse, then with DuckDB's GROUP BY (each forced)."""
    out = {}
    for path, per_row in (("numpy", 1), ("sql", 10 ** 15)):
        monkeypatch.setattr(duck, "NUMPY_COLLAPSE_BYTES_PER_ROW", per_row)
        net = load_network(edges, people, drop_unknown=True, **kw)
        ids = net.ids.to_pylist() if hasattr(net.ids, "to_pylist") else list(net.ids)
        u, v = net.engine.edge_arrays()
        out[path] = (net.report, {frozenset((str(ids[x]), str(ids[y]))) for x, y in zip(u.tolist(), v.tolist())},
                     net.n_edges, net.engine.degrees(net.n_people).tolist())
    return out


def check(out, src, tgt, people):
    rows, missing, unknown, loops, duplicates, pairs = reference(src, tgt, people)
    for path, (report, got, n_edges, _) in out.items():
        assert (report.edge_rows, report.unknown_person_rows_dropped, report.self_loops_dropped,
                report.duplicate_rows_collapsed, report.edges) == (rows, unknown, loops, duplicates, len(pairs)), path
        assert got == {frozenset(map(str, p)) for p in pairs} and n_edges == len(pairs), path
    assert out["numpy"][3] == out["sql"][3]  # the same degrees per person


@pytest.mark.parametrize("ids", ["text", "integer in order", "integer shuffled"])
def test_numpy_collapse_matches_the_group_by_and_the_reference(tmp_path, monkeypatch, ids):
    rng = np.random.default_rng(7)
    n = 60
    people = [f"p{i:03d}" for i in range(n)] if ids == "text" else list(range(100, 100 + n))
    order = rng.permutation(n) if ids == "integer shuffled" else np.arange(n)
    pq.write_table(pa.table({"node": [people[i] for i in order], "g": ["x"] * n}), tmp_path / "p.parquet")
    outsiders = ["zz1", "zz2"] if ids == "text" else [7, 999]
    pool = people + outsiders
    src = [pool[i] for i in rng.integers(0, len(pool), 2000)]
    tgt = [pool[i] for i in rng.integers(0, len(pool), 2000)]
    for i in range(0, 2000, 97):  # self-loops, and the same pair written the other way round
        tgt[i] = src[i]
        src[i + 1], tgt[i + 1] = tgt[i + 2], src[i + 2]
    pq.write_table(pa.table({"source": src, "target": tgt}), tmp_path / "e.parquet")
    out = load_both_ways(monkeypatch, tmp_path / "e.parquet", tmp_path / "p.parquet")
    check(out, src, tgt, people)
    assert out["numpy"][0].self_loops_dropped > 0 and out["numpy"][0].duplicate_rows_collapsed > 0
    assert out["numpy"][0].unknown_person_rows_dropped > 0


def test_csv_with_missing_ids_both_ways(tmp_path, monkeypatch):
    people = ["a", "b", "c", "d"]
    (tmp_path / "p.csv").write_text("node,g\n" + "".join(f"{p},x\n" for p in people))
    rows = [("a", "b"), ("b", "a"), ("a", ""), ("NA", "c"), ("c", "c"), ("c", "zz"), ("d", "a"), ("a", "b"),
            ("null", "zz")]
    (tmp_path / "e.csv").write_text("source,target\n" + "".join(f"{s},{t}\n" for s, t in rows))
    monkeypatch.setattr(duck, "NUMPY_COLLAPSE_BYTES_PER_ROW", 1)
    with pytest.raises(Exception, match="missing"):  # ingest refuses missing ids on either path
        load_network(tmp_path / "e.csv", tmp_path / "p.csv")
    eng = DuckDBEngine()
    counts = {}
    for path, per_row in (("numpy", 1), ("sql", 10 ** 15)):
        monkeypatch.setattr(duck, "NUMPY_COLLAPSE_BYTES_PER_ROW", per_row)
        persons = read_people(eng, input_source(tmp_path / "p.csv", "person", False), "node", None, True)
        spec = EdgeColumns(source="source", target="target", weight=None, source_type=ColumnType(TEXT, "VARCHAR"),
                           target_type=ColumnType(TEXT, "VARCHAR"), weight_type=None,
                           missing_spellings=MISSING_ID_SPELLINGS)
        counts[path] = eng.stage_edges(input_source(tmp_path / "e.csv", "edge", False), spec, persons.id_table)
        eng.discard_staged_edges()
    eng.close()
    n_rows, missing, unknown, loops, duplicates, pairs = reference([s for s, _ in rows], [t for _, t in rows], people)
    for path, c in counts.items():
        assert (c.rows, c.missing_id, c.unknown_person, c.self_loops, c.duplicates, c.edges) == \
            (n_rows, missing, unknown, loops, duplicates, len(pairs)), path
    assert counts["numpy"] == counts["sql"]


def test_collapse_pairs_counts_codes_loops_and_repeats():
    # dense ids 0..4; -2 missing (both ends), -1 unknown
    s = np.array([0, 1, 2, 2, -2, -1, 3, 4, 4, 1], dtype=np.int32)
    t = np.array([1, 0, 2, 3, -2, 3, 2, 0, 0, 0], dtype=np.int32)
    counts, u, v, layer = collapse_pairs(s, t, 5)
    assert (counts.rows, counts.missing_id, counts.unknown_person, counts.self_loops, counts.duplicates,
            counts.edges, counts.bad_weight, counts.bad_layer) == (10, 1, 1, 1, 4, 3, 0, 0)
    assert list(zip(u.tolist(), v.tolist())) == [(0, 1), (0, 4), (2, 3)]  # in key order
    assert u.dtype == v.dtype == np.int32 and layer is None


@pytest.mark.parametrize("stretches", [0, 3, 4096])
def test_both_ways_of_keeping_each_pair_once_against_numpy_unique(monkeypatch, stretches):
    # few repeats: split stretch by stretch; many: slice by slice (slices of 64 rows here, so that a pair's
    # rows straddle a slice's edge), checked against numpy.unique of the ordered pairs
    monkeypatch.setattr(PairCollapser, "MAX_STRETCHES", stretches)
    monkeypatch.setattr(duck, "EDGE_BATCH_ROWS", 64)
    rng = np.random.default_rng(stretches)
    s = rng.integers(0, 30, 3000).astype(np.int32)
    t = rng.integers(0, 30, 3000).astype(np.int32)
    counts, u, v, _ = collapse_pairs(s, t, 30)
    lo, hi = np.minimum(s, t), np.maximum(s, t)
    want = np.unique(np.stack([lo[lo < hi], hi[lo < hi]], axis=1), axis=0)
    assert np.array_equal(np.stack([u, v], axis=1), want)
    assert counts.edges == len(want) and counts.duplicates == int((lo < hi).sum()) - len(want)
    assert counts.self_loops == int((lo == hi).sum())


def test_batches_and_a_short_hint_give_the_same_answer():
    rng = np.random.default_rng(3)
    s = rng.integers(-2, 50, 5000).astype(np.int32)
    t = rng.integers(-2, 50, 5000).astype(np.int32)
    t[s == -2] = -2  # the mapping's rule: a missing end makes both ends missing
    s[t == -2] = -2
    whole = collapse_pairs(s, t, 50)
    c = PairCollapser(50, rows_hint=10)  # grows as batches arrive
    for i in range(0, 5000, 777):
        c.add(s[i:i + 777], t[i:i + 777])
    parts = c.finish()
    assert parts[0] == whole[0]
    assert np.array_equal(parts[1], whole[1]) and np.array_equal(parts[2], whole[2])
    assert parts[3] is None and whole[3] is None


def test_the_memory_limit_chooses_the_path(tmp_path, monkeypatch):
    pq.write_table(pa.table({"source": list(range(1000)), "target": list(range(1, 1001))}), tmp_path / "e.parquet")
    src = input_source(tmp_path / "e.parquet", "edge", False)
    monkeypatch.setattr(duck, "NUMPY_COLLAPSE_BYTES_PER_ROW", 100_000)  # 1,000 rows "need" 100 MB
    eng = DuckDBEngine(memory_limit="300MB")
    assert eng._collapse_in_numpy(src, 1001) == 1000  # the Parquet metadata's row count
    eng.con.execute("SET memory_limit='90MB'")
    assert eng._collapse_in_numpy(src, 1001) is None  # does not fit: DuckDB's GROUP BY
    (tmp_path / "e.csv").write_text("source,target\n" + "".join(f"{i},{i + 1}\n" for i in range(1000)))
    text = input_source(tmp_path / "e.csv", "edge", False)
    eng.con.execute("SET memory_limit='8GB'")
    bound = eng._collapse_in_numpy(text, 1001)
    assert bound is not None and bound >= 1000  # a text file: its size over 4 bounds its rows
    eng.close()


@pytest.mark.parametrize("text, expected", [("2.2 GiB", int(2.2 * 2 ** 30)), ("476.8 MiB", int(476.8 * 2 ** 20)),
                                            ("97.6 KiB", int(97.6 * 1024)), ("300 bytes", 300), ("lots", None),
                                            ("", None), ("1.5 parsecs", None)])
def test_memory_setting_as_duckdb_prints_it(text, expected):
    assert _setting_bytes(text) == expected


LAYERS = ("household", "school", "work", "community")


@pytest.mark.parametrize("stretches", [0, 4096])
def test_layers_keep_each_pairs_first_declared_layer_both_ways(tmp_path, monkeypatch, stretches):
    # the one-layer rule: a pair recorded in several layers counts once, in the first of its layers in the
    # declared order; the numpy collapse (few or many repeats) and the GROUP BY against a Python reference
    monkeypatch.setattr(PairCollapser, "MAX_STRETCHES", stretches)
    rng = np.random.default_rng(11)
    people = [f"q{i:02d}" for i in range(25)]
    (tmp_path / "p.csv").write_text("node,g\n" + "".join(f"{p},x\n" for p in people))
    rows = [(people[a], people[b], LAYERS[c]) for a, b, c in zip(rng.integers(0, 25, 900), rng.integers(0, 25, 900),
                                                                   rng.integers(0, 4, 900))]
    (tmp_path / "e.csv").write_text("source,target,setting\n" + "".join(f"{a},{b},{c}\n" for a, b, c in rows))
    first = {}
    for a, b, c in rows:
        if a != b:
            key = frozenset((a, b))
            first[key] = min(first.get(key, 9), LAYERS.index(c))
    got = {}
    for path, per_row in (("numpy", 1), ("sql", 10 ** 15)):
        monkeypatch.setattr(duck, "NUMPY_COLLAPSE_BYTES_PER_ROW", per_row)
        net = load_network(tmp_path / "e.csv", tmp_path / "p.csv", layer="setting", layer_values=LAYERS)
        ids = list(net.ids.to_pylist() if hasattr(net.ids, "to_pylist") else net.ids)
        res = net.engine.con.execute("SELECT u, v, layer FROM edges").fetchall()
        got[path] = ({frozenset((ids[u], ids[v])): int(lay) for u, v, lay in res}, net.report)
    assert got["numpy"][0] == got["sql"][0] == first
    assert got["numpy"][1] == got["sql"][1]


def test_an_undeclared_layer_is_counted_on_rows_of_known_people_only():
    s = np.array([0, 1, 2, -1, 3, 3], dtype=np.int32)
    t = np.array([1, 0, 2, 4, 4, 4], dtype=np.int32)
    layer = np.array([2, -1, -1, -1, 1, 0], dtype=np.int16)  # -1: empty or not declared
    counts, u, v, lay = collapse_pairs(s, t, 5, layer, layers=4)
    assert counts.bad_layer == 2  # the row (1, 0) and the self-loop (2, 2); not the unknown person's row
    assert list(zip(u.tolist(), v.tolist(), lay.tolist())) == [(0, 1, 2), (3, 4, 0)]
    assert counts.duplicates == 2 and counts.self_loops == 1 and counts.unknown_person == 1


def test_keys_that_would_not_fit_64_bits_go_to_the_group_by():
    assert PairCollapser.fits(2 ** 31 - 1, 0) and PairCollapser.fits(2 ** 30, 4)
    assert not PairCollapser.fits(2 ** 31, 4)
    with pytest.raises(ValueError):
        PairCollapser(2 ** 31 + 1, 0, 4)
