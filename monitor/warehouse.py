"""Read-only access to the warehouse.

expwatch never writes to the warehouse. Connections are opened read-only where
the engine allows it: DuckDB files with ``read_only=True``, PostgreSQL sessions
with ``default_transaction_read_only = on``. Sessions run in UTC so hour
boundaries are the same on every engine.

Every query goes through :meth:`Warehouse.query`, which names the template in
its error message, records duration and row count, and calls an optional
``tracer(name, sql, params)`` so tests and ``--verbose`` can see what ran.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, NoSuchModuleError, SQLAlchemyError

from monitor.errors import ConfigError, WarehouseError

__all__ = ["QueryStats", "Warehouse", "safe_url"]

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
    name: str
    seconds: float
    rows: int


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
    """

    def __init__(self, url: str, *, tracer: Tracer | None = None, timeout_seconds: float = 600.0) -> None:
        self.url = url
        self.tracer = tracer
        self.stats: list[QueryStats] = []
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

    @property
    def dialect(self) -> sa.Dialect:
        return self.engine.dialect

    def _install_session_settings(self, backend: str, timeout_seconds: float) -> None:
        @sa.event.listens_for(self.engine, "connect")
        def _on_connect(dbapi_conn: Any, _record: Any) -> None:
            cur = dbapi_conn.cursor()
            try:
                if backend == "postgresql":
                    cur.execute("SET default_transaction_read_only = on")
                    cur.execute("SET TIME ZONE 'UTC'")
                    cur.execute(f"SET statement_timeout = {int(timeout_seconds * 1000)}")
                    dbapi_conn.commit()
                elif backend == "duckdb":
                    try:
                        cur.execute("SET TimeZone = 'UTC'")
                    except Exception:  # the ICU extension may be absent; naive TIMESTAMPs need no zone
                        log.debug("duckdb: could not set TimeZone (no ICU extension)")
            finally:
                cur.close()

    def query(self, name: str, sql: str, params: Mapping[str, Any], *, expanding: tuple[str, ...] = ()) -> pd.DataFrame:
        """Run one read-only query and return its rows as a DataFrame."""
        stmt = sa.text(sql)
        if expanding:
            stmt = stmt.bindparams(*(sa.bindparam(n, expanding=True) for n in expanding))
        if self.tracer:
            self.tracer(name, sql, params)
        t0 = time.perf_counter()
        try:
            with self.engine.connect() as conn:
                result = conn.execute(stmt, dict(params))
                cols = list(result.keys())
                frame = self._fetch_frame(result, cols)
        except DBAPIError as exc:
            if exc.connection_invalidated or isinstance(exc, sa.exc.OperationalError) and "connect" in str(exc).lower():
                raise WarehouseError(f"warehouse {safe_url(self.url)} is unreachable: {_first_line(exc)}") from exc
            raise WarehouseError(f"query {name} failed on {self.dialect.name}: {_first_line(exc)}") from exc
        except SQLAlchemyError as exc:
            raise WarehouseError(f"query {name} failed on {self.dialect.name}: {_first_line(exc)}") from exc
        except Exception as exc:  # driver errors that are not DBAPI errors (e.g. duckdb.IOException)
            raise WarehouseError(f"warehouse {safe_url(self.url)}: query {name}: {_first_line(exc)}") from exc
        seconds = time.perf_counter() - t0
        self.stats.append(QueryStats(name, seconds, len(frame)))
        log.info("query %s: %d rows in %.2fs", name, len(frame), seconds)
        return frame

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

    def probe(self, name: str, sql: str, params: Mapping[str, Any], *, expanding: tuple[str, ...] = ()) -> list[str]:
        """Compile ``sql`` against the warehouse without reading data (``LIMIT 0``);
        returns the output column names."""
        wrapped = f"SELECT * FROM (\n{sql.rstrip().rstrip(';')}\n) AS expwatch_probe LIMIT 0"
        return list(self.query(name, wrapped, params, expanding=expanding).columns)

    def dispose(self) -> None:
        self.engine.dispose()
