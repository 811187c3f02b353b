"""The person table: its checks, and the dense ids (person ``i`` is the ``i``-th distinct id)."""

from __future__ import annotations

__all__ = ["People", "read_people", "dense_people", "missing_id_mask"]

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..engines.interface import PeopleColumns, Source
from ..errors import InputError
from ._columns import missing_column_error, require_id_type
from ._files import MISSING_ID_SPELLINGS


@dataclass(frozen=True)
class People:
    """The people after ingest, in dense order.

    Attributes
    ----------
    ids : pyarrow.Array
        ``ids[i]`` is the id (text) of person ``i``; private.
    attributes : pyarrow.Table
        Row ``i`` holds person ``i``'s attributes (strings).
    id_table : pyarrow.Table
        The id table of the dense id contract (:mod:`aggpub.engines.interface`).
    rows : int
        Person rows read (identical repeated rows included).
    """

    ids: pa.Array
    attributes: pa.Table
    id_table: pa.Table
    rows: int


def read_people(engine, source: Source, node: str, attributes, show_counts: bool = True) -> People:
    """Check the person input's columns, read them through ``engine`` and number the people.

    Parameters
    ----------
    engine : aggpub.engines.Engine
    source : Source
    node : str
        The id column.
    attributes : sequence of str or None
        Attribute columns to keep (None: every column but the id column).

    Raises
    ------
    InputError
        A missing column, an id column of another type than integers or text,
        or anything :func:`dense_people` refuses.
    """
    columns = engine.describe(source)
    expected = [node] + list(attributes or ())
    if node not in columns:
        raise missing_column_error(source, node, columns, expected, "id column", "--node-column or [input] node")
    require_id_type(source, node, columns[node])
    attr_cols = [c for c in columns if c != node] if attributes is None else list(attributes)
    for a in attr_cols:
        if a not in columns:
            raise missing_column_error(source, a, columns, expected, "attribute column")
    return dense_people(source.label, node, engine.read_people(source, node, attr_cols), show_counts)


def missing_id_mask(ids) -> np.ndarray:
    """True where an id is null, or empty or a :data:`MISSING_ID_SPELLINGS` after trimming spaces, any case."""
    spelled = pc.is_in(pc.utf8_lower(pc.utf8_trim(ids, characters=" ")), value_set=pa.array(MISSING_ID_SPELLINGS))
    return np.asarray(pc.or_(pc.is_null(ids), pc.fill_null(spelled, False)), dtype=bool)


def _all_distinct(values) -> bool:
    """Whether integer ids (no nulls) are all distinct: one sort and a comparison of neighbours.

    On a million ids about ten times faster than the dictionary encoding of their text that the
    general path uses (ids in file order are often already sorted, which the sort passes through).
    """
    v = np.sort(np.asarray(values))  # the engine's own integer type (no cast that could merge two ids)
    return not bool(np.any(v[1:] == v[:-1]))


def _rows(table: pa.Table, rows: np.ndarray, n_rows: int) -> pa.Table:
    """``table.take(rows)``, keeping the row count of a table without columns."""
    if table.num_columns == 0:
        return pa.table({"_": pa.nulls(n_rows)}).select([])
    return table.take(pa.array(rows))


def dense_people(label: str, node: str, read: PeopleColumns, show_counts: bool = True) -> People:
    """Refuse missing ids, empty attributes and conflicting repeated ids; number the people.

    Person ``i`` is the ``i``-th distinct id in order of first appearance; a
    repeated id must repeat its attributes exactly (the repeat is then collapsed).
    Messages name rows and columns, never a value.

    Parameters
    ----------
    label : str
        How messages name the person input.
    node : str
        The id column (for messages).
    read : PeopleColumns
        What the engine read, every row in input order.

    Raises
    ------
    InputError
        No rows; a missing id; an empty attribute; an id repeated with other attributes.
    """
    ids = read.ids.combine_chunks() if isinstance(read.ids, pa.ChunkedArray) else read.ids
    attrs = read.attributes
    native = read.native_ids
    n_rows = len(ids)
    if n_rows == 0:
        raise InputError(f"{label}: the person table has no rows")
    # integer ids: their text is digits or null, never empty nor a missing-value spelling
    missing = np.asarray(native.is_null(), dtype=bool) if native is not None else missing_id_mask(ids)
    if missing.any():
        raise InputError(f"{label}: {f'{int(missing.sum()):,} ' if show_counts else 'some '}row(s) have an empty "
                         "or missing id (NaN, NA, null) "
                         f"in column '{node}' (first at data row {int(np.argmax(missing)) + 1})")
    for name, column in zip(attrs.column_names, attrs.columns):
        empty = np.asarray(column.is_null(), dtype=bool)
        if empty.any():
            raise InputError(f"{label}: column '{name}' is empty in data row {int(np.argmax(empty)) + 1}")
    if native is not None and _all_distinct(native):  # the common case at scale: nothing to collapse
        first = None
    else:
        codes = np.asarray(ids.dictionary_encode().indices, dtype=np.int64)
        _, first = np.unique(codes, return_index=True)  # first[k]: the first row of id k
    if first is not None and len(first) < n_rows:  # a repeated id: it must repeat its attributes; keep its first row
        _refuse_conflicts(label, attrs, codes, first, show_counts)
        keep = np.sort(first)
        ids, attrs = ids.take(pa.array(keep)), _rows(attrs, keep, len(keep))
        native = native.take(pa.array(keep)) if native is not None else None
    n_people = len(ids)
    id_table = pa.table({"id": ids, "idx": pa.array(np.arange(n_people, dtype=np.int32))})
    if native is not None:
        id_table = id_table.append_column("nid", native)
    return People(ids=ids, attributes=attrs, id_table=id_table, rows=n_rows)


def _refuse_conflicts(label: str, attrs: pa.Table, codes: np.ndarray, first: np.ndarray,
                      show_counts: bool = True) -> None:
    """Refuse ids repeated with other attributes, naming the first such id's first row and first other row."""
    ref = pa.array(first[codes])  # every row's id's first row
    differ = np.zeros(len(codes), dtype=bool)
    for column in attrs.columns:  # one pass per attribute column, vectorised over the rows
        differ |= ~np.asarray(pc.equal(column, column.take(ref)), dtype=bool)
    if not differ.any():
        return
    keyed = pa.table([pa.array(codes)] + attrs.columns, names=[f"c{i}" for i in range(attrs.num_columns + 1)])
    conflicted = keyed.group_by(keyed.column_names).aggregate([]).num_rows - len(first)
    k = codes[differ][np.argmin(first[codes[differ]])]  # of the conflicted ids, the first to appear
    other = int(np.flatnonzero(differ & (codes == k))[0])
    raise InputError(f"{label}: {conflicted if show_counts else 'some'} person id(s) appear more than once with "
                     "conflicting attributes "
                     f"(first at data row {int(first[k]) + 1}, again with other attributes at data row "
                     f"{other + 1})")
