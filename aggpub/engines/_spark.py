"""The Spark counting engine (optional extra ``aggpub[spark]``), for tables held in a cluster.

The same stages as :class:`aggpub.engines._duckdb.DuckDBEngine`, in Spark SQL:
ingest (id mapping, self-loops, duplicates, unknown people), superedge counts,
weight totals, degrees, degree histograms, contact profiles. The results are
exactly DuckDB's on the same input: the same people in the same dense order
(first appearance in the person file), the same contacts, the same true counts.
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
from ..ingest import IngestReport, MISSING_ID_SPELLINGS, Network, csv_header, file_format
from ..progress import LongStep

MISSING_ID = -2
UNKNOWN_ID = -1

_INT_TYPES = ("tinyint", "smallint", "int", "bigint")
_NUMERIC_TYPES = _INT_TYPES + ("float", "double")


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


def _missing_id_sql(expr: str) -> str:
    """True when an id (as text) is empty or spells a missing value (as in the DuckDB engine)."""
    spellings = ", ".join(_lit(x) for x in MISSING_ID_SPELLINGS)
    return f"({expr} IS NULL OR lower(trim({expr})) IN ({spellings}))"


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
        self._weighted = False
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

    def _read(self, src, what: str, debug: bool):
        """A DataFrame over a file or an Arrow table, with ``__row`` increasing in input order."""
        from pyspark.sql import functions as F
        from pyspark.sql.types import StringType, StructField, StructType

        try:
            if isinstance(src, pa.Table):
                df = self._from_arrow(src)
            else:
                fmt = file_format(src)
                if fmt == "parquet":
                    df = self.spark.read.parquet(str(src))
                else:
                    delim = "\t" if fmt == "tsv" else ","
                    names = csv_header(src, delim)
                    schema = StructType([StructField(n, StringType(), True) for n in names])
                    df = self.spark.read.csv(str(src), header=True, schema=schema, sep=delim, quote='"',
                                             escape='"', mode="FAILFAST", encoding="UTF-8")
        except InputError:
            raise
        except Exception as exc:  # analysis errors: unreadable file, not Parquet, ...
            name = f"{what} table" if isinstance(src, pa.Table) else str(src)
            raise _input_error(f"{name}: cannot read {what} file", exc, debug) from None
        # monotonically increasing in file order (partition index in the high bits)
        return df.withColumn("__row", F.monotonically_increasing_id())

    def _data_row(self, view: str, mono) -> int:
        """1-based data row of the row whose ``__row`` is ``mono`` (rows before it, plus one)."""
        return int(self._one(f"SELECT count(*) FROM {view} WHERE __row < {int(mono)}")[0]) + 1

    # ------------------------------------------------------------------ ingest

    def load(self, edges_src, people_src, *, source, target, node, weight, drop_unknown, attributes,
             debug=False) -> Network:
        """Read edges and people (see :func:`aggpub.load_network`); same checks and results as DuckDB."""
        from ..errors import closest_name

        edge_name = "edge table" if isinstance(edges_src, pa.Table) else str(edges_src)
        people_name = "person table" if isinstance(people_src, pa.Table) else str(people_src)
        self._size_shuffles(edges_src)

        # ---- people: ids deduplicated, dense index = order of first appearance
        pdf = self._read(people_src, "person", debug)
        p_types = {f.name: f.dataType.simpleString() for f in pdf.schema.fields if f.name != "__row"}
        if node not in p_types:
            raise InputError(f"{people_name}: no id column '{node}'{closest_name(node, p_types)}")
        int_ids = p_types[node] in _INT_TYPES
        if not (int_ids or p_types[node] == "string" or p_types[node].startswith("decimal(")):
            raise InputError(f"{people_name}: id column '{node}' has type {p_types[node]}; ids must be "
                             "integers or text")
        attr_cols = [c for c in p_types if c != node] if attributes is None else list(attributes)
        for a in attr_cols:
            if a not in p_types:
                raise InputError(f"{people_name}: no attribute column '{a}'{closest_name(a, p_types)}")
        raw = self._register(pdf, "people_in")
        nid = f", CAST({_q(node)} AS BIGINT) AS __nid" if int_ids else ""
        attr_sel = "".join(f", CAST({_q(a)} AS STRING) AS {_q(a)}" for a in attr_cols)
        praw = self._register(self._sql(f"SELECT CAST({_q(node)} AS STRING) AS id{nid}{attr_sel}, __row "
                                        f"FROM {raw}"), "people_raw")
        null_attrs = "".join(f", min(CASE WHEN {_q(a)} IS NULL THEN __row END)" for a in attr_cols)
        missing_p = _missing_id_sql("id")
        try:  # every check of the person table in one pass
            stats = self._one(f"SELECT count(*), min(CASE WHEN {missing_p} THEN __row END), "
                              f"count(CASE WHEN {missing_p} THEN 1 END), count(DISTINCT id){null_attrs} "
                              f"FROM {praw}")
        except Exception as exc:
            raise _input_error(f"{people_name}: cannot read person file", exc, debug) from None
        person_rows, bad_row, n_bad, n_ids = int(stats[0]), stats[1], int(stats[2]), int(stats[3])
        if person_rows == 0:
            raise InputError(f"{people_name}: the person table has no rows")
        if bad_row is not None:
            raise InputError(f"{people_name}: {n_bad:,} row(s) have an empty or missing id (NaN, NA, null) "
                             f"in column '{node}' (first at data row {self._data_row(praw, bad_row)})")
        for a, bad in zip(attr_cols, stats[4:]):
            if bad is not None:
                raise InputError(f"{people_name}: column '{a}' is empty in data row {self._data_row(praw, bad)}")
        nid_col = ", __nid" if int_ids else ""
        attr_sql = "".join(", " + _q(a) for a in attr_cols)
        if n_ids == person_rows:
            firsts = praw
        else:
            firsts = self._register(self._sql(
                f"SELECT id{nid_col}{attr_sql}, min(__row) AS __row FROM {praw} GROUP BY id{nid_col}{attr_sql}"),
                "people_first", cache=True)
            n_distinct = int(self._one(f"SELECT count(*) FROM {firsts}")[0])
            if n_distinct != n_ids:
                row = self._one(f"SELECT min(__row) FROM (SELECT id, min(__row) AS __row, count(*) AS k "
                                f"FROM {firsts} GROUP BY id) WHERE k > 1")[0]
                raise InputError(f"{people_name}: {n_distinct - n_ids} person id(s) appear more than once with "
                                 f"conflicting attributes (first at data row {self._data_row(praw, row)})")
        ids_view = self._register(self._sql(
            f"SELECT id{nid_col}{attr_sql}, CAST(row_number() OVER (ORDER BY __row) - 1 AS INT) AS idx "
            f"FROM {firsts}"), "ids", cache=True)
        people_all = self._sql(f"SELECT id{attr_sql} FROM {ids_view} ORDER BY idx").toArrow()
        n_people = people_all.num_rows
        ids = people_all.column("id").combine_chunks()
        people = pa.table({a: people_all.column(a).combine_chunks().cast(pa.string()) for a in attr_cols}) \
            if attr_cols else pa.table({"__none": pa.nulls(n_people)}).select([])

        # ---- edges: mapped to dense ids, canonical u < v, collapsed
        edf = self._read(edges_src, "edge", debug)
        e_types = {f.name: f.dataType.simpleString() for f in edf.schema.fields if f.name != "__row"}
        for c in (source, target) + ((weight,) if weight else ()):
            if c not in e_types:
                raise InputError(f"{edge_name}: no column '{c}'{closest_name(c, e_types)}")
        for c in (source, target):
            t = e_types[c]
            if not (t in _INT_TYPES or t == "string" or t.startswith("decimal(")):
                raise InputError(f"{edge_name}: id column '{c}' has type {t}; ids must be integers or text")
        if weight and not (e_types[weight] in _NUMERIC_TYPES or e_types[weight] == "string"
                           or e_types[weight].startswith("decimal(")):
            raise InputError(f"{edge_name}: weight column '{weight}' is not numeric ({e_types[weight]})")
        ein = self._register(edf, "edges_in")
        w_expr = f"try_cast({_q(weight)} AS DOUBLE)" if weight else "CAST(NULL AS DOUBLE)"
        a_sql, b_sql, key = f"CAST({_q(source)} AS STRING)", f"CAST({_q(target)} AS STRING)", "id"
        missing = f"({_missing_id_sql('a')} OR {_missing_id_sql('b')})"
        missing_e = f"({_missing_id_sql('e.a')} OR {_missing_id_sql('e.b')})"
        if int_ids and e_types[source] in _INT_TYPES and e_types[target] in _INT_TYPES:
            # integers on both sides: join on the integers (same pairs as comparing their text)
            a_sql, b_sql, key = f"CAST({_q(source)} AS BIGINT)", f"CAST({_q(target)} AS BIGINT)", "__nid"
            missing, missing_e = "(a IS NULL OR b IS NULL)", "(e.a IS NULL OR e.b IS NULL)"
        bad_w = "(w IS NULL OR isnan(w) OR abs(w) = CAST('Infinity' AS DOUBLE) OR w < 0)"
        e_sel = self._register(self._sql(f"SELECT {a_sql} AS a, {b_sql} AS b, {w_expr} AS w, __row FROM {ein}"),
                               "edges_sel")
        try:
            mapped = self._register(self._sql(f"""
                WITH m AS (SELECT CASE WHEN {missing_e} THEN {MISSING_ID} ELSE coalesce(ps.idx, {UNKNOWN_ID}) END AS s,
                                  CASE WHEN {missing_e} THEN {MISSING_ID} ELSE coalesce(pt.idx, {UNKNOWN_ID}) END AS t,
                                  e.w
                           FROM {e_sel} e LEFT JOIN {ids_view} ps ON e.a = ps.{key}
                                          LEFT JOIN {ids_view} pt ON e.b = pt.{key})
                SELECT least(s, t) AS u, greatest(s, t) AS v, count(*) AS mult, sum(w) AS w,
                       count(CASE WHEN {bad_w} THEN 1 END) AS bad_w
                FROM m GROUP BY least(s, t), greatest(s, t)"""), "mapped", cache=True)
            stats = self._one(f"""
                SELECT coalesce(sum(mult), 0),
                       coalesce(sum(CASE WHEN u = {MISSING_ID} THEN mult END), 0),
                       coalesce(sum(CASE WHEN u = {UNKNOWN_ID} THEN mult END), 0),
                       coalesce(sum(CASE WHEN u >= 0 THEN bad_w END), 0),
                       coalesce(sum(CASE WHEN u = v AND u >= 0 THEN mult END), 0),
                       coalesce(sum(CASE WHEN u < v AND u >= 0 THEN mult - 1 END), 0),
                       count(CASE WHEN u < v AND u >= 0 THEN 1 END)
                FROM {mapped}""")
        except Exception as exc:
            raise _input_error(f"{edge_name}: cannot read edge file", exc, debug) from None
        rows, n_missing, unknown, n_bad_w, loops, dups, n_edges = (int(x) for x in stats)
        if rows == 0:
            raise InputError(f"{edge_name}: the edge table has no rows")
        known = (f"(NOT {missing} AND a IN (SELECT {key} FROM {ids_view}) "
                 f"AND b IN (SELECT {key} FROM {ids_view}))")

        def at(predicate):
            first = self._one(f"SELECT min(__row) FROM {e_sel} WHERE {predicate}")[0]
            return f" (first at data row {self._data_row(e_sel, first)})" if first is not None else ""

        if n_missing:
            raise InputError(f"{edge_name}: {n_missing:,} edge row(s) have an empty or missing id (NaN, NA, null) "
                             f"in '{source}' or '{target}'{at(missing)}")
        if unknown and not drop_unknown:
            raise InputError(f"{edge_name}: {unknown:,} edge row(s) name people missing from {people_name}"
                             f"{at(f'NOT {missing} AND NOT {known}')} (use --drop-unknown to drop them)")
        if weight and n_bad_w:
            raise InputError(f"{edge_name}: {n_bad_w:,} edge row(s) have an empty, unparseable, NaN, infinite or "
                             f"negative '{weight}'{at(f'{known} AND {bad_w}')}")
        if n_edges == 0:
            raise InputError(f"{edge_name}: no contacts left after dropping self-loops"
                             + (" and unknown people" if unknown else ""))
        self._edges = self._register(self._sql(
            f"SELECT CAST(u AS INT) AS u, CAST(v AS INT) AS v, w FROM {mapped} WHERE u < v AND u >= 0"), "edges")
        self._weighted = bool(weight)
        self._degrees = self._last_assignment = None
        report = IngestReport(edge_rows=rows, edges=n_edges, self_loops_dropped=loops,
                              duplicate_rows_collapsed=dups, unknown_person_rows_dropped=unknown,
                              person_rows=person_rows, people=n_people,
                              duplicate_person_rows_collapsed=person_rows - n_people)
        return Network(people=people, n_people=n_people, n_edges=n_edges, engine=self, report=report,
                       weighted=bool(weight), ids=ids)

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
        deg = self.degrees(len(assignment))
        bins = np.minimum(deg, cap)
        flat = np.asarray(assignment, dtype=np.int64) * (cap + 1) + bins
        return np.bincount(flat, minlength=n_groups * (cap + 1)).reshape(n_groups, cap + 1)

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
