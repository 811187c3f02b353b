"""The engine protocol (issue 16): both engines implement it, ingest and the release use nothing else,
and the engines import nothing from ingest.

The Spark class is checked without starting Spark (its module imports pyspark only
when a session is made); ``tests/test_spark.py`` checks a live Spark engine.
"""

from __future__ import annotations

import ast
import inspect
from pathlib import Path

import networkx as nx
import pyarrow as pa
import pytest

from aggpub.engines import Engine, make_engine
from aggpub.engines._duckdb import DuckDBEngine
from aggpub.engines._spark import SparkEngine
from aggpub.ingest import load_network
from aggpub.pipeline import build_release
from aggpub.policy import parse_policy

PACKAGE = Path(__file__).resolve().parents[1] / "aggpub"
METHODS = sorted(n for n, v in vars(Engine).items() if inspect.isfunction(v) and not n.startswith("_"))
MEMBERS = set(METHODS) | set(Engine.__annotations__)


def test_the_protocol_lists_what_the_rest_of_the_code_calls():
    assert {"describe", "read_people", "stage_edges", "first_staged_row", "publish_staged_edges",
            "discard_staged_edges", "superedge_counts", "weight_totals", "degrees", "degree_histograms",
            "contact_profiles", "edge_arrays", "close", "view_counts"} == set(METHODS)  # view_counts: issue 13
    assert set(Engine.__annotations__) == {"name"}
    for name in METHODS:
        assert inspect.getdoc(getattr(Engine, name)), f"Engine.{name} is not documented"


@pytest.mark.parametrize("cls", [DuckDBEngine, SparkEngine], ids=["duckdb", "spark"])
def test_both_engines_implement_every_method_with_the_protocols_parameters(cls):
    assert isinstance(cls.name, str) and cls.name in ("duckdb", "spark")
    for name in METHODS:
        impl = getattr(cls, name, None)
        assert callable(impl), f"{cls.__name__} lacks {name}"
        want = list(inspect.signature(getattr(Engine, name)).parameters)
        got = list(inspect.signature(impl).parameters)
        assert got == want, f"{cls.__name__}.{name}{got} differs from the protocol's {want}"


def test_a_duckdb_engine_is_an_engine():
    eng = make_engine("duckdb")
    try:
        assert isinstance(eng, Engine)
    finally:
        eng.close()


class _OnlyTheProtocol:
    """Passes to a real engine only what the protocol lists; records every name asked for."""

    def __init__(self, inner):
        self._inner = inner
        self.asked = set()

    def __getattr__(self, name):
        self.asked.add(name)
        assert name in MEMBERS, f"the code asked the engine for {name!r}, which the protocol does not list"
        return getattr(self._inner, name)


def test_ingest_and_a_whole_release_use_only_the_protocol():
    """Zachary's karate club (Zachary 1977, shipped by networkx) through ingest, grouping, counting,
    histograms, weights and the audit's edge list, with the engine behind a gate that lets through
    only the protocol's names."""
    G = nx.karate_club_graph()
    people = pa.table({"node": [str(n) for n in G.nodes()], "club": [G.nodes[n]["club"] for n in G.nodes()]})
    edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()],
                      "w": [float(d["weight"]) for _, _, d in G.edges(data=True)]})
    gate = _OnlyTheProtocol(DuckDBEngine())
    net = load_network(edges, people, weight="w", attributes=["club"], engine=gate)
    assert (net.n_people, net.n_edges) == (34, 78)
    policy = parse_policy({"privacy": {"unit": "edge", "epsilon": 1.0},
                           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 1},
                           "components": {"degree_histograms": {"enabled": True, "max_degree": 10},
                                          "weight_totals": {"enabled": True, "column": "w", "clip": 5}}})
    build_release(net, policy, seed=3)
    u, v = gate.edge_arrays()
    assert sorted(zip(u.tolist(), v.tolist())) == sorted((min(a, b), max(a, b)) for a, b in G.edges())
    gate.close()
    assert {"describe", "read_people", "stage_edges", "publish_staged_edges", "superedge_counts",
            "degree_histograms", "weight_totals"} <= gate.asked


def _imports(path: Path):
    """(module, names) of every import in a file, relative imports resolved against its package."""
    tree = ast.parse(path.read_text())
    package = ".".join(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if path.name != "__init__.py":
        package = package.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            base = package.split(".")
            module = node.module or ""
            if node.level:
                base = base[: len(base) - node.level + 1]
                module = ".".join(base + ([module] if module else []))
            yield module, [a.name for a in node.names]
        elif isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, []


@pytest.mark.parametrize("path", sorted((PACKAGE / "engines").glob("*.py")), ids=lambda p: p.name)
def test_engines_import_nothing_from_ingest(path):
    for module, _ in _imports(path):
        assert not module.startswith("aggpub.ingest"), f"{path.name} imports {module}"


@pytest.mark.parametrize("path", sorted((PACKAGE / "engines").glob("*.py")) + sorted((PACKAGE / "ingest").glob("*.py"))
                         + [PACKAGE / "network.py"], ids=lambda p: f"{p.parent.name}/{p.name}")
def test_no_private_name_of_another_module_is_imported(path):
    for module, names in _imports(path):
        for name in names:
            assert not name.startswith("_") or name == "__future__", f"{path.name} imports {module}.{name}"

