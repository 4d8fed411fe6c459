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
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

import requests
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine
from sqlalchemy.exc import IntegrityError, SQLAlchemyError

from monitor.errors import ConfigError, MonitorError, StateError
from monitor.findings import SEVERITY_NAMES
from monitor.notify_config import NotifyConfig, WebhookConfig
from monitor.state import UTCDateTime, alerts, metadata

__all__ = ["DeliveryReport", "ExperimentMeta", "Mute", "active_mutes", "begin_cycle", "deliver_pending", "enqueue",
           "ensure_notify_tables", "expire_digests", "get_state", "insert_email", "migration_delivery_leases",
           "migration_outbox", "mute", "next_email_attempt", "outbox", "pending_messages", "record_failure",
           "record_success", "send_heartbeat", "set_state", "unmute"]

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
    sa.Column("lease_owner", sa.String(64)),        # the deliverer sending the row now (NULL: nobody)
    sa.Column("lease_expires_at", UTCDateTime),     # ... until then; afterwards another may claim it
    sa.Column("deadline_at", UTCDateTime),          # digest e-mails: give up after this time
    sa.Column("expired_at", UTCDateTime),           # set when a digest e-mail passed its deadline undelivered
    sa.Index("ix_expwatch_outbox_pending", "delivered_at", "next_attempt_at"),
)
_LEASE_COLUMNS = ("lease_owner", "lease_expires_at", "deadline_at", "expired_at")
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


def migration_delivery_leases(conn: Connection) -> None:
    """Add the lease, deadline and expiry columns to an outbox created before them (idempotent)."""
    if not sa.inspect(conn).has_table(outbox.name):
        migration_outbox(conn)
        return
    have = {c["name"] for c in sa.inspect(conn).get_columns(outbox.name)}
    q = conn.dialect.identifier_preparer.quote
    for name in _LEASE_COLUMNS:
        if name not in have:
            col = outbox.c[name]
            conn.execute(sa.text(f"ALTER TABLE {q(outbox.name)} ADD COLUMN {q(name)} "
                                 f"{col.type.compile(dialect=conn.dialect)}"))


def ensure_notify_tables(engine: Engine) -> None:
    """Create the notification tables (and the outbox's lease columns) if a store
    predates them (no-op otherwise)."""
    insp = sa.inspect(engine)
    if all(insp.has_table(t.name) for t in _TABLES) and \
            set(_LEASE_COLUMNS) <= {c["name"] for c in insp.get_columns(outbox.name)}:
        return
    with engine.begin() as conn:
        migration_outbox(conn)
        migration_delivery_leases(conn)


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
    of the events gets no message. A ``collision`` pair finding is reported under one
    experiment of the pair; its route matches if it matches either experiment, so
    both owners hear of it (each event lists ``experiments``). Re-enqueueing the same run gives the same keys
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
        mine = [e for e in keep if any(hook.route.matches(x, metas.get(x, ExperimentMeta()).owner,
                                                          metas.get(x, ExperimentMeta()).tags) for x in _concerns(e))]
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
                        "summary": e.summary, "experiments": list(_concerns(e))} for e in mine],
        }
        _insert(conn, key, hook.name, message, as_of)
        written.append(key)
    return written


def _concerns(ev: Any) -> tuple[str, ...]:
    """The experiments an event is about: its own, and for a ``collision`` pair finding
    (reported once, under one experiment of the pair) the other one named by its scope."""
    other = ev.scope.split(":", 1)[0] if ev.check == "collision" and ev.scope != "pairs" else None
    return (ev.experiment,) if other in (None, ev.experiment) else (ev.experiment, other)


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
    """HTTP requests and SMTP transactions sent (retries within the round included)."""
    pending: int
    """Undelivered messages left in the outbox (due later, failed, or for a removed destination)."""
    orphaned: int
    """Of those, messages whose destination is no longer configured."""
    errors: tuple[str, ...] = ()
    leased: int = 0
    """Due messages skipped because another process held their lease."""
    expired: int = 0
    """Digest e-mails closed this round because their deadline passed undelivered."""


def backoff_seconds(failed_rounds: int, cfg_notify: NotifyConfig, rng: random.Random) -> float:
    """Wait before the next round: ``d = min(base * 2**(k-1), max)`` after ``k``
    failed rounds, drawn uniformly from ``[d/2, d]``."""
    k = max(1, int(failed_rounds))
    d = min(cfg_notify.retry_base_seconds * 2.0 ** min(k - 1, 60), cfg_notify.retry_max_seconds)
    return d / 2 + rng.uniform(0.0, d / 2)


def _store_error(engine: Engine, exc: SQLAlchemyError) -> StateError:
    from monitor.state import _first
    from monitor.warehouse import safe_url

    return StateError(f"state store {safe_url(engine.url)}: write failed while delivering notifications "
                      f"({_first(exc)}); undelivered messages stay queued")


def _claim(engine: Engine, row_id: int, owner: str, now: datetime, seconds: float, *,
           due: bool = True) -> Mapping[str, Any] | None:
    """Take the lease of one open row (and, with ``due``, only if its next attempt
    has come); returns the row as it stands, or None when it was delivered,
    rescheduled or is leased by another deliverer."""
    cond = [outbox.c.id == row_id, outbox.c.delivered_at.is_(None), outbox.c.expired_at.is_(None),
            sa.or_(outbox.c.lease_owner.is_(None), outbox.c.lease_expires_at <= now)]
    if due:
        cond.append(outbox.c.next_attempt_at <= now)
    with engine.begin() as conn:
        res = conn.execute(sa.update(outbox).where(*cond).values(
            lease_owner=owner, lease_expires_at=now + timedelta(seconds=seconds)))
        if res.rowcount != 1:
            return None
        return conn.execute(sa.select(outbox).where(outbox.c.id == row_id)).mappings().one()


def _send_webhook(row: Mapping[str, Any], hook: WebhookConfig, session: requests.Session,
                  sleep: Callable[[float], None]) -> tuple[int, str | None, float | None]:
    """One delivery round of a webhook message: (tries, error or None, Retry-After seconds or None)."""
    from monitor.notify import RetryLater, post_webhook, render_body

    message = json.loads(row["payload"])
    tries, error = 0, None
    for i in range(hook.max_attempts):
        tries += 1
        try:
            body = render_body(message, hook)
            post_webhook(hook, body, row["idempotency_key"], session=session)
            return tries, None, None
        except ConfigError as exc:
            return tries, str(exc), None  # retrying at once cannot fix a template or a missing secret
        except RetryLater as exc:  # the server said when: that ends the round
            return tries, str(exc), exc.retry_after
        except MonitorError as exc:
            error = str(exc)
            if i + 1 < hook.max_attempts:
                sleep(min(0.25 * 2**i, 2.0))
    return tries, error, None


def _send_email(row: Mapping[str, Any], email_cfg: Any) -> tuple[int, str | None, float | None]:
    """One SMTP transaction for one digest recipient (one try per round)."""
    from monitor.digest import send_prepared

    try:
        send_prepared(json.loads(row["payload"]), email_cfg)
    except MonitorError as exc:
        return 1, str(exc), None
    return 1, None, None


def deliver_pending(engine: Engine, cfg_notify: NotifyConfig, *, session: requests.Session | None = None,
                    clock: Callable[[], datetime] | None = None, rng: random.Random | None = None,
                    sleep: Callable[[float], None] = time.sleep, limit: int = 1000,
                    now_ids: Sequence[int] = ()) -> DeliveryReport:
    """Send every due, undelivered message: webhook messages and digest e-mails.

    Parameters
    ----------
    engine
        The state store.
    cfg_notify
        Destinations by name; a queued message whose destination was removed
        from the config stays queued (counted in ``orphaned``). Digest e-mails
        are sent only when ``email`` is configured.
    session
        HTTP session (tests pass one; default a fresh one per call).
    clock
        Returns the current aware UTC time (default the system clock).
    rng
        Randomness of the backoff jitter (seed it for reproducible schedules).
    sleep
        Pause between webhook retries within one round (``min(0.25 * 2**i, 2)`` seconds).
    limit
        At most this many messages per call, oldest first.
    now_ids
        Outbox ids to try now even if their next attempt is later (a manual
        ``expwatch digest --send`` retries the day's digest at once).

    Returns
    -------
    DeliveryReport

    Raises
    ------
    StateError
        The state store could not be written (one line; nothing is lost: an
        unmarked message is sent again later with the same key).

    Notes
    -----
    Before sending a row the deliverer takes its *lease* (``lease_owner``,
    ``lease_expires_at``) in a conditional UPDATE, so two processes never send
    the same row at the same time; the lease lasts as long as one round can take
    (timeouts and pauses) plus a minute, so a deliverer killed mid-round frees
    its rows by itself. Each message is marked delivered (or its failure
    recorded) in its own transaction, so a crash loses at most the mark of the
    message in flight, which is then re-sent with the same idempotency key.

    A webhook that answers with ``Retry-After`` (seconds or an HTTP date) ends
    the round at once; the round counts as one failed round and the next attempt
    waits what the server asked, at most ``retry_max_seconds``. A template that
    fails to render counts as a failed attempt and is retried like a network
    error (fixing the template releases the message). Digest e-mails get one SMTP
    transaction per round and are closed at their deadline (:func:`expire_digests`).
    """
    clock = clock or _now
    rng = rng or random.Random()
    hooks: dict[str, WebhookConfig] = {h.name: h for h in cfg_notify.webhooks}
    me = uuid.uuid4().hex
    attempted = delivered = failed = n_requests = leased = 0
    errors: list[str] = []
    own = session or requests.Session()
    try:
        ensure_notify_tables(engine)
        expired = expire_digests(engine, cfg_notify, clock=clock)
        now = clock()
        open_rows = sa.and_(outbox.c.delivered_at.is_(None), outbox.c.expired_at.is_(None))
        due_now = outbox.c.next_attempt_at <= now
        if now_ids:
            due_now = sa.or_(due_now, outbox.c.id.in_(list(now_ids)))
        with engine.connect() as conn:
            due = conn.execute(sa.select(outbox).where(open_rows, due_now).order_by(outbox.c.id).limit(limit)).mappings().all()
        for row in due:
            if row["channel"] == "email":
                if cfg_notify.email is None:
                    continue
                lease = cfg_notify.email.timeout_seconds * 3 + 60
            else:
                hook = hooks.get(row["destination"])
                if hook is None:
                    continue
                lease = (hook.timeout_seconds + 2.0) * hook.max_attempts + 60
            claimed = _claim(engine, row["id"], me, clock(), lease, due=row["id"] not in now_ids)
            if claimed is None:
                leased += 1
                continue
            row = claimed
            attempted += 1
            if row["channel"] == "email":
                tries, error, retry_after = _send_email(row, cfg_notify.email)
            else:
                tries, error, retry_after = _send_webhook(row, hook, own, sleep)
            n_requests += tries
            at = clock()
            mine = sa.and_(outbox.c.id == row["id"], outbox.c.lease_owner == me)
            with engine.begin() as conn:
                if error is None:
                    conn.execute(sa.update(outbox).where(mine).values(
                        delivered_at=at, attempts=row["attempts"] + tries, last_error=None,
                        lease_owner=None, lease_expires_at=None))
                    delivered += 1
                    continue
                rounds = row["failed_rounds"] + 1
                wait = (min(retry_after, cfg_notify.retry_max_seconds) if retry_after is not None
                        else backoff_seconds(rounds, cfg_notify, rng))
                nxt = at + timedelta(seconds=wait)
                conn.execute(sa.update(outbox).where(mine).values(
                    attempts=row["attempts"] + tries, failed_rounds=rounds, last_error=error[:2000],
                    next_attempt_at=nxt, lease_owner=None, lease_expires_at=None))
            failed += 1
            errors.append(error)
            log.warning("%s; retry after %s UTC", error, f"{nxt:%Y-%m-%d %H:%M:%S}")
        with engine.connect() as conn:
            left = conn.execute(sa.select(outbox.c.channel, outbox.c.destination).where(open_rows)).all()
    except SQLAlchemyError as exc:
        raise _store_error(engine, exc) from exc
    finally:
        if session is None:
            own.close()
    orphaned = sum(1 for ch, d in left if (d not in hooks if ch == "webhook" else cfg_notify.email is None))
    if orphaned:
        log.warning("%d queued message(s) are for destinations no longer in the config; they stay queued", orphaned)
    return DeliveryReport(attempted, delivered, failed, n_requests, len(left), orphaned, tuple(errors), leased, expired)


def pending_messages(engine: Engine) -> list[dict[str, Any]]:
    """Undelivered webhook messages (oldest first), without their payload."""
    ensure_notify_tables(engine)
    cols = [outbox.c.id, outbox.c.idempotency_key, outbox.c.destination, outbox.c.created_at, outbox.c.attempts,
            outbox.c.next_attempt_at, outbox.c.last_error]
    with engine.connect() as conn:
        return [dict(r) for r in conn.execute(sa.select(*cols).where(
            outbox.c.delivered_at.is_(None), outbox.c.expired_at.is_(None), outbox.c.channel == "webhook")
            .order_by(outbox.c.id)).mappings()]


def insert_email(conn: Connection, key: str, recipient: str, message: dict[str, Any], at: datetime,
                 deadline: datetime) -> None:
    """Queue one digest e-mail for one recipient (``message`` as :func:`monitor.digest.send_prepared` takes it)."""
    conn.execute(sa.insert(outbox).values(
        idempotency_key=key, channel="email", destination=recipient[:128],
        payload=json.dumps(message, sort_keys=True, ensure_ascii=False), created_at=at, attempts=0,
        failed_rounds=0, next_attempt_at=at, delivered_at=None, last_error=None, deadline_at=deadline))


def expire_digests(engine: Engine, cfg_notify: NotifyConfig, *, clock: Callable[[], datetime] = _now) -> int:
    """Close the digest e-mails still undelivered at their deadline and queue one
    "digest undelivered" monitor-health notice per day on every webhook.

    Returns the number of e-mails closed. A row leased by a deliverer right now
    is left to that deliverer.
    """
    now = clock()
    with engine.begin() as conn:
        rows = conn.execute(sa.select(outbox.c.id, outbox.c.payload, outbox.c.last_error, outbox.c.deadline_at).where(
            outbox.c.channel == "email", outbox.c.delivered_at.is_(None), outbox.c.expired_at.is_(None),
            outbox.c.deadline_at <= now,
            sa.or_(outbox.c.lease_owner.is_(None), outbox.c.lease_expires_at <= now))).mappings().all()
        if not rows:
            return 0
        conn.execute(sa.update(outbox).where(outbox.c.id.in_([r["id"] for r in rows])).values(
            expired_at=now, lease_owner=None, lease_expires_at=None))
        by_day: dict[tuple[str, str], list[Mapping[str, Any]]] = {}
        for r in rows:
            m = json.loads(r["payload"])
            by_day.setdefault((m["day"], m["message_id"]), []).append({**m, "last_error": r["last_error"],
                                                                       "deadline_at": r["deadline_at"]})
        for (day, message_id), lost in sorted(by_day.items()):
            who = sorted(m["recipient"] for m in lost)
            last = next((m["last_error"] for m in lost if m["last_error"]), "no attempt was possible")
            header = (f"expwatch could not deliver the digest of {day} to {len(who)} recipient(s) by its deadline "
                      f"({lost[0]['deadline_at']:%Y-%m-%d %H:%M} UTC): {', '.join(who)}. Last error: {last}")
            log.error("%s", header, extra={"event": "digest_undelivered"})
            for hook in cfg_notify.webhooks:
                key = _key("digest_undelivered", hook.name, message_id, who)
                if not conn.execute(sa.select(outbox.c.id).where(outbox.c.idempotency_key == key)).first():
                    _insert(conn, key, hook.name, {"format": "expwatch.notice/1", "kind": "digest_undelivered",
                                                   "run_id": None, "as_of": _iso(now), "header": header,
                                                   "lines": [], "events": [], "day": day}, now)
        return len(rows)


def next_email_attempt(engine: Engine) -> datetime | None:
    """When the next undelivered digest e-mail is due (its retry or its deadline, whichever is first)."""
    ensure_notify_tables(engine)
    with engine.connect() as conn:
        rows = conn.execute(sa.select(outbox.c.next_attempt_at, outbox.c.deadline_at).where(
            outbox.c.channel == "email", outbox.c.delivered_at.is_(None), outbox.c.expired_at.is_(None))).all()
    times = [min(t for t in r if t is not None) for r in rows]
    return min(times) if times else None


# -- monitor health --------------------------------------------------------------------
#
# Every cycle takes a number from a counter in the state store when it starts
# (:func:`begin_cycle`, one transaction that holds the store's write lock). The
# health record keeps the highest number of a failed cycle and of a successful
# one: the monitor is failing while the former is the larger. So a cycle that
# started before the latest failure cannot declare recovery, however late it
# commits, and an outage (a spell of failing) is named by the number of the cycle
# that opened it, which is what the notices' idempotency keys are made of.

def _locked_state(conn: Connection, key: str, at: datetime) -> dict[str, Any]:
    """Read a state row after taking its write lock (SQLite: the database's; others: the row's)."""
    touch = sa.update(notify_state).where(notify_state.c.key == key).values(updated_at=at)
    if conn.execute(touch).rowcount == 0:
        try:
            with conn.begin_nested():
                conn.execute(sa.insert(notify_state).values(key=key, value="{}", updated_at=at))
        except IntegrityError:  # inserted by another process meanwhile
            conn.execute(touch)
    return get_state(conn, key) or {}


def _next_cycle(conn: Connection, at: datetime) -> int:
    n = int(_locked_state(conn, "cycles", at).get("last", 0)) + 1
    set_state(conn, "cycles", {"last": n}, at)
    return n


def begin_cycle(engine: Engine, *, clock: Callable[[], datetime] = _now) -> int:
    """Take the next cycle number; call it when a cycle starts, before it reads anything.

    Raises
    ------
    StateError
        The state store cannot be written.
    """
    try:
        ensure_notify_tables(engine)
        with engine.begin() as conn:
            return _next_cycle(conn, clock())
    except SQLAlchemyError as exc:
        from monitor.state import _first
        from monitor.warehouse import safe_url

        raise StateError(f"state store {safe_url(engine.url)}: cannot start a cycle: {_first(exc)}") from exc


def _health(st: dict[str, Any]) -> dict[str, Any]:
    """The health record, upgrading one written before cycle numbers existed."""
    if "failed_cycle" in st:
        return st
    failing = st.get("state") == "failing"
    return {**st, "failed_cycle": 1 if failing else 0, "ok_cycle": 0, "outage": 1 if failing else None}


def _health_for(conn: Connection, cycle: int | None, at: datetime) -> tuple[dict[str, Any], int, bool]:
    """The health record (write-locked), the cycle's number and whether the monitor was failing."""
    st = _health(_locked_state(conn, "health", at))
    n = cycle if cycle is not None else _next_cycle(conn, at)
    return st, n, st["failed_cycle"] > st["ok_cycle"]


def _health_notice(conn: Connection, cfg_notify: NotifyConfig, kind: str, outage: str, header: str, at: datetime) -> int:
    n = 0
    for hook in cfg_notify.webhooks:
        key = _key(kind, hook.name, outage)
        if conn.execute(sa.select(outbox.c.id).where(outbox.c.idempotency_key == key)).first():
            continue
        _insert(conn, key, hook.name, {"format": "expwatch.notice/1", "kind": kind, "run_id": None, "as_of": _iso(at),
                                       "header": header, "lines": [], "events": [], "outage": outage}, at)
        n += 1
    return n


def _outage_id(st: dict[str, Any]) -> str:
    return _key("outage", st.get("outage"), st.get("since"))[:16]


def record_failure(engine: Engine, message: str, cfg_notify: NotifyConfig, *, cycle: int | None = None,
                   clock: Callable[[], datetime] = _now) -> bool:
    """Note that a run of expwatch failed; True when this failure opened an outage
    (a "monitor failing" notice was queued).

    Parameters
    ----------
    cycle
        The failed cycle's number from :func:`begin_cycle` (None: a fresh number,
        as if the cycle had started now).

    Notes
    -----
    Later failures only update the stored message, so an hourly job that keeps
    failing sends one notice, not one per hour. A failure of a cycle that started
    before the latest successful one opens no outage (the monitor has worked
    since). If the state store itself cannot be written the failure is logged as
    an error and False is returned: it cannot be recorded in the store that
    failed; the heartbeat stops and the metrics file's
    ``expwatch_last_attempt_success`` gauge is 0, which outside watchers notice.
    """
    now = clock()
    text = " ".join(str(message).split())[:500]
    try:
        ensure_notify_tables(engine)
        with engine.begin() as conn:
            st, n, was_failing = _health_for(conn, cycle, now)
            st = {**st, "failed_cycle": max(st["failed_cycle"], n), "last_error": text, "last_failure_at": _iso(now)}
            if was_failing or st["failed_cycle"] <= st["ok_cycle"]:
                if was_failing:
                    st["failures"] = int(st.get("failures", 1)) + 1
                set_state(conn, "health", st, now)
                return False
            st.update({"state": "failing", "since": _iso(now), "outage": n, "failures": 1})
            set_state(conn, "health", st, now)
            header = (f"expwatch is failing since {now:%Y-%m-%d %H:%M} UTC: {text}. Checks are not being computed "
                      "until it recovers; one notice is sent when it does.")
            _health_notice(conn, cfg_notify, "monitor_failing", _outage_id(st), header, now)
            return True
    except SQLAlchemyError as exc:
        from monitor.state import _first

        log.error("could not record the monitor failure in the state store: %s", _first(exc),
                  extra={"event": "state_write_failed"})
        return False


def record_success(engine: Engine, cfg_notify: NotifyConfig, *, cycle: int | None = None,
                   clock: Callable[[], datetime] = _now) -> bool:
    """Note a successful run; True when it ends an outage (a recovery notice was queued).

    A cycle whose number (``cycle``, from :func:`begin_cycle`) is lower than the
    latest failed cycle's started before that failure and ends nothing.
    """
    now = clock()
    try:
        ensure_notify_tables(engine)
        with engine.begin() as conn:
            st, n, was_failing = _health_for(conn, cycle, now)
            st["ok_cycle"] = max(st["ok_cycle"], n)
            if not was_failing or st["failed_cycle"] > st["ok_cycle"]:
                set_state(conn, "health", st, now)
                return False
            since = datetime.fromisoformat(st["since"].replace("Z", "+00:00"))
            outage = _outage_id(st)
            header = (f"expwatch recovered at {now:%Y-%m-%d %H:%M} UTC after failing since {since:%Y-%m-%d %H:%M} UTC "
                      f"({int(st.get('failures', 1))} failed run(s); last error: {st.get('last_error', '')})")
            set_state(conn, "health", {**st, "state": "ok", "since": _iso(now)}, now)
            _health_notice(conn, cfg_notify, "monitor_recovered", outage, header, now)
            return True
    except SQLAlchemyError as exc:
        raise _store_error(engine, exc) from exc


def send_heartbeat(cfg_notify: NotifyConfig, *, session: requests.Session | None = None) -> bool | None:
    """Ping ``heartbeat_url`` (None when none is configured); never raises."""
    if not cfg_notify.heartbeat_url:
        return None
    from monitor.notify import ping_heartbeat

    return ping_heartbeat(cfg_notify.heartbeat_url, session=session)
