"""Counting engines: DuckDB embedded (default) and Spark (clusters), same results.

An engine holds the contacts and counts over them in SQL; Python sees only
aggregated tables and arrays of one value per person. :class:`Engine` lists
every method the rest of aggpub calls; :func:`make_engine` makes one by name.

Ingest (:mod:`aggpub.ingest`) drives an engine through the first group of
methods (``describe`` to ``discard_staged_edges``), handing it the plain values
of :mod:`aggpub.engines.interface`; everything after ingest uses the counting
methods. Engines import nothing from ingest.
"""

from __future__ import annotations

__all__ = ["Engine", "make_engine", "ENGINES", "ColumnType", "Source", "PeopleColumns", "EdgeColumns",
           "EdgeCounts", "RowCondition"]

from typing import Protocol, Sequence, runtime_checkable

import numpy as np
import pyarrow as pa

from .interface import ColumnType, EdgeColumns, EdgeCounts, PeopleColumns, RowCondition, Source

ENGINES = ("duckdb", "spark")


@runtime_checkable
class Engine(Protocol):
    """What aggpub asks of a counting engine.

    Assignments are int arrays with ``assignment[i]`` the supernode of person
    ``i`` (inputs already validated). Count arrays are int64. Pairs of
    supernodes come as ``a <= b``.

    Attributes
    ----------
    name : str
        The engine's name (``"duckdb"``, ``"spark"``), as given to :func:`make_engine`.
    """

    name: str

    # ------------------------------------------------------------------ ingest side

    def describe(self, source: Source) -> dict[str, ColumnType]:
        """The columns of ``source``, in order, with their types.

        Raises ``InputError(f"{source.unreadable}: {reason}")`` when the input
        cannot be read at all (not Parquet, unreadable file).
        """

    def read_people(self, source: Source, id_column: str, attributes: Sequence[str]) -> PeopleColumns:
        """The id column and the ``attributes`` columns of ``source``, every row, in input order.

        The columns exist and the id column is INTEGER or TEXT (checked by
        ingest). Raises ``InputError(f"{source.unreadable}: {reason}")`` on a
        read failure (ragged row, bad encoding, ...).
        """

    def stage_edges(self, source: Source, columns: EdgeColumns, ids: pa.Table) -> EdgeCounts:
        """Read the edges, map both ends through the id table and collapse them; count each kind of row.

        Ends are mapped as the dense id contract says
        (:mod:`aggpub.engines.interface`); pairs are made canonical
        (smaller dense id first) and collapsed, their weights summed. The result
        is *staged*: kept until :meth:`publish_staged_edges` or
        :meth:`discard_staged_edges`, and searched by :meth:`first_staged_row`.
        Raises ``InputError(f"{source.unreadable}: {reason}")`` on a read failure.
        """

    def first_staged_row(self, condition: RowCondition) -> int | None:
        """The 1-based data row of the first staged edge row matching ``condition``, or ``None``.

        For error messages only (it may read the input again).
        """

    def publish_staged_edges(self) -> None:
        """Keep the staged pairs of known, different people as the contacts every count runs over.

        Degrees kept from an earlier load are forgotten.
        """

    def discard_staged_edges(self) -> None:
        """Drop the staged edges (the input was refused)."""

    # ------------------------------------------------------------------ counting

    def superedge_counts(self, assignment: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Non-zero superedge counts: arrays ``a <= b`` and ``count``."""

    def weight_totals(self, assignment: np.ndarray, clip: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per-superedge totals of weights clipped to ``[0, clip]`` and rounded to integers: ``a``, ``b``, ``total``."""

    def degrees(self, n_people: int) -> np.ndarray:
        """Number of contacts of every person (length ``n_people``); callers get a copy."""

    def degree_histograms(self, assignment: np.ndarray, n_groups: int, cap: int) -> np.ndarray:
        """People by (supernode, degree bin), shape ``(n_groups, cap + 1)``; the top bin is 'cap or more'."""

    def contact_profiles(self, assignment: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per person and supernode, that person's contacts in the supernode: ``person``, ``supernode``, ``count``."""

    def view_counts(self, codes: Sequence[np.ndarray], n_values: Sequence[int], n_layers: int,
                    clip: float | None = None) -> list[np.ndarray]:
        """Contacts (or totals of weights clipped to ``[0, clip]`` and rounded) between every pair of values,
        per layer, for several views (issue 13).

        ``codes[i][p]`` is person ``p``'s value in view ``i`` (``0 .. n_values[i] - 1``); the layer of a
        contact is its stored layer (0 without a layer column). Each result has shape
        ``(n_layers, K (K + 1) / 2)``, cells in the row-major upper triangle of value pairs, zeros included.
        """

    def edge_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """All contacts as arrays ``u < v`` of dense ids (small networks and the audit).

        The order of the rows is the engine's (DuckDB's parallel scan varies from run to run); a caller
        whose result depends on it puts them in order itself (the audit's structure section does).
        """

    def close(self) -> None:
        """Release what the engine holds (tables, temporary folders); the engine is not used again."""


def make_engine(name: str = "duckdb", **options) -> Engine:
    """Create a counting engine by name (:data:`ENGINES`); ``options`` go to its constructor."""
    from ..errors import UsageError

    if name == "duckdb":
        from ._duckdb import DuckDBEngine

        return DuckDBEngine(**options)
    if name == "spark":
        from ._spark import SparkEngine

        return SparkEngine(**options)
    raise UsageError(f"unknown engine {name!r}; choose one of {', '.join(ENGINES)}")
