"""Ingest: edges and person attributes into a :class:`Network` with dense integer ids.

Edge files (CSV, TSV or Parquet) have two id columns (default ``source`` and
``target``) and optionally a weight column. Person files (CSV or Parquet) have an
id column (default ``node``) plus attribute columns. Ids may be integers or
strings; each person is mapped once to a dense integer (its row in the person
table). The network is undirected: self-loops are dropped and counted, duplicate
pairs are collapsed (their weights summed) and counted. An edge naming a person
missing from the person table is an error, or is dropped and counted when
``drop_unknown`` is set.

The edges never leave the counting engine; only the person table (attributes)
comes back to Python as an Arrow table.

What is accepted and what is refused (each refusal is an :class:`InputError`
naming the file and the row, line or column, never a value from the file):

* CSV must be comma-separated, TSV tab-separated, UTF-8; a UTF-8 byte-order mark
  is accepted and dropped. The header must have distinct, non-empty names. A
  ragged row, an unclosed quote or non-UTF-8 bytes are refused with the line number.
* Ids are text. CSV ids are read verbatim, never re-typed (``007`` stays ``007``;
  ids beyond 64 bits are fine). Parquet/Arrow id columns must be integers (any
  width, signed or unsigned) or strings; floats, decimals, booleans, dates and
  nested types are refused. An empty id, or one spelling a missing value
  (:data:`MISSING_ID_SPELLINGS`), is refused.
* Weights must be finite and non-negative numbers; text weights are parsed.
"""

from __future__ import annotations

__all__ = ["Network", "IngestReport", "load_network", "load_policy_inputs", "policy_attributes", "policy_weight_column",
           "file_format", "csv_header", "MISSING_ID_SPELLINGS"]

from pathlib import Path

import pyarrow as pa

from .errors import InputError
from .network import IngestReport, Network


def file_format(path: Path) -> str:
    """``'csv'``, ``'tsv'`` or ``'parquet'`` from the name, else from the first bytes."""
    suffixes = [s.lower() for s in path.suffixes]
    if suffixes and suffixes[-1] in (".parquet", ".pq"):
        return "parquet"
    if suffixes and suffixes[-1] == ".tsv":
        return "tsv"
    if suffixes and suffixes[-1] in (".csv", ".txt"):
        return "csv"
    try:
        with open(path, "rb") as fh:
            head = fh.read(4)
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror})") from None
    return "parquet" if head == b"PAR1" else "csv"


#: id spellings treated as a missing id (what spreadsheet and dataframe exports write for an empty cell);
#: compared after trimming spaces, case-insensitively
MISSING_ID_SPELLINGS = ("", "nan", "na", "n/a", "null", "none")


def csv_header(path: Path, delimiter: str) -> list[str]:
    """Column names from the first line of a CSV or TSV file.

    A UTF-8 byte-order mark is accepted (and dropped). The header must be UTF-8
    and its names non-empty and distinct.

    Raises
    ------
    InputError
        The header is unreadable, not UTF-8, has an empty or a repeated name.
    """
    import csv

    try:
        with open(path, "rb") as fh:
            head = b""
            while b"\n" not in head and len(head) < (4 << 20):
                block = fh.read(1 << 16)
                if not block:
                    break
                head += block
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror})") from None
    line = head.split(b"\n", 1)[0].rstrip(b"\r")
    try:
        text = line.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"{path}: line 1 (the header) is not UTF-8 text (byte {exc.start + 1})") from None
    if "\x00" in text:
        raise InputError(f"{path}: line 1 (the header) contains a NUL byte; is this a text file?")
    try:
        names = next(csv.reader([text], delimiter=delimiter, quotechar='"'), [])
    except csv.Error:
        raise InputError(f"{path}: line 1 (the header) is not valid CSV") from None
    if not names:
        raise InputError(f"{path}: line 1 (the header) is empty")
    seen = {}
    for i, name in enumerate(names):  # no names in these messages: a headerless file's first line is data
        if not name.strip():
            raise InputError(f"{path}: header field {i + 1} has no name")
        if name in seen:
            raise InputError(f"{path}: header fields {seen[name] + 1} and {i + 1} have the same name")
        seen[name] = i
    return names


def _check_input_path(path, what) -> Path:
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: {what} file not found")
    if path.is_dir():
        raise InputError(f"{path}: {what} path is a folder, expected a file")
    try:
        with open(path, "rb") as fh:
            first = fh.read(1)
    except OSError as exc:
        raise InputError(f"{path}: cannot read {what} file ({exc.strerror})") from None
    if not first:
        raise InputError(f"{path}: {what} file is empty")
    return path


def load_network(edges, people, *, source="source", target="target", node="node", weight=None,
                 drop_unknown=False, attributes=None, engine=None, debug=False) -> Network:
    """Read edges and person attributes into a :class:`Network`.

    Parameters
    ----------
    edges : str, Path or pyarrow.Table
        Edge list: a CSV/TSV/Parquet file or an Arrow table.
    people : str, Path or pyarrow.Table
        Person attributes: a CSV/Parquet file or an Arrow table.
    source, target, node, weight : str
        Column names (``weight`` optional).
    drop_unknown : bool
        Drop edges naming people missing from the person table instead of failing.
    attributes : sequence of str, optional
        Attribute columns to keep (default: all but the id column).
    engine : object, optional
        A counting engine (default: a new embedded DuckDB engine).
    debug : bool
        Allow private values (ids) in error messages.

    Returns
    -------
    Network
    """
    from .engines import make_engine

    if engine is None:
        engine = make_engine("duckdb")
    edges_src = edges if isinstance(edges, pa.Table) else _check_input_path(edges, "edge")
    people_src = people if isinstance(people, pa.Table) else _check_input_path(people, "person")
    return engine.load(edges_src, people_src, source=source, target=target, node=node, weight=weight,
                       drop_unknown=drop_unknown, attributes=attributes, debug=debug)


def policy_weight_column(policy, given=None):
    """The edge weight column to read: ``components.weight_totals.column`` when weight totals are on."""
    from .errors import PolicyError

    wt = policy.components.weight_totals
    if not wt.enabled:
        return given
    if given and given != wt.column:
        raise PolicyError(f"'components.weight_totals.column' = '{wt.column}' differs from the weight column "
                          f"given for input ('{given}'); name one column")
    return wt.column


def policy_attributes(policy) -> list:
    """The person attributes a policy reads: its grouping attributes and the gate's contact-matrix attribute."""
    attrs = list(policy.grouping.attributes)
    gate_attr = policy.gate.contact_matrix_attribute
    if gate_attr and gate_attr not in attrs:
        attrs.append(gate_attr)
    return attrs


def load_policy_inputs(policy, edges, people, *, source=None, target=None, node=None, weight=None,
                       drop_unknown=None, engine=None, debug=False) -> Network:
    """Read the inputs of a release, sweep or plan the way ``policy`` says.

    Column options left as ``None`` come from the policy's ``[input]`` section;
    the weight column from ``components.weight_totals`` when weight totals are
    released; only the attributes the policy uses are kept.

    Returns
    -------
    Network
    """
    inp = policy.input
    return load_network(edges, people, source=source or inp.source, target=target or inp.target,
                        node=node or inp.node, weight=policy_weight_column(policy, weight or inp.weight),
                        drop_unknown=inp.drop_unknown if drop_unknown is None else drop_unknown,
                        attributes=policy_attributes(policy), engine=engine, debug=debug)
