"""Read-only access to the warehouse.

expwatch never writes to the warehouse. Every user ``sql:`` has been checked to be
one read-only SELECT when the config was loaded (:mod:`monitor.sqlguard`); the
sessions add a second layer. DuckDB files are opened with ``read_only=True``, with
external file access off (``enable_external_access = false``, except
``readable_directories``) and the configuration locked. PostgreSQL sessions have
``default_transaction_read_only = on``, every transaction starts ``BEGIN READ
ONLY``, and every statement is sent through the extended (prepared) protocol, so
the server refuses a string holding several commands (and ``enable_nestloop =
off``, see ``_install_session_settings``). Sessions run in UTC so hour
boundaries are the same on every engine.

Every query goes through :meth:`Warehouse.query`, which names the template in
its error message, records duration and row count, and calls an optional
``tracer(name, sql, params)`` so tests and ``--verbose`` can see what ran.

Scan cost: each :class:`QueryStats` also holds what the engine itself reported
about the rows (and bytes) its scans read, where that is cheap to get: DuckDB's
profiler (``enable_profiling = 'no_output'``; ``total_rows_scanned`` and
``total_bytes_read``) and Spark's scan-node metrics (rows output by the file
scans, size of the files they opened). Other engines report nothing cheaply
(PostgreSQL would need ``EXPLAIN (ANALYZE, BUFFERS)``, a second execution), so
there the fields stay None and only the rows returned are known.

One connection per run (DuckDB): :meth:`Warehouse.pin` keeps a single
connection for all the queries of a cycle, so they read one snapshot and the
engine's buffer cache stays warm, and so the run's first-assignment relation
(:mod:`monitor.firsts`) can live in that session's temp catalog, which is in
the monitor's memory (spilled to ``spill_directory``), never in the warehouse
file. Other engines keep one short connection per query; their sessions are
read-only and cannot hold a temporary table, so there each template keeps its
own CTE.

:class:`SparkWarehouse` runs the same templates on Apache Spark SQL through a
``SparkSession`` (local mode or a cluster); :func:`open_warehouse` picks the
backend from the ``warehouse`` config section.
"""

from __future__ import annotations

import importlib.util
import json
import logging
import os
import re
import shutil
import tempfile
import time
import warnings
from collections.abc import Callable, Mapping
from contextlib import nullcontext
from dataclasses import dataclass
from typing import Any

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError, SQLAlchemyError

from monitor.errors import ConfigError, WarehouseError

__all__ = ["QueryStats", "SparkWarehouse", "Warehouse", "open_warehouse", "safe_url"]

log = logging.getLogger("monitor")

Tracer = Callable[[str, str, Mapping[str, Any]], None]


def safe_url(url: str | sa.URL) -> str:
    """The URL with any password masked, for messages and logs."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return "<unparseable URL>"


def _first_line(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None) or exc
    text = str(orig).strip().splitlines()
    return text[0] if text else type(orig).__name__


@dataclass(frozen=True)
class QueryStats:
    """One query: wall time, rows returned and, where the engine reported them,
    rows and bytes its scans read (None: not reported)."""

    name: str
    seconds: float
    rows: int
    rows_scanned: int | None = None
    bytes_scanned: int | None = None


def _record(stats: list[QueryStats], q: QueryStats) -> None:
    """Keep a finished query's statistics and log it once, when it finished (``event``
    ``query``; the run id comes from the caller's :func:`monitor.observe.run_context`)."""
    stats.append(q)
    log.info("query %s: %d rows in %.2fs", q.name, q.rows, q.seconds,
             extra={"event": "query", "query": q.name, "seconds": round(q.seconds, 4), "rows": q.rows,
                    "rows_scanned": q.rows_scanned, "bytes_scanned": q.bytes_scanned})


class Warehouse:
    """A read-only SQLAlchemy engine plus the query helpers the monitor needs.

    Parameters
    ----------
    url : str
        Any SQLAlchemy URL.
    tracer : callable, optional
        Called as ``tracer(name, sql, params)`` before every query.
    timeout_seconds : float
        Statement timeout where the engine supports one (PostgreSQL).
    memory_limit, threads, spill_directory : optional
        DuckDB session settings (``memory_limit``, ``threads``, ``temp_directory``);
        the spill directory defaults to a per-process folder under the system's
        temporary directory, never beside the warehouse file.
    work_mem : optional
        PostgreSQL session setting ``work_mem`` (memory per sort or hash before it spills).
    readable_directories : optional
        DuckDB only: folders whose files the queries may read (``read_parquet`` and the like);
        every other file outside the warehouse and the spill folder is refused.
    """

    _pinned: sa.Connection | None = None  # the run's one connection (pin); never set on Spark

    def __init__(self, url: str, *, tracer: Tracer | None = None, timeout_seconds: float = 600.0,
                 memory_limit: str | None = None, threads: int | None = None,
                 spill_directory: str | None = None, work_mem: str | None = None,
                 readable_directories: list[str] | None = None) -> None:
        self.url = url
        self._readable = list(readable_directories or [])
        self._work_mem = work_mem
        self.tracer = tracer
        self.stats: list[QueryStats] = []
        self._temps: list[str] = []
        self._temp_count = 0
        self.first_relations: list[Any] = []
        """Relations :mod:`monitor.firsts` built in this session."""
        self._own_spill: str | None = None
        self._duckdb_settings = {"memory_limit": memory_limit, "threads": threads, "temp_directory": spill_directory}
        try:
            parsed = make_url(url)
        except ArgumentError as exc:
            raise ConfigError(f"warehouse.url: not a SQLAlchemy URL ({safe_url(url)})") from exc
        connect_args: dict[str, Any] = {}
        backend = parsed.get_backend_name()
        database = parsed.database or ""
        if backend == "duckdb" and database not in ("", ":memory:") and not database.startswith(":memory:"):
            connect_args["read_only"] = True
        try:
            self.engine: Engine = sa.create_engine(parsed, connect_args=connect_args, poolclass=sa.pool.NullPool)
        except NoSuchModuleError as exc:
            raise ConfigError(
                f"warehouse.url: no SQLAlchemy dialect for {backend!r} is installed (install its driver package)"
            ) from exc
        except (ArgumentError, ImportError) as exc:
            raise ConfigError(f"warehouse.url: {safe_url(url)}: {_first_line(exc)}") from exc
        self._install_session_settings(backend, timeout_seconds)
        if backend == "postgresql" and parsed.get_driver_name() == "psycopg":
            self._one_statement_per_call()

    @property
    def dialect(self) -> sa.Dialect:
        return self.engine.dialect

    @property
    def label(self) -> str:
        """Where the queries run, for messages (password masked)."""
        return safe_url(self.url)

    def _install_session_settings(self, backend: str, timeout_seconds: float) -> None:
        @sa.event.listens_for(self.engine, "connect")
        def _on_connect(dbapi_conn: Any, _record: Any) -> None:
            cur = dbapi_conn.cursor()
            try:
                if backend == "postgresql":
                    cur.execute("SET default_transaction_read_only = on")
                    cur.execute("SET TIME ZONE 'UTC'")
                    cur.execute(f"SET statement_timeout = {int(timeout_seconds * 1000)}")
                    # Every expwatch query is a scan with GROUP BYs and equi-joins between CTEs. The
                    # planner's row estimates for CTEs joined to bind-parameter windows come out at a
                    # handful of rows, and the nested loops it then picks turned the novelty query on
                    # the demo from 13 s into more than 10 minutes; hash and merge joins stay available.
                    cur.execute("SET enable_nestloop = off")
                    if self._work_mem is not None:  # checked by the config: digits and a unit
                        cur.execute("SET work_mem = '" + self._work_mem.strip().replace("'", "''") + "'")
                    dbapi_conn.commit()
                    # every later transaction of this session starts with BEGIN READ ONLY (psycopg 3),
                    # whatever the session default says by then
                    if hasattr(dbapi_conn, "read_only"):
                        dbapi_conn.read_only = True
                elif backend == "duckdb":
                    try:
                        cur.execute("SET TimeZone = 'UTC'")
                    except Exception:  # the ICU extension may be absent; naive TIMESTAMPs need no zone
                        log.debug("duckdb: could not set TimeZone (no ICU extension)")
                    try:  # the profiler's counters give rows/bytes scanned per query, nothing printed
                        cur.execute("SET enable_profiling = 'no_output'")
                    except Exception:
                        log.debug("duckdb: profiling not available; rows scanned will not be reported")
                    self._duckdb_session(cur)
            finally:
                cur.close()

    def _one_statement_per_call(self) -> None:
        """PostgreSQL (psycopg 3): send every statement through the extended query protocol
        (prepared), which the server refuses to run with more than one command in it. Without
        bind parameters psycopg would use the simple protocol, which runs a whole
        ``...; COMMIT; INSERT ...`` script."""

        @sa.event.listens_for(self.engine, "do_execute")
        def _execute(cursor: Any, statement: str, parameters: Any, _context: Any) -> bool:
            cursor.execute(statement, parameters, prepare=True)
            return True

        @sa.event.listens_for(self.engine, "do_execute_no_params")
        def _execute_no_params(cursor: Any, statement: str, _context: Any) -> bool:
            cursor.execute(statement, prepare=True)
            return True

    def _duckdb_session(self, cur: Any) -> None:
        """Memory limit, threads and spill folder of a DuckDB session (values are checked by the config)."""
        settings = dict(self._duckdb_settings)
        if settings["temp_directory"] is None:
            if self._own_spill is None:
                self._own_spill = os.path.join(tempfile.gettempdir(), f"expwatch-duckdb-{os.getpid()}-{id(self):x}")
            settings["temp_directory"] = self._own_spill
        for key, value in settings.items():
            if value is None:
                continue
            literal = str(int(value)) if key == "threads" else "'" + str(value).replace("'", "''") + "'"
            cur.execute(f"SET {key} = {literal}")
        # A monitor reads the warehouse file and spills to temp_directory, nothing else: no COPY ... TO,
        # no ATTACH, no reading other files except under readable_directories; then the settings are
        # locked so no statement can turn them back on (measured: reads, spilling and the session's
        # temp tables keep working).
        if self._readable:
            dirs = ", ".join("'" + str(d).rstrip("/").replace("'", "''") + "/'" for d in self._readable)
            cur.execute(f"SET allowed_directories = [{dirs}]")
        cur.execute("SET enable_external_access = false")
        cur.execute("SET lock_configuration = true")

    @property
    def pinned(self) -> bool:
        """True while one connection serves every query (:meth:`pin`)."""
        return self._pinned is not None

    def pin(self) -> bool:
        """Keep one connection for every later query until :meth:`dispose` (DuckDB
        only; elsewhere a no-op). Returns whether a connection is pinned."""
        if self.dialect.name != "duckdb":
            return False
        if self._pinned is None:
            try:
                self._pinned = self.engine.connect()
            except DBAPIError as exc:
                raise WarehouseError(f"warehouse {safe_url(self.url)} is unreachable: {_first_line(exc)}") from exc
            except Exception as exc:  # duckdb.IOException and the like
                raise WarehouseError(f"warehouse {safe_url(self.url)}: {_first_line(exc)}") from exc
        return True

    def create_temp(self, name: str, sql: str, params: Mapping[str, Any], *,
                    expanding: tuple[str, ...] = ()) -> str:
        """Materialise ``sql`` as a session temporary table (pinned DuckDB sessions
        only: the temp catalog is in the monitor's memory, not in the warehouse) and
        return the table's name. Recorded in :attr:`stats` as ``name``, with the
        table's row count as its rows."""
        if self._pinned is None:
            raise WarehouseError(f"query {name}: temporary relations need a pinned session")
        self._temp_count += 1
        relation = f"expwatch_tmp_{self._temp_count}"
        stmt = self._statement(name, f"CREATE OR REPLACE TEMP TABLE {relation} AS\n{sql}", params, expanding)
        t0 = time.perf_counter()
        try:
            result = self._pinned.execute(stmt, dict(params))
            scanned, read_bytes = self._scan_counters(result)
            # committed, the table is a regular (temp-catalog) table with its own statistics;
            # left in the open transaction, every later scan of it reads transaction-local storage
            self._pinned.commit()
            rows = int(self._pinned.execute(sa.text(f"SELECT COUNT(*) FROM {relation}")).scalar() or 0)
        except SQLAlchemyError as exc:
            raise WarehouseError(f"query {name} failed on {self.dialect.name}: {_first_line(exc)}{self._memory_hint(exc)}") from exc
        except Exception as exc:
            raise WarehouseError(f"warehouse {safe_url(self.url)}: query {name}: {_first_line(exc)}") from exc
        self._temps.append(relation)
        seconds = time.perf_counter() - t0
        _record(self.stats, QueryStats(name, seconds, rows, scanned, read_bytes))
        return relation

    def _statement(self, name: str, sql: str, params: Mapping[str, Any], expanding: tuple[str, ...]) -> sa.TextClause:
        """``sql`` with its expanding (IN-list) binds, shown to the tracer as it will run."""
        stmt = sa.text(sql)
        if expanding:
            stmt = stmt.bindparams(*(sa.bindparam(n, expanding=True) for n in expanding))
        if self.tracer:
            self.tracer(name, sql, params)
        return stmt

    def _memory_hint(self, exc: BaseException) -> str:
        """What to change when DuckDB ran out of memory (its own message names SET commands
        the user cannot issue to the monitor)."""
        if self.dialect.name != "duckdb" or "Out of Memory" not in str(exc):
            return ""
        limit = self._duckdb_settings.get("memory_limit")
        now = f" (now {limit})" if limit else ""
        return f"; raise warehouse.memory_limit{now} or lower warehouse.threads in the config"

    def drop_temp(self, relation: str) -> None:
        """Drop a temporary table made by :meth:`create_temp` (frees its memory)."""
        if self._pinned is not None and relation in self._temps:
            self._pinned.execute(sa.text(f"DROP TABLE IF EXISTS {relation}"))
            self._temps.remove(relation)

    def query(self, name: str, sql: str, params: Mapping[str, Any], *, expanding: tuple[str, ...] = ()) -> pd.DataFrame:
        """Run one read-only query and return its rows as a DataFrame."""
        stmt = self._statement(name, sql, params, expanding)
        t0 = time.perf_counter()
        try:
            frame, scanned, read_bytes = self._run_query(name, stmt, params)
        except BaseException:
            self._recover()
            raise
        seconds = time.perf_counter() - t0
        _record(self.stats, QueryStats(name, seconds, len(frame), scanned, read_bytes))
        return frame

    def _recover(self) -> None:
        """After a failed query on the pinned session, end its aborted transaction so the
        run's later queries (other checks) can still use it; committed temp tables stay."""
        if self._pinned is not None:
            try:
                self._pinned.rollback()
            except Exception:  # the connection is broken: the next query reports it
                log.debug("warehouse: rollback after a failed query failed", exc_info=True)

    def _run_query(self, name: str, stmt: sa.TextClause, params: Mapping[str, Any]) -> tuple[pd.DataFrame, Any, Any]:
        try:
            with nullcontext(self._pinned) if self._pinned is not None else self.engine.connect() as conn:
                result = conn.execute(stmt, dict(params))
                cols = list(result.keys())
                frame = self._fetch_frame(result, cols)
                scanned, read_bytes = self._scan_counters(result)
        except DBAPIError as exc:
            if exc.connection_invalidated or isinstance(exc, sa.exc.OperationalError) and "connect" in str(exc).lower():
                raise WarehouseError(f"warehouse {safe_url(self.url)} is unreachable: {_first_line(exc)}") from exc
            raise WarehouseError(f"query {name} failed on {self.dialect.name}: {_first_line(exc)}{self._memory_hint(exc)}") from exc
        except SQLAlchemyError as exc:
            raise WarehouseError(f"query {name} failed on {self.dialect.name}: {_first_line(exc)}{self._memory_hint(exc)}") from exc
        except Exception as exc:  # driver errors that are not DBAPI errors (e.g. duckdb.IOException)
            raise WarehouseError(f"warehouse {safe_url(self.url)}: query {name}: {_first_line(exc)}") from exc
        return frame, scanned, read_bytes

    def _fetch_frame(self, result: sa.CursorResult[Any], cols: list[str]) -> pd.DataFrame:
        """Rows as a DataFrame, without per-row Python work where the driver can
        hand over a frame (DuckDB); otherwise the driver's raw tuples."""
        cursor = result.cursor
        if self.dialect.name == "duckdb" and cursor is not None:
            frame = cursor.df()
            frame.columns = cols
            return frame
        rows = cursor.fetchall() if cursor is not None else []
        return pd.DataFrame.from_records(rows, columns=cols)

    def _scan_counters(self, result: sa.CursorResult[Any]) -> tuple[int | None, int | None]:
        """Rows and bytes the engine says the query's scans read (DuckDB's profiler)."""
        cursor = result.cursor
        if self.dialect.name != "duckdb" or cursor is None:
            return None, None
        try:
            info = json.loads(cursor.get_profiling_information(format="json"))
        except Exception:  # profiling disabled or an engine version without it
            return None, None
        return _duckdb_counters(info)

    def probe(self, name: str, sql: str, params: Mapping[str, Any], *, expanding: tuple[str, ...] = ()) -> list[str]:
        """Compile ``sql`` against the warehouse without reading data (``LIMIT 0``);
        returns the output column names."""
        wrapped = f"SELECT * FROM (\n{sql.rstrip().rstrip(';')}\n) AS expwatch_probe LIMIT 0"
        return list(self.query(name, wrapped, params, expanding=expanding).columns)

    def dispose(self) -> None:
        if self._pinned is not None:
            try:
                self._pinned.close()  # ends the session: its temporary tables go with it
            except Exception:  # a broken connection is being thrown away anyway
                log.debug("warehouse: closing the pinned connection failed", exc_info=True)
            self._pinned = None
            self._temps = []
            self.first_relations = []
        self.engine.dispose()
        if self._own_spill is not None:
            shutil.rmtree(self._own_spill, ignore_errors=True)


def _duckdb_counters(info: Mapping[str, Any]) -> tuple[int | None, int | None]:
    """``total_rows_scanned`` and ``io.total_bytes_read`` from DuckDB's JSON profile
    (bytes read from storage; 0 when everything came from its buffer or memory)."""
    query = info.get("query") or {}
    rows = query.get("total_rows_scanned", info.get("cumulative_rows_scanned"))
    nbytes = (info.get("io") or {}).get("total_bytes_read")
    return (int(rows) if rows is not None else None, int(nbytes) if nbytes is not None else None)


# -- Apache Spark SQL -------------------------------------------------------------------

#: Spark scan nodes' metric keys: rows a scan handed on, size of the files it opened.
_SPARK_ROWS_METRIC = "numOutputRows"
_SPARK_BYTES_METRIC = "filesSize"


def _spark_markers(sql: str, params: Mapping[str, Any], expanding: tuple[str, ...]) -> tuple[str, dict[str, Any]]:
    """Named ``:name`` markers and their values for ``SparkSession.sql(args=...)``.

    An expanding list ``:ids`` becomes ``(:ids_0, :ids_1, ...)`` (``(NULL)`` when
    empty, which matches nothing); a naive datetime is taken as UTC, as on every
    other engine (Spark would read it in the Python process's local zone)."""
    args: dict[str, Any] = {}
    for key, value in params.items():
        if key in expanding:
            values = list(value)
            names = [f"{key}_{i}" for i in range(len(values))]
            marker = "(" + ", ".join(f":{n}" for n in names) + ")" if names else "(NULL)"
            sql = re.sub(rf"(?<![\w:]):{re.escape(key)}\b", lambda _m, m=marker: m, sql)
            args.update({n: _spark_value(v) for n, v in zip(names, values)})
        else:
            args[key] = _spark_value(value)
    return sql, args


def _spark_value(v: Any) -> Any:
    from datetime import datetime, timezone

    if isinstance(v, datetime) and v.tzinfo is None:
        return v.replace(tzinfo=timezone.utc)
    return v


def _spark_scan_counters(df: Any) -> tuple[int | None, int | None]:
    """Sum the scan nodes' metrics of the executed physical plan of ``df``.

    Rows: ``numOutputRows`` of every leaf scan (rows read after partition and
    row-group pruning, before the remaining filters). Bytes: ``filesSize`` (the
    size of the files a file scan opened; column pruning reads less), None when
    no scan reports it. Adaptive plans are followed into their final stages; a
    reused exchange is not counted twice. Spark Connect sessions expose no plan:
    (None, None)."""
    try:
        stack = [df._jdf.queryExecution().executedPlan()]
        rows = 0
        nbytes: int | None = None
        scans = 0
        while stack:
            node = stack.pop()
            kind = node.getClass().getSimpleName()
            if kind == "AdaptiveSparkPlanExec":
                stack.append(node.executedPlan())
                continue
            if kind.endswith("QueryStageExec"):
                stack.append(node.plan())
                continue
            if kind.startswith("Reused"):
                continue
            children = node.children()
            if children.isEmpty() and "Scan" in kind:
                metrics = node.metrics()
                scans += 1
                if metrics.contains(_SPARK_ROWS_METRIC):
                    rows += int(metrics.apply(_SPARK_ROWS_METRIC).value())
                if metrics.contains(_SPARK_BYTES_METRIC):
                    nbytes = (nbytes or 0) + int(metrics.apply(_SPARK_BYTES_METRIC).value())
            it = children.iterator()
            while it.hasNext():
                stack.append(it.next())
    except Exception:  # Spark Connect, or a plan shape we do not know: nothing reported
        return None, None
    return (rows if scans else None), nbytes


def _import_pyspark() -> Any:
    try:
        with warnings.catch_warnings():
            # pyspark warns on import about pandas versions it has not certified; the
            # monitor only hands it Python values and reads rows back
            warnings.simplefilter("ignore", FutureWarning)
            from pyspark.sql import SparkSession
    except ImportError as exc:
        raise ConfigError("warehouse.spark: pyspark is not installed (pip install 'expwatch[spark]')") from exc
    return SparkSession


class SparkWarehouse(Warehouse):
    """The same read-only query interface on Apache Spark SQL.

    Parameters
    ----------
    settings : monitor.config.SparkConfig
        ``master`` (``local[N]``, ``spark://host:port``, ``yarn``... or None for the
        session ``spark-submit`` set up), ``app_name``, extra ``conf``, ``parquet``
        (view name -> path: each registered as a temporary view of the session) and
        ``database`` (made current with ``USE``).
    tracer : callable, optional
        As for :class:`Warehouse`.
    timeout_seconds : float
        A query's Spark jobs are cancelled (``cancelJobGroup``) after this long.

    Notes
    -----
    An existing active session is reused (``getOrCreate``), so ``master`` and the
    static ``conf`` only apply when this process has none yet. The session time
    zone is set to UTC. Nothing is written: the monitor issues SELECT statements
    only and registers temporary views, which live in the session alone; grant the
    Spark principal read access only. Values reach Spark as named parameters
    (``spark.sql(sql, args=...)``), never as text.
    """

    def __init__(self, settings: Any, *, tracer: Tracer | None = None, timeout_seconds: float = 600.0) -> None:
        session_cls = _import_pyspark()
        self.tracer = tracer
        self.stats = []
        self.timeout_seconds = timeout_seconds
        self.url = f"spark {settings.master or '(session from spark-submit)'}"
        self._views: list[str] = []
        builder = session_cls.builder.appName(settings.app_name)
        if settings.master:
            builder = builder.master(settings.master)
        for key, value in (settings.conf or {}).items():
            builder = builder.config(key, str(value).lower() if isinstance(value, bool) else str(value))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FutureWarning)
                self.spark = builder.getOrCreate()
            self.spark.conf.set("spark.sql.session.timeZone", "UTC")
        except Exception as exc:
            raise WarehouseError(
                f"warehouse.spark: could not start a Spark session (master {settings.master!r}; "
                f"Java 17+ must be installed): {_first_line(exc)}") from exc
        # rows come back through Arrow when pyarrow is installed (the 'spark' extra), else row by row
        self._arrow = importlib.util.find_spec("pyarrow") is not None
        if self._arrow:
            self.spark.conf.set("spark.sql.execution.arrow.pyspark.enabled", "true")
            self.spark.conf.set("spark.sql.execution.arrow.pyspark.fallback.enabled", "false")
        from monitor.templates import offline_dialect

        self._dialect = offline_dialect("spark")
        q = self._dialect.identifier_preparer
        if settings.database:
            name = ".".join(q.quote_identifier(p) for p in settings.database.split("."))
            try:
                self.spark.sql(f"USE {name}")
            except Exception as exc:
                raise ConfigError(f"warehouse.spark.database: {settings.database}: {_first_line(exc)}") from exc
        for view, path in (settings.parquet or {}).items():
            try:
                self.spark.read.parquet(str(path)).createOrReplaceTempView(view)
            except Exception as exc:
                raise ConfigError(f"warehouse.spark.parquet.{view}: {path}: {_first_line(exc)}") from exc
            self._views.append(view)

    @property
    def dialect(self) -> sa.Dialect:
        return self._dialect

    @property
    def label(self) -> str:
        return self.url

    def _context(self) -> Any:
        try:
            return self.spark.sparkContext  # absent on Spark Connect sessions
        except Exception:
            return None

    def query(self, name: str, sql: str, params: Mapping[str, Any], *, expanding: tuple[str, ...] = ()) -> pd.DataFrame:
        """Run one query on Spark and return its rows as a DataFrame; TIMESTAMP
        columns come back as naive UTC (cast to TIMESTAMP_NTZ in the UTC session)."""
        import threading
        import uuid

        from pyspark.sql import functions as F
        from pyspark.sql.types import TimestampType

        text, args = _spark_markers(sql, params, expanding)
        if self.tracer:
            self.tracer(name, sql, params)
        sc = self._context()
        timed_out = threading.Event()
        timer = None
        if sc is not None:
            group = f"expwatch-{uuid.uuid4().hex}"
            sc.setJobGroup(group, f"expwatch query {name}", interruptOnCancel=True)

            def _cancel() -> None:
                timed_out.set()
                sc.cancelJobGroup(group)

            timer = threading.Timer(self.timeout_seconds, _cancel)
            timer.daemon = True
            timer.start()
        t0 = time.perf_counter()
        try:
            df = self.spark.sql(text, args=args)
            cols = df.columns
            out = df.select([F.col("`" + c.replace("`", "``") + "`").cast("timestamp_ntz").alias(c)
                             if isinstance(f.dataType, TimestampType) else F.col("`" + c.replace("`", "``") + "`")
                             for c, f in zip(cols, df.schema.fields)])
            if self._arrow:
                with warnings.catch_warnings():
                    # pyspark's own conversion code trips pandas 3's notices (its version check, the
                    # deprecated copy= keyword); they concern pyspark, not the rows handed back
                    warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas",
                                            category=FutureWarning)
                    warnings.filterwarnings("ignore", message="The copy keyword is deprecated")
                    frame = out.toPandas()
            else:
                frame = pd.DataFrame.from_records([tuple(r) for r in out.collect()], columns=cols)
        except Exception as exc:
            if timed_out.is_set():
                raise WarehouseError(f"query {name} on spark: cancelled after {self.timeout_seconds:g}s "
                                     "(warehouse.query_timeout_seconds)") from exc
            raise WarehouseError(f"query {name} failed on spark: {_first_line(exc)}") from exc
        finally:
            if timer is not None:
                timer.cancel()
        seconds = time.perf_counter() - t0
        scanned, nbytes = _spark_scan_counters(out)
        _record(self.stats, QueryStats(name, seconds, len(frame), scanned, nbytes))
        return frame

    def dispose(self) -> None:
        """Drop the temporary views this warehouse registered; the session stays
        up for the next cycle of a long-running process."""
        for view in self._views:
            try:
                self.spark.catalog.dropTempView(view)
            except Exception:
                log.debug("spark: could not drop temporary view %s", view)
        self._views = []


def open_warehouse(settings: Any, *, tracer: Tracer | None = None) -> Warehouse:
    """The warehouse a ``warehouse`` config section describes: Spark when it has a
    ``spark`` block, else a SQLAlchemy engine for its ``url``."""
    if getattr(settings, "spark", None) is not None:
        return SparkWarehouse(settings.spark, tracer=tracer, timeout_seconds=settings.query_timeout_seconds)
    return Warehouse(settings.url, tracer=tracer, timeout_seconds=settings.query_timeout_seconds,
                     memory_limit=getattr(settings, "memory_limit", None), threads=getattr(settings, "threads", None),
                     spill_directory=getattr(settings, "spill_directory", None),
                     work_mem=getattr(settings, "work_mem", None),
                     readable_directories=getattr(settings, "readable_directories", None))
