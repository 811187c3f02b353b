"""Plain values that pass between ingest and a counting engine.

Ingest (:mod:`aggpub.ingest`) decides what is accepted and refused and words
every message; an engine only reads, maps and counts, in its own SQL dialect.
What ingest hands an engine and what it gets back are the small frozen records
below: no file-format helper, rule or message template crosses over, so the
engines import nothing from ingest.

The dense id contract
---------------------
Ingest numbers the people: person ``i`` is the ``i``-th distinct id in order of
first appearance in the person input. It hands the engine an *id table*, an
Arrow table with one row per person:

``id``
    the person id as text (string),
``idx``
    the dense id ``i`` (int32),
``nid`` (only when :attr:`PeopleColumns.native_ids` was given)
    the engine's native integer id, as the engine returned it.

The engine maps each edge end to ``idx`` by comparing the end's text with
``id``, or, when both edge id columns and the person ids are integers in the
engine's own types, by comparing integers with ``nid`` (the same pairs: an
integer's decimal text is unique).
"""

from __future__ import annotations

__all__ = ["ColumnType", "INTEGER", "TEXT", "REAL", "OTHER", "Source", "PeopleColumns", "EdgeColumns",
           "EdgeCounts", "RowCondition", "ID_TABLE_COLUMNS"]

import enum
from dataclasses import dataclass

import pyarrow as pa

#: Kinds of column an engine reports (:class:`ColumnType`): ids must be INTEGER or TEXT; weights INTEGER,
#: REAL or TEXT (text is parsed).
INTEGER, TEXT, REAL, OTHER = "integer", "text", "real", "other"

#: Columns of the id table ingest hands to :meth:`Engine.stage_edges` (``nid`` only with native ids).
ID_TABLE_COLUMNS = ("id", "idx", "nid")


@dataclass(frozen=True)
class ColumnType:
    """The type of one input column as an engine sees it.

    Attributes
    ----------
    kind : str
        :data:`INTEGER` (any width, signed or unsigned), :data:`TEXT`,
        :data:`REAL` (floating point or decimal) or :data:`OTHER`.
    name : str
        The engine's own name of the type, upper case, for messages
        (``"DOUBLE"``, ``"DECIMAL(38,0)"``).
    """

    kind: str
    name: str


@dataclass(frozen=True)
class Source:
    """One input as an engine reads it: an Arrow table, a Parquet file or a CSV/TSV file.

    Ingest resolves the format (and, for CSV, the header and delimiter) before
    an engine sees the input.

    Attributes
    ----------
    label : str
        How messages name the input: its path, or ``"edge table"`` /
        ``"person table"`` for an Arrow table.
    unreadable : str
        The message for a failed read, without its reason (``"<label>: cannot
        read edge file"``); an engine raises
        ``InputError(f"{unreadable}: {reason}")`` with a reason of its own
        that names no private value unless ``debug``.
    format : str
        ``"arrow"``, ``"parquet"`` or ``"csv"`` (CSV and TSV).
    path : str, optional
        The file (``parquet``, ``csv``).
    table : pyarrow.Table, optional
        The table (``arrow``).
    header : tuple of str
        CSV only: the column names of the first line. Every column is read as
        text, verbatim (no type guessing), with ``"`` as quote and escape; the
        first line is skipped.
    delimiter : str
        CSV only: ``","`` or ``"\\t"``.
    debug : bool
        Whether an engine's error reasons may quote the input (private values).
    """

    label: str
    unreadable: str
    format: str
    path: str | None = None
    table: pa.Table | None = None
    header: tuple = ()
    delimiter: str = ","
    debug: bool = False


@dataclass(frozen=True)
class PeopleColumns:
    """The person input's id and attribute columns, one row per input row, in input order.

    Attributes
    ----------
    ids : pyarrow.Array
        The ids as text (string; null where the input has none).
    native_ids : pyarrow.Array or None
        The ids as the engine's native integers when the id column is an
        integer type the engine joins on (else ``None``); ingest passes them
        back in the id table's ``nid`` column.
    attributes : pyarrow.Table
        One string column per asked attribute, in the asked order.
    """

    ids: pa.Array
    native_ids: pa.Array | None
    attributes: pa.Table


@dataclass(frozen=True)
class EdgeColumns:
    """What to read from the edge input: the two id columns, the optional weight, their types.

    Attributes
    ----------
    source, target : str
        The id columns of the two ends.
    weight : str or None
        The weight column (read as a double; text is parsed, an unparseable
        value counts as a bad weight).
    source_type, target_type, weight_type : ColumnType
        As :meth:`Engine.describe` reported them (``weight_type`` None without a weight).
    missing_spellings : tuple of str
        Id spellings that mean "missing", compared with the id text after
        trimming spaces (U+0020 only), case-insensitively; an empty or null id
        is missing too.
    """

    source: str
    target: str
    weight: str | None
    source_type: ColumnType
    target_type: ColumnType
    weight_type: ColumnType | None
    missing_spellings: tuple
    #: issue 13: the layer column (read as text) and its declared values, in the order of the one-layer
    #: rule (a pair recorded in several layers keeps the first); the engine stores the layer's position
    layer: str | None = None
    layer_values: tuple = ()


@dataclass(frozen=True)
class EdgeCounts:
    """Row counts of a staged edge input (:meth:`Engine.stage_edges`); no private value.

    Attributes
    ----------
    rows : int
        Edge rows read.
    missing_id : int
        Rows with an end that is null, empty or spells a missing value.
    unknown_person : int
        Rows without a missing end naming at least one id absent from the id table.
    bad_weight : int
        Rows between two known people whose weight is null, unparseable, NaN,
        infinite or negative (0 without a weight column).
    self_loops : int
        Rows between two known people with the same dense id.
    duplicates : int
        Rows between two known, different people beyond the first of their
        (unordered) pair.
    edges : int
        Distinct unordered pairs of known, different people.
    bad_layer : int
        Rows between two known people whose layer (as text) is null or not one
        of the declared layers (0 without a layer column).
    """

    rows: int
    missing_id: int
    unknown_person: int
    bad_weight: int
    self_loops: int
    duplicates: int
    edges: int
    #: rows between two known people whose layer is null or not one of the declared values (issue 13)
    bad_layer: int = 0


class RowCondition(enum.Enum):
    """Which edge row :meth:`Engine.first_staged_row` looks for (error messages only)."""

    #: an end is null, empty or spells a missing value
    MISSING_ID = "missing id"
    #: no end missing, and an end absent from the id table
    UNKNOWN_PERSON = "unknown person"
    #: both ends known, and the weight null, unparseable, NaN, infinite or negative
    BAD_WEIGHT = "bad weight"
    #: both ends known, and the layer null or not declared (issue 13)
    BAD_LAYER = "bad layer"
