"""Column checks: a missing column (naming what was found when that is safe), id and weight types."""

from __future__ import annotations

__all__ = ["missing_column_error", "require_id_type", "require_weight_type", "looks_like_header"]

import difflib

from ..engines.interface import INTEGER, REAL, TEXT, ColumnType, Source
from ..errors import InputError, closest_name

#: Delimiters a CSV file with a single header field may really be using
_OTHER_DELIMITERS = (";", "\t", "|", ",")
#: At most this many found column names are listed in a message
_LISTED_NAMES = 20


def looks_like_header(asked: str, found, expected) -> bool:
    """Whether the first line of a CSV file reads as a header rather than as data.

    A file without a header has data on its first line, so its "column names" are
    private values. The first line counts as a header when it has at least one
    expected column, or a near-miss of the asked name that holds no digit (ids
    usually have digits); otherwise it may be data.
    """
    found = [str(c) for c in found]
    if any(c in found for c in expected):
        return True
    near = difflib.get_close_matches(str(asked), found, n=1, cutoff=0.75)
    return bool(near) and not any(ch.isdigit() for ch in near[0])


def _listed(found) -> str:
    names = [f"'{c}'" for c in found]
    more = len(names) - _LISTED_NAMES
    return ", ".join(names[:_LISTED_NAMES]) + (f" and {more} more" if more > 0 else "")


def missing_column_error(source: Source, asked: str, found, expected, what: str, option: str = "") -> InputError:
    """The error for a column ``asked`` that ``source`` lacks.

    Parquet and Arrow column names, and a CSV first line that
    :func:`looks_like_header`, are listed (column names are not private) with
    the closest one suggested. A CSV first line that may be data is not quoted:
    the message then says how many fields it has, or which delimiter it seems
    to use when it is a single field.

    Parameters
    ----------
    source : Source
        The input (its label names it; ``debug`` allows quoting any first line).
    asked : str
        The missing column.
    found : sequence of str
        The columns the input has.
    expected : sequence of str
        Every column this read asks for.
    what : str
        ``"column"``, ``"id column"`` or ``"attribute column"``.
    option : str
        How to name another column (e.g. ``"--source-column or [input] source"``), said at the end.
    """
    found = list(found)
    prefix = f"{source.label}: no {what} '{asked}'"
    how = f"; name the right one with {option}" if option else ""
    if source.debug or source.format != "csv" or looks_like_header(asked, found, expected):
        return InputError(f"{prefix}{closest_name(asked, found)} (columns found: {_listed(found)}){how}")
    if len(found) == 1 and any(d in found[0] for d in _OTHER_DELIMITERS):
        delim = next(d for d in _OTHER_DELIMITERS if d in found[0])
        return InputError(f"{prefix} (the header is a single field containing {delim!r}: the file looks "
                          f"{delim!r}-delimited; .csv files must be comma-separated and .tsv files tab-separated)")
    return InputError(f"{prefix} (none of the {len(found)} header fields is an expected column: "
                      f"is the first line a header?){how}")


def require_id_type(source: Source, column: str, ctype: ColumnType) -> None:
    """Refuse an id column that is neither integers nor text."""
    if ctype.kind not in (INTEGER, TEXT):
        raise InputError(f"{source.label}: id column '{column}' has type {ctype.name}; ids must be integers or text")


def require_weight_type(source: Source, column: str, ctype: ColumnType) -> None:
    """Refuse a weight column that is not numbers (integers, floating point, decimals) or text."""
    if ctype.kind not in (INTEGER, REAL, TEXT):
        raise InputError(f"{source.label}: weight column '{column}' is not numeric ({ctype.name})")
