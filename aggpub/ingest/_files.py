"""Input files: existence, format, CSV header; each input resolved into an engine :class:`Source`."""

from __future__ import annotations

__all__ = ["file_format", "csv_header", "check_input_path", "input_source", "MISSING_ID_SPELLINGS"]

import csv
from pathlib import Path

import pyarrow as pa

from ..engines.interface import Source
from ..errors import InputError

#: id spellings treated as a missing id (what spreadsheet and dataframe exports write for an empty cell);
#: compared after trimming spaces (U+0020 only, in every engine), case-insensitively
MISSING_ID_SPELLINGS = ("", "nan", "na", "n/a", "null", "none")


def file_format(path: Path) -> str:
    """``'csv'``, ``'tsv'`` or ``'parquet'`` from the name, else from the first bytes."""
    path = Path(path)
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


def _first_line(path: Path) -> bytes:
    """The first line of a file (up to 4 MiB), without its line ending."""
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
    return head.split(b"\n", 1)[0].rstrip(b"\r")


def csv_header(path: Path, delimiter: str) -> list[str]:
    """Column names from the first line of a CSV or TSV file.

    A UTF-8 byte-order mark is accepted (and dropped). The header must be UTF-8
    and its names non-empty and distinct. No message names a field: a
    headerless file's first line is data.

    Raises
    ------
    InputError
        The header is unreadable, not UTF-8, has an empty or a repeated name.
    """
    try:
        text = _first_line(path).decode("utf-8-sig")
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
    for i, name in enumerate(names):
        if not name.strip():
            raise InputError(f"{path}: header field {i + 1} has no name")
        if name in seen:
            raise InputError(f"{path}: header fields {seen[name] + 1} and {i + 1} have the same name")
        seen[name] = i
    return names


def check_input_path(path, what: str) -> Path:
    """``path`` as a :class:`Path` after checking it names a readable, non-empty file.

    Raises
    ------
    InputError
        Not found, a folder, unreadable or empty.
    """
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


def input_source(given, what: str, debug: bool) -> Source:
    """The engine's :class:`Source` for an input: an Arrow table, or a checked file (format and header resolved).

    Parameters
    ----------
    given : pyarrow.Table or Path
        The input (a path already checked by :func:`check_input_path`).
    what : str
        ``"edge"`` or ``"person"`` (names the input in messages).
    debug : bool
        Allow private values in the engine's error reasons.
    """
    if isinstance(given, pa.Table):
        label = f"{what} table"
        return Source(label=label, unreadable=f"{label}: cannot read {what} file", format="arrow", table=given,
                      debug=debug)
    label = str(given)
    unreadable = f"{label}: cannot read {what} file"
    fmt = file_format(given)
    if fmt == "parquet":
        return Source(label=label, unreadable=unreadable, format="parquet", path=str(given), debug=debug)
    delimiter = "\t" if fmt == "tsv" else ","
    return Source(label=label, unreadable=unreadable, format="csv", path=str(given),
                  header=tuple(csv_header(given, delimiter)), delimiter=delimiter, debug=debug)
