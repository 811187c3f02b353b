"""The network every stage after ingest receives: person attributes in Arrow, contacts in the engine."""

from __future__ import annotations

__all__ = ["Network", "IngestReport"]

from dataclasses import asdict, dataclass

import pyarrow as pa


@dataclass(frozen=True)
class IngestReport:
    """What ingest read, kept and dropped (counts only, no private values)."""

    edge_rows: int
    edges: int
    self_loops_dropped: int
    duplicate_rows_collapsed: int
    unknown_person_rows_dropped: int
    person_rows: int
    people: int
    duplicate_person_rows_collapsed: int

    def as_dict(self) -> dict:
        return asdict(self)

    def lines(self, private_counts: bool = True) -> list[str]:
        """Progress lines. The counts are true figures about the private network: printed under a
        CONFIDENTIAL label, or (``private_counts=False``, unit ``person``) withheld."""
        if not private_counts:
            return ["inputs read; their counts are withheld (private under unit 'person'; the confidential "
                    "report has them)"]
        return [f"CONFIDENTIAL (true input counts): {line}" for line in self._count_lines()]

    def _count_lines(self) -> list[str]:
        out = [f"read {self.edge_rows:,} edge rows and {self.person_rows:,} person rows",
               f"kept {self.edges:,} undirected contacts between {self.people:,} people"]
        if self.self_loops_dropped:
            out.append(f"dropped {self.self_loops_dropped:,} self-loop rows")
        if self.duplicate_rows_collapsed:
            out.append(f"collapsed {self.duplicate_rows_collapsed:,} duplicate contact rows")
        if self.unknown_person_rows_dropped:
            out.append(f"dropped {self.unknown_person_rows_dropped:,} rows naming people not in the person table")
        if self.duplicate_person_rows_collapsed:
            out.append(f"collapsed {self.duplicate_person_rows_collapsed:,} identical duplicate person rows")
        return out


@dataclass
class Network:
    """An ingested network: person attributes in Arrow, edges inside the engine.

    Attributes
    ----------
    people : pyarrow.Table
        One row per person (row ``i`` is person ``i``), attribute columns as strings.
    n_people, n_edges : int
        Number of people and of distinct undirected contacts.
    engine : aggpub.engines.Engine
        The counting engine holding the contacts (``u < v``, dense ids).
    report : IngestReport
        Counts of what was read and dropped.
    weighted : bool
        Whether the edges carry a weight.
    ids : pyarrow.Array of string, optional
        The person ids as read (``ids[i]`` is person ``i``); private, used only to
        join a public person -> supernode map (grouping method ``given``).
    """

    people: pa.Table
    n_people: int
    n_edges: int
    engine: object
    report: IngestReport
    weighted: bool = False
    ids: pa.Array | None = None
    layers: tuple = ()  # issue 13: the declared layers (empty: no layer column); layer i of each contact
