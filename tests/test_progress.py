"""Progress of long engine steps (aggpub.progress.LongStep) and the DuckDB engine's use of it."""

from __future__ import annotations

import threading
import time

import numpy as np

from aggpub.progress import LongStep


def test_a_short_step_prints_nothing():
    lines = []
    with LongStep(lines.append, "short work", poll=lambda: "50%", every=5.0):
        time.sleep(0.01)
    assert lines == []


def test_a_long_step_reports_the_engines_estimate_until_it_ends():
    lines = []
    with LongStep(lines.append, "long work", poll=lambda: "42% of the current statement", every=0.05):
        time.sleep(0.3)
    n = len(lines)
    assert n >= 3
    assert all(line.startswith("long work: 42% of the current statement, ") and line.endswith(" s so far")
               for line in lines)
    time.sleep(0.15)
    assert len(lines) == n  # nothing after the step ended
    assert not any(t.name == "aggpub-progress" for t in threading.enumerate())


def test_a_failing_estimate_is_left_out_not_fatal():
    lines = []

    def broken():
        raise RuntimeError("no estimate")

    with LongStep(lines.append, "work", poll=broken, every=0.05):
        time.sleep(0.2)
    assert lines and all(line.startswith("work: ") and "no estimate" not in line for line in lines)


def test_tick_reports_at_most_once_per_interval():
    lines = []
    step = LongStep(lines.append, "batches", every=0.1)
    step.tick("first")  # too early: the step has only just started
    assert lines == []
    time.sleep(0.12)
    step.tick("1,000 rows")
    step.tick("2,000 rows")  # within the interval of the previous report
    assert len(lines) == 1 and lines[0].startswith("batches: 1,000 rows, ")


def test_silent_without_a_printer():
    with LongStep(None, "work", poll=lambda: "1%", every=0.01) as step:
        time.sleep(0.05)
        step.tick("x")
    assert step._thread is None


def test_duckdb_engine_reports_long_counting(monkeypatch):
    """With a zero interval every batch of the counting loop reports; the counts do not change."""
    from aggpub import load_network
    from aggpub import progress as _progress
    from aggpub.engines import make_engine

    from .conftest import graph_tables
    import networkx as nx

    G = nx.les_miserables_graph()
    edges, people = graph_tables(G, {"g": {n: i % 3 for i, n in enumerate(G)}})
    quiet = load_network(edges, people)
    monkeypatch.setattr(_progress, "PROGRESS_EVERY", 0.0)
    lines = []
    net = load_network(edges, people, engine=make_engine("duckdb", progress=lines.append))
    assignment = np.arange(net.n_people) % 3
    got = net.engine.superedge_counts(assignment)
    ref = quiet.engine.superedge_counts(assignment)
    assert all(np.array_equal(x, y) for x, y in zip(got, ref))
    assert any(line.startswith("counting superedges: 254 contacts read") for line in lines)


def test_duckdb_reports_its_own_estimate_of_a_long_statement(monkeypatch):
    """DuckDB's query_progress gives a percentage while a statement runs (its progress bar is on,
    printing off): the watcher's lines carry it."""
    from aggpub import progress as _progress
    from aggpub.engines import make_engine

    eng = make_engine("duckdb")
    lines = []
    eng.progress = lines.append
    monkeypatch.setattr(_progress, "PROGRESS_EVERY", 0.05)
    with eng._long("a long statement"):
        eng.con.execute("SELECT count(*) FROM (SELECT i % 1000003 AS k, count(*) FROM range(60000000) t(i) "
                        "GROUP BY 1)").fetchall()
    assert any("% of the current statement" in line for line in lines), lines
    eng.close()
