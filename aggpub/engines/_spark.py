"""The Spark counting engine (optional extra ``aggpub[spark]``), for tables held in a cluster.

The same methods as the DuckDB engine (:class:`aggpub.engines.Engine`), in Spark
SQL: the edge mapping that ingest asks for (ids to dense ids, self-loops,
duplicates, unknown people), superedge counts, weight totals, degrees, degree
histograms, contact profiles. Ingest (:mod:`aggpub.ingest`) applies the same
rules and words the same messages for both engines, and numbers the people
itself, so the results are exactly DuckDB's on the same input: the same people
in the same dense order (first appearance in the person file), the same
contacts, the same true counts.
Only aggregated tables come back to the driver, where the noise is drawn from the
full table of cells in its canonical order (row-major upper triangle), so a
seeded source gives the same released counts with either engine.

Local mode (``master="local[2]"``) serves tests and single machines; on a
cluster pass an existing ``SparkSession``.

No Python loop touches an edge: Python sees per-supernode tables, and arrays of
one value per person (assignment, degrees).
"""

from __future__ import annotations

__all__ = ["SparkEngine", "spark_session"]

import os
import re
import secrets

import numpy as np
import pyarrow as pa

from ..errors import InputError, UsageError
from ..progress import LongStep
from .common import degree_histograms_from_degrees
from .interface import (INTEGER, OTHER, REAL, TEXT, ColumnType, EdgeColumns, EdgeCounts, PeopleColumns,
                        RowCondition, Source)

MISSING_ID = -2
UNKNOWN_ID = -1

#: Spark's integer types (their values join as BIGINT)
_INT_TYPES = ("tinyint", "smallint", "int", "bigint")
#: how Spark reads an unsigned 64-bit Parquet integer column
_UINT64_TYPE = "decimal(20,0)"
#: a weight that is null, unparseable (null after try_cast), NaN, infinite or negative
_BAD_WEIGHT = "(w IS NULL OR isnan(w) OR abs(w) = CAST('Infinity' AS DOUBLE) OR w < 0)"


def _column_type(simple: str) -> ColumnType:
    """The kind of a Spark type (its ``simpleString``): integers, text, floating point or decimal, other.

    ``decimal(20,0)`` counts as integers: it is how Spark reads an unsigned
    64-bit integer column (other decimals are real numbers, refused as ids).
    """
    if simple in _INT_TYPES or simple == _UINT64_TYPE:
        return ColumnType(INTEGER, simple.upper())
    if simple == "string":
        return ColumnType(TEXT, simple.upper())
    if simple in ("float", "double") or simple.startswith("decimal("):
        return ColumnType(REAL, simple.upper())
    return ColumnType(OTHER, simple.upper())


def _size_to_jvm(text: str) -> str:
    """``'4GB'`` -> ``'4g'``, ``'500MB'`` -> ``'500m'`` (a JVM memory setting)."""
    m = re.fullmatch(r"\s*(\d+(?:\.\d+)?)\s*([KMGT]i?B?|[kmgt])?\s*", str(text))
    if not m:
        raise UsageError(f"memory limit {text!r} is not a size such as '4GB' or '500MB'")
    value, unit = float(m.group(1)), (m.group(2) or "M")[0].upper()
    mb = value * {"K": 1 / 1024, "M": 1, "G": 1024, "T": 1024 * 1024}[unit]
    return f"{max(256, int(mb))}m"


def spark_session(master: str = "local[2]", *, memory_limit=None, shuffle_partitions: int = 4,
                  local_dir=None, app_name: str = "aggpub"):
    """The process's Spark session, created for local use if none is running.

    A running session (on a cluster, or a test fixture's) is reused as it is:
    ``memory_limit`` (driver memory) only applies to a session created here.
    """
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        raise UsageError("the Spark engine needs pyspark: pip install 'aggpub[spark]'") from None
    active = SparkSession.getActiveSession()
    if active is not None:
        return active
    builder = (SparkSession.builder.master(master).appName(app_name)
               .config("spark.ui.enabled", "false")
               .config("spark.ui.showConsoleProgress", "false")
               .config("spark.sql.shuffle.partitions", str(int(shuffle_partitions)))
               .config("spark.sql.execution.arrow.pyspark.enabled", "true")
               .config("spark.sql.session.timeZone", "UTC"))
    if memory_limit:
        builder = builder.config("spark.driver.memory", _size_to_jvm(memory_limit))
    if local_dir:
        builder = builder.config("spark.local.dir", str(local_dir))
    spark = builder.getOrCreate()
    spark.sparkContext.setLogLevel("ERROR")
    return spark


#: Edge-file bytes per shuffle partition in a session the engine created itself.
SHUFFLE_BYTES = 32 << 20


def _active_session():
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        return None
    return SparkSession.getActiveSession()


def _q(name: str) -> str:
    """Quote a column name for Spark SQL."""
    return "`" + str(name).replace("`", "``") + "`"


def _lit(text: str) -> str:
    """Quote a string literal for Spark SQL."""
    return "'" + str(text).replace("\\", "\\\\").replace("'", "\\'") + "'"


def _missing_id_sql(expr: str, spellings) -> str:
    """True when an id (as text) is null, or empty or one of ``spellings`` after trimming spaces (U+0020), any case."""
    listed = ", ".join(_lit(x) for x in spellings)
    return f"({expr} IS NULL OR lower(trim(BOTH ' ' FROM {expr})) IN ({listed}))"


def _resource_error(exc: Exception):
    """A :class:`UsageError` for Spark failures that are about resources, not the input; else ``None``."""
    text = str(exc)
    if "OutOfMemoryError" in text or "Java heap space" in text:
        return UsageError("Spark ran out of memory (Java heap space): give it more with --memory-limit (the "
                          "driver's memory in local mode) or run on a cluster")
    return None


def _input_error(message: str, exc: Exception, debug: bool) -> Exception:
    """The error for a failed read: a resource problem named as such, else an :class:`InputError`."""
    return _resource_error(exc) or InputError(f"{message}: {_clean_message(exc, debug)}")


def _clean_message(exc: Exception, debug: bool) -> str:
    text = str(exc).strip()
    if debug:
        return text
    first = text.splitlines()[0] if text else type(exc).__name__
    first = re.sub(r'"[^"]*"', '"…"', first)
    first = re.sub(r"'[^']*'", "'…'", first)
    return first[:160]


class SparkEngine:
    """Counting in Spark SQL (same interface and results as the DuckDB engine).

    Parameters
    ----------
    spark : pyspark.sql.SparkSession, optional
        A session to use (default: the running one, else a new local one).
    master : str
        Spark master for a new session (default ``local[2]``; ``threads`` sets ``local[n]``).
    memory_limit : str, optional
        Driver memory of a new session, e.g. ``"4GB"``.
    threads : int, optional
        Local worker threads of a new session.
    shuffle_partitions : int
        ``spark.sql.shuffle.partitions`` of a new session (small for local mode).
    temp_directory : str, optional
        Where a new local session spills (``spark.local.dir``; default Spark's own).
    spill_parent : str, optional
        Accepted for the engines' common interface; not used by Spark.
    scratch : str, optional
        Folder for the small tables the driver hands to Spark (the person ->
        supernode assignment, Arrow inputs), as Parquet. On a cluster it must
        be visible to the executors (shared storage); default: a private
        temporary folder, removed by :meth:`close`.
    progress : callable, optional
        Takes one message; long Spark jobs report their tasks done through it
        every few seconds (from Spark's status tracker).
    """

    name = "spark"

    def __init__(self, spark=None, master="local[2]", memory_limit=None, threads=None, shuffle_partitions=4,
                 spill_parent=None, temp_directory=None, scratch=None, progress=None):
        self.progress = progress
        if threads:
            master = f"local[{int(threads)}]"
        if memory_limit:
            _size_to_jvm(memory_limit)  # validate early
        # spill_parent is accepted for the common engine interface; Spark keeps its own default
        # (spark.local.dir, the system's temporary folder) unless temp_directory names a folder,
        # so no folder of Spark's is left beside the output
        local_dir = temp_directory
        self._own_session = spark is None and _active_session() is None
        self.shuffle_partitions = int(shuffle_partitions)
        self.spark = spark or spark_session(master, memory_limit=memory_limit,
                                            shuffle_partitions=shuffle_partitions, local_dir=local_dir)
        self._prefix = f"aggpub_{secrets.token_hex(4)}_"
        self._cached = []
        self._views = set()
        self._staged = None
        self._last_read = None
        self._degrees = None
        self._last_assignment = None
        self._edges = None
        self._scratch = scratch
        self._cleanup = None
        self._n_scratch = 0

    def _size_shuffles(self, edges_src) -> None:
        """In a session of its own, one shuffle partition per :data:`SHUFFLE_BYTES` of edge file.

        A handful of partitions suits small tables, but at 10^8 edges each task
        would hold tens of millions of rows and exhaust a few GB of heap. A session
        handed in (a cluster's) keeps its own setting.
        """
        if not self._own_session or isinstance(edges_src, pa.Table):
            return
        try:
            path = str(edges_src)
            size = (sum(os.path.getsize(os.path.join(r, f)) for r, _, fs in os.walk(path) for f in fs)
                    if os.path.isdir(path) else os.path.getsize(path))
        except OSError:
            return  # unreadable here (a remote path): the read reports it
        parts = max(self.shuffle_partitions, -(-size // SHUFFLE_BYTES))
        self.spark.conf.set("spark.sql.shuffle.partitions", str(parts))

    def _scratch_path(self, name: str) -> str:
        """A new Parquet path in the scratch folder (driver-written tables: assignment, Arrow inputs)."""
        if self._scratch is None:
            import shutil
            import tempfile
            import weakref

            self._scratch = tempfile.mkdtemp(prefix=".aggpub-spark-")
            self._cleanup = weakref.finalize(self, shutil.rmtree, self._scratch, True)
        self._n_scratch += 1
        return os.path.join(self._scratch, f"{name}-{self._n_scratch}.parquet")

    def _from_arrow(self, table: pa.Table):
        """A DataFrame of a driver-side Arrow table, through a Parquet file in the scratch folder.

        (``createDataFrame`` on Arrow needs pandas, which is not a dependency.)
        """
        import pyarrow.parquet as pq

        path = self._scratch_path("t")
        pq.write_table(table, path, row_group_size=1 << 20)
        return self.spark.read.parquet(path)

    # ------------------------------------------------------------------ helpers

    def _view(self, name: str) -> str:
        return self._prefix + name

    def _register(self, df, name: str, cache: bool = False):
        if cache:
            from pyspark import StorageLevel

            df = df.persist(StorageLevel.MEMORY_AND_DISK)
            self._cached.append(df)
        view = self._view(name)
        df.createOrReplaceTempView(view)
        self._views.add(view)
        return view

    def _sql(self, query: str):
        return self.spark.sql(query)

    def _long(self, what: str) -> LongStep:
        """Reports the tasks done of Spark's running stages while the block runs (see :class:`LongStep`)."""
        def poll():
            tracker = self.spark.sparkContext.statusTracker()
            done = total = 0
            for stage in tracker.getActiveStageIds():
                info = tracker.getStageInfo(stage)
                if info is not None:
                    done, total = done + info.numCompletedTasks, total + info.numTasks
            return f"{done:,} of {total:,} tasks of the running stages" if total else None

        return LongStep(self.progress, what, poll)

    def _one(self, query: str):
        with self._long("Spark query"):
            return self._sql(query).collect()[0]

    def _numpy(self, query: str) -> dict:
        with self._long("Spark query"):
            table = self._sql(query).toArrow()
        return {name: table.column(name).to_numpy() for name in table.column_names}

    def _read(self, source: Source):
        """A DataFrame over ``source``, with ``__row`` increasing in input order (the last one is reused)."""
        from pyspark.sql import functions as F
        from pyspark.sql.types import StringType, StructField, StructType

        if self._last_read is not None and self._last_read[0] is source:
            return self._last_read[1]
        try:
            if source.format == "arrow":
                df = self._from_arrow(source.table)
            elif source.format == "parquet":
                df = self.spark.read.parquet(source.path)
            else:  # every column as text, verbatim (the header was parsed by ingest)
                schema = StructType([StructField(n, StringType(), True) for n in source.header])
                df = self.spark.read.csv(source.path, header=True, schema=schema, sep=source.delimiter, quote='"',
                                         escape='"', mode="FAILFAST", encoding="UTF-8")
        except Exception as exc:  # analysis errors: unreadable file, not Parquet, ...
            raise _input_error(source.unreadable, exc, source.debug) from None
        # monotonically increasing in file order (partition index in the high bits)
        df = df.withColumn("__row", F.monotonically_increasing_id())
        self._last_read = (source, df)
        return df

    def _data_row(self, view: str, mono) -> int:
        """1-based data row of the row whose ``__row`` is ``mono`` (rows before it, plus one)."""
        return int(self._one(f"SELECT count(*) FROM {view} WHERE __row < {int(mono)}")[0]) + 1

    # ------------------------------------------------------------------ ingest (driven by aggpub.ingest)

    def describe(self, source: Source) -> dict:
        """The columns of ``source`` and their types (see :meth:`aggpub.engines.Engine.describe`)."""
        return {name: _column_type(simple) for name, simple in self._read(source).dtypes if name != "__row"}

    def read_people(self, source: Source, id_column: str, attributes) -> PeopleColumns:
        """The id and attribute columns as Arrow, in input order (see :meth:`aggpub.engines.Engine.read_people`).

        Integer ids (up to 64-bit signed) also come back as BIGINT, for the integer join of the edge mapping.
        """
        attributes = list(attributes)
        df = self._read(source)
        native = dict(df.dtypes)[id_column] in _INT_TYPES
        view = self._register(df, "people_in")
        exprs = ([f"CAST({_q(id_column)} AS STRING)"] + ([f"CAST({_q(id_column)} AS BIGINT)"] if native else [])
                 + [f"CAST({_q(a)} AS STRING)" for a in attributes])
        select = ", ".join(f"{e} AS __c{i}" for i, e in enumerate(exprs))  # no clash with any input name
        try:
            with self._long("reading people"):
                table = self._sql(f"SELECT {select} FROM {view} ORDER BY __row").toArrow()
        except Exception as exc:
            raise _input_error(source.unreadable, exc, source.debug) from None
        first = 2 if native else 1
        attrs = pa.table([table.column(first + i).combine_chunks().cast(pa.string()) for i in range(len(attributes))],
                         names=attributes)
        if not attributes:
            attrs = pa.table({"_": pa.nulls(table.num_rows)}).select([])
        return PeopleColumns(ids=table.column(0).combine_chunks().cast(pa.string()),
                             native_ids=table.column(1).combine_chunks() if native else None, attributes=attrs)

    def stage_edges(self, source: Source, columns: EdgeColumns, ids: pa.Table) -> EdgeCounts:
        """Map, canonicalise and collapse the edges (see :meth:`aggpub.engines.Engine.stage_edges`)."""
        self._size_shuffles(source.table if source.format == "arrow" else source.path)
        ein = self._register(self._read(source), "edges_in")
        ids_view = self._register(self._from_arrow(ids), "ids", cache=True)
        w_expr = f"try_cast({_q(columns.weight)} AS DOUBLE)" if columns.weight else "CAST(NULL AS DOUBLE)"
        a_sql, b_sql, key = f"CAST({_q(columns.source)} AS STRING)", f"CAST({_q(columns.target)} AS STRING)", "id"
        spellings = columns.missing_spellings
        missing = f"({_missing_id_sql('a', spellings)} OR {_missing_id_sql('b', spellings)})"
        missing_e = f"({_missing_id_sql('e.a', spellings)} OR {_missing_id_sql('e.b', spellings)})"
        if "nid" in ids.column_names and all(t.name.lower() in _INT_TYPES
                                             for t in (columns.source_type, columns.target_type)):
            # integers on both sides: join on the integers (same pairs as comparing their text)
            a_sql, b_sql, key = (f"CAST({_q(columns.source)} AS BIGINT)", f"CAST({_q(columns.target)} AS BIGINT)",
                                 "nid")
            missing, missing_e = "(a IS NULL OR b IS NULL)", "(e.a IS NULL OR e.b IS NULL)"
        # issue 13: the layer's position among the declared layers (NULL when undeclared)
        if columns.layer:
            cases = " ".join(f"WHEN {_lit(v)} THEN {i}" for i, v in enumerate(columns.layer_values))
            l_expr = f"CAST(CASE CAST({_q(columns.layer)} AS STRING) {cases} END AS SMALLINT)"
        else:
            l_expr = "CAST(0 AS SMALLINT)"
        e_sel = self._register(self._sql(f"SELECT {a_sql} AS a, {b_sql} AS b, {w_expr} AS w, {l_expr} AS l, "
                                         f"__row FROM {ein}"), "edges_sel")
        try:
            mapped = self._register(self._sql(f"""
                WITH m AS (SELECT CASE WHEN {missing_e} THEN {MISSING_ID} ELSE coalesce(ps.idx, {UNKNOWN_ID}) END AS s,
                                  CASE WHEN {missing_e} THEN {MISSING_ID} ELSE coalesce(pt.idx, {UNKNOWN_ID}) END AS t,
                                  e.w, e.l
                           FROM {e_sel} e LEFT JOIN {ids_view} ps ON e.a = ps.{key}
                                          LEFT JOIN {ids_view} pt ON e.b = pt.{key})
                SELECT least(s, t) AS u, greatest(s, t) AS v, count(*) AS mult, sum(w) AS w,
                       count(CASE WHEN {_BAD_WEIGHT} THEN 1 END) AS bad_w,
                       coalesce(min(l), 0) AS layer, count(CASE WHEN l IS NULL THEN 1 END) AS bad_l
                FROM m GROUP BY least(s, t), greatest(s, t)"""), "mapped", cache=True)
            stats = self._one(f"""
                SELECT coalesce(sum(mult), 0),
                       coalesce(sum(CASE WHEN u = {MISSING_ID} THEN mult END), 0),
                       coalesce(sum(CASE WHEN u = {UNKNOWN_ID} THEN mult END), 0),
                       coalesce(sum(CASE WHEN u >= 0 THEN bad_w END), 0),
                       coalesce(sum(CASE WHEN u = v AND u >= 0 THEN mult END), 0),
                       coalesce(sum(CASE WHEN u < v AND u >= 0 THEN mult - 1 END), 0),
                       count(CASE WHEN u < v AND u >= 0 THEN 1 END),
                       coalesce(sum(CASE WHEN u >= 0 THEN bad_l END), 0)
                FROM {mapped}""")
        except Exception as exc:
            raise _input_error(source.unreadable, exc, source.debug) from None
        known = f"(NOT {missing} AND a IN (SELECT {key} FROM {ids_view}) AND b IN (SELECT {key} FROM {ids_view}))"
        self._staged = {"edges": e_sel, "mapped": mapped, "predicates": {
            RowCondition.MISSING_ID: missing,
            RowCondition.UNKNOWN_PERSON: f"NOT {missing} AND NOT {known}",
            RowCondition.BAD_WEIGHT: f"{known} AND {_BAD_WEIGHT}",
            RowCondition.BAD_LAYER: f"{known} AND l IS NULL"}}
        return EdgeCounts(*(int(x) for x in stats))

    def first_staged_row(self, condition: RowCondition):
        """1-based data row of the first staged edge row matching ``condition`` (error path only)."""
        view = self._staged["edges"]
        first = self._one(f"SELECT min(__row) FROM {view} WHERE {self._staged['predicates'][condition]}")[0]
        return self._data_row(view, first) if first is not None else None

    def publish_staged_edges(self):
        """Keep the staged pairs of known, different people as the contacts (inputs already validated)."""
        self._edges = self._register(self._sql(
            f"SELECT CAST(u AS INT) AS u, CAST(v AS INT) AS v, w, CAST(layer AS SMALLINT) AS layer "
            f"FROM {self._staged['mapped']} WHERE u < v AND u >= 0"), "edges")
        self._degrees = self._last_assignment = None
        self.discard_staged_edges()

    def discard_staged_edges(self):
        """Forget the staged edges and the last input read (their views go at :meth:`close`)."""
        self._staged = None
        self._last_read = None

    # ------------------------------------------------------------------ counting

    def _assign_view(self, assignment: np.ndarray) -> str:
        """The assignment as a Spark table (the last one is reused when the same is asked again)."""
        assignment = np.asarray(assignment, dtype=np.int32)
        last = getattr(self, "_last_assignment", None)
        if last is not None and last[0].shape == assignment.shape and np.array_equal(last[0], assignment):
            return last[1]
        table = pa.table({"idx": pa.array(np.arange(len(assignment), dtype=np.int32)), "g": pa.array(assignment)})
        view = self._register(self._from_arrow(table), f"assign{self._n_scratch}")
        self._last_assignment = (assignment.copy(), view)
        return view

    def superedge_counts(self, assignment: np.ndarray):
        """Non-zero superedge counts: arrays ``a <= b`` and ``count`` (int64), ordered by ``(a, b)``.

        Inputs already validated: ``assignment[i]`` is the supernode of person ``i``.
        """
        g = self._assign_view(assignment)
        res = self._numpy(f"""
            SELECT least(ga.g, gb.g) AS a, greatest(ga.g, gb.g) AS b, count(*) AS c
            FROM {self._edges} e JOIN {g} ga ON e.u = ga.idx JOIN {g} gb ON e.v = gb.idx
            GROUP BY least(ga.g, gb.g), greatest(ga.g, gb.g) ORDER BY a, b""")
        return _int64(res, "a", "b", "c")

    def weight_totals(self, assignment: np.ndarray, clip: float):
        """Per-superedge totals of weights clipped to ``[0, clip]`` and rounded to integers."""
        g = self._assign_view(assignment)
        res = self._numpy(f"""
            SELECT least(ga.g, gb.g) AS a, greatest(ga.g, gb.g) AS b,
                   sum(CAST(round(least(greatest(e.w, 0D), {float(clip)!r}D)) AS BIGINT)) AS t
            FROM {self._edges} e JOIN {g} ga ON e.u = ga.idx JOIN {g} gb ON e.v = gb.idx
            GROUP BY least(ga.g, gb.g), greatest(ga.g, gb.g) ORDER BY a, b""")
        return _int64(res, "a", "b", "t")

    def degrees(self, n_people: int) -> np.ndarray:
        """Number of contacts of every person (int64 array of length ``n_people``)."""
        cached = getattr(self, "_degrees", None)
        if cached is not None and len(cached) == n_people:
            return cached.copy()
        res = self._numpy(f"""
            SELECT x, count(*) AS d FROM (SELECT u AS x FROM {self._edges} UNION ALL SELECT v FROM {self._edges})
            GROUP BY x""")
        out = np.zeros(n_people, dtype=np.int64)
        out[res["x"].astype(np.int64)] = res["d"]
        self._degrees = out.copy()  # one value per person; the edges do not change after load
        return out

    def degree_histograms(self, assignment: np.ndarray, n_groups: int, cap: int) -> np.ndarray:
        """Counts of people by (supernode, degree bin); bins 0..cap-1 and a top bin 'cap or more'.

        Returns an int64 array of shape ``(n_groups, cap + 1)``; people with no
        contacts count in bin 0 (one value per person on the driver, as in DuckDB).
        """
        return degree_histograms_from_degrees(self.degrees(len(assignment)), assignment, n_groups, cap)

    def contact_profiles(self, assignment: np.ndarray):
        """Per person and supernode, the number of that person's contacts in the supernode.

        Returns arrays ``person``, ``supernode``, ``count`` (non-zero entries only), ordered.
        """
        g = self._assign_view(assignment)
        res = self._numpy(f"""
            WITH ends AS (SELECT u AS p, v AS q FROM {self._edges} UNION ALL SELECT v, u FROM {self._edges})
            SELECT ends.p AS person, g.g AS supernode, count(*) AS c
            FROM ends JOIN {g} g ON ends.q = g.idx GROUP BY ends.p, g.g ORDER BY person, supernode""")
        return _int64(res, "person", "supernode", "c")

    def view_counts(self, codes, n_values, n_layers: int, clip=None) -> list:
        """Contacts (or clipped weight totals) per pair of values and layer, one query per view (issue 13).

        The same dense tables as :meth:`aggpub.engines._duckdb.DuckDBEngine.view_counts`: each view's
        codes go to Spark as a small table, a join and GROUP BY count the non-zero cells, and the driver
        scatters them into every cell (inputs already validated).
        """
        out = []
        w_sql = (f"CAST(round(least(greatest(e.w, 0D), {float(clip)!r}D)) AS BIGINT)" if clip is not None else "1")
        for code, k in zip(codes, n_values):
            k = int(k)
            n_c = k * (k + 1) // 2
            table = pa.table({"idx": pa.array(np.arange(len(code), dtype=np.int32)),
                              "x": pa.array(np.asarray(code, dtype=np.int64))})
            view = self._register(self._from_arrow(table), f"codes{self._n_scratch}")
            res = self._numpy(f"""
                SELECT least(ca.x, cb.x) AS lo, greatest(ca.x, cb.x) AS hi, e.layer AS layer, sum({w_sql}) AS c
                FROM {self._edges} e JOIN {view} ca ON e.u = ca.idx JOIN {view} cb ON e.v = cb.idx
                GROUP BY least(ca.x, cb.x), greatest(ca.x, cb.x), e.layer""")
            lo, hi, lay, c = _int64(res, "lo", "hi", "layer", "c")
            dense = np.zeros(int(n_layers) * n_c, dtype=np.int64)
            dense[lay * n_c + lo * k - (lo * (lo - 1)) // 2 + (hi - lo)] = c
            out.append(dense.reshape(int(n_layers), n_c))
        return out

    def edge_arrays(self):
        """All edges as numpy arrays ``u``, ``v`` (for small networks and the audit), ordered."""
        res = self._numpy(f"SELECT u, v FROM {self._edges} ORDER BY u, v")
        return res["u"].astype(np.int64), res["v"].astype(np.int64)

    def close(self):
        """Drop this engine's views and cached tables (the shared session keeps running)."""
        for df in self._cached:
            try:
                df.unpersist()
            except Exception:  # pragma: no cover - session already stopped
                pass
        for view in self._views:
            try:
                self.spark.catalog.dropTempView(view)
            except Exception:  # pragma: no cover
                pass
        self._cached, self._views = [], set()
        if self._cleanup is not None:
            self._cleanup()


def _int64(res: dict, *names):
    return tuple(np.asarray(res[n], dtype=np.int64) for n in names)
