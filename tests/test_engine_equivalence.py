"""The DuckDB engine's fast paths give exactly the results of its general path (issue 6).

* integer ids on both sides are joined as integers; text ids (or a mix) are
  joined as text: the same network either way;
* a person table without repeated ids skips the deduplicating sort;
* the engine's memory limit and spill folder settings.

Outside reference: superedge counts on the integer path equal the edge counts of
``networkx.quotient_graph`` on Les Misérables (Knuth, *The Stanford GraphBase*,
1993; shipped by networkx: 77 characters, 254 co-appearance edges) and the
degrees equal networkx's.
"""

from __future__ import annotations

import os

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from aggpub.engines._duckdb import DuckDBEngine
from aggpub.errors import UsageError
from aggpub.ingest import load_network
from aggpub.pipeline import build_release
from aggpub.policy import parse_policy


def _random_tables(seed=3, n=400, m=2500):
    rng = np.random.default_rng(seed)
    u = rng.integers(0, n + 5, m)  # a few ids beyond the person table: unknown people
    v = rng.integers(0, n + 5, m)
    u[:20], v[:20] = v[20:40], u[20:40]  # reversed duplicates
    people = pa.table({"node": pa.array(np.arange(n), pa.int64()),
                       "area": [f"a{x}" for x in rng.integers(0, 5, n)],
                       "band": [f"b{x}" for x in rng.integers(0, 3, n)]})
    edges = pa.table({"source": pa.array(u, pa.int64()), "target": pa.array(v, pa.int64())})
    return edges, people


def _as_text(table, cols):
    return table.set_column(table.schema.get_field_index(cols[0]), cols[0],
                            table.column(cols[0]).cast(pa.string())) if len(cols) == 1 else \
        _as_text(_as_text(table, cols[:1]), cols[1:])


POLICY = parse_policy({"privacy": {"unit": "edge", "epsilon": 1.0},
                       "grouping": {"method": "attributes", "attributes": ["area", "band"], "min_size": 5}})


def _summary(edges, people):
    net = load_network(edges, people, attributes=["area", "band"], drop_unknown=True, engine=DuckDBEngine())
    rel = build_release(net, POLICY, seed=5)
    ids = net.ids.to_pylist()
    deg = dict(zip(ids, net.engine.degrees(net.n_people).tolist()))
    return net.report, rel.tables["supernodes"], rel.tables["superedges"], deg


def test_integer_and_text_id_paths_give_the_same_network():
    edges, people = _random_tables()
    ref = _summary(edges, people)  # integer ids on both sides
    for e, p in ((_as_text(edges, ["source", "target"]), _as_text(people, ["node"])),  # all text
                 (_as_text(edges, ["source", "target"]), people),                      # mixed
                 (edges, _as_text(people, ["node"]))):
        got = _summary(e, p)
        assert got[0] == ref[0]
        assert got[1].equals(ref[1]) and got[2].equals(ref[2])
        assert got[3] == ref[3]
    assert ref[0].unknown_person_rows_dropped > 0 and ref[0].duplicate_rows_collapsed >= 20


def test_integer_parquet_equals_text_csv(tmp_path):
    edges, people = _random_tables(seed=8)
    pq.write_table(edges, tmp_path / "e.parquet")
    pq.write_table(people, tmp_path / "p.parquet")
    pacsv.write_csv(edges, tmp_path / "e.csv")
    pacsv.write_csv(people, tmp_path / "p.csv")
    a = _summary(tmp_path / "e.parquet", tmp_path / "p.parquet")
    b = _summary(tmp_path / "e.csv", tmp_path / "p.csv")
    assert a[0] == b[0] and a[1].equals(b[1]) and a[2].equals(b[2]) and a[3] == b[3]


def test_repeated_identical_person_rows_take_the_dedup_path_with_the_same_result():
    edges, people = _random_tables(seed=4)
    doubled = pa.concat_tables([people, people.slice(0, 50)])
    a, b = _summary(edges, people), _summary(edges, doubled)
    assert b[0].duplicate_person_rows_collapsed == 50
    assert a[1].equals(b[1]) and a[2].equals(b[2]) and a[3] == b[3]


def test_integer_path_matches_networkx_quotient_graph_on_les_miserables():
    G = nx.les_miserables_graph()
    names = sorted(G.nodes())
    code = {n: i for i, n in enumerate(names)}
    group = {n: f"g{i % 4}" for i, n in enumerate(names)}
    people = pa.table({"node": pa.array([code[n] for n in names], pa.int32()),
                       "grp": [group[n] for n in names]})
    edges = pa.table({"source": pa.array([code[u] for u, v in G.edges()], pa.int64()),
                      "target": pa.array([code[v] for u, v in G.edges()], pa.int64())})
    net = load_network(edges, people, attributes=["grp"], engine=DuckDBEngine())
    assert (net.n_people, net.n_edges) == (77, 254)
    assignment = np.array([int(g[1:]) for g in net.people.column("grp").to_pylist()], dtype=np.int32)
    a, b, c = net.engine.superedge_counts(assignment)
    got = {(int(x), int(y)): int(z) for x, y, z in zip(a, b, c)}
    blocks = [{n for n in names if group[n] == f"g{k}"} for k in range(4)]
    Q = nx.quotient_graph(G, blocks, relabel=True, weight=None)
    for i in range(4):
        assert got.get((i, i), 0) == Q.nodes[i]["nedges"]
        for j in range(i + 1, 4):
            assert got.get((i, j), 0) == (Q.edges[i, j]["weight"] if Q.has_edge(i, j) else 0)
    ids = [int(x) for x in net.ids.to_pylist()]
    deg = net.engine.degrees(77)
    assert {names[i]: int(d) for i, d in zip(ids, deg)} == dict(G.degree())


def test_memory_limit_and_spill_folder(tmp_path):
    with pytest.raises(UsageError, match="memory limit"):
        DuckDBEngine(memory_limit="lots")
    eng = DuckDBEngine(memory_limit="300MB", spill_parent=tmp_path)
    limit, temp = eng.con.execute(
        "SELECT current_setting('memory_limit'), current_setting('temp_directory')").fetchall()[0]
    assert limit.replace(" ", "") in ("286.1MiB", "300.0MB", "300MB")
    assert os.path.dirname(temp) == str(tmp_path)
    # force a spill: a table several times larger than a 40 MB limit
    eng.con.execute("SET memory_limit='40MB'")
    eng.con.execute("SET threads=1")
    eng.con.execute("CREATE TEMP TABLE big AS SELECT i, md5(i::VARCHAR) AS h FROM range(2000000) t(i)")
    assert eng.con.execute("SELECT count(DISTINCT h) FROM big").fetchall()[0][0] == 2_000_000
    assert os.path.isdir(temp)  # DuckDB spilled into the private folder
    eng.close()
    assert not os.path.exists(temp)  # the private spill folder is removed
    assert list(tmp_path.iterdir()) == []
