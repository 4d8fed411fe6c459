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

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import ArgumentError, IntegrityError, NoSuchModuleError, SQLAlchemyError

from monitor.errors import ConfigError, StateError
from monitor.warehouse import safe_url

__all__ = ["SCHEMA_VERSION", "StateStore", "LockHeld", "prune", "prune_in"]

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
#: The hourly counts as schema versions 1 to 5 kept them: one row per source, experiment,
#: variant, hour and segment combination, the segment as JSON text in every row, plus a
#: separate index. Created by migration 1 and converted by migration 6; not in ``metadata``.
legacy = sa.MetaData()
counts_v5 = sa.Table(
    "expwatch_hourly_counts", legacy,
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
    metadata.create_all(conn, tables=[meta, runs, watermarks, findings, alerts, alert_events, locks])
    legacy.create_all(conn, tables=[counts_v5])


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


#: One row per source, experiment, variant and segment combination whose hourly counts are
#: stored (a "series"); the segment, canonical JSON of segment name -> value, is stored here once.
count_series = sa.Table(
    "expwatch_count_series", metadata,
    sa.Column("series_id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("source", sa.String(128), nullable=False),
    sa.Column("experiment", sa.String(512), nullable=False),
    sa.Column("variant", sa.String(512)),
    sa.Column("segment", sa.Text, nullable=False),
    sa.Index("ix_expwatch_count_series_key", "source", "experiment"),
)
#: The hourly counts: one row per series and hour, the hour as whole hours since 1970-01-01
#: 00:00 UTC, stored in key order (SQLite: WITHOUT ROWID), so the key needs no separate index.
counts = sa.Table(
    "expwatch_counts", metadata,
    sa.Column("series_id", sa.Integer, primary_key=True, autoincrement=False),
    sa.Column("hour", sa.Integer, primary_key=True, autoincrement=False),
    sa.Column("units", sa.BigInteger, nullable=False),
    sa.Column("leaked", sa.BigInteger, nullable=False),
    sqlite_with_rowid=False,
)


def _migration_6(conn: Connection) -> None:
    """The hourly counts in compact form: the (source, experiment, variant, segment) of each
    series once in ``expwatch_count_series``, the counts keyed by series id and integer hour
    in ``expwatch_counts``. Converts ``expwatch_hourly_counts`` one source and experiment at a
    time (rows of the same key and hour, which the pull never writes, are summed), then drops it."""
    metadata.create_all(conn, tables=[count_series, counts])
    if not sa.inspect(conn).has_table(counts_v5.name):
        return
    cols = [counts_v5.c.experiment, counts_v5.c.variant, counts_v5.c.hour, counts_v5.c.segment,
            counts_v5.c.units, counts_v5.c.leaked]
    keys = conn.execute(sa.select(counts_v5.c.source, counts_v5.c.experiment).distinct()).all()
    for source, experiment in keys:
        result = conn.execute(sa.select(*cols).where(counts_v5.c.source == source, counts_v5.c.experiment == experiment))
        frame = pd.DataFrame.from_records(result.cursor.fetchall() if result.cursor is not None else [],
                                          columns=COUNT_COLUMNS)
        frame["hour"] = pd.to_datetime(frame["hour"], utc=True, format="ISO8601")
        _write_counts(conn, source, frame)
    counts_v5.drop(conn)


MIGRATIONS: list[Callable[[Connection], None]] = [_migration_1, _migration_2, _migration_3, _migration_4, _migration_5,
                                                  _migration_6]
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
        if current < 6 <= SCHEMA_VERSION:
            self.vacuum()  # the hourly counts were rewritten: give the file back what they no longer need

    def vacuum(self) -> None:
        """Return the free pages of a SQLite store file to the file system (``VACUUM``); other
        databases manage their own space. SQLite otherwise reuses freed pages but never shrinks
        the file. A failure (e.g. another process holding the store) is logged, not raised."""
        if self.engine.dialect.name != "sqlite" or self.engine.url.database in (None, "", ":memory:"):
            return
        try:
            with self.engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
                conn.exec_driver_sql("VACUUM")
        except SQLAlchemyError as exc:
            log.warning("state store %s: VACUUM failed (the file keeps its free pages): %s", safe_url(self.url), _first(exc))

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
        limit = None if before is None else _hour_ceiling(before)
        rows: list[Any] = []
        with self.engine.connect() as conn:
            series = _series_frame(conn, source, experiments)
            for chunk in _chunks(series["series_id"].tolist(), 500):
                stmt = sa.select(counts.c.series_id, counts.c.hour, counts.c.units, counts.c.leaked).where(
                    counts.c.series_id.in_(chunk))
                if limit is not None:
                    stmt = stmt.where(counts.c.hour < limit)
                result = conn.execute(stmt)
                rows.extend(result.cursor.fetchall() if result.cursor is not None else [])
        found = pd.DataFrame.from_records(rows, columns=["series_id", "hour", "units", "leaked"])
        at = pd.Index(series["series_id"]).get_indexer(found["series_id"])
        return pd.DataFrame({
            "experiment": series["experiment"].to_numpy(dtype=object)[at],
            "variant": series["variant"].astype(object).where(series["variant"].notna(), None).to_numpy()[at],
            "hour": _hour_times(found["hour"]),
            "segment": series["segment"].to_numpy(dtype=object)[at],
            "units": found["units"].to_numpy(dtype="int64"),
            "leaked": found["leaked"].to_numpy(dtype="int64"),
        })

    def watermarks(self, source: str) -> dict[str, datetime]:
        with self.engine.connect() as conn:
            rows = conn.execute(sa.select(watermarks.c.experiment, watermarks.c.pulled_to).where(watermarks.c.source == source)).all()
        return {r[0]: r[1] for r in rows}

    @staticmethod
    def replace_counts(conn: Connection, source: str, since: datetime, pulled_to: datetime, experiments: Sequence[str], frame: pd.DataFrame) -> None:
        """Replace the stored hours >= ``since`` of ``experiments`` with ``frame``."""
        first = _hour_ceiling(since)
        for chunk in _chunks(list(experiments), 500):
            of_chunk = sa.select(count_series.c.series_id).where(count_series.c.source == source,
                                                                 count_series.c.experiment.in_(chunk))
            conn.execute(sa.delete(counts).where(counts.c.series_id.in_(of_chunk), counts.c.hour >= first))
            conn.execute(sa.delete(watermarks).where(watermarks.c.source == source, watermarks.c.experiment.in_(chunk)))
        _write_counts(conn, source, frame)
        if experiments:
            conn.execute(sa.insert(watermarks), [{"source": source, "experiment": e, "pulled_to": pulled_to} for e in experiments])

    @staticmethod
    def allocation_counts(conn: Connection, source: str, experiment: str) -> pd.DataFrame:
        """Units per variant and hour (aware UTC), summed over segments, of one experiment in
        ``source``; rows without a variant are left out (the digest's allocation chart)."""
        stmt = (sa.select(count_series.c.variant, counts.c.hour, sa.func.sum(counts.c.units).label("units"))
                .join_from(counts, count_series, counts.c.series_id == count_series.c.series_id)
                .where(count_series.c.source == source, count_series.c.experiment == experiment,
                       count_series.c.variant.is_not(None))
                .group_by(count_series.c.variant, counts.c.hour))
        frame = pd.DataFrame(conn.execute(stmt).all(), columns=["variant", "hour", "units"])
        frame["hour"] = _hour_times(frame["hour"])
        return frame

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
    with store.transaction() as conn:
        return prune_in(conn, keep_days, dry_run=dry_run)


def prune_in(conn: Connection, keep_days: float, *, dry_run: bool = False) -> dict[str, Any]:
    """:func:`prune` inside the caller's transaction (a cycle prunes in the one that records it)."""
    latest = conn.execute(sa.select(sa.func.max(runs.c.as_of))).scalar()
    removed: dict[str, int] = {}
    if latest is None:
        return {"cutoff": None, "removed": removed}
    if isinstance(latest, str):
        latest = datetime.fromisoformat(latest)
    latest = latest.replace(tzinfo=timezone.utc) if latest.tzinfo is None else latest
    cutoff = latest - timedelta(days=keep_days)
    old_runs = sa.select(runs.c.run_id).where(runs.c.as_of < cutoff).scalar_subquery()
    stale = conn.execute(sa.select(watermarks.c.source, watermarks.c.experiment)
                         .where(watermarks.c.pulled_to < cutoff)).all()
    targets: list[tuple[str, Any]] = [
        (t.name, t.c.run_id.in_(old_runs)) for t in (findings, metric_snapshots, query_costs)
    ]
    stale_series = sa.or_(sa.false(), *(
        sa.and_(count_series.c.source == src, count_series.c.experiment == exp) for src, exp in stale))
    targets.append((counts.name, counts.c.series_id.in_(sa.select(count_series.c.series_id).where(stale_series))))
    targets.append((count_series.name, stale_series))
    targets.append((watermarks.name, watermarks.c.pulled_to < cutoff))
    targets.append((runs.name, runs.c.as_of < cutoff))
    for name, where in targets:
        table = metadata.tables[name]
        if dry_run:
            removed[name] = int(conn.execute(sa.select(sa.func.count()).select_from(table).where(where)).scalar() or 0)
        else:
            removed[name] = int(conn.execute(sa.delete(table).where(where)).rowcount or 0)
    return {"cutoff": cutoff, "removed": removed}


#: The columns of a frame of hourly counts (monitor/pull.py); ``hour`` aware UTC.
COUNT_COLUMNS = ["experiment", "variant", "hour", "segment", "units", "leaked"]
_HOUR = pd.Timedelta(hours=1)
_EPOCH = pd.Timestamp(0, tz="UTC")
_NO_VARIANT = "\x00none"


def _hour_numbers(values: pd.Series) -> np.ndarray:
    """Aware hour starts as whole hours since 1970-01-01 00:00 UTC (how ``expwatch_counts`` keeps them)."""
    since = pd.to_datetime(values, utc=True) - _EPOCH
    off = since[since % _HOUR != pd.Timedelta(0)]
    if len(off):
        raise StateError(f"hourly counts: {(_EPOCH + off.iloc[0]).isoformat()} is not the start of an hour")
    return (since // _HOUR).to_numpy(dtype="int64")


def _hour_times(numbers: pd.Series) -> pd.Series:
    """Whole hours since the epoch back to aware UTC timestamps."""
    return pd.Series(_EPOCH + pd.to_timedelta(np.asarray(numbers, dtype="int64"), unit="h"), dtype="datetime64[ns, UTC]")


def _hour_ceiling(t: datetime) -> int:
    """The first whole hour (since the epoch) that starts at or after ``t``: hour < t iff number < this."""
    return -int((_EPOCH - pd.Timestamp(t).tz_convert("UTC")) // _HOUR)


def _series_frame(conn: Connection, source: str, experiments: Sequence[str]) -> pd.DataFrame:
    """The stored series (id, experiment, variant, segment) of ``experiments`` in ``source``."""
    rows: list[Any] = []
    for chunk in _chunks(sorted(set(experiments)), 500):
        rows.extend(conn.execute(
            sa.select(count_series.c.series_id, count_series.c.experiment, count_series.c.variant, count_series.c.segment)
            .where(count_series.c.source == source, count_series.c.experiment.in_(chunk))).all())
    return pd.DataFrame.from_records(rows, columns=["series_id", "experiment", "variant", "segment"])


def _write_counts(conn: Connection, source: str, frame: pd.DataFrame) -> None:
    """Insert the hourly counts of ``frame`` (:data:`COUNT_COLUMNS`) for ``source``, adding the
    series not stored yet. Rows of the same series and hour are summed."""
    if frame.empty:
        return
    variant = frame["variant"].astype(object).where(frame["variant"].notna(), _NO_VARIANT)
    codes, combos = pd.MultiIndex.from_arrays(
        [frame["experiment"].astype(str), variant.astype(str), frame["segment"].astype(str)]).factorize()
    wanted = [(e, None if v == _NO_VARIANT else v, g) for e, v, g in combos]

    def known() -> dict[tuple[str, str | None, str], int]:
        stored = _series_frame(conn, source, [w[0] for w in wanted])
        return {(e, None if pd.isna(v) else v, g): int(i) for i, e, v, g in stored.itertuples(index=False)}

    ids = known()
    missing = [w for w in wanted if w not in ids]
    if missing:
        conn.execute(sa.insert(count_series), [{"source": source, "experiment": e, "variant": v, "segment": g}
                                               for e, v, g in missing])
        ids = known()
    rows = pd.DataFrame({
        "series_id": np.array([ids[w] for w in wanted], dtype="int64")[codes],
        "hour": _hour_numbers(frame["hour"]),
        "units": frame["units"].to_numpy(dtype="int64"),
        "leaked": frame["leaked"].to_numpy(dtype="int64"),
    }).groupby(["series_id", "hour"], sort=True, as_index=False).sum()
    sql = _insert_sql(conn.dialect, counts.name, ["series_id", "hour", "units", "leaked"])
    for lo in range(0, len(rows), 20000):  # rows as Python tuples one slice at a time (peak memory)
        part = rows.iloc[lo:lo + 20000]
        conn.exec_driver_sql(sql, list(zip(*(part[c].tolist() for c in ("series_id", "hour", "units", "leaked")))))


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
