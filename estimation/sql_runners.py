"""Run the generated aggregation SQL on DuckDB (embedded) or Spark (a cluster by master URL, or local mode).

A runner exposes the source as one relation, reports column types, runs a query for its single result row (or
a few rows), materialises a small intermediate table, and reports progress while a scan runs. Nothing here
knows about models: the queries come from :mod:`ivdossier.estimation.sql_moments`.
"""

from __future__ import annotations

import itertools
import tempfile
import threading
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.sql_moments import DUCKDB, SPARK, Dialect

# progress is reported for scans that run longer than this (seconds), then every PROGRESS_EVERY seconds
PROGRESS_AFTER = 2.0
PROGRESS_EVERY = 1.0
MAX_FIELDS_CONF = "spark.sql.codegen.maxFields"


@dataclass(frozen=True)
class ScanProgress:
    """One progress report of a running scan: which scan, how far, and for how long."""

    scan: str
    index: int
    total: int
    fraction: float | None
    rows_read: int | None
    rows_total: int | None
    elapsed: float
    done: bool = False

    def __str__(self) -> str:
        rows = (
            f"{self.rows_read:,} of ~{self.rows_total:,} rows"
            if self.rows_read is not None and self.rows_total
            else ""
        )
        pct = f"{100 * self.fraction:.0f}%" if self.fraction is not None else "running"
        state = "done" if self.done else pct
        return f"scan {self.index}/{self.total} ({self.scan}): {state} {rows} {self.elapsed:.1f} s".replace(
            "  ", " "
        )


ProgressCallback = Callable[[ScanProgress], None]


class _Monitor:
    """Polls a runner's progress in a thread and forwards reports after PROGRESS_AFTER seconds."""

    def __init__(
        self,
        poll: Callable[[], float | None],
        callback: ProgressCallback | None,
        scan: str,
        index: int,
        total: int,
        rows_total: int | None,
    ) -> None:
        self.poll, self.callback = poll, callback
        self.scan, self.index, self.total, self.rows_total = scan, index, total, rows_total
        self.start = time.monotonic()
        self.stop = threading.Event()
        self.reported = False
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _report(self, fraction: float | None, done: bool) -> None:
        if self.callback is None:
            return
        rows = int(fraction * self.rows_total) if fraction is not None and self.rows_total else None
        self.callback(
            ScanProgress(
                self.scan,
                self.index,
                self.total,
                fraction,
                rows,
                self.rows_total,
                time.monotonic() - self.start,
                done,
            )
        )
        self.reported = True

    def _run(self) -> None:
        if self.stop.wait(PROGRESS_AFTER):
            return
        while not self.stop.is_set():
            try:
                frac = self.poll()
            except Exception:  # a progress probe must never break the scan
                frac = None
            self._report(frac, False)
            self.stop.wait(PROGRESS_EVERY)

    def __enter__(self) -> _Monitor:
        if self.callback is not None:
            self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        if self.callback is not None:
            self.thread.join()
            if self.reported and exc[0] is None:
                self._report(1.0, True)


class Runner:
    """Common interface of the engines (see the module docstring)."""

    name: str
    dialect: Dialect
    relation: str
    rows_total: int | None = None
    scans_total: int = 3
    progress: ProgressCallback | None = None

    def version(self) -> str:
        """The engine's version string."""
        raise NotImplementedError

    def columns(self) -> dict[str, str]:
        """Column name -> kind: "number", "bool", "text" or "other"."""
        raise NotImplementedError

    def _fetch(self, sql: str) -> list[dict[str, Any]]:
        raise NotImplementedError

    def _fraction(self) -> float | None:
        return None

    def _create(self, name: str, sql: str) -> None:
        raise NotImplementedError

    def close(self) -> None:
        """Release the connection or session the runner opened."""

    def rows(self, sql: str, scan: str, index: int) -> list[dict[str, Any]]:
        """Run one scan and return its (few) result rows as dicts."""
        with _Monitor(self._fraction, self.progress, scan, index, self.scans_total, self.rows_total):
            return self._fetch(sql)

    def _batches(self, sql: str, size: int) -> Iterator[list[dict[str, Any]]]:
        yield self._fetch(sql)

    def each_batch(
        self,
        sql: str,
        scan: str,
        index: int,
        consume: Callable[[list[dict[str, Any]]], None],
        size: int = 2000,
    ) -> None:
        """Run one scan whose result may have many rows (one per cluster) and hand them to ``consume`` a batch
        of at most ``size`` rows at a time, so they are never all held as Python objects."""
        with _Monitor(self._fraction, self.progress, scan, index, self.scans_total, self.rows_total):
            for batch in self._batches(sql, size):
                consume(batch)

    def one(self, sql: str, scan: str, index: int) -> dict[str, Any]:
        """Run one scan that returns a single row."""
        out = self.rows(sql, scan, index)
        if len(out) != 1:
            raise EstimationError(f"The {scan} scan returned {len(out)} rows instead of one.")
        return out[0]

    def materialise(self, sql: str, scan: str, index: int) -> str:
        """Store a query's result as a temporary table (small: one row per level) and return its name."""
        name = f"ivd_tmp_{uuid.uuid4().hex[:12]}"
        with _Monitor(self._fraction, self.progress, scan, index, self.scans_total, self.rows_total):
            self._create(name, sql)
        return name


def _duckdb_kind(t: str) -> str:
    t = t.upper()
    if t == "BOOLEAN":
        return "bool"
    if t.startswith(("DECIMAL", "NUMERIC")) or t in {
        "TINYINT",
        "SMALLINT",
        "INTEGER",
        "BIGINT",
        "HUGEINT",
        "UTINYINT",
        "USMALLINT",
        "UINTEGER",
        "UBIGINT",
        "UHUGEINT",
        "FLOAT",
        "DOUBLE",
        "REAL",
    }:
        return "number"
    if t in {"VARCHAR", "TEXT", "STRING"}:
        return "text"
    return "other"


def _sql_string(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


class DuckDBRunner(Runner):
    """DuckDB in this process: reads the Parquet files (or CSV) directly, with a memory cap and a spill folder."""

    name = "duckdb"
    dialect = DUCKDB

    def __init__(
        self,
        files: list[str],
        fmt: str,
        *,
        memory_limit: str | None = None,
        temp_directory: str | None = None,
        threads: int | None = None,
        rows_total: int | None = None,
        progress: ProgressCallback | None = None,
    ) -> None:
        try:
            import duckdb
        except ImportError as exc:  # pragma: no cover - depends on the environment
            raise InvalidInputError(
                "engine='duckdb' needs the duckdb package; install it (pip install duckdb) or use engine='pandas'."
            ) from exc
        self._duckdb = duckdb
        self.con = duckdb.connect(":memory:")
        self.con.execute("SET preserve_insertion_order = false")
        if memory_limit:
            self.con.execute(f"SET memory_limit = {_sql_string(memory_limit)}")
        if temp_directory:
            self.con.execute(f"SET temp_directory = {_sql_string(temp_directory)}")
        if threads:
            self.con.execute(f"SET threads = {int(threads)}")
        self.con.execute("SET enable_progress_bar = true")
        self.con.execute("SET enable_progress_bar_print = false")
        listed = "[" + ", ".join(_sql_string(f) for f in files) + "]"
        reader = f"read_parquet({listed})" if fmt == "parquet" else f"read_csv({listed}, header = true)"
        self.relation = "ivd_source"
        self.con.execute(f"CREATE VIEW {self.relation} AS SELECT * FROM {reader}")
        self.rows_total = rows_total
        self.progress = progress

    def version(self) -> str:
        """DuckDB's version."""
        return str(self._duckdb.__version__)

    def settings(self) -> dict[str, str]:
        """The memory cap, spill folder and threads in force."""
        out = {}
        for key in ("memory_limit", "temp_directory", "threads"):
            row = self.con.execute(f"SELECT current_setting({_sql_string(key)})").fetchone()
            out[key] = str(row[0]) if row else ""
        return out

    def columns(self) -> dict[str, str]:
        """Column kinds from DESCRIBE."""
        return {
            str(r[0]): _duckdb_kind(str(r[1]))
            for r in self.con.execute(f"DESCRIBE {self.relation}").fetchall()
        }

    def _fetch(self, sql: str) -> list[dict[str, Any]]:
        cur = self.con.execute(sql)
        names = [d[0] for d in cur.description]
        return [dict(zip(names, row, strict=True)) for row in cur.fetchall()]

    def _batches(self, sql: str, size: int) -> Iterator[list[dict[str, Any]]]:
        cur = self.con.execute(sql)
        names = [d[0] for d in cur.description]
        while rows := cur.fetchmany(size):
            yield [dict(zip(names, row, strict=True)) for row in rows]

    def _fraction(self) -> float | None:
        v = float(self.con.query_progress())
        return v / 100.0 if v >= 0 else None

    def _create(self, name: str, sql: str) -> None:
        self.con.execute(f"CREATE TEMP TABLE {name} AS {sql}")

    def close(self) -> None:
        """Close the connection (temporary tables and spill files go with it)."""
        self.con.close()


def _spark_kind(t: str) -> str:
    if t == "boolean":
        return "bool"
    if t.startswith("decimal") or t in {"tinyint", "smallint", "int", "bigint", "float", "double"}:
        return "number"
    if t == "string":
        return "text"
    return "other"


class SparkRunner(Runner):
    """Spark SQL on a session (given, or built from a master URL: "local[2]", "spark://host:7077", "yarn")."""

    name = "spark"
    dialect = SPARK

    def __init__(
        self,
        path: str,
        fmt: str,
        *,
        session: Any = None,
        master: str | None = None,
        rows_total: int | None = None,
        progress: ProgressCallback | None = None,
    ) -> None:
        try:
            import pyspark
            from pyspark.sql import SparkSession
        except ImportError as exc:  # pragma: no cover - depends on the environment
            raise InvalidInputError(
                "engine='spark' needs the pyspark package (and Java); install pyspark or use engine='duckdb'."
            ) from exc
        self._pyspark = pyspark
        self.owns = session is None
        if session is None:
            builder = (
                SparkSession.builder.appName("ivdossier-estimate")
                .master(master or "local[*]")
                .config("spark.ui.showConsoleProgress", "false")  # progress goes to the callback instead
                .config("spark.sql.warehouse.dir", tempfile.mkdtemp(prefix="ivdossier-spark-"))
            )
            session = builder.getOrCreate()
        self.spark = session
        # the aggregations have well over the 100 fields at which Spark drops whole-stage code generation (measured
        # about 1.7x slower on the Gram scan); raised for this runner's queries and restored by close()
        self._saved_max_fields = session.conf.get(MAX_FIELDS_CONF, None)
        session.conf.set(MAX_FIELDS_CONF, "5000")
        reader = session.read
        frame = (
            reader.parquet(path)
            if fmt == "parquet"
            else reader.option("header", "true").option("inferSchema", "true").csv(path)
        )
        self.relation = f"ivd_source_{uuid.uuid4().hex[:12]}"
        frame.createOrReplaceTempView(self.relation)
        self._frame = frame
        self._views = [self.relation]
        self._cached: list[Any] = []
        self.rows_total = rows_total
        self.progress = progress

    def version(self) -> str:
        """The Spark version of the session (the cluster's)."""
        return str(self.spark.version)

    def columns(self) -> dict[str, str]:
        """Column kinds from the DataFrame schema."""
        return {name: _spark_kind(t) for name, t in self._frame.dtypes}

    def _fetch(self, sql: str) -> list[dict[str, Any]]:
        return [r.asDict() for r in self.spark.sql(sql).collect()]

    def _batches(self, sql: str, size: int) -> Iterator[list[dict[str, Any]]]:
        rows = self.spark.sql(sql).toLocalIterator(prefetchPartitions=True)
        while batch := [r.asDict() for r in itertools.islice(rows, size)]:
            yield batch

    def _fraction(self) -> float | None:
        tracker = self.spark.sparkContext.statusTracker()
        done = total = 0
        for sid in tracker.getActiveStageIds():
            info = tracker.getStageInfo(sid)
            if info is not None:
                done += info.numCompletedTasks
                total += info.numTasks
        return done / total if total else None

    def _create(self, name: str, sql: str) -> None:
        frame = self.spark.sql(sql).cache()
        frame.count()
        frame.createOrReplaceTempView(name)
        self._views.append(name)
        self._cached.append(frame)

    def close(self) -> None:
        """Drop the views and cached tables; stop the session only when this runner started it."""
        for frame in self._cached:
            frame.unpersist()
        for v in self._views:
            self.spark.catalog.dropTempView(v)
        if self._saved_max_fields is None:
            self.spark.conf.unset(MAX_FIELDS_CONF)
        else:
            self.spark.conf.set(MAX_FIELDS_CONF, self._saved_max_fields)
        if self.owns:
            self.spark.stop()


@contextmanager
def closing(runner: Runner) -> Iterator[Runner]:
    """Close the runner however the block ends."""
    try:
        yield runner
    finally:
        runner.close()
