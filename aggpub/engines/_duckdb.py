"""The embedded DuckDB counting engine (the default).

All counting over edges happens here, in SQL (or numpy over Arrow batches):
the edge mapping that ingest asks for (ids to dense ids, self-loops, duplicates),
superedge counts, degrees, degree histograms, weight totals and contact
profiles. No Python loop touches an edge. What is accepted and every message
are :mod:`aggpub.ingest`'s; this module only reads and counts.
"""

from __future__ import annotations

__all__ = ["DuckDBEngine", "default_memory_limit", "fetch_arrow", "quote_ident", "quote_literal"]

import os
import re
import warnings

import duckdb
import numpy as np
import pyarrow as pa

from ..errors import InputError
from ..progress import LongStep
from .common import degree_histograms_from_degrees
from .interface import (INTEGER, OTHER, REAL, TEXT, ColumnType, EdgeColumns, EdgeCounts, PeopleColumns,
                        RowCondition, Source)

MISSING_ID = -2
UNKNOWN_ID = -1
#: Rows per Arrow batch when edges stream out of DuckDB into numpy.
EDGE_BATCH_ROWS = 1 << 22
#: Threads (each a share of every batch) of the dense superedge counting.
COUNTING_PARTS = 2
#: Largest table of superedge cells counted densely in numpy (8 bytes a cell: 128 MiB); above, SQL.
DENSE_COUNT_MAX_CELLS = 1 << 24
#: Memory (bytes per edge row) that collapsing repeated contacts in numpy takes at most: 19 in
#: :class:`PairCollapser` (keys, repeat marks, the two int32 ends and an int16 layer) and a little for the
#: batch in hand. Inputs of at most ``memory_limit / NUMPY_COLLAPSE_BYTES_PER_ROW`` rows are collapsed in numpy, larger
#: ones by DuckDB's GROUP BY (which spills to disk); the same contacts and counts either way
#: (:meth:`DuckDBEngine.stage_edges`). At the default limit on a 24 GB machine (2.2 GiB): 118M rows.
NUMPY_COLLAPSE_BYTES_PER_ROW = 20


def quote_ident(name: str) -> str:
    """Quote a column name for SQL."""
    return '"' + str(name).replace('"', '""') + '"'


def quote_literal(text: str) -> str:
    """Quote a string literal for SQL."""
    return "'" + str(text).replace("'", "''") + "'"


def fetch_arrow(result) -> pa.Table:
    """An executed DuckDB result as an Arrow table (the method name differs across DuckDB versions)."""
    fn = getattr(result, "to_arrow_table", None) or getattr(result, "fetch_arrow_table")
    with warnings.catch_warnings():  # DuckDB 2 warns that a DB-API result copies once; fine here
        warnings.simplefilter("ignore", UserWarning)
        return fn()


#: Share of the machine's physical memory DuckDB may use by default.
MEMORY_SHARE = 0.10


def default_memory_limit() -> str:
    """A tenth of physical memory, between 256 MB and 8 GB, as a DuckDB memory setting.

    DuckDB spills joins and aggregations beyond it to disk, and the rest of a
    release (person attributes, the supernode tables, the audit) lives outside
    it. On a 24 GB machine this is 2.4 GB, with which a release of 10^8 edges
    and 10^7 people stays under 4 GB resident in all (``benchmarks/bench_scale.py``);
    pass ``--memory-limit`` to trade memory for speed.
    """
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        total = 8 << 30
    return f"{max(256, min(int(total * MEMORY_SHARE), 8 << 30) >> 20)}MB"


def _clean_duckdb_message(exc: Exception, debug: bool) -> str:
    """A short reason from a DuckDB error, with private values removed unless debugging.

    DuckDB quotes the offending input line ("Original Line: ...") and values in
    its messages; outside debug mode only the line number and a reason of our
    own wording are kept.
    """
    text = str(exc).strip()
    if debug:
        return text
    line = re.search(r"[Ll]ine:? ?(\d+)", text)
    where = f"line {line.group(1)}: " if line else ""
    fields = re.search(r"Expected Number of Columns: (\d+) Found: (\d+)", text)
    if fields:
        return f"{where}expected {fields.group(1)} fields, found {fields.group(2)} (a ragged row, or a " \
               f"delimiter or quote inside an unquoted value)"
    if "Invalid unicode" in text or "not utf-8" in text.lower():
        return f"{where}not UTF-8 text (save the file as UTF-8)"
    if "unterminated quote" in text:
        return f"{where}a quoted value is never closed"
    if "magic bytes" in text.lower() or "not a parquet file" in text.lower():
        return "not a Parquet file, or a truncated one (no Parquet footer)"
    first = text.splitlines()[0] if text else type(exc).__name__
    first = re.sub(r"^[A-Za-z ]*Error: ", "", first)
    first = re.sub(r'"[^"]*"', '"…"', first)
    first = re.sub(r"'[^']*'", "'…'", first)
    first = re.sub(r"(?i)(value|string|original line)s?:? .*", r"\1 …", first)
    first = first[:160]
    return first + (f" (near line {line.group(1)})" if line and not where else "")


#: DuckDB types of each column kind (see :class:`ColumnType`)
_INT_TYPE = re.compile(r"^U?(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT)$")
_REAL_TYPE = re.compile(r"^(FLOAT|DOUBLE|REAL|DECIMAL.*)$")


def _column_type(name: str) -> ColumnType:
    """The kind of a DuckDB type: integers of any width, text, floating point or decimal, other."""
    upper = name.upper()
    if _INT_TYPE.match(upper):
        return ColumnType(INTEGER, name)
    if upper == "VARCHAR":
        return ColumnType(TEXT, name)
    if _REAL_TYPE.match(upper):
        return ColumnType(REAL, name)
    return ColumnType(OTHER, name)


def _missing_id_sql(expr: str, spellings) -> str:
    """SQL true when an id (as text) is null, or empty or one of ``spellings`` after trimming spaces, any case.

    Only U+0020 is trimmed (DuckDB's one-argument trim() also takes other Unicode spaces).
    """
    listed = ", ".join(quote_literal(x) for x in spellings)
    return f"({expr} IS NULL OR lower(trim({expr}, ' ')) IN ({listed}))"


def _unreadable(source: Source, exc: Exception) -> InputError:
    """The error for a failed read of ``source`` (the reason names no private value unless debugging)."""
    return InputError(f"{source.unreadable}: {_clean_duckdb_message(exc, source.debug)}")

def _contiguous_offset(ids: pa.Table):
    """``o`` when the id table's native ids are ``o, o + 1, ...`` in dense-id order, else ``None``."""
    nid = ids.column("nid")
    if nid.null_count or not pa.types.is_integer(nid.type) or ids.num_rows == 0:
        return None
    values = np.asarray(nid.to_numpy(), dtype=np.int64)
    first = int(values[0])
    if first < -(2 ** 62) or first > 2 ** 62 - len(values):
        return None
    if not np.array_equal(values - first, np.arange(len(values), dtype=np.int64)):
        return None
    return first


_SIZE_UNITS = {"bytes": 1, "kib": 1 << 10, "mib": 1 << 20, "gib": 1 << 30, "tib": 1 << 40,
               "kb": 10 ** 3, "mb": 10 ** 6, "gb": 10 ** 9, "tb": 10 ** 12}


def _setting_bytes(text) -> int | None:
    """Bytes of a size as DuckDB prints a setting (``'2.2 GiB'``, ``'476.8 MiB'``); ``None`` if not one."""
    parts = str(text).strip().split()
    if len(parts) != 2 or parts[1].lower() not in _SIZE_UNITS:
        return None
    try:
        return int(float(parts[0]) * _SIZE_UNITS[parts[1].lower()])
    except ValueError:
        return None


class PairCollapser:
    """Repeated contacts collapsed in numpy, batch by batch, as the staging query's GROUP BY counts them.

    :meth:`add` takes a batch of mapped dense ids ``s``, ``t`` (or the codes :data:`MISSING_ID` and
    :data:`UNKNOWN_ID`; the mapping gives both ends :data:`MISSING_ID` when either is missing) and, with
    ``layers`` declared, each row's layer position (``-1``: empty or undeclared). Each row's ends are
    ordered (``u = min``, ``v = max``): a row whose smaller end is a code is missing or unknown, ``u == v``
    is a self-loop, a row of known people without a declared layer is counted as such, and each pair
    ``u < v`` of known people becomes the 64-bit key ``(u * 2**b + v) * 2**c + layer`` (``2**b`` at least
    the number of people, ``2**c`` above the number of layers; an undeclared layer takes the largest
    code), so that one sort orders the rows by pair and, within a pair, by layer. :meth:`finish` keeps
    each pair once, with its first declared layer (the GROUP BY's ``min``: the one-layer rule).

    Memory: 8 bytes a row for the keys (written into one array of ``rows_hint`` rows, reserved, not
    touched, and grown if the hint was short), then a byte a row for the repeat marks and 8 bytes a
    distinct pair for the two int32 ends (2 more with layers): at most 19 bytes a row, and the
    temporaries of one batch or slice.
    """

    #: Up to this many repeated rows the kept pairs are split straight out of the sorted keys, stretch by
    #: stretch between repeats; with more, slice by slice after gathering each slice's kept keys.
    MAX_STRETCHES = 4096

    def __init__(self, n_people: int, rows_hint: int = 0, layers: int = 0):
        self.n = int(n_people)
        self.bits = self.people_bits(self.n)
        self.layers = int(layers)
        self.layer_bits = self.layer_bits_for(self.layers)
        if 2 * self.bits + self.layer_bits > 63:
            raise ValueError("too many people and layers for 64-bit pair keys")
        self.keys = np.empty(max(int(rows_hint), 0), dtype=np.int64)
        self.filled = self.rows = self.missing = self.unknown = self.loops = self.bad_layer = 0

    @staticmethod
    def people_bits(n_people: int) -> int:
        """Bits of a dense id (at least 1)."""
        return max(1, (int(n_people) - 1).bit_length())

    @staticmethod
    def layer_bits_for(layers: int) -> int:
        """Bits of a layer's code: the declared positions and one more code for an undeclared layer."""
        return int(layers).bit_length() if layers else 0

    @classmethod
    def fits(cls, n_people: int, layers: int = 0) -> bool:
        """Whether the keys of ``n_people`` people (and ``layers`` layers) fit 63 bits."""
        return 2 * cls.people_bits(n_people) + cls.layer_bits_for(layers) <= 63

    def add(self, s: np.ndarray, t: np.ndarray, layer: np.ndarray | None = None) -> None:
        lo = np.minimum(s, t)
        hi = np.maximum(s, t)
        self.rows += len(lo)
        self.missing += int(np.count_nonzero(lo == MISSING_ID))
        self.unknown += int(np.count_nonzero(lo == UNKNOWN_ID))
        known = lo >= 0
        self.loops += int(np.count_nonzero(known & (lo == hi)))
        pair = known & (lo < hi)
        k = int(np.count_nonzero(pair))
        if self.filled + k > len(self.keys):  # the hint was short: grow (copies what is there)
            grown = np.empty(max(2 * len(self.keys), self.filled + k), dtype=np.int64)
            grown[:self.filled] = self.keys[:self.filled]
            self.keys = grown
        out = self.keys[self.filled:self.filled + k]
        np.left_shift(lo[pair], self.bits, out=out, dtype=np.int64, casting="unsafe")
        out |= hi[pair]
        if self.layers:
            undeclared = layer < 0
            self.bad_layer += int(np.count_nonzero(known & undeclared))
            code = np.where(undeclared, (1 << self.layer_bits) - 1, layer)[pair]
            out <<= self.layer_bits
            out |= code
        self.filled += k

    def _split(self, keys, u, v, layer) -> None:
        c = self.layer_bits
        if layer is not None:
            np.bitwise_and(keys, (1 << c) - 1, out=layer, casting="unsafe")
        np.right_shift(keys, self.bits + c, out=u, casting="unsafe")
        # v: the key's low bits after the layer's; the cast keeps the low 32 bits, then the mask keeps b of them
        np.right_shift(keys, c, out=v, casting="unsafe")
        np.bitwise_and(v, (1 << self.bits) - 1, out=v)

    def finish(self):
        """``(EdgeCounts, u, v, layer)``: the counts, the distinct pairs (int32) in key order and each pair's first
        declared layer (int16; ``None`` without layers)."""
        keys = self.keys[:self.filled]
        self.keys = None
        keys.sort()
        c = self.layer_bits
        if c:  # rows of one pair differ in their layer bits only
            same = (keys[1:] >> c) == (keys[:-1] >> c)
        else:
            same = keys[1:] == keys[:-1]  # a row repeating the pair of the row before it
        repeated = int(np.count_nonzero(same))
        kept = len(keys) - repeated
        u = np.empty(kept, dtype=np.int32)
        v = np.empty(kept, dtype=np.int32)
        layer = np.empty(kept, dtype=np.int16) if self.layers else None
        done = 0

        def put(part):
            nonlocal done
            end = done + len(part)
            self._split(part, u[done:end], v[done:end], None if layer is None else layer[done:end])
            done = end

        if repeated <= self.MAX_STRETCHES:  # the stretches between repeats, split where they lie (no copy)
            repeats = np.flatnonzero(same) + 1
            del same
            for a, e in zip([0] + (repeats + 1).tolist(), repeats.tolist() + [len(keys)]):
                if e > a:
                    put(keys[a:e])
        else:  # slice by slice: each slice's first rows of their pairs gathered, then split
            del same
            for i in range(0, len(keys), EDGE_BATCH_ROWS):
                part = keys[i:i + EDGE_BATCH_ROWS]
                first = np.empty(len(part), dtype=bool)
                first[0] = i == 0 or (part[0] >> c) != (keys[i - 1] >> c)
                np.not_equal(part[1:] >> c, part[:-1] >> c, out=first[1:])
                put(part[first])
        if layer is not None:  # a pair whose rows all lack a declared layer: 0, as the GROUP BY's coalesce
            layer[layer == (1 << c) - 1] = 0
        counts = EdgeCounts(rows=self.rows, missing_id=self.missing, unknown_person=self.unknown, bad_weight=0,
                            self_loops=self.loops, duplicates=repeated, edges=kept, bad_layer=self.bad_layer)
        return counts, u, v, layer


def collapse_pairs(s: np.ndarray, t: np.ndarray, n_people: int, layer=None, layers: int = 0):
    """``(EdgeCounts, u, v, layer)`` of one batch of mapped ids (:class:`PairCollapser`)."""
    c = PairCollapser(n_people, len(s), layers)
    c.add(np.asarray(s), np.asarray(t), None if layer is None else np.asarray(layer))
    return c.finish()


class _DenseCounter:
    """One thread's share of the dense superedge counting: its own table of every cell, degrees and arrays.

    The arrays are made for the largest batch share and reused (views of each share's length): fresh
    memory costs a page fault per page when first touched, and a loop over 100M contacts made about
    600 MB of temporaries per batch before.
    """

    def __init__(self, group: np.ndarray, n_groups: int, n_cells: int, with_degrees: bool):
        self.group = group  # int32 supernode of each person, shared (read only) by the threads
        self.n_groups, self.n_cells = n_groups, n_cells
        self.total = np.zeros(n_cells, dtype=np.int64)
        self.degrees = np.zeros(len(group), dtype=np.int64) if with_degrees else None
        self.size, self.arrays = 0, None

    def add(self, u: np.ndarray, v: np.ndarray) -> None:
        """Count the contacts ``(u, v)`` (dense ids) into the table (and the degrees)."""
        if len(u) == 0:
            return
        ends, lo, low, hi = self._arrays(len(u))
        if self.degrees is not None:  # both ends in one bincount
            np.concatenate((u, v), out=ends)
            self.degrees += np.bincount(ends, minlength=len(self.degrees))
        # dense ids are in [0, n_people) by the staging contract; "clip" spares numpy's buffered bounds check
        np.take(self.group, u, out=lo, mode="clip")
        np.take(self.group, v, out=low, mode="clip")
        np.maximum(lo, low, out=hi)
        np.minimum(lo, low, out=lo)
        # position of (lo, hi) in the upper triangle, row by row (components.cell_index):
        # lo * n_groups - lo * (lo - 1) / 2 + (hi - lo), in place (int32 holds it: n_groups < 2**13)
        hi -= lo
        np.subtract(lo, 1, out=low)
        low *= lo
        low //= 2
        hi -= low
        np.multiply(lo, self.n_groups, out=low)
        hi += low
        self.total += np.bincount(hi, minlength=self.n_cells)

    def _arrays(self, k: int):
        """``ends`` (int64, ``2 k``), ``lo`` and ``low`` (int32, ``k``), ``hi`` (int64, ``k``), reused."""
        if k > self.size:
            self.size = k
            self.arrays = (np.empty(2 * k, dtype=np.int64), np.empty(k, dtype=np.int32),
                           np.empty(k, dtype=np.int32), np.empty(k, dtype=np.int64))
        ends, lo, low, hi = self.arrays
        return ends[:2 * k], lo[:k], low[:k], hi[:k]


class DuckDBEngine:
    """Counting in an embedded DuckDB database.

    Parameters
    ----------
    memory_limit : str, optional
        DuckDB ``memory_limit`` (default :func:`default_memory_limit`: a tenth of
        the machine, between 256 MB and 8 GB).
    threads : int, optional
        Worker threads (default: DuckDB's choice, all cores).
    temp_directory : str, optional
        Where DuckDB spills when data exceed memory (kept as given). Default: a
        private folder under ``spill_parent``, created by DuckDB only when it
        spills and removed by :meth:`close` (or when the engine is
        garbage-collected, or at exit).
    spill_parent : str, optional
        Folder in which to create the default spill folder (default: the
        system's temporary folder; the release command uses the output's
        folder, which is on a disk that holds the bundle).
    progress : callable, optional
        Takes one message; long statements report how far they are
        (DuckDB's own estimate) through it every few seconds.
    """

    name = "duckdb"

    def __init__(self, memory_limit=None, threads=None, temp_directory=None, spill_parent=None, progress=None):
        self.progress = progress
        self.con = duckdb.connect(":memory:")
        self.memory_limit = memory_limit or default_memory_limit()
        try:
            self.con.execute(f"SET memory_limit={quote_literal(self.memory_limit)}")
        except duckdb.Error:
            from ..errors import UsageError

            self.con.close()
            raise UsageError(f"memory limit {self.memory_limit!r} is not a size such as '4GB' or '500MB'") from None
        if threads:
            self.con.execute(f"SET threads={int(threads)}")
        self._cleanup = None
        if not temp_directory:
            import secrets
            import shutil
            import tempfile
            import weakref

            # DuckDB creates this folder only if it spills; nothing appears beside the output otherwise
            temp_directory = os.path.join(spill_parent or tempfile.gettempdir(),
                                          f".aggpub-spill-{os.getpid()}-{secrets.token_hex(6)}")
            self._cleanup = weakref.finalize(self, shutil.rmtree, temp_directory, True)
        self.temp_directory = str(temp_directory)
        self.con.execute(f"SET temp_directory={quote_literal(self.temp_directory)}")
        self.con.execute("SET preserve_insertion_order=false")
        # DuckDB tracks a statement's progress only with its progress bar on; nothing is printed
        self.con.execute("SET enable_progress_bar=true")
        self.con.execute("SET enable_progress_bar_print=false")
        self._staged = None
        self._pairs = None  # the distinct pairs when collapsed in numpy (_stage_in_numpy), until published
        self._degrees = None

    def _long(self, what: str) -> LongStep:
        """Reports the progress of the statement(s) run inside it (see :class:`LongStep`)."""
        def poll():
            pct = self.con.query_progress()
            return f"{pct:.0f}% of the current statement" if pct is not None and pct >= 0 else None

        return LongStep(self.progress, what, poll)

    # ------------------------------------------------------------------ ingest (driven by aggpub.ingest)

    def _relation_sql(self, source: Source) -> str:
        """SQL for a scan of ``source`` (an Arrow table is registered as a view)."""
        if source.format == "arrow":
            self.con.register("__input_arrow", source.table)
            return "__input_arrow"
        path = quote_literal(source.path)
        if source.format == "parquet":
            return f"read_parquet({path})"
        # CSV/TSV: the header was parsed by ingest and every column is read as text without type
        # sniffing, so ids keep their exact spelling ("007" stays "007", ids beyond 64 bits stay exact)
        # and the parser reports ragged rows by line number
        delim = "\\t" if source.delimiter == "\t" else ","
        columns = "{" + ", ".join(f"{quote_literal(n)}: 'VARCHAR'" for n in source.header) + "}"
        opts = f"header=true, delim='{delim}', quote='\"', escape='\"', auto_detect=false, " \
               f"columns={columns}, strict_mode=true"
        return f"read_csv({path}, {opts})"

    def _forget_input(self):
        """Drop the view of an Arrow input (and so the engine's reference to the caller's table)."""
        try:
            self.con.unregister("__input_arrow")
        except duckdb.Error:  # pragma: no cover - nothing registered
            pass

    def describe(self, source: Source) -> dict:
        """The columns of ``source`` and their types (see :meth:`aggpub.engines.Engine.describe`)."""
        try:
            desc = self.con.execute(f"DESCRIBE SELECT * FROM {self._relation_sql(source)}").fetchall()
        except duckdb.Error as exc:
            raise _unreadable(source, exc) from None
        return {row[0]: _column_type(str(row[1])) for row in desc}

    def read_people(self, source: Source, id_column: str, attributes) -> PeopleColumns:
        """The id and attribute columns as Arrow, in input order (see :meth:`aggpub.engines.Engine.read_people`).

        Integer ids also come back as DuckDB integers: the edge mapping then joins on
        integers when the edge ids are integers too, which gives the same pairs as
        comparing the text at a fraction of the cost.
        """
        attributes = list(attributes)
        int_ids = self.describe(source)[id_column].kind == INTEGER
        exprs = ([f"CAST({quote_ident(id_column)} AS VARCHAR)"] + ([quote_ident(id_column)] if int_ids else [])
                 + [f"CAST({quote_ident(a)} AS VARCHAR)" for a in attributes])
        select = ", ".join(f"{e} AS __c{i}" for i, e in enumerate(exprs))  # no clash with any input name
        self.con.execute("SET preserve_insertion_order=true")  # rows in file order: row numbers, dense ids
        try:
            raw = fetch_arrow(self.con.execute(f"SELECT {select} FROM {self._relation_sql(source)}"))
        except duckdb.Error as exc:
            raise _unreadable(source, exc) from None
        finally:
            self.con.execute("SET preserve_insertion_order=false")
            self._forget_input()
        first = 2 if int_ids else 1
        attrs = pa.table([raw.column(first + i) for i in range(len(attributes))], names=attributes)
        return PeopleColumns(ids=raw.column(0), native_ids=raw.column(1) if int_ids else None, attributes=attrs)

    @staticmethod
    def _weight_sql(columns: EdgeColumns) -> str:
        """The weight as a DOUBLE; text weights are parsed, an unparseable one becomes NULL (a bad weight).

        trim() keeps DuckDB from pushing the cast into the CSV reader, where it turns
        into a strict cast that fails on the first bad value with the value in its message.
        """
        if not columns.weight:
            return "NULL::DOUBLE"
        if columns.weight_type.kind == TEXT:
            return f"TRY_CAST(trim({quote_ident(columns.weight)}) AS DOUBLE)"
        return f"CAST({quote_ident(columns.weight)} AS DOUBLE)"

    @staticmethod
    def _layer_sql(columns: EdgeColumns) -> str:
        """The layer's position among the declared layers (text compared exactly), NULL when undeclared.

        Without a layer column every contact is in layer 0.
        """
        if not columns.layer:
            return "CAST(0 AS SMALLINT)"
        col = f"CAST({quote_ident(columns.layer)} AS VARCHAR)"
        cases = " ".join(f"WHEN {quote_literal(v)} THEN {i}" for i, v in enumerate(columns.layer_values))
        return f"CAST(CASE {col} {cases} END AS SMALLINT)"

    def stage_edges(self, source: Source, columns: EdgeColumns, ids: pa.Table) -> EdgeCounts:
        """Map, canonicalise and collapse the edges in one scan (see :meth:`aggpub.engines.Engine.stage_edges`).

        Ids map to dense ids in SQL (arithmetic for integer ids numbered in order, else a join). Without a
        weight column, an input whose rows fit the memory limit (:meth:`_collapse_in_numpy`) has its
        repeated contacts collapsed in numpy (:meth:`_stage_in_numpy`, with each pair's first declared
        layer); otherwise, and always with a weight (its sums), a GROUP BY collapses them. The same
        contacts, layers and counts either way (``tests/test_pair_collapse.py``).
        """
        e_sql = self._relation_sql(source)
        self.con.register("__ids", ids)
        spellings = columns.missing_spellings
        missing = f"({_missing_id_sql('e.a', spellings)} OR {_missing_id_sql('e.b', spellings)})"
        # person ids are VARCHAR; compare edge ids as text so CSV and Parquet inputs mix,
        # or as integers when both sides are integers (same pairs, much faster)
        a_sql = f"CAST({quote_ident(columns.source)} AS VARCHAR)"
        b_sql = f"CAST({quote_ident(columns.target)} AS VARCHAR)"
        id_col = "id"
        if "nid" in ids.column_names and columns.source_type.kind == columns.target_type.kind == INTEGER:
            a_sql, b_sql, id_col = quote_ident(columns.source), quote_ident(columns.target), "nid"
            missing = "(e.a IS NULL OR e.b IS NULL)"
        offset = _contiguous_offset(ids) if id_col == "nid" else None
        if offset is not None:
            # the native ids are offset, offset + 1, ... in the order of the dense ids: the dense id is
            # the native one minus the offset, no join (the same pairs, about 3x faster)
            last = offset + ids.num_rows - 1
            dense = {x: f"CASE WHEN e.{x} BETWEEN {offset} AND {last} THEN CAST(e.{x} - {offset} AS INTEGER) "
                        f"ELSE {UNKNOWN_ID} END" for x in ("a", "b")}
            mapped = (f"SELECT CASE WHEN {missing} THEN {MISSING_ID} ELSE {dense['a']} END AS s, "
                      f"CASE WHEN {missing} THEN {MISSING_ID} ELSE {dense['b']} END AS t, e.w, e.l FROM e")
        else:
            # a person id is never null, empty nor a missing-value spelling (ingest refuses such person rows), so
            # an edge whose two ids both name a person has no missing id: the text test runs only on the other
            # rows (CASE evaluates a branch on the rows that reach it; the demo town's staging query 94 -> 58 ms)
            known = "ps.idx IS NOT NULL AND pt.idx IS NOT NULL"
            mapped = (f"SELECT CASE WHEN {known} THEN ps.idx WHEN {missing} THEN {MISSING_ID} "
                      f"ELSE coalesce(ps.idx, {UNKNOWN_ID}) END AS s, "
                      f"CASE WHEN {known} THEN pt.idx WHEN {missing} THEN {MISSING_ID} "
                      f"ELSE coalesce(pt.idx, {UNKNOWN_ID}) END AS t, "
                      f"e.w, e.l FROM e LEFT JOIN __ids ps ON e.a = ps.{id_col} LEFT JOIN __ids pt "
                      f"ON e.b = pt.{id_col}")
        # without a weight (a layer) column the aggregates over it are constants: not computed per row
        w_select = f"{self._weight_sql(columns)} AS w," if columns.weight else ""
        l_select = f"{self._layer_sql(columns)} AS l" if columns.layer else "NULL AS l"
        w_aggs = ("sum(w) AS w, count(*) FILTER (WHERE w IS NULL OR isnan(w) OR isinf(w) OR w < 0) AS bad_w"
                  if columns.weight else "CAST(NULL AS DOUBLE) AS w, CAST(0 AS BIGINT) AS bad_w")
        l_aggs = ("coalesce(min(l), 0) AS layer, count(*) FILTER (WHERE l IS NULL) AS bad_l" if columns.layer
                  else "CAST(0 AS SMALLINT) AS layer, CAST(0 AS BIGINT) AS bad_l")
        if not columns.weight:
            mapped = mapped.replace(", e.w, e.l", ", e.l")
        layers = len(columns.layer_values) if columns.layer else 0
        fits = not columns.weight and PairCollapser.fits(ids.num_rows, layers)
        bound = self._collapse_in_numpy(source, ids.num_rows) if fits else None
        if bound is not None:
            return self._stage_in_numpy(source, columns, a_sql, b_sql, e_sql, mapped, ids.num_rows, bound)
        # issue 13: the layer's position among the declared layers (NULL when undeclared); the GROUP BY that
        # collapses a pair's rows keeps its first declared layer (the public one-layer rule)
        q = f"""
            CREATE OR REPLACE TEMP TABLE __mapped AS
            WITH e AS (SELECT {a_sql} AS a, {b_sql} AS b, {w_select} {l_select} FROM {e_sql}),
                 m AS ({mapped})
            SELECT least(s, t) AS u, greatest(s, t) AS v, count(*) AS mult, {w_aggs}, {l_aggs}
            FROM m GROUP BY 1, 2
        """
        try:
            with self._long("reading, mapping and collapsing edges"):
                self.con.execute(q)
        except duckdb.Error as exc:
            self.discard_staged_edges()
            raise _unreadable(source, exc) from None
        self._staged = (source, columns)
        stats = self.con.execute(f"""
            SELECT coalesce(sum(mult), 0),
                   coalesce(sum(mult) FILTER (WHERE u = {MISSING_ID}), 0),
                   coalesce(sum(mult) FILTER (WHERE u = {UNKNOWN_ID}), 0),
                   coalesce(sum(bad_w) FILTER (WHERE u >= 0), 0),
                   coalesce(sum(mult) FILTER (WHERE u = v AND u >= 0), 0),
                   coalesce(sum(mult - 1) FILTER (WHERE u < v AND u >= 0), 0),
                   count(*) FILTER (WHERE u < v AND u >= 0),
                   coalesce(sum(bad_l) FILTER (WHERE u >= 0), 0)
            FROM __mapped""").fetchall()[0]
        return EdgeCounts(*(int(x) for x in stats))

    def _collapse_in_numpy(self, source: Source, n_people: int) -> int | None:
        """The input's rows at most, when they fit :data:`NUMPY_COLLAPSE_BYTES_PER_ROW` each in the memory limit
        (else ``None``: DuckDB's GROUP BY collapses them).

        The bound: an Arrow table's rows, a Parquet file's row count (its metadata), a text file's size
        over 4 (a data row holds two ids, a separator and a line end). It only chooses how the same pairs
        are collapsed; nothing released depends on it (docs/privacy.md, section 10).
        """
        limit = _setting_bytes(self.con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0])
        if limit is None or n_people >= 2 ** 31:
            return None
        try:
            if source.format == "arrow":
                bound = source.table.num_rows
            elif source.format == "parquet":
                bound = self.con.execute("SELECT sum(num_rows) FROM parquet_file_metadata("
                                         f"{quote_literal(source.path)})").fetchall()[0][0]
            else:
                bound = os.path.getsize(source.path) // 4 + 1
        except (duckdb.Error, OSError, TypeError, ValueError):  # unreadable here: DuckDB's GROUP BY reports it
            return None
        if bound is None or int(bound) * NUMPY_COLLAPSE_BYTES_PER_ROW > limit:
            return None
        return int(bound)

    def _stage_in_numpy(self, source, columns, a_sql, b_sql, e_sql, mapped, n_people, bound) -> EdgeCounts:
        """:meth:`stage_edges` for an input without weight that fits in memory: the mapped ids (and layer
        positions, -1 when undeclared) stream out in Arrow batches and repeated contacts are collapsed by one
        sort in numpy (:class:`PairCollapser`) instead of DuckDB's GROUP BY over two columns
        (``benchmarks/bench_left_out.py``, section 3)."""
        layers = len(columns.layer_values) if columns.layer else 0
        l_sql = self._layer_sql(columns) if layers else "NULL"
        q = (f"WITH e AS (SELECT {a_sql} AS a, {b_sql} AS b, {l_sql} AS l FROM {e_sql}), m AS ({mapped}) "
             f"SELECT s, t{', coalesce(l, -1) AS l' if layers else ''} FROM m")
        collapser = PairCollapser(n_people, bound, layers)
        try:
            with self._long("reading, mapping and collapsing edges"):
                for batch in self.con.sql(q).to_arrow_reader(EDGE_BATCH_ROWS):
                    collapser.add(batch.column(0).to_numpy(), batch.column(1).to_numpy(),
                                  batch.column(2).to_numpy() if layers else None)
        except (duckdb.Error, pa.ArrowException) as exc:
            self.discard_staged_edges()
            raise _unreadable(source, exc) from None
        counts, u, v, layer = collapser.finish()
        self._staged = (source, columns)
        self._pairs = pa.table({"u": pa.array(u), "v": pa.array(v),
                                **({"layer": pa.array(layer)} if layer is not None else {})})
        return counts

    def first_staged_row(self, condition: RowCondition):
        """1-based data row of the first staged edge row matching ``condition`` (error path only)."""
        source, columns = self._staged
        spellings = columns.missing_spellings
        select = (f"CAST({quote_ident(columns.source)} AS VARCHAR) AS a, "
                  f"CAST({quote_ident(columns.target)} AS VARCHAR) AS b, {self._weight_sql(columns)} AS w, "
                  f"{self._layer_sql(columns)} AS l")
        missing = f"({_missing_id_sql('a', spellings)} OR {_missing_id_sql('b', spellings)})"
        known = f"(NOT {missing} AND a IN (SELECT id FROM __ids) AND b IN (SELECT id FROM __ids))"
        predicate = {RowCondition.MISSING_ID: missing,
                     RowCondition.UNKNOWN_PERSON: f"NOT {missing} AND NOT {known}",
                     RowCondition.BAD_WEIGHT: f"{known} AND (w IS NULL OR isnan(w) OR isinf(w) OR w < 0)",
                     RowCondition.BAD_LAYER: f"{known} AND l IS NULL"}[condition]
        return self._first_row(self._relation_sql(source), select, predicate)

    def _first_row(self, rel_sql, select, predicate):
        """1-based data row of the first input row matching ``predicate`` (error path only).

        Insertion order is preserved for this one query so the row number follows the file.
        """
        self.con.execute("SET preserve_insertion_order=true")
        # and without statistics propagation: Parquet min/max statistics leave NaN out, and DuckDB 2.0.1
        # then folds isnan(w) to false
        self.con.execute("SET disabled_optimizers = 'statistics_propagation'")
        try:
            # the test sits in the aggregate, not a WHERE: DuckDB prunes Parquet row groups by their
            # min/max statistics, which leave NaN out, so a pushed-down filter can miss a NaN row
            row = self.con.execute(f"SELECT min(CASE WHEN {predicate} THEN __rn END) FROM "
                                   f"(SELECT row_number() OVER () AS __rn, {select} FROM {rel_sql})").fetchall()[0][0]
        except duckdb.Error:
            row = None
        finally:
            self.con.execute("SET preserve_insertion_order=false")
            self.con.execute("RESET disabled_optimizers")
        return None if row is None else int(row)

    def publish_staged_edges(self):
        """Keep the staged pairs of known, different people as table ``edges`` (inputs already validated)."""
        source, columns = self._staged
        # only the columns the input has are stored (an in-memory table keeps every value: a NULL weight
        # and a constant layer would take 10 of 18 bytes a contact); the view ``edges`` adds the others as
        # constants, so every query reads the same columns whatever the input had
        stored = ["CAST(u AS INTEGER) AS u", "CAST(v AS INTEGER) AS v"]
        shown = ["u", "v", "w" if columns.weight else "CAST(NULL AS DOUBLE) AS w",
                 "layer" if columns.layer else "CAST(0 AS SMALLINT) AS layer"]
        if columns.weight:
            stored.append("w")
        if columns.layer:
            stored.append("CAST(layer AS SMALLINT) AS layer")
        if self._pairs is not None:  # collapsed in numpy: the distinct pairs of known, different people
            self.con.register("__pairs", self._pairs)
            staged = "__pairs"
        else:
            staged = "__mapped WHERE u < v AND u >= 0"
        with self._long("keeping the contacts"):
            self.con.execute("DROP VIEW IF EXISTS edges")
            self.con.execute(f"""CREATE OR REPLACE TABLE __edges AS SELECT {', '.join(stored)}
                                 FROM {staged}""")
            self.con.execute(f"CREATE VIEW edges AS SELECT {', '.join(shown)} FROM __edges")
        self.discard_staged_edges()
        self._degrees = None  # new edges: forget degrees of a previous load

    def discard_staged_edges(self):
        """Drop the staged table (or pairs), the id table and the input's view."""
        self.con.execute("DROP TABLE IF EXISTS __mapped")
        for name in ("__ids", "__pairs"):
            try:
                self.con.unregister(name)
            except duckdb.Error:  # pragma: no cover - not registered
                pass
        self._pairs = None
        self._forget_input()
        self._staged = None

    # ------------------------------------------------------------------ counting

    def _register_assignment(self, assignment: np.ndarray):
        table = pa.table({"idx": pa.array(np.arange(len(assignment), dtype=np.int32)),
                          "g": pa.array(np.asarray(assignment, dtype=np.int32))})
        self.con.register("__assign", table)

    def superedge_counts(self, assignment: np.ndarray):
        """Non-zero superedge counts: arrays ``a <= b`` and ``count`` (int64).

        Inputs already validated: ``assignment[i]`` is the supernode of person ``i``.

        Up to :data:`DENSE_COUNT_MAX_CELLS` cells the edges stream out of DuckDB
        in Arrow batches and numpy counts them into a dense table (a gather of
        both ends' supernodes and one ``bincount`` per batch: about 3x faster than
        the join and GROUP BY, in memory bounded by the batch and the table).
        Above, the join and GROUP BY run in DuckDB, which spills to disk.
        """
        assignment = np.asarray(assignment)
        n_groups = int(assignment.max()) + 1 if len(assignment) else 0
        if n_groups * (n_groups + 1) // 2 <= DENSE_COUNT_MAX_CELLS:
            return self._superedge_counts_dense(assignment, n_groups)
        return self._superedge_counts_sql(assignment)

    def _superedge_counts_dense(self, assignment: np.ndarray, n_groups: int):
        """Counting into a dense table of every cell (inputs already validated; see :meth:`superedge_counts`).

        Each batch is split in :data:`COUNTING_PARTS` parts counted on as many threads (numpy's
        gathers and bincounts release the GIL), each into its own table and degrees, added at the
        end: the same integers whatever the split.
        """
        n_cells = n_groups * (n_groups + 1) // 2
        n_people = len(assignment)
        # the same pass counts every person's contacts unless that is known (the audit asks for it)
        with_degrees = self._cached_degrees(n_people) is None
        group = assignment.astype(np.int32)  # n_cells <= DENSE_COUNT_MAX_CELLS: n_groups fits easily
        parts = [_DenseCounter(group, n_groups, n_cells, with_degrees) for _ in range(COUNTING_PARTS)]
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=len(parts), thread_name_prefix="aggpub-count") as pool:
            for u, v in self._edge_batches("counting superedges", n_people):
                cut = np.linspace(0, len(u), len(parts) + 1).astype(np.int64)
                jobs = [pool.submit(part.add, u[i:j], v[i:j]) for part, i, j in zip(parts, cut[:-1], cut[1:])]
                for job in jobs:
                    job.result()
        total = parts[0].total
        for part in parts[1:]:
            total += part.total
        degrees = None
        if with_degrees:
            degrees = parts[0].degrees
            for part in parts[1:]:
                degrees += part.degrees
        cell = np.flatnonzero(total)
        # invert the cell index: a is the largest row whose first cell is at or before the cell
        first = np.arange(n_groups, dtype=np.int64)
        first = first * n_groups - (first * (first - 1)) // 2
        a = np.searchsorted(first, cell, side="right") - 1
        b = cell - first[a] + a
        if degrees is not None:
            self._degrees = degrees
        return a, b, total[cell]

    def _superedge_counts_sql(self, assignment: np.ndarray):
        """Counting by a join and GROUP BY in DuckDB (inputs already validated; see :meth:`superedge_counts`)."""
        self._register_assignment(assignment)
        try:
            with self._long("counting superedges"):
                res = self.con.execute("""
                SELECT least(ga.g, gb.g) AS a, greatest(ga.g, gb.g) AS b, count(*) AS c
                FROM edges e JOIN __assign ga ON e.u = ga.idx JOIN __assign gb ON e.v = gb.idx
                GROUP BY 1, 2""").fetchnumpy()
        finally:
            self.con.unregister("__assign")
        return (res["a"].astype(np.int64), res["b"].astype(np.int64), res["c"].astype(np.int64))

    def weight_totals(self, assignment: np.ndarray, clip: float):
        """Per-superedge totals of weights clipped to ``[0, clip]`` and rounded to integers."""
        self._register_assignment(assignment)
        try:
            res = self.con.execute(f"""
                SELECT least(ga.g, gb.g) AS a, greatest(ga.g, gb.g) AS b,
                       sum(CAST(round(least(greatest(e.w, 0), {float(clip)})) AS BIGINT)) AS t
                FROM edges e JOIN __assign ga ON e.u = ga.idx JOIN __assign gb ON e.v = gb.idx
                GROUP BY 1, 2""").fetchnumpy()
        finally:
            self.con.unregister("__assign")
        return (res["a"].astype(np.int64), res["b"].astype(np.int64), res["t"].astype(np.int64))

    def degrees(self, n_people: int) -> np.ndarray:
        """Number of contacts of every person (int64 array of length ``n_people``).

        Computed by one pass over the edges and kept: the cap check, the degree
        histograms, a structural grouping and the audit all ask for it.
        """
        cached = self._cached_degrees(n_people)
        if cached is not None:
            return cached.copy()
        # numpy counts both ends of each batch: about 4x faster than a GROUP BY over both ends
        out = np.zeros(n_people, dtype=np.int64)
        for u, v in self._edge_batches("counting contacts per person", n_people):
            out += np.bincount(u, minlength=n_people)
            out += np.bincount(v, minlength=n_people)
        self._degrees = out.copy()  # the edges do not change after load
        return out

    def _cached_degrees(self, n_people: int):
        cached = getattr(self, "_degrees", None)
        return cached if cached is not None and len(cached) == n_people else None

    def _edge_batches(self, what: str, n_people: int):
        """Yield the contacts as numpy arrays ``u``, ``v``, batch by batch, reporting progress as ``what``.

        Batches hold at least ``n_people`` rows, so per-person counts made per batch
        are no larger than the batch; memory stays bounded at any number of edges.
        """
        reader = self.con.sql("SELECT u, v FROM edges").to_arrow_reader(max(EDGE_BATCH_ROWS, int(n_people)))
        step, done = LongStep(self.progress, what), 0
        for batch in reader:
            done += batch.num_rows
            step.tick(f"{done:,} contacts read")
            yield batch.column(0).to_numpy(), batch.column(1).to_numpy()

    def degree_histograms(self, assignment: np.ndarray, n_groups: int, cap: int) -> np.ndarray:
        """Counts of people by (supernode, degree bin); bins 0..cap-1 and a top bin 'cap or more'.

        Returns an int64 array of shape ``(n_groups, cap + 1)``; people with no
        contacts count in bin 0.
        """
        return degree_histograms_from_degrees(self.degrees(len(assignment)), assignment, n_groups, cap)

    def contact_profiles(self, assignment: np.ndarray):
        """Per person and supernode, the number of that person's contacts in the supernode.

        Returns arrays ``person``, ``supernode``, ``count`` (non-zero entries only).
        """
        self._register_assignment(assignment)
        try:
            res = self.con.execute("""
                WITH ends AS (SELECT u AS p, v AS q FROM edges UNION ALL SELECT v, u FROM edges)
                SELECT ends.p AS person, g.g AS supernode, count(*) AS c
                FROM ends JOIN __assign g ON ends.q = g.idx GROUP BY 1, 2""").fetchnumpy()
        finally:
            self.con.unregister("__assign")
        return (res["person"].astype(np.int64), res["supernode"].astype(np.int64), res["c"].astype(np.int64))

    def view_counts(self, codes, n_values, n_layers: int, clip=None) -> list:
        """Contacts (or clipped weight totals) between every pair of values, per layer, for several views.

        Parameters
        ----------
        codes : sequence of numpy.ndarray
            One code array per view: the value (``0 .. n_values[i] - 1``) of every person.
        n_values : sequence of int
            Number of values of each view.
        n_layers : int
            Declared layers (1 without a layer column).
        clip : float, optional
            Sum ``round(min(max(w, 0), clip))`` instead of counting (weighted views).

        Returns
        -------
        list of numpy.ndarray of int64, shape ``(n_layers, K (K + 1) / 2)``
            Row-major upper triangle of value pairs (:func:`aggpub.estimates.views.view_cell_index`), every
            cell (dense). One pass over the edges for all views: Arrow batches streamed out of DuckDB,
            numpy gathers and ``bincount`` (inputs already validated).
        """
        codes = [np.asarray(c, dtype=np.int64) for c in codes]
        n_values = [int(k) for k in n_values]
        n_cells = [k * (k + 1) // 2 for k in n_values]
        weighted = clip is not None
        totals = [np.zeros(int(n_layers) * c, dtype=np.float64 if weighted else np.int64) for c in n_cells]
        w_sql = (f"CAST(round(least(greatest(w, 0), {float(clip)})) AS BIGINT)" if weighted else "NULL")
        n_people = len(codes[0]) if codes else 0
        reader = self.con.sql(f"SELECT u, v, layer, {w_sql} AS cw FROM edges").to_arrow_reader(
            max(EDGE_BATCH_ROWS, n_people))
        step, done = LongStep(self.progress, "counting contact views"), 0
        for batch in reader:
            done += batch.num_rows
            step.tick(f"{done:,} contacts read")
            u, v = batch.column(0).to_numpy(), batch.column(1).to_numpy()
            lay = batch.column(2).to_numpy().astype(np.int64)
            w = batch.column(3).to_numpy(zero_copy_only=False).astype(np.float64) if weighted else None
            for code, k, c, tot in zip(codes, n_values, n_cells, totals):
                x, y = code[u], code[v]
                lo = np.minimum(x, y)
                cell = lo * k - (lo * (lo - 1)) // 2 + (np.maximum(x, y) - lo) + lay * c
                tot += np.bincount(cell, weights=w, minlength=len(tot)).astype(tot.dtype)
        return [np.rint(t).astype(np.int64).reshape(int(n_layers), c) for t, c in zip(totals, n_cells)]

    def edge_arrays(self):
        """All edges as numpy arrays ``u``, ``v`` (for small networks and the audit), in the scan's order."""
        res = self.con.execute("SELECT u, v FROM edges").fetchnumpy()
        return res["u"].astype(np.int64), res["v"].astype(np.int64)

    def close(self):
        self.con.close()
        if self._cleanup is not None:
            self._cleanup()  # the private spill folder
