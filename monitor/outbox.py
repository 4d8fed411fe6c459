"""The outbox: alert notifications that survive a crash, an outage and a rerun.

How a notification travels
--------------------------
1. :func:`enqueue` runs inside the cycle's state-store transaction, right after
   the alert ledger is written. For every webhook destination it writes at most
   one message per run listing the run's notifiable events (opened, escalated,
   resolved) that pass the destination's route, ``notify_on`` and the mutes. The
   message therefore commits together with the alerts it describes, or not at
   all.
2. :func:`deliver_pending` runs after the transaction (and again on every later
   run). It sends each undelivered message whose ``next_attempt_at`` has come
   and marks it delivered in its own small transaction. A message that still
   fails after ``max_attempts`` tries in this round keeps its place: the error is
   recorded and the next attempt is scheduled with exponential backoff and
   jitter (``retry_base_seconds`` doubling per failed round up to
   ``retry_max_seconds``; the wait is drawn uniformly between half and all of
   it [1]_), so it goes out on a later run. Nothing is dropped.

Guarantee: **at-least-once delivery, deduplicated by key at the receiver.** A
message can be sent twice (the receiver answered but the process died before
the delivered mark was committed, or two deliverers raced); every attempt of
one message carries the same ``X-Expwatch-Idempotency-Key``, so a receiver that
remembers the keys it has seen shows each message once. The key is the SHA-256
of (destination, run id, the sorted event keys and kinds), so enqueueing the
same run twice cannot create a second message either.

Monitor health
--------------
When a run of expwatch itself fails, :func:`record_failure` sends one "monitor
failing" notice to every webhook the first time, and nothing on the following
failed runs; the first successful run afterwards (:func:`record_success`) sends
one recovery notice. The state lives in ``expwatch_notify_state``. After a
successful run :func:`send_heartbeat` pings ``heartbeat_url`` (an outside
dead-man's switch notices when the pings stop); its failure is only logged.

Mutes (``expwatch mute``) are stored in ``expwatch_mutes``: a muted alert is not
pushed to webhooks but still appears, marked, in the digest.

References
----------
.. [1] R. M. Metcalfe and D. R. Boggs, "Ethernet: Distributed Packet Switching
   for Local Computer Networks", Communications of the ACM 19(7), 1976
   (binary exponential backoff with randomised waits).
"""

from __future__ import annotations

import hashlib
import json
import logging
import random
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

import requests
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import SQLAlchemyError

from monitor.errors import ConfigError, MonitorError
from monitor.findings import SEVERITY_NAMES
from monitor.notify_config import NotifyConfig, WebhookConfig
from monitor.state import UTCDateTime, alerts, metadata

__all__ = ["DeliveryReport", "ExperimentMeta", "Mute", "active_mutes", "deliver_pending", "enqueue",
           "ensure_notify_tables", "get_state", "migration_outbox", "mute", "outbox", "pending_messages",
           "record_failure", "record_success", "send_heartbeat", "set_state", "unmute"]

log = logging.getLogger("monitor")

ALL_CHECKS = "*"

outbox = sa.Table(
    "expwatch_outbox", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("idempotency_key", sa.String(64), nullable=False, unique=True),
    sa.Column("channel", sa.String(16), nullable=False),
    sa.Column("destination", sa.String(128), nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("attempts", sa.Integer, nullable=False, default=0),
    sa.Column("failed_rounds", sa.Integer, nullable=False, default=0),
    sa.Column("next_attempt_at", UTCDateTime, nullable=False),
    sa.Column("delivered_at", UTCDateTime),
    sa.Column("last_error", sa.Text),
    sa.Index("ix_expwatch_outbox_pending", "delivered_at", "next_attempt_at"),
)
notify_state = sa.Table(
    "expwatch_notify_state", metadata,
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.Text, nullable=False),
    sa.Column("updated_at", UTCDateTime, nullable=False),
)
mutes = sa.Table(
    "expwatch_mutes", metadata,
    sa.Column("experiment", sa.String(512), primary_key=True),
    sa.Column("check_name", sa.String(64), primary_key=True),
    sa.Column("until", UTCDateTime, nullable=False),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
)
_TABLES = [outbox, notify_state, mutes]


def migration_outbox(conn: Connection) -> None:
    """Create the outbox, the notification state and the mutes tables (idempotent)."""
    metadata.create_all(conn, tables=_TABLES, checkfirst=True)


def ensure_notify_tables(engine: Engine) -> None:
    """Create the notification tables if a store predates them (no-op otherwise)."""
    insp = sa.inspect(engine)
    if all(insp.has_table(t.name) for t in _TABLES):
        return
    with engine.begin() as conn:
        migration_outbox(conn)


def _now() -> datetime:
    return datetime.now(timezone.utc)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")


# -- small key/value state -------------------------------------------------------------

def get_state(conn: Connection, key: str) -> dict[str, Any] | None:
    row = conn.execute(sa.select(notify_state.c.value).where(notify_state.c.key == key)).first()
    return json.loads(row[0]) if row else None


def set_state(conn: Connection, key: str, value: dict[str, Any], at: datetime) -> None:
    conn.execute(sa.delete(notify_state).where(notify_state.c.key == key))
    conn.execute(sa.insert(notify_state).values(key=key, value=json.dumps(value, sort_keys=True), updated_at=at))


# -- mutes -----------------------------------------------------------------------------

@dataclass(frozen=True)
class Mute:
    experiment: str
    check: str | None
    """None: every check of the experiment."""
    until: datetime
    reason: str
    created_at: datetime

    def covers(self, experiment: str, check: str) -> bool:
        return self.experiment == experiment and (self.check is None or self.check == check)


def mute(engine: Engine, experiment: str, check: str | None, until: datetime, reason: str,
         *, clock: Callable[[], datetime] = _now) -> Mute:
    """Mute an experiment's alerts (one check, or all when ``check`` is None) until ``until``.

    Raises
    ------
    ConfigError
        ``until`` is naive or not in the future, or ``reason`` is empty.
    """
    now = clock()
    if until.tzinfo is None:
        raise ConfigError("--until: give a time zone or 'Z' (UTC)")
    if until <= now:
        raise ConfigError(f"--until {_iso(until)} is not in the future")
    if not reason.strip():
        raise ConfigError("--reason: say why the alerts are muted")
    ensure_notify_tables(engine)
    ck = check or ALL_CHECKS
    with engine.begin() as conn:
        conn.execute(sa.delete(mutes).where(mutes.c.experiment == experiment, mutes.c.check_name == ck))
        conn.execute(sa.insert(mutes).values(experiment=experiment, check_name=ck, until=until,
                                             reason=reason.strip(), created_at=now))
    return Mute(experiment, check, until, reason.strip(), now)


def unmute(engine: Engine, experiment: str, check: str | None = None) -> int:
    """Remove the mute of ``experiment`` (of one check, or every mute of the
    experiment when ``check`` is None); returns how many were removed."""
    ensure_notify_tables(engine)
    stmt = sa.delete(mutes).where(mutes.c.experiment == experiment)
    if check is not None:
        stmt = stmt.where(mutes.c.check_name == check)
    with engine.begin() as conn:
        return int(conn.execute(stmt).rowcount or 0)


def active_mutes(conn: Connection, at: datetime) -> list[Mute]:
    rows = conn.execute(sa.select(mutes).where(mutes.c.until > at).order_by(mutes.c.experiment, mutes.c.check_name)).mappings()
    return [Mute(r["experiment"], None if r["check_name"] == ALL_CHECKS else r["check_name"], r["until"], r["reason"],
                 r["created_at"]) for r in rows]


# -- enqueue ---------------------------------------------------------------------------

@dataclass(frozen=True)
class ExperimentMeta:
    owner: str | None = None
    title: str | None = None
    tags: tuple[str, ...] = ()


def _metas(experiments_meta: Any) -> dict[str, ExperimentMeta]:
    """Accept registry ``Experiment`` objects, or a mapping id -> ExperimentMeta / dict."""
    if experiments_meta is None:
        return {}
    out: dict[str, ExperimentMeta] = {}
    if isinstance(experiments_meta, Mapping):
        for k, v in experiments_meta.items():
            if isinstance(v, ExperimentMeta):
                out[str(k)] = v
            elif isinstance(v, Mapping):
                out[str(k)] = ExperimentMeta(v.get("owner"), v.get("title"), tuple(v.get("tags") or ()))
            else:
                raise ConfigError(f"experiments_meta[{k!r}]: expected a mapping with owner/title/tags")
        return out
    for e in experiments_meta:
        out[e.id] = ExperimentMeta(getattr(e, "owner", None), getattr(e, "title", None), tuple(getattr(e, "tags", ()) or ()))
    return out


def _key(*parts: Any) -> str:
    return hashlib.sha256(json.dumps(parts, separators=(",", ":"), ensure_ascii=False).encode("utf-8")).hexdigest()


def _line(ev: Any) -> str:
    where = f"{ev.experiment} · {ev.check} · {ev.scope}"
    summary = ev.summary if len(ev.summary) <= 280 else ev.summary[:277] + "..."
    if ev.kind == "resolved":
        return f"RESOLVED {where}: {summary}"
    sev = SEVERITY_NAMES[ev.severity].upper()
    if ev.kind == "escalated":
        return f"ESCALATED to {sev} {where}: {summary}"
    return f"{sev} {where}: {summary}"


def enqueue(conn: Connection, run_id: str, as_of: datetime, events: Sequence[Any], cfg_notify: NotifyConfig,
            experiments_meta: Any = None) -> list[str]:
    """Queue one webhook message per destination for this run, in the caller's transaction.

    Parameters
    ----------
    conn
        The run's state-store transaction (the one :func:`monitor.ledger.apply` wrote into).
    run_id, as_of
        The run.
    events
        The ledger's :class:`~monitor.ledger.AlertEvent` objects of the run.
    cfg_notify
        The notification configuration.
    experiments_meta
        The live experiments (registry objects with ``id``, ``owner``, ``title``
        and optionally ``tags``), or a mapping id -> ``{"owner", "title", "tags"}``;
        used for routing and shown in the message.

    Returns
    -------
    list of str
        Idempotency keys of the messages written (empty when nothing is notifiable
        or the run was already enqueued).

    Notes
    -----
    Notifiable: ``opened`` and ``escalated`` events with severity >= ``notify_on``;
    ``resolved`` events of alerts whose highest severity reached ``notify_on``
    (so a warn-only alert that was never pushed does not push its resolution).
    ``changed`` events are recorded by the ledger but never pushed. Muted
    (experiment, check) pairs are skipped. A destination whose route matches none
    of the events gets no message. Re-enqueueing the same run gives the same keys
    and writes nothing. Missing notification tables are created in the same
    transaction.
    """
    if not cfg_notify.webhooks:
        return []
    if not sa.inspect(conn).has_table(outbox.name):  # a store migrated before the outbox existed
        migration_outbox(conn)
    floor = cfg_notify.min_severity
    cand = [e for e in events if e.kind in ("opened", "escalated", "resolved")]
    if not cand:
        return []
    resolved_ids = [int(e.alert_id) for e in cand if e.kind == "resolved" and e.alert_id is not None]
    max_sev: dict[int, int] = {}
    if resolved_ids:
        rows = conn.execute(sa.select(alerts.c.id, alerts.c.max_severity).where(alerts.c.id.in_(resolved_ids))).all()
        max_sev = {int(r[0]): int(r[1]) for r in rows}
    muted = active_mutes(conn, as_of)
    keep = []
    for e in cand:
        if e.kind == "resolved":
            if e.alert_id is not None and max_sev.get(int(e.alert_id), floor) < floor:
                continue
        elif e.severity < floor:
            continue
        if any(m.covers(e.experiment, e.check) for m in muted):
            continue
        keep.append(e)
    if not keep:
        return []
    metas = _metas(experiments_meta)
    written: list[str] = []
    for hook in cfg_notify.webhooks:
        mine = [e for e in keep if hook.route.matches(e.experiment, metas.get(e.experiment, ExperimentMeta()).owner,
                                                      metas.get(e.experiment, ExperimentMeta()).tags)]
        if not mine:
            continue
        mine.sort(key=lambda e: (-e.severity if e.kind != "resolved" else 1, e.experiment, e.check, e.scope))
        key = _key("alerts", hook.name, run_id, sorted([e.key, e.kind] for e in mine))
        if conn.execute(sa.select(outbox.c.id).where(outbox.c.idempotency_key == key)).first():
            continue
        counts = {k: sum(1 for e in mine if e.kind == k) for k in ("opened", "escalated", "resolved")}
        header = "expwatch · " + ", ".join(f"{n} {k}" for k, n in counts.items() if n) + f" · as of {as_of:%Y-%m-%d %H:%M} UTC"
        message = {
            "format": "expwatch.notice/1", "kind": "alerts", "run_id": run_id, "as_of": _iso(as_of),
            "header": header, "lines": [_line(e) for e in mine],
            "events": [{"event": e.kind, "experiment": e.experiment,
                        "title": metas.get(e.experiment, ExperimentMeta()).title,
                        "owner": metas.get(e.experiment, ExperimentMeta()).owner,
                        "check": e.check, "scope": e.scope, "severity": SEVERITY_NAMES[e.severity],
                        "summary": e.summary} for e in mine],
        }
        _insert(conn, key, hook.name, message, as_of)
        written.append(key)
    return written


def _insert(conn: Connection, key: str, destination: str, message: dict[str, Any], at: datetime) -> None:
    message = {**message, "idempotency_key": key}
    conn.execute(sa.insert(outbox).values(
        idempotency_key=key, channel="webhook", destination=destination,
        payload=json.dumps(message, sort_keys=True, ensure_ascii=False), created_at=at, attempts=0,
        failed_rounds=0, next_attempt_at=at, delivered_at=None, last_error=None))


# -- delivery --------------------------------------------------------------------------

@dataclass(frozen=True)
class DeliveryReport:
    attempted: int
    """Messages tried this round."""
    delivered: int
    failed: int
    """Messages tried and still undelivered; each has a retry scheduled."""
    requests: int
    """HTTP requests sent (retries within the round included)."""
    pending: int
    """Undelivered messages left in the outbox (due later, failed, or for a removed destination)."""
    orphaned: int
    """Of those, messages whose destination is no longer configured."""
    errors: tuple[str, ...] = ()


def backoff_seconds(failed_rounds: int, cfg_notify: NotifyConfig, rng: random.Random) -> float:
    """Wait before the next round: ``d = min(base * 2**(k-1), max)`` after ``k``
    failed rounds, drawn uniformly from ``[d/2, d]``."""
    k = max(1, int(failed_rounds))
    d = min(cfg_notify.retry_base_seconds * 2.0 ** min(k - 1, 60), cfg_notify.retry_max_seconds)
    return d / 2 + rng.uniform(0.0, d / 2)


def deliver_pending(engine: Engine, cfg_notify: NotifyConfig, *, session: requests.Session | None = None,
                    clock: Callable[[], datetime] | None = None, rng: random.Random | None = None,
                    sleep: Callable[[float], None] = time.sleep, limit: int = 1000) -> DeliveryReport:
    """Send every due, undelivered webhook message.

    Parameters
    ----------
    engine
        The state store.
    cfg_notify
        Destinations by name; a queued message whose destination was removed
        from the config stays queued (counted in ``orphaned``).
    session
        HTTP session (tests pass one; default a fresh one per call).
    clock
        Returns the current aware UTC time (default the system clock).
    rng
        Randomness of the backoff jitter (seed it for reproducible schedules).
    sleep
        Pause between retries within one round (``min(0.25 * 2**i, 2)`` seconds).
    limit
        At most this many messages per call, oldest first.

    Returns
    -------
    DeliveryReport

    Notes
    -----
    Each message is marked delivered (or its failure recorded) in its own
    transaction, so a crash loses at most the mark of the message in flight,
    which is then re-sent with the same idempotency key. A template that fails
    to render counts as a failed attempt and is retried like a network error
    (fixing the template releases the message).
    """
    clock = clock or _now
    rng = rng or random.Random()
    hooks: dict[str, WebhookConfig] = {h.name: h for h in cfg_notify.webhooks}
    from monitor.notify import post_webhook, render_body

    ensure_notify_tables(engine)
    now = clock()
    with engine.connect() as conn:
        due = conn.execute(sa.select(outbox).where(outbox.c.delivered_at.is_(None), outbox.c.next_attempt_at <= now)
                           .order_by(outbox.c.id).limit(limit)).mappings().all()
    attempted = delivered = failed = n_requests = 0
    errors: list[str] = []
    own = session or requests.Session()
    try:
        for row in due:
            hook = hooks.get(row["destination"])
            if hook is None:
                continue
            attempted += 1
            message = json.loads(row["payload"])
            tries, error = 0, None
            for i in range(hook.max_attempts):
                tries += 1
                try:
                    body = render_body(message, hook)
                    n_requests += 1
                    post_webhook(hook, body, row["idempotency_key"], session=own)
                    error = None
                    break
                except ConfigError as exc:
                    error = str(exc)
                    break  # retrying at once cannot fix a template or a missing secret
                except MonitorError as exc:
                    error = str(exc)
                    if i + 1 < hook.max_attempts:
                        sleep(min(0.25 * 2**i, 2.0))
            at = clock()
            with engine.begin() as conn:
                if error is None:
                    conn.execute(sa.update(outbox).where(outbox.c.id == row["id"]).values(
                        delivered_at=at, attempts=row["attempts"] + tries, last_error=None))
                    delivered += 1
                else:
                    rounds = row["failed_rounds"] + 1
                    nxt = at + timedelta(seconds=backoff_seconds(rounds, cfg_notify, rng))
                    conn.execute(sa.update(outbox).where(outbox.c.id == row["id"]).values(
                        attempts=row["attempts"] + tries, failed_rounds=rounds, last_error=error[:2000],
                        next_attempt_at=nxt))
                    failed += 1
                    errors.append(error)
                    log.warning("%s; retry after %s UTC", error, f"{nxt:%Y-%m-%d %H:%M:%S}")
    finally:
        if session is None:
            own.close()
    with engine.connect() as conn:
        left = conn.execute(sa.select(outbox.c.destination).where(outbox.c.delivered_at.is_(None))).scalars().all()
    orphaned = sum(1 for d in left if d not in hooks)
    if orphaned:
        log.warning("%d queued message(s) are for webhooks no longer in the config; they stay queued", orphaned)
    return DeliveryReport(attempted, delivered, failed, n_requests, len(left), orphaned, tuple(errors))


def pending_messages(engine: Engine) -> list[dict[str, Any]]:
    """Undelivered messages (oldest first), without their payload."""
    ensure_notify_tables(engine)
    cols = [outbox.c.id, outbox.c.idempotency_key, outbox.c.destination, outbox.c.created_at, outbox.c.attempts,
            outbox.c.next_attempt_at, outbox.c.last_error]
    with engine.connect() as conn:
        return [dict(r) for r in conn.execute(sa.select(*cols).where(outbox.c.delivered_at.is_(None))
                                              .order_by(outbox.c.id)).mappings()]


# -- monitor health --------------------------------------------------------------------

def _health_notice(conn: Connection, cfg_notify: NotifyConfig, kind: str, since: datetime, header: str, at: datetime) -> int:
    n = 0
    for hook in cfg_notify.webhooks:
        key = _key(kind, hook.name, _iso(since))
        if conn.execute(sa.select(outbox.c.id).where(outbox.c.idempotency_key == key)).first():
            continue
        _insert(conn, key, hook.name, {"format": "expwatch.notice/1", "kind": kind, "run_id": None, "as_of": _iso(at),
                                       "header": header, "lines": [], "events": []}, at)
        n += 1
    return n


def record_failure(engine: Engine, message: str, cfg_notify: NotifyConfig, *,
                   clock: Callable[[], datetime] = _now) -> bool:
    """Note that a run of expwatch failed; True when this is the first failure
    since the monitor was last healthy (a "monitor failing" notice was queued).

    Notes
    -----
    Later failures only update the stored message, so an hourly job that keeps
    failing sends one notice, not one per hour. If the state store itself cannot
    be written the failure is logged and False is returned (nothing else can be
    done from here; the heartbeat stops, which an outside watcher notices).
    """
    now = clock()
    text = " ".join(str(message).split())[:500]
    try:
        ensure_notify_tables(engine)
        with engine.begin() as conn:
            st = get_state(conn, "health") or {"state": "ok"}
            if st.get("state") == "failing":
                set_state(conn, "health", {**st, "last_error": text, "last_failure_at": _iso(now),
                                           "failures": int(st.get("failures", 1)) + 1}, now)
                return False
            set_state(conn, "health", {"state": "failing", "since": _iso(now), "last_error": text,
                                       "last_failure_at": _iso(now), "failures": 1}, now)
            header = (f"expwatch is failing since {now:%Y-%m-%d %H:%M} UTC: {text}. Checks are not being computed "
                      "until it recovers; one notice is sent when it does.")
            _health_notice(conn, cfg_notify, "monitor_failing", now, header, now)
            return True
    except SQLAlchemyError as exc:
        log.warning("could not record the monitor failure in the state store: %s", type(exc).__name__)
        return False


def record_success(engine: Engine, cfg_notify: NotifyConfig, *, clock: Callable[[], datetime] = _now) -> bool:
    """Note a successful run; True when it ends a failing spell (a recovery notice was queued)."""
    now = clock()
    ensure_notify_tables(engine)
    with engine.begin() as conn:
        st = get_state(conn, "health")
        if not st or st.get("state") != "failing":
            return False
        since = datetime.fromisoformat(st["since"].replace("Z", "+00:00"))
        set_state(conn, "health", {"state": "ok", "since": _iso(now)}, now)
        header = (f"expwatch recovered at {now:%Y-%m-%d %H:%M} UTC after failing since {since:%Y-%m-%d %H:%M} UTC "
                  f"({int(st.get('failures', 1))} failed run(s); last error: {st.get('last_error', '')})")
        _health_notice(conn, cfg_notify, "monitor_recovered", since, header, now)
        return True


def send_heartbeat(cfg_notify: NotifyConfig, *, session: requests.Session | None = None) -> bool | None:
    """Ping ``heartbeat_url`` (None when none is configured); never raises."""
    if not cfg_notify.heartbeat_url:
        return None
    from monitor.notify import ping_heartbeat

    return ping_heartbeat(cfg_notify.heartbeat_url, session=session)


