"""The alert ledger: findings become alerts that open, escalate and resolve.

Rules, applied per stable key (experiment, check, scope):

* a finding with status ``warn`` or ``alert`` and no alert in progress opens one
  (an *episode*);
* while it keeps failing the alert stays open; it *escalates* (a notifiable
  event) only when its severity rises above the highest it has had
  (warn -> alert -> critical), so a flapping check does not re-notify;
* an ``ok`` finding does not close the episode at once: the alert becomes
  ``clearing`` (event ``cleared``, not notified) and resolves only once the
  finding has stayed ``ok`` for ``clear_for`` (``checks.episode_clear_hours``,
  default 24 h). A finding that fails again within that span continues the same
  episode (event ``returned``, not notified; ``escalated`` and notified at once
  if it is more severe than the episode has been). So a check that hovers around
  its threshold gives one episode and one notification, not one per crossing;
* the experiment no longer being live, or the check no longer being evaluated
  for it, resolves the episode at once;
* running the same hour twice produces the same findings and therefore no new
  events (idempotent reruns).

A clearing alert keeps ``state = 'clearing'`` in ``expwatch_alerts``; its
``updated_at`` is the time its finding went clear (later runs leave it alone
until the episode returns or resolves), so no extra column is needed.

:func:`plan` is pure; :func:`apply` writes the plan inside the caller's
transaction, together with the run's findings, so a crash leaves either the whole
run or none of it.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, Literal

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from monitor.findings import SEVERITY_NAMES, Finding, clean_json
from monitor.state import alert_events, alerts, findings

__all__ = ["DEFAULT_CLEAR_FOR", "AlertEvent", "advance", "apply", "plan"]

EventKind = Literal["opened", "escalated", "changed", "cleared", "returned", "resolved"]

#: How long a finding must stay ``ok`` before its episode closes (``checks.episode_clear_hours``).
DEFAULT_CLEAR_FOR = timedelta(hours=24)


@dataclass(frozen=True)
class AlertEvent:
    kind: EventKind
    key: str
    experiment: str
    check: str
    scope: str
    severity: int
    summary: str
    alert_id: int | None = None

    @property
    def notifiable(self) -> bool:
        return self.kind in ("opened", "escalated", "resolved")

    def to_json(self) -> dict[str, Any]:
        return {"event": self.kind, "experiment": self.experiment, "check": self.check, "scope": self.scope,
                "severity": SEVERITY_NAMES[self.severity], "summary": self.summary}


def _event(kind: EventKind, f: Finding, a: dict[str, Any] | None, severity: int, summary: str | None = None) -> AlertEvent:
    return AlertEvent(kind, f.key, f.experiment, f.check, f.scope, severity, f.summary if summary is None else summary,
                      None if a is None else a["id"])


def plan(open_alerts: Sequence[dict[str, Any]], found: Sequence[Finding], live: Iterable[str], *,
         as_of: datetime | None = None, clear_for: timedelta = timedelta(0)) -> list[AlertEvent]:
    """Events that turn the alerts in progress into the state the findings describe.

    ``open_alerts`` are the episodes in progress (``state`` ``open`` or ``clearing``;
    a row without ``state`` counts as open). ``clear_for`` is how long a finding must
    stay ``ok`` before its episode resolves (zero: at once); with a positive span,
    ``as_of`` (the run's data time) is required.
    """
    if clear_for > timedelta(0) and as_of is None:
        raise ValueError("ledger.plan: as_of is required when clear_for is positive")
    live_set = set(live)
    by_key = {a["key"]: a for a in open_alerts}
    events: list[AlertEvent] = []
    seen: set[str] = set()
    for f in found:
        seen.add(f.key)
        a = by_key.get(f.key)
        sev = f.severity
        if a is None:
            if sev > 0:
                events.append(_event("opened", f, None, sev))
            continue
        clearing = a.get("state") == "clearing"
        if sev == 0:
            if clear_for <= timedelta(0):
                events.append(_event("resolved", f, a, 0))
            elif not clearing:
                events.append(_event("cleared", f, a, 0))
            elif as_of is not None and as_of - a["updated_at"] >= clear_for:
                events.append(_event("resolved", f, a, 0, f"{f.summary} (clear since {a['updated_at']:%Y-%m-%d %H:%M} UTC)"))
        elif sev > a["max_severity"]:
            events.append(_event("escalated", f, a, sev))
        elif clearing:
            # failing again within the span: the same episode goes on, not re-notified
            events.append(_event("returned", f, a, sev))
        elif sev != a["severity"]:
            # eased, or back up to a level it already had: recorded, not re-notified
            events.append(_event("changed", f, a, sev))
    for key, a in by_key.items():
        if key in seen:
            continue
        why = ("the experiment is no longer live" if a["experiment"] not in live_set
               else "this check is no longer evaluated for the experiment")
        events.append(AlertEvent("resolved", key, a["experiment"], a["check_name"], a["scope"], 0, why, a["id"]))
    return events


def advance(alerts_by_key: dict[str, dict[str, Any]], events: Sequence[AlertEvent], as_of: datetime,
            new_id: Callable[[], int]) -> None:
    """Apply ``events`` to an in-memory ledger (key -> the row :func:`plan` reads), as
    :func:`apply` does to the state store; a replay keeps its ledger this way."""
    for ev in events:
        if ev.kind == "opened":
            alerts_by_key[ev.key] = {"key": ev.key, "id": new_id(), "experiment": ev.experiment,
                                     "check_name": ev.check, "scope": ev.scope, "state": "open",
                                     "severity": ev.severity, "max_severity": ev.severity, "updated_at": as_of}
            continue
        if ev.kind == "resolved":
            alerts_by_key.pop(ev.key, None)
            continue
        a = alerts_by_key[ev.key]
        a["severity"] = ev.severity
        a["max_severity"] = max(a["max_severity"], ev.severity)
        a["state"] = "clearing" if ev.kind == "cleared" else "open"
        a["updated_at"] = as_of


def apply(conn: Connection, run_id: str, as_of: datetime, found: Sequence[Finding], events: Sequence[AlertEvent]) -> list[AlertEvent]:
    """Write the run's findings and the ledger events; returns events with alert ids."""
    if found:
        conn.execute(sa.insert(findings), [
            {"run_id": run_id, "as_of": as_of, "key": f.key, "experiment": f.experiment, "check_name": f.check,
             "scope": f.scope, "phase": f.phase, "status": f.status, "severity": f.severity, "summary": f.summary,
             "statistics": json.dumps(clean_json(f.statistics), sort_keys=True, ensure_ascii=False)}
            for f in found
        ])
    out: list[AlertEvent] = []
    touched: set[int] = set()
    for ev in events:
        alert_id = ev.alert_id
        if ev.kind == "opened":
            alert_id = conn.execute(sa.insert(alerts).values(
                key=ev.key, experiment=ev.experiment, check_name=ev.check, scope=ev.scope, state="open",
                severity=ev.severity, max_severity=ev.severity, summary=ev.summary, opened_at=as_of,
                updated_at=as_of, opened_run=run_id, last_run=run_id,
            )).inserted_primary_key[0]
        elif ev.kind == "resolved":
            conn.execute(sa.update(alerts).where(alerts.c.id == alert_id).values(
                state="resolved", severity=0, summary=ev.summary, updated_at=as_of, resolved_at=as_of, last_run=run_id))
        else:
            values: dict[str, Any] = {"severity": ev.severity, "summary": ev.summary, "updated_at": as_of, "last_run": run_id,
                                      "state": "clearing" if ev.kind == "cleared" else "open"}
            if ev.kind == "escalated":
                values["max_severity"] = ev.severity
            conn.execute(sa.update(alerts).where(alerts.c.id == alert_id).values(**values))
        assert alert_id is not None
        touched.add(int(alert_id))
        conn.execute(sa.insert(alert_events).values(alert_id=alert_id, run_id=run_id, at=as_of, event=ev.kind,
                                                     severity=ev.severity, summary=ev.summary))
        out.append(AlertEvent(ev.kind, ev.key, ev.experiment, ev.check, ev.scope, ev.severity, ev.summary, int(alert_id)))
    # keep the summary of every still-failing open alert current
    by_key = {f.key: f for f in found if f.severity > 0}
    for a in conn.execute(sa.select(alerts.c.id, alerts.c.key).where(alerts.c.state == "open")).all():
        if a.id in touched or a.key not in by_key:
            continue
        conn.execute(sa.update(alerts).where(alerts.c.id == a.id).values(
            summary=by_key[a.key].summary, updated_at=as_of, last_run=run_id))
    return out
