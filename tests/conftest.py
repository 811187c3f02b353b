"""Shared fixtures: small networks as Arrow tables, policies, the CLI runner."""

from __future__ import annotations

import networkx as nx
import pyarrow as pa
import pytest


def graph_tables(G: nx.Graph, attrs: dict[str, dict]) -> tuple[pa.Table, pa.Table]:
    """Edge and person tables (string ids) from a networkx graph and node attribute dicts."""
    nodes = list(G.nodes())
    edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    cols = {"node": [str(n) for n in nodes]}
    for name, values in attrs.items():
        cols[name] = [str(values[n]) for n in nodes]
    return edges, pa.table(cols)


def simple_policy(attributes, min_size=1, epsilon=1.0, **extra):
    policy = {"privacy": {"unit": "edge", "epsilon": epsilon},
              "grouping": {"method": "attributes", "attributes": list(attributes), "min_size": min_size}}
    for section, values in extra.items():
        policy.setdefault(section, {}).update(values)
    return policy


@pytest.fixture
def karate():
    """Zachary's karate club as shipped by networkx (Zachary 1977: 34 nodes, 78 edges)."""
    return nx.karate_club_graph()


def fresh_interpreter_json(code: str, drop=(), **extra) -> dict:
    """Run ``code`` in a fresh interpreter of this checkout and parse its last line as JSON.

    For settings that are process-wide (BLAS threads, Arrow's pool, huge pages): the environment is this
    one without the variables in ``drop``, plus ``extra``.
    """
    import json
    import os
    import subprocess
    import sys
    from pathlib import Path

    env = {k: v for k, v in os.environ.items() if k not in drop}
    env.update(extra)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parents[1]) + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])
