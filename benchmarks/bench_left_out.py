"""Alternatives measured for issue 15, kept runnable so that the figures can be checked again: two left out
(sections 1 and 2), and the comparison behind one that was taken (section 3).

1. **The contact view's value columns as Arrow dictionaries** instead of strings, on a view of 2,000
   values (2,001,000 cells, the size of the scale benchmark's view): building the table
   (``aggpub.estimates.views.view_table`` against a dictionary-typed copy made here), writing it as the
   bundle writes it (zstd, page checksums) and decoding one value column back to codes
   (``aggpub.estimates.matrix._codes_in`` against a lookup of the dictionary's indices).
2. **Triangles per person by listing wedges** instead of the two sparse products of
   ``aggpub.audit.network_stats.node_triangles``, on the demo town's contacts: the same degree-rank
   orientation (Schank and Wagner, WEA 2005), every pair of out-neighbours of a person looked up among the
   oriented contacts by binary search, each triangle found once and counted at its three corners. The two
   answers are compared person by person.
3. **Collapsing repeated contacts**: DuckDB's GROUP BY over the two mapped id columns (the staging query
   of ``aggpub.engines._duckdb.DuckDBEngine.stage_edges`` before 2026-12-03's fifth session, for integer
   ids numbered from 0: the dense id is the id, no join), the same GROUP BY on one 64-bit key, and numpy
   (the ids fetched, one sort of the pair keys: what ``stage_edges`` now does for inputs without weight or
   layer that fit the memory limit, ``PairCollapser``), on the scale benchmark's contacts
   (``gen_graph.generate_grp``, cached under ``--data``; ``--contacts``, default 10M). Each variant
   counts the distinct pairs; the three counts are compared.

Each figure is the median (and the minimum) of ``--repeat`` runs in this process, after one untimed run, the two
variants interleaved.
Speed only; nothing here is used by the product (section 3 times the engine's own ``PairCollapser``).

Usage::

    python benchmarks/bench_left_out.py [--repeat 15] [--out benchmarks/results/left-out-<date>.txt]
"""

from __future__ import annotations

import argparse
import datetime
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq


def _interleaved(calls: dict, repeat: int) -> dict:
    """``{name: ((median, min) seconds, value)}`` of ``repeat`` timed calls of each, after one untimed call of
    each, the variants interleaved (one call of each in turn, the order alternating): the machine's drift
    hits them alike."""
    values = {name: f() for name, f in calls.items()}
    times = {name: [] for name in calls}
    names = list(calls)
    for i in range(repeat):
        for name in (names if i % 2 == 0 else names[::-1]):
            t = time.perf_counter()
            values[name] = calls[name]()
            times[name].append(time.perf_counter() - t)
    return {name: ((statistics.median(times[name]), min(times[name])), values[name]) for name in calls}


def _ms(t) -> str:
    return f"{t[0] * 1e3:6.1f} ms (min {t[1] * 1e3:5.1f})"


def dictionary_view_table(name, values, noisy, scale):
    """``view_table``'s columns with ``view``, ``value_a`` and ``value_b`` as dictionaries (one layer)."""
    from aggpub.estimates.views import view_cells

    a, b = view_cells(len(values))
    vals = pa.array([str(v) for v in values], pa.string())
    flat = np.asarray(noisy, dtype=np.int64).reshape(-1)
    return pa.table({
        "view": pa.DictionaryArray.from_arrays(pa.array(np.zeros(len(flat), dtype=np.int32)), pa.array([name])),
        "layer": pa.nulls(len(flat), pa.string()),
        "value_a": pa.DictionaryArray.from_arrays(pa.array(a.astype(np.int32)), vals),
        "value_b": pa.DictionaryArray.from_arrays(pa.array(b.astype(np.int32)), vals),
        "contacts": pa.array(np.maximum(flat, 0)),
        "contacts_unclamped": pa.array(flat),
        "noise_scale": pa.array(np.full(len(flat), float(scale))),
    })


def dictionary_codes(column, values):
    """Codes of a dictionary column: its dictionary looked up once, then its indices mapped."""
    col = column.combine_chunks() if isinstance(column, pa.ChunkedArray) else column
    lookup = pc.index_in(col.dictionary, value_set=pa.array([str(v) for v in values])).to_numpy(
        zero_copy_only=False)
    return np.asarray(lookup, dtype=np.int64)[col.indices.to_numpy()]


def views(repeat, lines):
    from aggpub.estimates.matrix import _codes_in
    from aggpub.estimates.views import view_table

    k = 2000
    values = [f"value {i:04d}" for i in range(k)]
    noisy = np.random.default_rng(1).integers(-5, 50, k * (k + 1) // 2)
    folder = Path(tempfile.mkdtemp(prefix="aggpub-left-out-"))
    build = _interleaved({"strings": lambda: view_table("grp", values, noisy, 3.0),
                          "dictionaries": lambda: dictionary_view_table("grp", values, noisy, 3.0)}, repeat)
    tables = {kind: build[kind][1] for kind in build}
    write = _interleaved({kind: (lambda kind=kind: pq.write_table(tables[kind], folder / f"{kind}.parquet",
                                                                  write_page_checksum=True, compression="zstd"))
                          for kind in tables}, repeat)
    decode = _interleaved({"strings": lambda: _codes_in(tables["strings"].column("value_a"), values),
                           "dictionaries": lambda: dictionary_codes(tables["dictionaries"].column("value_a"),
                                                                    values)}, repeat)
    for kind in tables:
        path = folder / f"{kind}.parquet"
        lines.append(f"  {kind:<13} build {_ms(build[kind][0])}   write {_ms(write[kind][0])}   "
                     f"decode value_a {_ms(decode[kind][0])}   file {os.path.getsize(path) / 1e6:5.2f} MB")
        path.unlink()
    folder.rmdir()
    lines.append(f"  same codes: {np.array_equal(decode['strings'][1], decode['dictionaries'][1])}")


def wedge_triangles(u, v, n, deg):
    """Triangles through each person by listing, on the degree-rank orientation (see the module's docstring)."""
    rank = np.empty(n, dtype=np.int64)
    rank[np.lexsort((np.arange(n), deg))] = np.arange(n)
    ru, rv = rank[u], rank[v]
    key = np.minimum(ru, rv) * n + np.maximum(ru, rv)
    key.sort()
    lo, hi = key // n, key % n
    out_degree = np.bincount(lo, minlength=n)
    start = np.concatenate(([0], np.cumsum(out_degree)))
    later = out_degree[lo] - (np.arange(len(lo)) - start[lo]) - 1  # later contacts of the same person
    first = np.repeat(np.arange(len(lo)), later)
    second = first + 1 + np.arange(len(first)) - np.repeat(np.cumsum(later) - later, later)
    wanted = hi[first] * n + hi[second]
    pos = np.minimum(np.searchsorted(key, wanted), len(key) - 1)
    hit = key[pos] == wanted
    by_rank = (np.bincount(lo[first[hit]], minlength=n) + np.bincount(hi[first[hit]], minlength=n)
               + np.bincount(hi[second[hit]], minlength=n))
    return by_rank[rank], len(first)


def triangles(repeat, lines):
    from aggpub.audit.network_stats import node_triangles, oriented
    from aggpub.demo import generate_town

    edges, people = generate_town()
    ids = {name: i for i, name in enumerate(people.column("node").to_pylist())}
    u = np.array([ids[x] for x in edges.column("source").to_pylist()], dtype=np.int64)
    v = np.array([ids[x] for x in edges.column("target").to_pylist()], dtype=np.int64)
    n = len(ids)
    key = np.unique(np.minimum(u, v) * n + np.maximum(u, v))
    u, v = key // n, key % n
    deg = np.bincount(u, minlength=n) + np.bincount(v, minlength=n)
    res = _interleaved({"sparse": lambda: node_triangles(oriented(u, v, n, deg)),
                        "wedges": lambda: wedge_triangles(u, v, n, deg)}, repeat)
    (t_sparse, by_products), (t_wedges, (by_wedges, wedges)) = res["sparse"], res["wedges"]
    lines.append(f"  demo town: {n:,} people, {len(u):,} contacts, {int(by_products.sum()) // 3:,} triangles, "
                 f"{wedges:,} wedges listed")
    lines.append(f"  two sparse products (as now) {_ms(t_sparse)}   listing wedges {_ms(t_wedges)}   "
                 f"same counts: {np.array_equal(np.asarray(by_products, dtype=np.int64), by_wedges)}")


def mapped_sql(path: Path, n: int) -> str:
    """The staging query's mapping of integer ids numbered from 0 (unknown ids as -1)."""
    return (f"SELECT CASE WHEN source BETWEEN 0 AND {n - 1} THEN CAST(source AS INTEGER) ELSE -1 END AS s, "
            f"CASE WHEN target BETWEEN 0 AND {n - 1} THEN CAST(target AS INTEGER) ELSE -1 END AS t "
            f"FROM read_parquet('{path}')")


def collapse_sql(path: Path, n: int, one_key: bool) -> str:
    """The staging query's collapse of repeated pairs, on the two mapped columns or on one key."""
    mapped = mapped_sql(path, n)
    if one_key:
        return (f"CREATE OR REPLACE TEMP TABLE m AS SELECT (CAST(least(s, t) AS BIGINT) + 2) * {n + 2} "
                f"+ (greatest(s, t) + 2) AS k, count(*) AS mult FROM ({mapped}) GROUP BY 1")
    return (f"CREATE OR REPLACE TEMP TABLE m AS SELECT least(s, t) AS u, greatest(s, t) AS v, count(*) AS mult "
            f"FROM ({mapped}) GROUP BY 1, 2")


def collapse(repeat, lines, data: Path, contacts: str):
    import duckdb

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from gen_graph import generate_grp, parse_size

    edges, people = generate_grp(data, parse_size(contacts), log=lambda msg: None)
    n = pq.read_metadata(people).num_rows
    con = duckdb.connect()
    con.execute("SET preserve_insertion_order=false")

    def in_sql(one_key):
        con.execute(collapse_sql(edges, n, one_key))
        return con.execute("SELECT count(*) FROM m").fetchall()[0][0]

    def in_numpy():  # the engine's own collapse (PairCollapser) of the same mapped ids, streamed in batches
        from aggpub.engines._duckdb import EDGE_BATCH_ROWS, PairCollapser

        collapser = PairCollapser(n, pq.read_metadata(edges).num_rows)
        for batch in con.sql(mapped_sql(edges, n)).to_arrow_reader(EDGE_BATCH_ROWS):
            collapser.add(batch.column(0).to_numpy(), batch.column(1).to_numpy())
        return collapser.finish()[0].edges

    res = _interleaved({"two columns": lambda: in_sql(False), "one key": lambda: in_sql(True),
                        "numpy sort": in_numpy}, repeat)
    lines.append(f"  {edges.name}: {n:,} people")
    lines.append("  " + "   ".join(f"{name} {res[name][0][0]:.3f} s (min {res[name][0][1]:.3f})" for name in res))
    counts = {res[name][1] for name in res}
    lines.append(f"  pairs {sorted(counts)[0]:,} (numpy: distinct known pairs; GROUP BY: groups); the same in all three: "
                 f"{len(counts) == 1}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=15, help="timed runs of each figure (median and minimum)")
    ap.add_argument("--out", type=Path, help="also write the report here")
    ap.add_argument("--data", type=Path, default=Path(__file__).resolve().parent.parent / "bench-data",
                    help="folder of the scale benchmark's generated files (made here when missing)")
    ap.add_argument("--contacts", default="10M", help="size of the graph of section 3 (1M, 10M, ...)")
    ap.add_argument("--repeat-large", type=int, default=5, help="timed runs of each variant of section 3")
    ap.add_argument("--sections", default="1,2,3", help="which sections to run (comma-separated)")
    args = ap.parse_args(argv)
    wanted = {x.strip() for x in args.sections.split(",")}
    lines = [f"bench_left_out.py, {datetime.datetime.now().astimezone():%Y-%m-%d %H:%M %Z}, "
             f"median (min) of {args.repeat}, load {os.getloadavg()[0]:.2f}",
             ]
    if "1" in wanted:
        lines.append("1. the contact view's value columns (2,000 values, 2,001,000 cells)")
        views(args.repeat, lines)
    if "2" in wanted:
        lines.append("2. triangles through each person")
        triangles(args.repeat, lines)
    if "3" in wanted:
        lines.append(f"3. collapsing repeated contacts, {args.contacts} contacts (median (min) of {args.repeat_large})")
        collapse(args.repeat_large, lines, args.data, args.contacts)
    text = "\n".join(lines) + "\n"
    print(text, end="")
    if args.out:
        args.out.write_text(text)


if __name__ == "__main__":
    sys.exit(main())
