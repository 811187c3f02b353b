"""The embedded DuckDB counting engine (the default).

All counting over edges happens here, in SQL: ingest (id mapping, self-loops,
duplicates), superedge counts, degrees, degree histograms, weight totals and
contact profiles. No Python loop touches an edge.
"""

from __future__ import annotations

import os
import re
import warnings

import duckdb
import numpy as np
import pyarrow as pa

from ..errors import InputError
from ..ingest import IngestReport, Network, csv_header, file_format
from ..progress import LongStep

MISSING_ID = -2
UNKNOWN_ID = -1
#: Rows per Arrow batch when edges stream out of DuckDB into numpy.
EDGE_BATCH_ROWS = 1 << 22
#: Largest table of superedge cells counted densely in numpy (8 bytes a cell: 128 MiB); above, SQL.
DENSE_COUNT_MAX_CELLS = 1 << 24


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


#: DuckDB types accepted for id columns: integers of any width, or text
_ID_TYPE = re.compile(r"^(U?(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT)|VARCHAR)$")
_INT_TYPE = re.compile(r"^U?(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT)$")
_NUMERIC_TYPE = re.compile(r"^(U?(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT)|FLOAT|DOUBLE|REAL|DECIMAL.*|VARCHAR)$")


def _missing_id_sql(expr: str) -> str:
    """SQL true when an id (as text) is empty or spells a missing value (see ``MISSING_ID_SPELLINGS``)."""
    from ..ingest import MISSING_ID_SPELLINGS

    spellings = ", ".join(quote_literal(x) for x in MISSING_ID_SPELLINGS)
    return f"({expr} IS NULL OR lower(trim({expr})) IN ({spellings}))"


def _missing_column(file_name, col, cols, expected, what, debug) -> InputError:
    """Error for a missing column; names from the header are suggested only when it is a real header.

    A file without a header has data on its first line, so its "column names" are
    private values: they are shown only with ``debug`` or when at least one
    expected column is present (the first line is then a header).
    """
    from ..errors import closest_name

    import difflib

    cols = list(cols)
    is_header = debug or any(c in cols for c in expected)
    if not is_header:  # a near-miss of the asked name without digits (ids have them) reads as a header
        near = difflib.get_close_matches(str(col), [str(c) for c in cols], n=1, cutoff=0.75)
        is_header = bool(near) and not any(ch.isdigit() for ch in near[0])
    hint = closest_name(col, cols) if is_header else ""
    if not is_header:
        if len(cols) == 1 and any(d in cols[0] for d in (";", "\t", "|", ",")):
            delim = next(d for d in (";", "\t", "|", ",") if d in cols[0])
            hint = (f" (the header is a single field containing {delim!r}: the file looks {delim!r}-delimited; "
                    f".csv files must be comma-separated and .tsv files tab-separated)")
        else:
            hint = f" (none of the {len(cols)} header fields is an expected column: is the first line a header?)"
    return InputError(f"{file_name}: no {what} '{col}'{hint}")


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
        self._weighted = False

    def _long(self, what: str) -> LongStep:
        """Reports the progress of the statement(s) run inside it (see :class:`LongStep`)."""
        def poll():
            pct = self.con.query_progress()
            return f"{pct:.0f}% of the current statement" if pct is not None and pct >= 0 else None

        return LongStep(self.progress, what, poll)

    # ------------------------------------------------------------------ ingest

    def _relation_sql(self, src, what, all_varchar):
        """SQL for a scan of a file (or a registered Arrow table)."""
        if isinstance(src, pa.Table):
            view = f"__{what}_arrow"
            self.con.register(view, src)
            return view
        fmt = file_format(src)
        path = quote_literal(str(src))
        if fmt == "parquet":
            return f"read_parquet({path})"
        # CSV/TSV: the header is parsed here (a UTF-8 byte-order mark is accepted) and every column is
        # read as text without type sniffing, so ids keep their exact spelling ("007" stays "007",
        # ids beyond 64 bits stay exact) and the parser reports ragged rows by line number.
        names = csv_header(src, "\t" if fmt == "tsv" else ",")
        delim = "\\t" if fmt == "tsv" else ","
        columns = "{" + ", ".join(f"{quote_literal(n)}: 'VARCHAR'" for n in names) + "}"
        opts = f"header=true, delim='{delim}', quote='\"', escape='\"', auto_detect=false, " \
               f"columns={columns}, strict_mode=true"
        return f"read_csv({path}, {opts})"

    def _columns(self, rel_sql, src, what, debug):
        try:
            desc = self.con.execute(f"DESCRIBE SELECT * FROM {rel_sql}").fetchall()
        except duckdb.Error as exc:
            raise InputError(f"{src if not isinstance(src, pa.Table) else what + ' table'}: cannot read "
                             f"{what} file: {_clean_duckdb_message(exc, debug)}") from None
        return {row[0]: row[1] for row in desc}

    def load(self, edges_src, people_src, *, source, target, node, weight, drop_unknown, attributes,
             debug=False) -> Network:
        edge_name = "edge table" if isinstance(edges_src, pa.Table) else str(edges_src)
        people_name = "person table" if isinstance(people_src, pa.Table) else str(people_src)

        # ---- people: into Arrow, ids deduplicated, dense index = row order
        p_sql = self._relation_sql(people_src, "people", all_varchar=True)
        p_cols = self._columns(p_sql, people_src, "person", debug)
        expected = [node] + list(attributes or ())
        if node not in p_cols:
            raise _missing_column(people_name, node, p_cols, expected, "id column", debug)
        if not _ID_TYPE.match(str(p_cols[node]).upper()):
            raise InputError(f"{people_name}: id column '{node}' has type {p_cols[node]}; ids must be "
                             "integers or text")
        attr_cols = [c for c in p_cols if c != node] if attributes is None else list(attributes)
        for a in attr_cols:
            if a not in p_cols:
                raise _missing_column(people_name, a, p_cols, expected, "attribute column", debug)
        # integer ids (Parquet, Arrow) also keep their native value: the edge mapping then joins on
        # integers when the edge ids are integers too, which gives the same pairs as comparing the text
        # (an integer's decimal text is unique) at a fraction of the cost
        int_ids = _INT_TYPE.match(str(p_cols[node]).upper()) is not None
        nid_sql = ", __nid" if int_ids else ""
        sel = ", ".join([f"CAST({quote_ident(node)} AS VARCHAR) AS id"] +
                        ([f"{quote_ident(node)} AS __nid"] if int_ids else []) +
                        [f"CAST({quote_ident(a)} AS VARCHAR) AS {quote_ident(a)}" for a in attr_cols])
        try:
            raw = fetch_arrow(self.con.execute(f"SELECT {sel} FROM {p_sql}"))
        except duckdb.Error as exc:
            raise InputError(f"{people_name}: cannot read person file: {_clean_duckdb_message(exc, debug)}") from None
        person_rows = raw.num_rows
        if person_rows == 0:
            raise InputError(f"{people_name}: the person table has no rows")
        raw = raw.append_column("__row", pa.array(np.arange(person_rows, dtype=np.int64)))
        self.con.register("__people_raw", raw)
        bad = self.con.execute(f"SELECT min(__row), count(*) FROM __people_raw WHERE {_missing_id_sql('id')}"
                               ).fetchall()[0]
        if bad[0] is not None:
            raise InputError(f"{people_name}: {bad[1]:,} row(s) have an empty or missing id (NaN, NA, null) "
                             f"in column '{node}' (first at data row {bad[0] + 1})")
        for a in attr_cols:
            bad = self.con.execute(f"SELECT min(__row) FROM __people_raw WHERE {quote_ident(a)} IS NULL").fetchall()[0][0]
            if bad is not None:
                raise InputError(f"{people_name}: column '{a}' is empty in data row {bad + 1}")
        attr_sql = "".join(", " + quote_ident(a) for a in attr_cols)
        n_ids = self.con.execute("SELECT count(DISTINCT id) FROM __people_raw").fetchall()[0][0]
        if n_ids == person_rows:  # no repeated id: the rows are the people, in file order (no sort needed)
            distinct = raw
        else:
            distinct = fetch_arrow(self.con.execute(
                f"SELECT id{nid_sql}{attr_sql}, min(__row) AS first FROM __people_raw GROUP BY ALL ORDER BY first"))
        if distinct.num_rows != n_ids:
            conflicted = distinct.num_rows - n_ids
            tup = "row(" + (", ".join("p." + quote_ident(c) for c in attr_cols) or "p.id") + ")"
            row, other = self.con.execute(  # error path: the first repeated id and its first differing row
                f"WITH k AS (SELECT id, min(__row) AS first FROM __people_raw GROUP BY id "
                f"           HAVING count(DISTINCT {tup.replace('p.', '')}) > 1 ORDER BY first LIMIT 1), "
                f"     f AS (SELECT p.id, {tup} AS t FROM __people_raw p JOIN k ON p.__row = k.first) "
                f"SELECT min(k.first), min(p.__row) FROM __people_raw p JOIN k ON p.id = k.id "
                f"JOIN f ON f.id = p.id WHERE {tup} IS DISTINCT FROM f.t"
            ).fetchall()[0]
            raise InputError(f"{people_name}: {conflicted} person id(s) appear more than once with conflicting "
                             f"attributes (first at data row {int(row) + 1}, again with other attributes at "
                             f"data row {int(other) + 1})")
        self.con.unregister("__people_raw")
        n_people = distinct.num_rows
        ids = distinct.column("id")
        people = distinct.select(attr_cols)
        id_table = pa.table({"id": ids, "idx": pa.array(np.arange(n_people, dtype=np.int32))})
        if int_ids:
            id_table = id_table.append_column("nid", distinct.column("__nid"))

        # ---- edges: mapped to dense ids, canonical u < v, collapsed, all in one scan
        e_sql = self._relation_sql(edges_src, "edges", all_varchar=False)
        e_cols = self._columns(e_sql, edges_src, "edge", debug)
        expected = [source, target] + ([weight] if weight else [])
        for c in expected:
            if c not in e_cols:
                raise _missing_column(edge_name, c, e_cols, expected, "column", debug)
        for c in (source, target):
            if not _ID_TYPE.match(str(e_cols[c]).upper()):
                raise InputError(f"{edge_name}: id column '{c}' has type {e_cols[c]}; ids must be "
                                 "integers or text")
        if weight and not _NUMERIC_TYPE.match(str(e_cols[weight]).upper()):
            raise InputError(f"{edge_name}: weight column '{weight}' is not numeric ({e_cols[weight]})")
        self.con.register("__ids", id_table)
        # text weights (CSV) are parsed here; an unparseable one becomes NULL and is refused below
        # (trim() keeps DuckDB from pushing the cast into the CSV reader, where it turns into a strict
        # cast that fails on the first bad value with the value in its message)
        w_expr = "NULL::DOUBLE"
        if weight:
            w_expr = (f"TRY_CAST(trim({quote_ident(weight)}) AS DOUBLE)" if str(e_cols[weight]).upper() == "VARCHAR"
                      else f"CAST({quote_ident(weight)} AS DOUBLE)")
        missing_a, missing_b = _missing_id_sql("e.a"), _missing_id_sql("e.b")
        # people ids are VARCHAR; compare edge ids as text so CSV and Parquet inputs mix,
        # or as integers when both sides are integers (same pairs, much faster)
        a_sql = f"CAST({quote_ident(source)} AS VARCHAR)"
        b_sql = f"CAST({quote_ident(target)} AS VARCHAR)"
        id_col = "id"
        if int_ids and all(_INT_TYPE.match(str(e_cols[c]).upper()) for c in (source, target)):
            a_sql, b_sql, id_col = quote_ident(source), quote_ident(target), "nid"
            missing_a, missing_b = "(e.a IS NULL)", "(e.b IS NULL)"
        q = f"""
            CREATE OR REPLACE TEMP TABLE __mapped AS
            WITH e AS (SELECT {a_sql} AS a, {b_sql} AS b, {w_expr} AS w
                       FROM {e_sql}),
                 m AS (SELECT CASE WHEN {missing_a} OR {missing_b}
                                   THEN {MISSING_ID} ELSE coalesce(ps.idx, {UNKNOWN_ID}) END AS s,
                              CASE WHEN {missing_a} OR {missing_b}
                                   THEN {MISSING_ID} ELSE coalesce(pt.idx, {UNKNOWN_ID}) END AS t,
                              e.w
                       FROM e LEFT JOIN __ids ps ON e.a = ps.{id_col} LEFT JOIN __ids pt ON e.b = pt.{id_col})
            SELECT least(s, t) AS u, greatest(s, t) AS v, count(*) AS mult, sum(w) AS w,
                   count(*) FILTER (WHERE w IS NULL OR isnan(w) OR isinf(w) OR w < 0) AS bad_w
            FROM m GROUP BY 1, 2
        """
        try:
            with self._long("reading, mapping and collapsing edges"):
                self.con.execute(q)
        except duckdb.Error as exc:
            self.con.unregister("__ids")
            raise InputError(f"{edge_name}: cannot read edge file: {_clean_duckdb_message(exc, debug)}") from None
        try:
            self._check_edges(e_sql, edge_name, people_name, source, target, weight, w_expr, drop_unknown)
        finally:
            self.con.unregister("__ids")
        stats = self.con.execute(f"""
            SELECT coalesce(sum(mult), 0),
                   coalesce(sum(mult) FILTER (WHERE u = {UNKNOWN_ID}), 0),
                   coalesce(sum(mult) FILTER (WHERE u = v AND u >= 0), 0),
                   coalesce(sum(mult - 1) FILTER (WHERE u < v AND u >= 0), 0),
                   count(*) FILTER (WHERE u < v AND u >= 0)
            FROM __mapped""").fetchall()[0]
        rows, unknown, loops, dups, n_edges = (int(x) for x in stats)
        if n_edges == 0:
            raise InputError(f"{edge_name}: no contacts left after dropping self-loops"
                             + (" and unknown people" if unknown else ""))
        self._publish_edges(weight)
        report = IngestReport(edge_rows=rows, edges=n_edges, self_loops_dropped=loops,
                              duplicate_rows_collapsed=dups, unknown_person_rows_dropped=unknown,
                              person_rows=person_rows, people=n_people,
                              duplicate_person_rows_collapsed=person_rows - n_people)
        return Network(people=people, n_people=n_people, n_edges=n_edges, engine=self, report=report,
                       weighted=bool(weight), ids=ids.combine_chunks() if hasattr(ids, "combine_chunks") else ids)

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

    def _check_edges(self, e_sql, edge_name, people_name, source, target, weight, w_expr, drop_unknown):
        """Refuse empty edge tables, missing ids, unknown people and bad weights, naming the first row."""
        stats = self.con.execute(f"""
            SELECT coalesce(sum(mult), 0),
                   coalesce(sum(mult) FILTER (WHERE u = {MISSING_ID}), 0),
                   coalesce(sum(mult) FILTER (WHERE u = {UNKNOWN_ID}), 0),
                   coalesce(sum(bad_w) FILTER (WHERE u >= 0), 0)
            FROM __mapped""").fetchall()[0]
        rows, missing, unknown, bad_w = (int(x) for x in stats)
        if rows == 0:
            raise InputError(f"{edge_name}: the edge table has no rows")
        select = (f"CAST({quote_ident(source)} AS VARCHAR) AS a, CAST({quote_ident(target)} AS VARCHAR) AS b, "
                  f"{w_expr} AS w")
        missing_ab = f"({_missing_id_sql('a')} OR {_missing_id_sql('b')})"
        known = f"(NOT {missing_ab} AND a IN (SELECT id FROM __ids) AND b IN (SELECT id FROM __ids))"

        def at(predicate):
            row = self._first_row(e_sql, select, predicate)
            return f" (first at data row {row})" if row else ""

        if missing:
            raise InputError(f"{edge_name}: {missing:,} edge row(s) have an empty '{source}' or '{target}' "
                             f"(or an id spelling a missing value: NaN, NA, null){at(missing_ab)}")
        if unknown and not drop_unknown:
            raise InputError(f"{edge_name}: {unknown:,} edge row(s) name people missing from {people_name}"
                             f"{at(f'NOT {missing_ab} AND NOT {known}')} (use --drop-unknown to drop them)")
        if weight and bad_w:
            raise InputError(f"{edge_name}: {bad_w:,} edge row(s) have an empty, unparseable, NaN, infinite or "
                             f"negative '{weight}'"
                             f"{at(f'{known} AND (w IS NULL OR isnan(w) OR isinf(w) OR w < 0)')}")

    def _publish_edges(self, weight):
        """Keep the mapped, canonical contacts as table ``edges`` (inputs already validated)."""
        with self._long("keeping the contacts"):
            self.con.execute("""CREATE OR REPLACE TABLE edges AS
                                SELECT CAST(u AS INTEGER) AS u, CAST(v AS INTEGER) AS v, w
                                FROM __mapped WHERE u < v AND u >= 0""")
        self.con.execute("DROP TABLE __mapped")
        self._weighted = bool(weight)
        self._degrees = None  # new edges: forget degrees of a previous load

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
        """Counting into a dense table of every cell (inputs already validated; see :meth:`superedge_counts`)."""
        n_cells = n_groups * (n_groups + 1) // 2
        group = assignment.astype(np.int32)  # n_cells <= DENSE_COUNT_MAX_CELLS: n_groups fits easily
        total = np.zeros(n_cells, dtype=np.int64)
        n_people = len(assignment)
        # the same pass counts every person's contacts unless that is known (the audit asks for it)
        degrees = np.zeros(n_people, dtype=np.int64) if self._cached_degrees(n_people) is None else None
        for u, v in self._edge_batches("counting superedges", n_people):
            if degrees is not None:
                degrees += np.bincount(u, minlength=n_people)
                degrees += np.bincount(v, minlength=n_people)
            gu = group[u]
            gv = group[v]
            lo = np.minimum(gu, gv).astype(np.int64)
            hi = np.maximum(gu, gv) - lo
            # position of (lo, hi) in the upper triangle, row by row (components.cell_index)
            hi += lo * n_groups - (lo * (lo - 1)) // 2
            total += np.bincount(hi, minlength=n_cells)
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
        deg = self.degrees(len(assignment))
        bins = np.minimum(deg, cap)
        flat = np.asarray(assignment, dtype=np.int64) * (cap + 1) + bins
        return np.bincount(flat, minlength=n_groups * (cap + 1)).reshape(n_groups, cap + 1)

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

    def edge_arrays(self):
        """All edges as numpy arrays ``u``, ``v`` (for small networks and the audit)."""
        res = self.con.execute("SELECT u, v FROM edges").fetchnumpy()
        return res["u"].astype(np.int64), res["v"].astype(np.int64)

    def close(self):
        self.con.close()
        if self._cleanup is not None:
            self._cleanup()  # the private spill folder
