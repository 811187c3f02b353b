"""Read a release bundle."""

from __future__ import annotations

__all__ = ["Bundle", "read_bundle", "public_tables", "require_superedges", "table_column"]

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import BundleError, UsageError
from ._files import MANIFEST


@dataclass
class Bundle:
    """A release bundle loaded into memory.

    Attributes
    ----------
    path : Path
    manifest : dict
    supernodes : pyarrow.Table
        ``supernode``, ``size`` and the (possibly generalised) attribute columns.
    superedges : pyarrow.Table or None
        ``supernode_a <= supernode_b``, ``edge_count`` and the noise columns
        (None when the release has no superedge counts).
    tables : dict
        Every Parquet table of the bundle by file stem (degree histograms, weight totals).
    """

    path: Path
    manifest: dict
    supernodes: pa.Table
    superedges: pa.Table | None
    tables: dict = field(default_factory=dict)

    @property
    def seeded(self) -> bool:
        return bool(self.manifest.get("seeded"))

    @property
    def epsilon_total(self) -> float:
        return float(self.manifest["epsilon_total"])


def read_bundle(path) -> Bundle:
    """Load a bundle folder (use :func:`aggpub.check_bundle` to verify it first).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Bundle

    Examples
    --------
    >>> import networkx as nx, pyarrow as pa
    >>> import aggpub
    >>> G = nx.karate_club_graph()  # Zachary's karate club, as networkx ships it
    >>> edges = pa.table({"source": [str(u) for u, v in G.edges()], "target": [str(v) for u, v in G.edges()]})
    >>> people = pa.table({"node": [str(n) for n in G], "club": [G.nodes[n]["club"] for n in G]})
    >>> policy = {"privacy": {"unit": "edge", "epsilon": 1.0},
    ...           "grouping": {"method": "attributes", "attributes": ["club"], "min_size": 5}}
    >>> import pathlib, tempfile
    >>> path = aggpub.publish(aggpub.release_tables(edges, people, policy, seed=1),
    ...                       pathlib.Path(tempfile.mkdtemp()) / "bundle")
    >>> bundle = aggpub.read_bundle(path)
    >>> bundle.supernodes.column_names
    ['supernode', 'size', 'club']
    >>> bundle.manifest["privacy_unit"], bundle.manifest["epsilon_total"], bundle.seeded
    ('edge', 1.0, True)
    """
    path = Path(path)
    if not (path / MANIFEST).is_file():
        raise BundleError(f"{path}: not a bundle (no {MANIFEST})")
    try:
        manifest = json.loads((path / MANIFEST).read_text("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BundleError(f"{path / MANIFEST}: unreadable manifest ({exc})") from None
    tables = {}
    for name in manifest.get("files", {}):
        if name.endswith(".parquet"):
            try:
                tables[name[: -len(".parquet")]] = pq.read_table(path / name)
            except (OSError, pa.ArrowException) as exc:
                raise BundleError(f"{path / name}: unreadable Parquet file ({exc})") from None
    if "supernodes" not in tables:
        raise BundleError(f"{path}: bundle has no supernodes.parquet")
    return Bundle(path=path, manifest=manifest, supernodes=tables["supernodes"],
                  superedges=tables.get("superedges"), tables=tables)


# --------------------------------------------------------------------------- the public tables of a release


def public_tables(release):
    """``(supernodes, superedges, manifest)`` of a Bundle or a Release (or any object with ``tables``)."""
    tables = getattr(release, "tables", None)
    manifest = getattr(release, "manifest", None)
    if not isinstance(tables, dict) or not isinstance(manifest, dict):
        raise UsageError(f"expected a Bundle (aggpub.read_bundle) or a Release, got {type(release).__name__}")
    supernodes = tables.get("supernodes")
    if supernodes is None:
        raise BundleError("the release has no supernodes table")
    return supernodes, tables.get("superedges"), manifest


def require_superedges(release):
    supernodes, superedges, manifest = public_tables(release)
    if superedges is None:
        raise BundleError("the release has no superedge counts (components.superedge_counts was disabled)")
    return supernodes, superedges, manifest


def table_column(table: pa.Table, name: str, dtype=np.int64) -> np.ndarray:
    """Column ``name`` of a released table as a numpy array (``BundleError`` when missing)."""
    if name not in table.column_names:
        raise BundleError(f"superedges table: missing column '{name}'")
    return np.asarray(table.column(name).to_numpy(), dtype=dtype)
