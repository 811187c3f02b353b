"""A user-supplied person -> supernode map from a public source.

The map is a CSV or Parquet file with the columns ``node`` (person id, as in the
person table) and ``supernode`` (any label). It is validated: every person of the
network appears exactly once, no row names an unknown person, and every
supernode has at least ``min_size`` members. No budget is charged, which is
sound **only if the map itself is public** (for example administrative units or
a published role list): a map computed from the contacts would be a release of
its own and void the guarantee. The manifest carries a note saying so.

Parsing (:func:`parse_group_map`) is separate from file reading
(:func:`read_group_map`).
"""

from __future__ import annotations

__all__ = ["read_group_map", "parse_group_map", "group_by_map", "MAP_NOTE"]

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import InputError, PrivacyError, closest_name
from ._common import Grouping

MAP_NOTE = ("grouping 'given': the person -> supernode map was supplied by the data steward and no budget was "
            "charged for it; the privacy guarantee holds only if that map is public (not derived from the "
            "contacts or other private data)")


def read_group_map(path) -> pa.Table:
    """Read a map file (CSV or Parquet) as strings ``node``, ``supernode``."""
    from ..ingest import file_format

    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: grouping map file not found ('grouping.map')")
    if path.is_dir():
        raise InputError(f"{path}: 'grouping.map' is a folder, expected a file")
    try:
        if file_format(path) == "parquet":
            import pyarrow.parquet as pq

            table = pq.read_table(path)
        else:
            import pyarrow.csv as pcsv

            delim = "\t" if file_format(path) == "tsv" else ","
            table = pcsv.read_csv(path, parse_options=pcsv.ParseOptions(delimiter=delim),
                                  convert_options=pcsv.ConvertOptions(
                                      column_types={"node": pa.string(), "supernode": pa.string()},
                                      strings_can_be_null=False))
    except (pa.ArrowInvalid, OSError) as exc:
        reason = str(exc).splitlines()[0][:160] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: cannot read grouping map: {reason.split(':')[0]}") from None
    return parse_group_map(table, name=str(path))


def parse_group_map(table: pa.Table, name: str = "grouping map") -> pa.Table:
    """Check the columns of a map table and cast them to strings."""
    for col in ("node", "supernode"):
        if col not in table.column_names:
            raise InputError(f"{name}: no column '{col}'{closest_name(col, table.column_names)}")
    out = {}
    for col in ("node", "supernode"):
        c = table.column(col).combine_chunks()
        if c.null_count:
            row = int(np.flatnonzero(c.is_null().to_numpy(zero_copy_only=False))[0])
            raise InputError(f"{name}: column '{col}' is empty in data row {row + 1}")
        c = pc.cast(c, pa.string())
        blank = pc.equal(pc.utf8_trim_whitespace(c), "").to_numpy(zero_copy_only=False)
        if blank.any():
            raise InputError(f"{name}: column '{col}' is empty in data row {int(np.flatnonzero(blank)[0]) + 1}")
        out[col] = c
    return pa.table(out)


def group_by_map(ids, group_map: pa.Table, min_size: int, name: str = "grouping map") -> Grouping:
    """Validate a public map against the network's people and turn it into a Grouping.

    Parameters
    ----------
    ids : pyarrow.Array of string
        The person ids of the network, ``ids[i]`` = person ``i``.
    group_map : pyarrow.Table
        ``node``, ``supernode`` strings (from :func:`parse_group_map`).
    min_size : int
        Minimum members per supernode.
    name : str
        File name for messages.

    Returns
    -------
    Grouping
        ``public = True``, no spends; labels ``supernode`` and ``map_supernode``
        (the map's own label), supernodes ordered by that label.

    Raises
    ------
    InputError
        A person listed twice, an unknown person, or people missing from the map
        (counts and row numbers only, never ids).
    PrivacyError
        A supernode of the map has fewer than ``min_size`` members.
    """
    ids = pc.cast(ids if isinstance(ids, (pa.Array, pa.ChunkedArray)) else pa.array(ids), pa.string())
    if isinstance(ids, pa.ChunkedArray):
        ids = ids.combine_chunks()
    n = len(ids)
    nodes = group_map.column("node").combine_chunks()
    labels = group_map.column("supernode").combine_chunks()
    # each person at most once
    enc = pc.dictionary_encode(nodes)
    codes = enc.indices.to_numpy(zero_copy_only=False)
    counts = np.bincount(codes, minlength=len(enc.dictionary))
    if (counts > 1).any():
        _, first_idx = np.unique(codes, return_index=True)
        repeat = np.ones(len(codes), dtype=bool)
        repeat[first_idx] = False
        first_repeat = int(np.flatnonzero(repeat)[0])
        raise InputError(f"{name}: {int((counts > 1).sum())} person(s) are listed more than once "
                         f"(first repeat at data row {first_repeat + 1}); each person needs exactly one supernode")
    pos_arr = pc.index_in(nodes, value_set=ids)
    unknown = pos_arr.is_null().to_numpy(zero_copy_only=False)
    if unknown.any():
        raise InputError(f"{name}: {int(unknown.sum())} row(s) name people missing from the person table "
                         f"(first at data row {int(np.flatnonzero(unknown)[0]) + 1})")
    pos = pos_arr.fill_null(-1).to_numpy(zero_copy_only=False)
    pos = pos.astype(np.int64)
    covered = np.zeros(n, dtype=bool)
    covered[pos] = True
    if not covered.all():
        raise InputError(f"{name}: {int((~covered).sum())} person(s) of the person table have no supernode "
                         "in the map; every person needs exactly one")
    lab_enc = pc.dictionary_encode(labels)
    dictionary = lab_enc.dictionary
    sort = np.asarray(pc.sort_indices(dictionary).to_numpy(zero_copy_only=False), dtype=np.int64)
    rank = np.empty(len(dictionary), dtype=np.int64)
    rank[sort] = np.arange(len(dictionary))
    group_of_row = rank[lab_enc.indices.to_numpy(zero_copy_only=False)]
    assignment = np.empty(n, dtype=np.int32)
    assignment[pos] = group_of_row.astype(np.int32)
    sizes = np.bincount(assignment, minlength=len(dictionary))
    small = sizes < min_size
    if small.any():
        raise PrivacyError(f"{name}: {int(small.sum())} supernode(s) of the map have fewer than "
                           f"'grouping.min_size' = {min_size} members; merge them in the map")
    table = pa.table({"supernode": pa.array(np.arange(len(dictionary), dtype=np.int64)),
                      "map_supernode": dictionary.take(pa.array(sort))})
    notes = [MAP_NOTE, f"{n} people in {len(dictionary)} supernode(s) from the given map"]
    return Grouping(assignment=assignment, labels=table, method="given", notes=notes, public=True)
