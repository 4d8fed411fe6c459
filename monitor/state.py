"""The state store: what expwatch remembers between runs.

Any SQLAlchemy database works (default: a SQLite file beside the config). It
holds the hourly counts already pulled and a watermark per source and
experiment (so a run pulls only recent hours), every run, every finding, the
alert ledger and a lock so two cycles never run on the same state at once.

Schema versions: a ``expwatch_meta`` row holds ``schema_version``; ordered
migrations bring an older store up to date, each in its own transaction. A store
written by a newer expwatch is refused with an explanation rather than guessed
at.

All times are stored as naive UTC and returned as aware UTC datetimes.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import time
import uuid
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from datetime import datetime, timedelta, timezone
from typing import Any

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import ArgumentError, IntegrityError, NoSuchModuleError, SQLAlchemyError

from monitor.errors import ConfigError, StateError
from monitor.warehouse import safe_url

__all__ = ["SCHEMA_VERSION", "StateStore", "LockHeld", "prune"]

log = logging.getLogger("monitor")


class UTCDateTime(sa.types.TypeDecorator[datetime]):
    """Naive UTC in the database, aware UTC in Python."""

    impl = sa.DateTime
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetime given to the state store; expected an aware datetime")
        return value.astimezone(timezone.utc).replace(tzinfo=None)

    def process_result_value(self, value: Any, dialect: sa.Dialect) -> datetime | None:
        if value is None:
            return None
        if isinstance(value, str):
            value = datetime.fromisoformat(value)
        return value.replace(tzinfo=timezone.utc) if value.tzinfo is None else value.astimezone(timezone.utc)


metadata = sa.MetaData()

meta = sa.Table(
    "expwatch_meta", metadata,
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.String(256), nullable=False),
)
runs = sa.Table(
    "expwatch_runs", metadata,
    sa.Column("run_id", sa.String(36), primary_key=True),
    sa.Column("started_at", UTCDateTime, nullable=False),
    sa.Column("finished_at", UTCDateTime),
    sa.Column("as_of", UTCDateTime, nullable=False),
    sa.Column("outcome", sa.String(16), nullable=False),
    sa.Column("detail", sa.Text),
)
counts = sa.Table(
    "expwatch_hourly_counts", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("source", sa.String(128), nullable=False),
    sa.Column("experiment", sa.String(512), nullable=False),
    sa.Column("variant", sa.String(512)),
    sa.Column("hour", UTCDateTime, nullable=False),
    sa.Column("segment", sa.Text, nullable=False),
    sa.Column("units", sa.BigInteger, nullable=False),
    sa.Column("leaked", sa.BigInteger, nullable=False),
    sa.Index("ix_expwatch_counts_key", "source", "experiment", "hour"),
)
watermarks = sa.Table(
    "expwatch_watermarks", metadata,
    sa.Column("source", sa.String(128), primary_key=True),
    sa.Column("experiment", sa.String(512), primary_key=True),
    sa.Column("pulled_to", UTCDateTime, nullable=False),
)
findings = sa.Table(
    "expwatch_findings", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run_id", sa.String(36), nullable=False, index=True),
    sa.Column("as_of", UTCDateTime, nullable=False),
    sa.Column("key", sa.String(1024), nullable=False),
    sa.Column("experiment", sa.String(512), nullable=False),
    sa.Column("check_name", sa.String(64), nullable=False),
    sa.Column("scope", sa.String(256), nullable=False),
    sa.Column("phase", sa.Integer),
    sa.Column("status", sa.String(8), nullable=False),
    sa.Column("severity", sa.Integer, nullable=False),
    sa.Column("summary", sa.Text, nullable=False),
    sa.Column("statistics", sa.Text, nullable=False),
)
alerts = sa.Table(
    "expwatch_alerts", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("key", sa.String(1024), nullable=False, index=True),
    sa.Column("experiment", sa.String(512), nullable=False),
    sa.Column("check_name", sa.String(64), nullable=False),
    sa.Column("scope", sa.String(256), nullable=False),
    sa.Column("state", sa.String(16), nullable=False),
    sa.Column("severity", sa.Integer, nullable=False),
    sa.Column("max_severity", sa.Integer, nullable=False),
    sa.Column("summary", sa.Text, nullable=False),
    sa.Column("opened_at", UTCDateTime, nullable=False),
    sa.Column("updated_at", UTCDateTime, nullable=False),
    sa.Column("resolved_at", UTCDateTime),
    sa.Column("opened_run", sa.String(36), nullable=False),
    sa.Column("last_run", sa.String(36), nullable=False),
)
alert_events = sa.Table(
    "expwatch_alert_events", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("alert_id", sa.Integer, nullable=False, index=True),
    sa.Column("run_id", sa.String(36), nullable=False),
    sa.Column("at", UTCDateTime, nullable=False),
    sa.Column("event", sa.String(16), nullable=False),
    sa.Column("severity", sa.Integer, nullable=False),
    sa.Column("summary", sa.Text, nullable=False),
)
locks = sa.Table(
    "expwatch_locks", metadata,
    sa.Column("name", sa.String(64), primary_key=True),
    sa.Column("owner", sa.String(64), nullable=False),
    sa.Column("host", sa.String(256), nullable=False),
    sa.Column("pid", sa.Integer, nullable=False),
    sa.Column("acquired_at", UTCDateTime, nullable=False),
    sa.Column("expires_at", UTCDateTime, nullable=False),
)


def _migration_1(conn: Connection) -> None:
    metadata.create_all(conn, tables=[meta, runs, counts, watermarks, findings, alerts, alert_events, locks])


metric_snapshots = sa.Table(
    "expwatch_metric_snapshots", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run_id", sa.String(36), nullable=False, index=True),
    sa.Column("as_of", UTCDateTime, nullable=False),
    sa.Column("experiment", sa.String(512), nullable=False),
    sa.Column("metric", sa.String(256), nullable=False),
    sa.Column("variant", sa.String(512), nullable=False),
    sa.Column("units_since", UTCDateTime, nullable=False),
    *(sa.Column(c, sa.Float, nullable=False) for c in
      ("n", "sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy", "sum_c", "sum_c2", "sum_yc")),
    sa.Index("ix_expwatch_metric_snapshots_key", "experiment", "metric", "as_of"),
)


def _migration_2(conn: Connection) -> None:
    """Per-run sufficient statistics of every metric comparison (guardrails)."""
    metadata.create_all(conn, tables=[metric_snapshots])


def _migration_3(conn: Connection) -> None:
    """The notification outbox, mutes and monitor-health state (monitor/outbox.py)."""
    from monitor.outbox import migration_outbox

    migration_outbox(conn)


query_costs = sa.Table(
    "expwatch_query_costs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run_id", sa.String(36), nullable=False, index=True),
    sa.Column("position", sa.Integer, nullable=False),
    sa.Column("query", sa.String(256), nullable=False),
    sa.Column("seconds", sa.Float, nullable=False),
    sa.Column("rows_returned", sa.BigInteger, nullable=False),
    sa.Column("rows_scanned", sa.BigInteger),     # NULL: the engine did not report it
    sa.Column("bytes_scanned", sa.BigInteger),    # NULL: the engine did not report it
)


def _migration_4(conn: Connection) -> None:
    """Per-run, per-query scan cost: rows returned, and rows/bytes scanned where the
    engine reports them (monitor/warehouse.py ``QueryStats``)."""
    metadata.create_all(conn, tables=[query_costs])


def _migration_5(conn: Connection) -> None:
    """Outbox leases (owner, expiry), digest delivery deadlines and expiry, and the
    cycle counter that orders monitor-health decisions (monitor/outbox.py)."""
    from monitor.outbox import migration_delivery_leases

    migration_delivery_leases(conn)


MIGRATIONS: list[Callable[[Connection], None]] = [_migration_1, _migration_2, _migration_3, _migration_4, _migration_5]
SCHEMA_VERSION = len(MIGRATIONS)


class LockHeld(StateError):
    """Another expwatch cycle holds the state store's lock."""


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class StateStore:
    """Open (and create or migrate) the state store at ``url``."""

    def __init__(self, url: str, *, engine: Engine | None = None, migrate: bool = True) -> None:
        self.url = url
        try:
            self.engine = engine or sa.create_engine(url, poolclass=sa.pool.NullPool)
        except NoSuchModuleError as exc:
            raise ConfigError(f"state.url: no SQLAlchemy dialect is installed for {safe_url(url)}") from exc
        except ArgumentError as exc:
            raise ConfigError(f"state.url: not a SQLAlchemy URL ({safe_url(url)})") from exc
        if self.engine.dialect.name == "sqlite":
            @sa.event.listens_for(self.engine, "connect")
            def _sqlite_pragmas(dbapi_conn: Any, _rec: Any) -> None:
                cur = dbapi_conn.cursor()
                cur.execute("PRAGMA busy_timeout = 30000")
                cur.close()
        if migrate:
            self._migrate()

    # -- schema ------------------------------------------------------------------------
    def schema_version(self) -> int:
        try:
            with self.engine.connect() as conn:
                if not sa.inspect(conn).has_table(meta.name):
                    return 0
                row = conn.execute(sa.select(meta.c.value).where(meta.c.key == "schema_version")).first()
        except SQLAlchemyError as exc:
            raise StateError(f"state store {safe_url(self.url)} cannot be opened: {_first(exc)}") from exc
        return int(row[0]) if row else 0

    def _migrate(self) -> None:
        current = self.schema_version()
        if current > SCHEMA_VERSION:
            raise StateError(
                f"state store {safe_url(self.url)} has schema version {current}, newer than this expwatch "
                f"understands ({SCHEMA_VERSION}); upgrade expwatch or point state.url at another store"
            )
        for version in range(current + 1, SCHEMA_VERSION + 1):
            try:
                with self.engine.begin() as conn:
                    MIGRATIONS[version - 1](conn)
                    conn.execute(sa.delete(meta).where(meta.c.key == "schema_version"))
                    conn.execute(sa.insert(meta).values(key="schema_version", value=str(version)))
            except SQLAlchemyError as exc:
                # another process may have run the same migration at the same moment
                if self.schema_version() >= version:
                    continue
                raise StateError(
                    f"state store {safe_url(self.url)}: migration to schema version {version} failed: {_first(exc)}"
                ) from exc
            log.info("state store migrated to schema version %d", version)

    def dispose(self) -> None:
        self.engine.dispose()

    @contextmanager
    def transaction(self) -> Iterator[Connection]:
        try:
            with self.engine.begin() as conn:
                yield conn
        except SQLAlchemyError as exc:
            raise StateError(f"state store {safe_url(self.url)}: write failed: {_first(exc)}") from exc

    # -- lock --------------------------------------------------------------------------
    @contextmanager
    def lock(self, name: str = "cycle", *, wait_seconds: float = 0.0, ttl: timedelta = timedelta(hours=2)) -> Iterator[str]:
        """Hold the named lock for the duration of the ``with`` block.

        A lock left by a process that died on this host, or past its expiry, is
        taken over. Raises :class:`LockHeld` when another live holder keeps it
        longer than ``wait_seconds``.
        """
        owner = uuid.uuid4().hex
        host = socket.gethostname()
        deadline = time.monotonic() + wait_seconds
        waiting = False
        while True:
            holder = self._try_lock(name, owner, host, ttl)
            if holder is None:
                break
            if time.monotonic() >= deadline:
                raise LockHeld(
                    f"another expwatch cycle holds the state store lock (pid {holder['pid']} on {holder['host']}, "
                    f"since {holder['acquired_at']:%Y-%m-%d %H:%M:%S} UTC)"
                )
            if not waiting:
                waiting = True
                log.warning("waiting up to %gs for the state store lock held by pid %s on %s", wait_seconds,
                            holder["pid"], holder["host"], extra={"event": "lock_wait", "wait_seconds": wait_seconds})
            time.sleep(min(1.0, max(0.05, deadline - time.monotonic())))
        try:
            yield owner
        finally:
            try:
                with self.engine.begin() as conn:
                    conn.execute(sa.delete(locks).where(locks.c.name == name, locks.c.owner == owner))
            except SQLAlchemyError as exc:  # the lock expires by itself
                log.warning("could not release the state store lock: %s", _first(exc))

    def _try_lock(self, name: str, owner: str, host: str, ttl: timedelta) -> dict[str, Any] | None:
        now = _now()
        row = {"name": name, "owner": owner, "host": host, "pid": os.getpid(), "acquired_at": now, "expires_at": now + ttl}
        try:
            with self.engine.begin() as conn:
                held = conn.execute(sa.select(locks).where(locks.c.name == name)).mappings().first()
                if held is None:
                    conn.execute(sa.insert(locks).values(**row))
                    return None
                stale = held["expires_at"] <= now or (held["host"] == host and not _pid_alive(held["pid"]))
                if stale:
                    log.warning("taking over a stale state store lock left by pid %s on %s", held["pid"], held["host"])
                    res = conn.execute(
                        sa.update(locks).where(locks.c.name == name, locks.c.owner == held["owner"]).values(**row)
                    )
                    return None if res.rowcount == 1 else dict(held)
                return dict(held)
        except IntegrityError:
            return {"pid": "?", "host": "?", "acquired_at": now}
        except SQLAlchemyError as exc:
            msg = _first(exc)
            if "locked" in msg.lower():
                return {"pid": "?", "host": host, "acquired_at": now}
            raise StateError(f"state store {safe_url(self.url)}: cannot take the lock: {msg}") from exc

    # -- hourly counts -----------------------------------------------------------------
    def read_counts(self, source: str, experiments: Sequence[str], before: datetime | None = None) -> pd.DataFrame:
        """Stored hourly counts (hour as aware UTC) of ``experiments`` in ``source``."""
        cols = [counts.c.experiment, counts.c.variant, counts.c.hour, counts.c.segment, counts.c.units, counts.c.leaked]
        names = ["experiment", "variant", "hour", "segment", "units", "leaked"]
        out: list[Any] = []
        for chunk in _chunks(list(experiments), 500):
            stmt = sa.select(*cols).where(counts.c.source == source, counts.c.experiment.in_(chunk))
            if before is not None:
                stmt = stmt.where(counts.c.hour < before)
            with self.engine.connect() as conn:
                result = conn.execute(stmt)
                out.extend(result.cursor.fetchall() if result.cursor is not None else [])
        frame = pd.DataFrame.from_records(out, columns=names)
        frame["hour"] = pd.to_datetime(frame["hour"], utc=True, format="ISO8601") if len(frame) else pd.Series([], dtype="datetime64[ns, UTC]")
        frame["units"] = frame["units"].astype("int64")
        frame["leaked"] = frame["leaked"].astype("int64")
        return frame

    def watermarks(self, source: str) -> dict[str, datetime]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(watermarks.c.experiment, watermarks.c.pulled_to).where(watermarks.c.source == source)).all()
        return {r[0]: r[1] for r in rows}

    @staticmethod
    def replace_counts(conn: Connection, source: str, since: datetime, pulled_to: datetime, experiments: Sequence[str], frame: pd.DataFrame) -> None:
        """Replace the stored hours >= ``since`` of ``experiments`` with ``frame``."""
        for chunk in _chunks(list(experiments), 500):
            conn.execute(sa.delete(counts).where(counts.c.source == source, counts.c.experiment.in_(chunk), counts.c.hour >= since))
            conn.execute(sa.delete(watermarks).where(watermarks.c.source == source, watermarks.c.experiment.in_(chunk)))
        sql = _insert_sql(conn.dialect, counts.name, ["source", "experiment", "variant", "hour", "segment", "units", "leaked"])
        for lo in range(0, len(frame), 20000):  # rows as Python tuples one slice at a time (peak memory)
            part = frame.iloc[lo:lo + 20000]
            conn.exec_driver_sql(sql, list(zip(
                [source] * len(part), part["experiment"].tolist(),
                part["variant"].astype(object).where(part["variant"].notna(), None).tolist(),
                _db_times(part["hour"], conn.dialect), part["segment"].tolist(),
                part["units"].astype("int64").tolist(), part["leaked"].astype("int64").tolist(),
            )))
        if experiments:
            conn.execute(sa.insert(watermarks), [{"source": source, "experiment": e, "pulled_to": pulled_to} for e in experiments])

    # -- runs and findings -------------------------------------------------------------
    @staticmethod
    def record_run(conn: Connection, run_id: str, started_at: datetime, as_of: datetime, outcome: str, detail: dict[str, Any]) -> None:
        conn.execute(
            sa.insert(runs).values(
                run_id=run_id, started_at=started_at, finished_at=_now(), as_of=as_of, outcome=outcome,
                detail=json.dumps(detail, sort_keys=True),
            )
        )

    @staticmethod
    def record_query_costs(conn: Connection, run_id: str, stats: Sequence[Any]) -> None:
        """One row per warehouse query of the run (``QueryStats``), in query order."""
        rows = [{"run_id": run_id, "position": i, "query": str(q.name)[:256], "seconds": float(q.seconds),
                 "rows_returned": int(q.rows), "rows_scanned": getattr(q, "rows_scanned", None),
                 "bytes_scanned": getattr(q, "bytes_scanned", None)} for i, q in enumerate(stats)]
        if rows:
            conn.execute(sa.insert(query_costs), rows)

    def query_costs(self, run_id: str) -> list[dict[str, Any]]:
        """The recorded queries of one run, in query order."""
        with self.engine.connect() as c:
            rows = c.execute(sa.select(query_costs).where(query_costs.c.run_id == run_id)
                             .order_by(query_costs.c.position)).mappings().all()
        return [dict(r) for r in rows]

    @staticmethod
    def record_metric_snapshots(conn: Connection, run_id: str, as_of: datetime, rows: Sequence[Any]) -> None:
        """Store the metric statistics of a run (objects with the snapshot table's fields)."""
        stat_cols = ("n", "sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy", "sum_c", "sum_c2", "sum_yc")
        records = [{"run_id": run_id, "as_of": as_of, "experiment": r.experiment, "metric": r.metric,
                    "variant": r.variant, "units_since": r.since, **{c: float(getattr(r, c)) for c in stat_cols}}
                   for r in rows]
        for chunk in _chunks(records, 5000):
            conn.execute(sa.insert(metric_snapshots), chunk)

    def metric_snapshots(self, run_id: str) -> list[dict[str, Any]]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(metric_snapshots).where(metric_snapshots.c.run_id == run_id)
                                .order_by(metric_snapshots.c.id)).mappings().all()
        return [dict(r) for r in rows]

    def last_run_as_of(self) -> datetime | None:
        with self.engine.connect() as conn:
            return conn.execute(sa.select(sa.func.max(runs.c.as_of)).where(runs.c.outcome == "ok")).scalar()

    def recent_runs(self, limit: int = 20) -> list[dict[str, Any]]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(runs).order_by(runs.c.started_at.desc()).limit(limit)).mappings().all()
        return [dict(r) for r in rows]

    def open_alerts(self, conn: Connection | None = None) -> list[dict[str, Any]]:
        """The alert episodes in progress: ``state`` ``open`` (failing) or ``clearing``
        (clear, waiting out ``checks.episode_clear_hours`` before it resolves; see monitor/ledger.py)."""
        stmt = (sa.select(alerts).where(alerts.c.state.in_(("open", "clearing")))
                .order_by(alerts.c.opened_at, alerts.c.id))
        if conn is not None:
            return [dict(r) for r in conn.execute(stmt).mappings().all()]
        with self.engine.connect() as c:
            return [dict(r) for r in c.execute(stmt).mappings().all()]

    def alert_history(self) -> list[dict[str, Any]]:
        stmt = (
            sa.select(alert_events, alerts.c.key, alerts.c.experiment, alerts.c.check_name, alerts.c.scope)
            .join(alerts, alerts.c.id == alert_events.c.alert_id)
            .order_by(alert_events.c.at, alert_events.c.id)
        )
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(stmt).mappings().all()]

    def findings_for_run(self, run_id: str) -> list[dict[str, Any]]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(findings).where(findings.c.run_id == run_id).order_by(findings.c.id)).mappings().all()
        return [dict(r) for r in rows]


def prune(store: StateStore, keep_days: float, *, dry_run: bool = False) -> dict[str, Any]:
    """Remove what no later run or report needs, in one transaction.

    The retention counts back from the latest recorded run's data time (``as_of``), not
    the wall clock, so a monitor stopped for a while keeps what it was watching. Removed:
    runs older than the cutoff with their findings, metric snapshots and query costs; the
    hourly counts and watermark of every experiment whose watermark (the data time of the
    last run that pulled it, renewed by every run while it is live) is older than the
    cutoff. Live experiments are pulled every run, so their counts are kept for their
    whole phase. Alerts and their events (the ledger) are kept. Returns the cutoff and
    the rows removed per table; ``dry_run`` counts them and removes nothing.
    """
    with store.engine.connect() as conn:
        latest = conn.execute(sa.select(sa.func.max(runs.c.as_of))).scalar()
    removed: dict[str, int] = {}
    if latest is None:
        return {"cutoff": None, "removed": removed}
    if isinstance(latest, str):
        latest = datetime.fromisoformat(latest)
    latest = latest.replace(tzinfo=timezone.utc) if latest.tzinfo is None else latest
    cutoff = latest - timedelta(days=keep_days)
    with store.transaction() as conn:
        old_runs = sa.select(runs.c.run_id).where(runs.c.as_of < cutoff).scalar_subquery()
        gone = (sa.select(watermarks.c.source, watermarks.c.experiment)
                .where(watermarks.c.pulled_to < cutoff))
        stale = conn.execute(gone).all()
        targets: list[tuple[str, Any]] = [
            (t.name, t.c.run_id.in_(old_runs)) for t in (findings, metric_snapshots, query_costs)
        ]
        targets.append((counts.name, sa.or_(sa.false(), *(
            sa.and_(counts.c.source == src, counts.c.experiment == exp) for src, exp in stale))))
        targets.append((watermarks.name, watermarks.c.pulled_to < cutoff))
        targets.append((runs.name, runs.c.as_of < cutoff))
        for name, where in targets:
            table = metadata.tables[name]
            if dry_run:
                removed[name] = int(conn.execute(sa.select(sa.func.count()).select_from(table).where(where)).scalar() or 0)
            else:
                removed[name] = int(conn.execute(sa.delete(table).where(where)).rowcount or 0)
    return {"cutoff": cutoff, "removed": removed}


def _db_times(values: pd.Series, dialect: sa.Dialect) -> list[Any]:
    """Aware timestamps as the driver stores them for a naive-UTC DateTime column
    (SQLite keeps text in SQLAlchemy's own format)."""
    naive = pd.to_datetime(values, utc=True).dt.tz_localize(None)
    if dialect.name == "sqlite":
        return naive.dt.strftime("%Y-%m-%d %H:%M:%S.%f").tolist()
    return [t.to_pydatetime() for t in naive]


def _insert_sql(dialect: sa.Dialect, table: str, columns: list[str]) -> str:
    """A driver-level INSERT with the dialect's placeholder style, for executemany."""
    style = dialect.paramstyle
    marks = {"qmark": ["?"] * len(columns), "format": ["%s"] * len(columns), "pyformat": ["%s"] * len(columns),
             "numeric": [f":{i + 1}" for i in range(len(columns))], "numeric_dollar": [f"${i + 1}" for i in range(len(columns))],
             "named": [f":{c}" for c in columns]}[style]
    q = dialect.identifier_preparer.quote
    return f"INSERT INTO {q(table)} ({', '.join(q(c) for c in columns)}) VALUES ({', '.join(marks)})"


def _chunks(items: list[Any], size: int) -> Iterator[list[Any]]:
    for i in range(0, len(items), size):
        yield items[i : i + size]


def _first(exc: BaseException) -> str:
    orig = getattr(exc, "orig", None) or exc
    lines = str(orig).strip().splitlines()
    return lines[0] if lines else type(orig).__name__
