"""A commented starting policy for a person file and its grouping attributes (``aggpub draft-policy``).

The starting policy is a TOML file in which every key carries a comment saying
what it does and what the choices are (taken from the key table of
:mod:`aggpub.policy`). It is meant to be read and edited by the data steward,
then used as it is or changed; as written it parses strictly and releases.

Where the attribute values come from depends on the privacy unit:

* ``edge``: the person table is public under this unit (who is in the data and
  their attributes), so the person file is read and each attribute's values
  found there are listed as the first level of its hierarchy, each mapped to
  itself. The steward then maps values to broader groups, so that small cells
  are generalised rather than merged into the residual supernode. The number of
  attribute cells below ``min_size`` is reported (public under this unit).
* ``person``: the values present in the person file are private (one person can
  be the only one with a value), so they are **not read**. The domains come from
  a public codebook the steward supplies (:func:`read_codebook`); only the
  person file's header (column names, not private) is read, to check that the
  attributes exist.

A codebook is a UTF-8 CSV file with the columns ``attribute`` and ``value`` and
optionally ``broader``, ``broader_2``, ``broader_3``, ... (one row per possible
value; the ``broader`` columns give the value's generalisation path). See
:data:`STARTER_REFERENCE`, which ``docs/policy.md`` includes.

Errors name the file and what is wrong (row or line number, column), never a
value from the person file.
"""

from __future__ import annotations

__all__ = ["Codebook", "DraftPolicy", "read_codebook", "draft_policy", "write_draft_policy", "STARTER_REFERENCE",
           "CODEBOOK_COLUMNS"]

import math
import os
import re
import textwrap
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc

from ._version import __version__
from .errors import InputError, OutputError, PolicyError, UsageError, closest_name
from .ingest import check_input_path
from .policy import (KINDS, POLICY_SECTIONS, PRIVACY_UNITS, REQUIRED, Depends, check_value, parse_policy,
                     policy_key)

#: An attribute with more values found than this gets a note suggesting a coarser one.
MANY_VALUES = 1000

#: The required columns of a codebook; optional ``broader``, ``broader_2``, ... follow.
CODEBOOK_COLUMNS = ("attribute", "value")

STARTER_REFERENCE = """\
## Starting policy (`aggpub draft-policy`)

```
aggpub draft-policy --nodes people.csv --attributes age_band,neighbourhood --out policy.toml
aggpub draft-policy --nodes people.csv --attributes age_band,neighbourhood --unit person \\
    --codebook codebook.csv --max-contacts 60 --out policy.toml
```

writes a starting policy in which every key is commented with what it does and the choices: epsilon 1.0,
`min_size` 20 (`--epsilon`, `--min-size` to change), grouping by the given attributes, superedge counts released,
the contact views (`[components.contact_views]`: a contact matrix per grouping attribute, on by default) with
their options commented out, a `[layers]` section commented out (the setting of each contact, declared from the
study design; with `--edges` the edge file's other columns are listed as candidates), example shares commented
out that add up to 1, a `[ledger]` section commented out (one ledger file per dataset), `[gate]` thresholds only
as commented examples, and `[input]` with the person id column (`--node-column`, default `node`). As written it parses strictly and
releases; review it before a real release. The same in Python: `aggpub.starter.draft_policy(...)` returns the text
and the notes, `aggpub.starter.write_draft_policy(...)` writes it (atomically; an existing file is replaced only
with `--overwrite`). Exit codes: 0 written, 2 usage error, 3 input error (a file missing, unreadable or not
UTF-8, an attribute that is not a column), 7 output error.

Where the attribute values come from depends on the unit:

- **`--unit edge`** (default): the person table is public under this unit, so the person file is read and each
  attribute's values found there are listed as the first level of its hierarchy, each mapped to itself. Nothing
  is generalised yet: map the values to broader groups (`"0-4" = "0-9"`) so small cells are generalised rather
  than merged into the residual supernode. The command reports how many attribute cells have fewer than
  `min_size` people. With `--codebook`, the codebook's levels are used, and values found in the file but missing
  from the codebook are added, mapped to themselves.
- **`--unit person`**: the values present in the person file are private (one person can be the only one with a
  value), so the command does **not** read them: it reads only the file's header (column names are not private)
  and takes every attribute's domain from a public codebook, which `--unit person` requires, with the promised
  contact cap `--max-contacts`. The release then refuses people whose value the codebook does not list.

### The codebook file

A codebook lists every possible value of each grouping attribute, from public documentation (a survey's
codebook, an administrative classification), never from the private data. It is a CSV file, UTF-8, comma
separated, with a header:

| column | required | meaning |
|---|---|---|
| `attribute` | yes | the attribute (a column of the person file) |
| `value` | yes | one possible value, exactly as written in the person file |
| `broader` | no | the broader group the value belongs to (the first generalisation step); empty: the value stays as it is |
| `broader_2`, `broader_3`, ... | no | further steps: the broader group of the previous column's group |

Rules: one row per (attribute, value); no empty `attribute` or `value`; a `broader_k` cell may be filled only if
the previous step's cell is; a group that appears in several rows must have the same broader group in each (a
group has one parent). Attributes of the codebook that are not grouping attributes are ignored. Each attribute
becomes `[grouping.hierarchies.<attribute>]`: its first level maps every value to its `broader` group (or to
itself), each further level maps the groups of the previous level. Example:

```
attribute,value,broader,broader_2
age_band,0-4,0-9,0-19
age_band,5-9,0-9,0-19
age_band,10-14,10-19,0-19
age_band,15-19,10-19,0-19
neighbourhood,Alderquay,Millward
neighbourhood,Brackenholt,Millward
neighbourhood,Dovecote Green,Northreach
```
"""


# --------------------------------------------------------------------------- reading files


def _first_bad_utf8_line(path: Path):
    """(line number, byte offset in the line, looks like Windows-1252) of the first line that is not UTF-8."""
    with open(path, "rb") as fh:
        for number, line in enumerate(fh, start=1):
            if number == 1 and line.startswith(b"\xef\xbb\xbf"):
                line = line[3:]
            try:
                line.decode("utf-8")
            except UnicodeDecodeError as exc:
                try:
                    line.decode("cp1252")
                    cp1252 = True
                except UnicodeDecodeError:
                    cp1252 = False
                return number, exc.start + 1, cp1252
    return None


def _not_utf8(path: Path, what: str) -> InputError:
    found = _first_bad_utf8_line(path)
    where = f"line {found[0]} (byte {found[1]})" if found else "the file"
    hint = ("; it looks like Windows-1252 (or Latin-1) text" if found and found[2] else "")
    return InputError(f"{path}: {what} file is not UTF-8 text: {where}{hint}. Save it as UTF-8 (in a spreadsheet: "
                      "'CSV UTF-8') and run again; aggpub reads UTF-8 only")


def _csv_delimiter(path: Path, fmt: str) -> str:
    return "\t" if fmt == "tsv" else ","


def _read_csv_strings(path: Path, columns, delimiter: str, what: str) -> pa.Table:
    """Columns of a CSV file as strings, verbatim; errors name the file and the problem, never a value."""
    import pyarrow.csv as pacsv

    try:
        return pacsv.read_csv(
            path,
            read_options=pacsv.ReadOptions(encoding="utf8"),
            parse_options=pacsv.ParseOptions(delimiter=delimiter, quote_char='"', double_quote=True,
                                             newlines_in_values=True),
            convert_options=pacsv.ConvertOptions(include_columns=list(columns),
                                                 column_types={c: pa.string() for c in columns},
                                                 strings_can_be_null=False, quoted_strings_can_be_null=False))
    except pa.ArrowInvalid as exc:
        text = str(exc)
        if "UTF8" in text or "UTF-8" in text:
            raise _not_utf8(path, what) from None
        if "Expected" in text and "columns" in text:
            m = re.search(r"Expected (\d+) columns, got (\d+)", text)
            detail = f" (expected {m.group(1)} fields, a row has {m.group(2)})" if m else ""
            raise InputError(f"{path}: {what} file has a row with more or fewer fields than its header{detail}; "
                             "check the delimiter and the quoting") from None
        raise InputError(f"{path}: cannot read {what} file as CSV") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read {what} file ({exc.strerror or 'read error'})") from None


def _person_columns(path: Path) -> tuple[str, list[str]]:
    """(format, column names) of a person file; reads only the header (CSV) or the schema (Parquet)."""
    from .ingest import csv_header, file_format

    fmt = file_format(path)
    if fmt == "parquet":
        import pyarrow.parquet as pq

        try:
            schema = pq.read_schema(path)
        except (pa.ArrowException, OSError):
            raise InputError(f"{path}: cannot read the person file as Parquet") from None
        return fmt, list(schema.names)
    return fmt, csv_header(path, _csv_delimiter(path, fmt))


def _check_columns(path: Path, columns, wanted, node_column):
    if len(columns) == 1 and any(d in columns[0] for d in ";|\t"):
        delim = next(d for d in ";|\t" if d in columns[0])
        raise InputError(f"{path}: the header is a single field containing {delim!r}: the file looks {delim!r}-"
                         "delimited; .csv files must be comma-separated and .tsv files tab-separated (save it "
                         "again as comma-separated CSV, UTF-8)")
    for a in wanted:
        if a not in columns:
            raise InputError(f"{path}: no column '{a}' in the person file{closest_name(a, columns)}; "
                             f"its columns: {', '.join(columns)}")
    if node_column not in columns:
        raise InputError(f"{path}: no id column '{node_column}' in the person file"
                         f"{closest_name(node_column, columns)} (use --node-column)")


_TEXT_TYPES = (pa.types.is_string, pa.types.is_large_string, pa.types.is_integer, pa.types.is_boolean)


def _read_person_values(path: Path, fmt: str, attributes) -> pa.Table:
    """The attribute columns of the person file as strings, spelled as the release's ingest spells them."""
    if fmt == "parquet":
        import pyarrow.parquet as pq

        try:
            table = pq.read_table(path, columns=list(attributes))
        except (pa.ArrowException, OSError):
            raise InputError(f"{path}: cannot read the person file as Parquet") from None
        cols = {}
        for a in attributes:
            col = table.column(a)
            if pa.types.is_dictionary(col.type):
                col = col.cast(col.type.value_type)
            if not any(t(col.type) for t in _TEXT_TYPES):
                raise InputError(f"{path}: attribute column '{a}' has type {col.type}; draft-policy lists text, "
                                 "integer or boolean values only (write the attribute as text, or give --codebook)")
            cols[a] = col.cast(pa.string())
        return pa.table(cols)
    return _read_csv_strings(path, attributes, _csv_delimiter(path, fmt), "person")


# --------------------------------------------------------------------------- the codebook


@dataclass(frozen=True)
class Codebook:
    """A public codebook: every possible value of each attribute and its generalisation levels.

    Attributes
    ----------
    path : Path
        The file read.
    levels : dict
        Attribute -> tuple of levels; ``levels[0]`` maps every value (the domain)
        to its ``broader`` group or to itself, ``levels[k]`` maps the groups of
        level ``k - 1`` to the ``broader_{k+1}`` groups.
    """

    path: Path
    levels: dict = field(default_factory=dict)

    def domain(self, attribute) -> list[str]:
        return list(self.levels[attribute][0])


_BROADER = re.compile(r"^broader(?:_(\d+))?$")


def read_codebook(path) -> Codebook:
    """Read a codebook CSV (``attribute,value[,broader[,broader_2...]]``).

    A small public file, read with the standard ``csv`` module so that a row may
    leave out its trailing empty ``broader`` cells.

    Parameters
    ----------
    path : str or Path
        UTF-8 CSV file (comma-separated) with a header.

    Returns
    -------
    Codebook

    Raises
    ------
    InputError
        The file is missing, not UTF-8, malformed, or breaks a rule (the message
        names the line and the column).
    """
    import csv

    path = check_input_path(path, "codebook")
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError:
        raise _not_utf8(path, "codebook") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read codebook file ({exc.strerror})") from None
    reader = csv.reader(text.splitlines(), delimiter=",", quotechar='"', strict=True)
    try:
        header = [h.strip() for h in next(reader, [])]
        body = [(reader.line_num, row) for row in reader]
    except csv.Error as exc:
        raise InputError(f"{path}: line {reader.line_num}: not valid CSV ({exc})") from None
    for c in CODEBOOK_COLUMNS:
        if c not in header:
            raise InputError(f"{path}: the codebook has no column '{c}'{closest_name(c, header)}; "
                             "its header must be attribute,value[,broader[,broader_2...]]")
    if len(set(header)) != len(header):
        raise InputError(f"{path}: the codebook's header names a column twice")
    steps = {}
    for c in header:
        if c in CODEBOOK_COLUMNS:
            continue
        m = _BROADER.match(c)
        if not m or m.group(1) == "1":
            raise InputError(f"{path}: unknown codebook column '{c}'{closest_name(c, ['broader'])}; "
                             "allowed: attribute, value, broader, broader_2, broader_3, ...")
        steps[int(m.group(1) or 1)] = c
    if sorted(steps) != list(range(1, len(steps) + 1)):
        raise InputError(f"{path}: the codebook's broader columns must be broader, broader_2, broader_3, ... "
                         "without gaps")
    broader_cols = [steps[k] for k in sorted(steps)]
    index = {c: header.index(c) for c in header}
    levels_by_attr: dict[str, list[dict]] = {}
    first_line: dict = {}
    for line, row in body:
        if not any(cell.strip() for cell in row):
            continue  # a blank line
        if len(row) > len(header):
            raise InputError(f"{path}: line {line} has {len(row)} fields, the header {len(header)}")
        row = row + [""] * (len(header) - len(row))  # trailing empty broader cells may be left out
        attr, value = row[index["attribute"]].strip(), row[index["value"]]
        if not attr:
            raise InputError(f"{path}: line {line}: empty 'attribute'")
        if value == "":
            raise InputError(f"{path}: line {line}: empty 'value'")
        chain = [value]
        ended = False
        for c in broader_cols:
            cell = row[index[c]]
            if cell == "":
                ended = True
                chain.append(chain[-1])
                continue
            if ended:
                raise InputError(f"{path}: line {line}: column '{c}' is filled but the step before it is empty")
            chain.append(cell)
        levels = levels_by_attr.setdefault(attr, [dict() for _ in broader_cols] or [dict()])
        if value in levels[0]:
            raise InputError(f"{path}: line {line}: attribute '{attr}' lists the same value twice "
                             f"(first on line {first_line[(attr, 0, value)]})")
        for step in range(len(levels)):
            src = chain[step]
            dst = chain[step + 1] if step + 1 < len(chain) else src
            known = levels[step].get(src)
            if known is not None and known != dst:
                raise InputError(f"{path}: line {line}: column '{broader_cols[step]}' gives a group of attribute "
                                 f"'{attr}' another broader group than line {first_line[(attr, step, src)]} "
                                 "(a group has one broader group)")
            if known is None:
                levels[step][src] = dst
                first_line[(attr, step, src)] = line
    out = {}
    for attr, levels in levels_by_attr.items():
        while len(levels) > 1 and all(k == v for k, v in levels[-1].items()):
            levels.pop()  # trailing steps that change nothing
        out[attr] = tuple(levels)
    if not out:
        raise InputError(f"{path}: the codebook has no rows")
    return Codebook(path=path, levels=out)


# --------------------------------------------------------------------------- the starting policy


@dataclass
class DraftPolicy:
    """A starting policy: its TOML text and the notes the command prints.

    Attributes
    ----------
    text : str
        The commented TOML policy (parses strictly).
    notes : list of str
        One line each: where the values came from, small cells, what to do next.
    unit : str
    attributes : tuple of str
    """

    text: str
    notes: list = field(default_factory=list)
    unit: str = "edge"
    attributes: tuple = ()


def _natural_key(value: str):
    return [(0, int(part), "") if part.isdigit() else (1, 0, part) for part in re.split(r"(\d+)", value) if part]


def _toml_string(value: str) -> str:
    out = []
    for ch in value:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return _toml_string(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, float):
        return repr(v)
    return str(v)


def _plain(text: str) -> str:
    return text.replace("`", "")


def _choices_text(path: str) -> str:
    key = policy_key(path)
    parts = []
    if key.choices:
        parts.append("one of " + ", ".join(_value(c) for c in key.choices))
    if key.range is not None:
        parts.append(key.range.text())
    if key.default is REQUIRED:
        parts.append("required")
    elif isinstance(key.default, Depends):
        parts.append("default " + _plain(key.default.text(key.section)))
    elif key.default_doc:
        parts.append("default " + _plain(key.default_doc))
    elif key.default is not None:
        parts.append(f"default {_value(key.default)}")
    else:
        parts.append(f"{KINDS[key.kind]}, not set by default")
    return "; ".join(parts)


_WIDTH = 100


def _key_lines(path: str, value, *, active=True, extra=()) -> list[str]:
    """A key with its comment (meaning and choices from the key table)."""
    key = policy_key(path)
    lines = textwrap.wrap(f"{key.name}: {_plain(key.meaning)} ({_choices_text(path)}).", width=_WIDTH,
                          initial_indent="# ", subsequent_indent="#   ", break_on_hyphens=False)
    lines += [f"#   {x}" if x else "#" for x in extra]
    lines.append(("" if active else "# ") + f"{key.name} = {_value(value)}")
    return lines


def _section_lines(name: str, *, active=True) -> list[str]:
    sec = next(s for s in POLICY_SECTIONS if s.name == name)
    return ["", f"# {'-' * 98}", f"# [{name}]: {_plain(sec.meaning)}", ("" if active else "# ") + f"[{name}]"]


def _small_cells(values: pa.Table, attributes, min_size: int):
    """(cells, cells below min_size, people in them) of the attribute combinations (unit edge only)."""
    counts = values.group_by(list(attributes)).aggregate([([], "count_all")]).column("count_all")
    import numpy as np

    c = np.asarray(counts.to_numpy(zero_copy_only=False))
    small = c < min_size
    return int(len(c)), int(small.sum()), int(c[small].sum())


def draft_policy(people, attributes, *, unit: str = "edge", codebook=None, max_contacts=None,
                 node_column: str = "node", epsilon: float = 1.0, min_size: int = 20,
                 title: str | None = None, edges=None) -> DraftPolicy:
    """Write a commented starting policy for a person file and grouping attributes.

    Parameters
    ----------
    people : str or Path
        The person file (CSV, TSV or Parquet). Under ``edge`` its attribute
        columns are read; under ``person`` only its header.
    attributes : sequence of str
        Grouping attributes (columns of the person file), in order.
    unit : {"edge", "person"}
        The privacy unit.
    codebook : str, Path or Codebook, optional
        The public codebook (required under ``person``).
    max_contacts : int, optional
        The promised contact cap (required under ``person``).
    node_column : str
        The person id column.
    epsilon : float
        Total epsilon written (default 1.0).
    min_size : int
        Smallest supernode written (default 20).
    title : str, optional
        The policy's title.
    edges : str or Path, optional
        The edge file: only its header (or Parquet schema) is read, to name the
        edge id columns in ``[input]`` (column names are not private).

    Returns
    -------
    DraftPolicy

    Raises
    ------
    UsageError
        A missing or contradictory argument (names the command-line option).
    InputError
        A file is missing, unreadable or not UTF-8, or an attribute is not a column.
    """
    attributes = _check_draft_arguments(attributes, unit, codebook, max_contacts, node_column, epsilon, min_size)

    people = check_input_path(people, "person")
    fmt, columns = _person_columns(people)
    _check_columns(people, columns, attributes, node_column)
    if codebook is not None and not isinstance(codebook, Codebook):
        codebook = read_codebook(codebook)

    notes = []
    hierarchy_blocks = []
    found = None
    if unit == "edge":
        found = _read_person_values(people, fmt, attributes)
    else:
        notes.append(f"unit person: the attribute values were taken from the codebook {codebook.path}, not from "
                     f"{people.name}: under this unit the values present in the person file are private (one person "
                     "can be the only one with a value); only its header was read")
        missing = [a for a in attributes if a not in codebook.levels]
        if missing:
            raise InputError(f"{codebook.path}: the codebook lists no values of attribute '{missing[0]}'; under unit "
                             "'person' every grouping attribute needs its declared domain")
    small_note = None
    for a in attributes:
        hierarchy_blocks.append(_hierarchy_block(a, people, unit, codebook, found, notes))
    if found is not None:
        cells, small, small_people = _small_cells(found, attributes, min_size)
        small_note = (f"{small:,} of {cells:,} attribute cells have fewer than {min_size} people ({small_people:,} "
                      f"people); unless broader groups are given they join the residual supernode")
        notes.append(small_note)

    edge_columns = None
    if edges is not None:
        edges = check_input_path(edges, "edge")
        edge_columns = _person_columns(edges)[1]
        if len(edge_columns) < 2:
            raise InputError(f"{edges}: the edge file's header has fewer than two columns")
    text = _render(people, attributes, unit=unit, max_contacts=max_contacts, node_column=node_column,
                   epsilon=float(epsilon), min_size=int(min_size), title=title, hierarchies=hierarchy_blocks,
                   small_note=small_note, codebook=codebook, edge_columns=edge_columns)
    try:  # the starting policy must parse strictly, as it is written
        parse_policy(tomllib.loads(text))
    except (tomllib.TOMLDecodeError, PolicyError) as exc:  # pragma: no cover - a bug in this module
        raise AssertionError(f"draft-policy wrote a policy that does not parse: {exc}") from None
    return DraftPolicy(text=text, notes=notes, unit=unit, attributes=attributes)


def _check_draft_arguments(attributes, unit, codebook, max_contacts, node_column, epsilon, min_size) -> tuple:
    """The attributes, cleaned; a :class:`UsageError` naming the option for anything missing or contradictory."""
    attributes = tuple(a.strip() for a in attributes)
    if not attributes or not all(attributes):
        raise UsageError("--attributes: give at least one attribute, comma-separated (e.g. age_band,neighbourhood)")
    if len(set(attributes)) != len(attributes):
        raise UsageError("--attributes: an attribute is listed twice")
    if node_column in attributes:
        raise UsageError(f"--attributes: '{node_column}' is the person id column, not an attribute")
    if unit not in PRIVACY_UNITS:
        raise UsageError(f"--unit must be one of {', '.join(PRIVACY_UNITS)}, got {unit!r}")
    if unit == "person" and codebook is None:
        raise UsageError("--unit person needs --codebook FILE: under unit 'person' the values present in the person "
                         "file are private (one person can be the only one with a value), so the attribute domains "
                         "must come from a public codebook")
    if unit == "person" and max_contacts is None:
        raise UsageError("--unit person needs --max-contacts N: the promised cap on contacts per person")
    if unit == "edge" and max_contacts is not None:
        raise UsageError("--max-contacts only applies to --unit person")
    for path, value in (("privacy.epsilon", epsilon), ("grouping.min_size", min_size),
                        ("privacy.max_contacts", max_contacts)):
        if value is not None:
            try:
                check_value(path, value)
            except PolicyError as exc:
                option = {"privacy.epsilon": "--epsilon", "grouping.min_size": "--min-size",
                          "privacy.max_contacts": "--max-contacts"}[path]
                raise UsageError(f"{option}: {exc}") from None
    return attributes


def _hierarchy_block(a, people, unit, codebook, found, notes):
    """The first hierarchy levels of attribute ``a`` and their comments (codebook, or values found under edge)."""
    comments = []
    if codebook is not None and a in codebook.levels:
        levels = [dict(level) for level in codebook.levels[a]]
        comments.append(f"Values and broader groups from the public codebook {codebook.path.name} "
                        f"({len(levels[0])} values, {len(levels)} level(s)).")
        if unit == "person":
            comments += [
                "Under unit \"person\" the person file's values were not read: the values present in the data",
                "are private (one person can be the only one with a value), so this list is the declared",
                "domain of the attribute. The release refuses people whose value is not listed here.",
            ]
            notes.append(f"{a}: {len(levels[0])} values from the codebook, {len(levels)} level(s)")
        else:
            col = found.column(a)
            present = {v for v in col.unique().to_pylist() if v}
            extra = sorted(present - set(levels[0]), key=_natural_key)
            for v in extra:  # under edge the person table is public: make the hierarchy cover it
                levels[0][v] = v
                for level in levels[1:]:
                    level.setdefault(v, v)
            if extra:
                comments.append(f"{len(extra)} value(s) found in {people.name} but not in the codebook were "
                                "added, each mapped to itself.")
            notes.append(f"{a}: {len(levels[0]) - len(extra)} values from the codebook"
                         + (f", {len(extra)} more found in {people.name}" if extra else ""))
    else:
        col = found.column(a)
        values = sorted((v for v in col.unique().to_pylist() if v), key=_natural_key)
        levels = [{v: v for v in values}]
        comments += [
            f"{len(values)} values found in {people.name} (unit \"edge\": the person table is public and was",
            "read). Each value maps to itself, so nothing is generalised yet: map the values to broader",
            "groups (e.g. \"0-4\" = \"0-9\") so small cells are generalised rather than merged into the",
            "residual supernode. For a still broader step, add another [[...levels]] table that maps",
            "each group of this level to a broader one.",
        ]
        notes.append(f"{a}: {len(values)} values found in {people.name}, each mapped to itself "
                     "(map them to broader groups)")
        if len(values) > MANY_VALUES:
            notes.append(f"{a}: more than {MANY_VALUES:,} values; most cells will be small, so a coarser "
                         "attribute or broader groups will keep far more of them")
    if found is not None:
        col = found.column(a)
        empty = col.null_count + int(pc.sum(pc.equal(col, "")).as_py() or 0)
        if empty:
            notes.append(f"{a}: {empty:,} row(s) of {people.name} have no value; aggpub release refuses a person "
                         "file with empty attribute cells, so fill them in first")
    return a, levels, comments


def _render(people: Path, attributes, *, unit, max_contacts, node_column, epsilon, min_size, title, hierarchies,
            small_note, codebook, edge_columns=None) -> str:
    dataset = re.sub(r"[^A-Za-z0-9._-]+", "-", people.stem).strip("-") or "dataset"
    lines = _header_lines(people, attributes, unit, codebook, title, dataset)
    lines += _privacy_lines(unit, epsilon, max_contacts, codebook, hierarchies)
    lines += _grouping_lines(people, attributes, min_size, small_note, hierarchies)
    lines += _component_lines(unit, attributes)
    lines += _layer_lines(edge_columns)
    lines += _ledger_and_gate_lines(dataset, attributes)
    lines += _input_lines(people, node_column, edge_columns)
    return "\n".join(lines) + "\n"


def _header_lines(people, attributes, unit, codebook, title, dataset) -> list:
    lines = [
        f"# Starting release policy written by aggpub draft-policy {__version__}.",
        f"# Person file: {people.name}; grouping attributes: {', '.join(attributes)}; privacy unit: {unit}.",
    ]
    if unit == "edge":
        lines.append("# Under unit \"edge\" the person table is public, so its attribute values were read.")
    else:
        lines += [f"# Under unit \"person\" the person file's values are private and were NOT read (only its header);",
                  f"# the attribute domains come from the public codebook {codebook.path.name}."]
    lines += [
        "#",
        "# Review every key before a release: each one is explained below and in docs/policy.md.",
        "# A release can still harm people: group-level statistics can disclose attributes of small or",
        "# homogeneous groups, and repeated releases of the same people add up. Whether and to whom a",
        "# release may be made is for your data-protection officer, ethics board and the law that applies.",
        "",
    ]
    return lines + _key_lines("title", title if title is not None else f"{dataset} contacts: release",
                              extra=("It is published with the release: keep private information out of it.",))


def _privacy_lines(unit, epsilon, max_contacts, codebook, hierarchies) -> list:
    lines = _section_lines("privacy")
    unit_extra = [
        "\"edge\": one contact between two people is protected; the person table (who is in the data and",
        "their attributes) is public, and supernode sizes are released exactly.",
        "\"person\": one person with all of their contacts is protected; needs max_contacts and a",
        "public codebook of attribute values (aggpub draft-policy --unit person --codebook FILE",
        "--max-contacts N).",
    ]
    if unit == "edge" and any(not (codebook is not None and attr in codebook.levels) for attr, _, _ in hierarchies):
        unit_extra += [
            "Do not switch this file to \"person\": its value lists were read from the person file, which",
            "is private under that unit. Write a new one with --unit person --codebook instead.",
        ]
    lines += _key_lines("privacy.unit", unit, extra=unit_extra)
    protected = "contact" if unit == "edge" else "person (with all of their contacts)"
    lines += _key_lines("privacy.epsilon", epsilon, extra=(
        f"With epsilon = {epsilon:g}, no outcome of the release becomes more than e^{epsilon:g} = "
        f"{math.exp(epsilon):.3g} times more",
        f"(or less) likely because any one {protected} is in the data or not.",
        "Smaller is more private and noisier; above 10 the guarantee is weak.",
        "The components below split it.",
    ))
    if unit == "person":
        lines += _key_lines("privacy.max_contacts", max_contacts, extra=(
            "A promise about the data, taken from public facts (the most contacts the survey form can record):",
            "input in which anyone has more contacts is refused, never truncated, and the refusal is charged.",
            "A larger cap means more noise (it is the sensitivity of the superedge counts).",
        ))
    return lines


def _grouping_lines(people, attributes, min_size, small_note, hierarchies) -> list:
    lines = _section_lines("grouping")
    lines += _key_lines("grouping.method", "attributes", extra=(
        "\"attributes\": people with equal values of the attributes below (public, no budget under \"edge\").",
        "\"structure\", \"attributes+structure\": read the contacts, paid from grouping.epsilon_share",
        "(unit \"edge\" only).",
        "\"given\": a public person -> supernode map file; \"random\": a baseline for the audit.",
    ))
    lines += _key_lines("grouping.attributes", list(attributes))
    lines += _key_lines("grouping.min_size", min_size, extra=(
        "Small cells climb the hierarchies below; what is still too small joins one residual",
        "supernode, shown with \"*\". Larger hides individuals better and blurs group differences.",
    ))
    lines += _key_lines("grouping.merge_order", list(reversed(attributes)), extra=(
        "The first attribute listed gives up detail first when a cell is too small.",
    ))
    if small_note:
        lines += [""] + textwrap.wrap(f"In {people.name}, {small_note}.", width=_WIDTH, initial_indent="# ",
                                      subsequent_indent="# ")
    for attr, levels, comments in hierarchies:
        meaning = _plain(policy_key("grouping.hierarchies.<attribute>.levels").meaning)
        lines += ["", f'# Hierarchy of "{attr}": {meaning}.']
        lines += [f"# {c}" for c in comments]
        for k, level in enumerate(levels):
            lines.append(f"[[grouping.hierarchies.{_key_name(attr)}.levels]]"
                         + ("" if k == 0 else f"   # step {k + 1}: the groups of step {k} -> broader groups"))
            lines += [f"{_toml_string(v)} = {_toml_string(level[v])}" for v in level]
    return lines


def _component_lines(unit, attributes) -> list:
    lines = ["", f"# {'-' * 98}",
             f"# [components]: {_plain(next(s for s in POLICY_SECTIONS if s.name == 'components').meaning)}",
             "# Components without a share split what the shares leave (the triangle count takes half the",
             "# part of each other one). The example shares commented out below add up to 1."]
    if unit == "edge":
        lines.append("# With nothing set: superedge counts, contact views, degree sequences 2/7 each, triangles 1/7.")
    sizes_extra = (("Exact and free under unit \"edge\" (the person table is public).",) if unit == "edge" else
                   ("Noisy under unit \"person\" and paid from the budget; must stay enabled.",))
    lines += ["[components.supernode_sizes]"] + _key_lines("components.supernode_sizes.enabled", True,
                                                           extra=sizes_extra)
    if unit == "person":
        lines += _key_lines("components.supernode_sizes.share", 0.2, active=False)
    lines += ["", "[components.superedge_counts]"]
    lines += _key_lines("components.superedge_counts.enabled", True)
    lines += _key_lines("components.superedge_counts.share", 0.5 if unit == "person" else 0.3, active=False)
    lines += _key_lines("components.superedge_counts.method", "auto", active=False)
    lines += ["", "[components.degree_histograms]"]
    lines += _key_lines("components.degree_histograms.enabled", False)
    lines += _key_lines("components.degree_histograms.max_degree", 50, active=False)
    lines += ["", "[components.weight_totals]"]
    lines += _key_lines("components.weight_totals.enabled", False)
    lines += _key_lines("components.weight_totals.column", "minutes", active=False)
    lines += _key_lines("components.weight_totals.clip", 120, active=False)
    lines += _key_lines("components.weight_totals.unit", "minutes", active=False)
    lines += _view_lines(unit, attributes)
    if unit == "edge":  # under person neither has a derived sensitivity: the policy refuses them
        lines += ["", "# Degree sequences and the triangle count make synthetic networks (aggpub sample) keep degree",
                  "# heterogeneity and local clustering; both are on by default under unit \"edge\".",
                  "[components.degree_sequences]"]
        lines += _key_lines("components.degree_sequences.enabled", True, active=False)
        lines += _key_lines("components.degree_sequences.share", 0.3, active=False)
        lines += ["", "[components.triangle_count]"]
        lines += _key_lines("components.triangle_count.enabled", True, active=False)
        lines += _key_lines("components.triangle_count.share", 0.1, active=False)
    return lines


def _view_lines(unit, attributes) -> list:
    """``[components.contact_views]``: on by default, every key commented out (docs/policy.md)."""
    lines = ["", f"# {_plain(next(s for s in POLICY_SECTIONS if s.name == 'components.contact_views').meaning)}",
             "# With no key set here, every grouping attribute gets a complete contact matrix (a view), per",
             "# layer when [layers] is declared, as long as no other component sets a share: a policy that",
             "# splits epsilon by shares lists every component it wants, so give the views a share there.",
             "# 'aggpub matrix' and aggpub.contact_matrix read them (docs/contact-matrices.md).",
             "[components.contact_views]"]
    lines += _key_lines("components.contact_views.enabled", True, active=False)
    lines += _key_lines("components.contact_views.share", 0.3, active=False)
    lines += _key_lines("components.contact_views.attributes", list(attributes), active=False, extra=(
        ("Under unit \"person\" an attribute outside the grouping needs [domains.<attribute>] values",
         "from a public codebook.") if unit == "person" else ()))
    if len(attributes) > 1:
        lines += _key_lines("components.contact_views.combinations", [",".join(attributes[:2])], active=False)
    lines += _key_lines("components.contact_views.weighted", True, active=False)
    lines += _key_lines("components.contact_views.column", "minutes", active=False)
    lines += _key_lines("components.contact_views.clip", 120, active=False)
    lines += _key_lines("components.contact_views.unit", "minutes", active=False)
    return lines


def _layer_lines(edge_columns) -> list:
    """``[layers]``, commented out: the setting of each contact is declared, never read from the data."""
    lines = _section_lines("layers", active=False)
    lines += [
        "# Not active: remove the leading '# ' of the section and its keys to use it. With it, the contact",
        "# matrices come per setting (aggpub matrix --layer NAME). Declare the values from the study design,",
        "# never from the data; their order places a pair of people recorded in several settings.",
    ]
    if edge_columns is not None and len(edge_columns) > 2:
        lines += textwrap.wrap("Columns of the edge file besides the first two (a layer column may be one of them): "
                               + ", ".join(edge_columns[2:]) + ".", width=_WIDTH, initial_indent="# ",
                               subsequent_indent="# ")
    lines += _key_lines("layers.column", "setting", active=False)
    lines += _key_lines("layers.values", ["household", "school", "work", "community"], active=False)
    return lines


def _ledger_and_gate_lines(dataset, attributes) -> list:
    lines = _section_lines("ledger", active=False)
    lines += [
        "# Not active: remove the leading '# ' of the section and its keys to use it. Keep ONE ledger file",
        "# per dataset (the same people) and name it in every policy that releases that dataset: each",
        "# release charges its epsilon there, and one that would exceed lifetime_epsilon is refused.",
    ]
    lines += _key_lines("ledger.path", f"{dataset}.ledger", active=False)
    lines += _key_lines("ledger.dataset", dataset, active=False, extra=(
        "Written from the person file's name: name the data instead (e.g. the study and its year), the",
        "same in every policy that releases these people."))
    lines += _key_lines("ledger.lifetime_epsilon", 3.0, active=False)
    lines += _section_lines("gate", active=False)
    lines += [
        "# No thresholds are set. Examples (the gate judges the errors to expect from the noise, from public",
        "# values only; 'aggpub plan' predicts it before any noise; a release missing one is not published):",
    ]
    lines += _key_lines("gate.max_degree_ks", 0.1, active=False)
    lines += _key_lines("gate.max_contact_matrix_median_relative_error", 0.25, active=False)
    lines += _key_lines("gate.contact_matrix_attribute", attributes[0], active=False)
    lines += _section_lines("assumptions", active=False)
    lines += [
        "# Public planning figures for the pre-flight ('aggpub plan'), from the study design or a",
        "# published survey, never from this data:",
    ]
    lines += _key_lines("assumptions.contacts_per_person", 11.0, active=False)
    lines += _key_lines("assumptions.people", 10000, active=False)
    return lines


def _input_lines(people, node_column, edge_columns=None) -> list:
    lines = _section_lines("input")
    lines += _key_lines("input.node", node_column, extra=(f"A column of {people.name}.",))
    if edge_columns is None:
        source, target = "source", "target"
        note = ("Edge-file columns: draft-policy did not read the edge file (give --edges FILE to read its header).",)
    elif "source" in edge_columns and "target" in edge_columns:
        source, target = "source", "target"
        note = (f"The edge file's columns: {', '.join(edge_columns)}.",)
    else:
        source, target = edge_columns[0], edge_columns[1]
        note = (f"The edge file's columns: {', '.join(edge_columns)}; its first two are taken as the two people",
                "of each contact: check them.")
    lines += _key_lines("input.source", source, extra=note)
    lines += _key_lines("input.target", target)
    lines += _key_lines("input.weight", "minutes", active=False)
    lines += _key_lines("input.drop_unknown", False, active=False)
    return lines


def _key_name(name: str) -> str:
    """A TOML key: bare if it can be, quoted otherwise."""
    return name if re.fullmatch(r"[A-Za-z0-9_-]+", name) else _toml_string(name)


def write_draft_policy(out, draft: DraftPolicy, *, overwrite: bool = False, inputs=()) -> Path:
    """Write a starting policy atomically (temporary file beside the target, fsync, rename).

    Raises
    ------
    OutputError
        ``out`` exists (and ``overwrite`` is false), is one of ``inputs``, is a
        folder, or its folder is missing or not writable.
    """
    from .outputs import write_file, write_synced

    out = Path(out).absolute()
    for inp in inputs:
        if inp is not None and out.exists() and Path(inp).exists() and os.path.samefile(out, inp):
            raise OutputError(f"{out}: the output would replace an input file")
    return write_file(out, lambda tmp: write_synced(tmp, draft.text), overwrite=overwrite, what="policy")
