"""Replay: what expwatch would have said, step by step, over a past period.

Two ways to get there, both on a throw-away state (nothing is read from or
written to the configured store, and nothing is sent):

``fast`` (the default)
    Each assignment source is pulled **once** for the whole period, with each
    leaked unit's leak hour (``sql/assignments.sql.j2``, render flag
    ``leak_hours``), so the hourly counts as they stood at any earlier hour are
    read off that one pull. The allocation checks then run at every step on
    those counts (:func:`monitor.checks.allocation_findings_from`, the same code
    a cycle runs), and the metric checks (guardrails) run every
    ``metrics_every`` with their own queries. The alert ledger is kept in
    memory. What it reports is what a cycle with ``--full-refresh`` would have
    said at each step, from the data as it is now.
``cycles``
    :func:`monitor.cycle.run_cycle` at every step, against a temporary SQLite
    store, stepping forward so each cycle reuses the counts the previous one
    pulled, exactly as a scheduled deployment would (lookback bound included).
    Slow: every step is a whole cycle.

From the ledger events it reports, per experiment, check and scope, when the
alert would have opened, escalated and closed, and the detection delay against
a known onset. The ledger keeps its episode rule (monitor/ledger.py): an episode
closes only after its finding has been clear for ``checks.episode_clear_hours``.
The quietness report counts, per check, the episodes, those that closed within
a day of opening (flaps) and those that opened within a day of the previous
episode on the same key closing (reopened), so the noise of a configuration can
be judged on its own history.
"""

from __future__ import annotations

import itertools
import logging
import re
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

from monitor import ledger
from monitor.errors import ConfigError, MonitorError
from monitor.findings import SEVERITY_NAMES, Finding
from monitor.ledger import AlertEvent

__all__ = ["AlertTimeline", "CheckQuietness", "MissedOnset", "ReplayReport", "parse_every", "quietness", "render_replay_text", "replay",
           "replay_to_json"]

log = logging.getLogger("monitor")

_EVERY_RE = re.compile(r"^\s*(\d+)\s*([mhd])\s*$")
_UNITS = {"m": "minutes", "h": "hours", "d": "days"}
MAX_STEPS = 20000
#: An episode that closes within this long of opening is a flap; one that opens within this
#: long of the previous episode's close on the same key is a reopening.
FLAP_WINDOW = timedelta(hours=24)


def parse_every(text: str, option: str = "--every") -> timedelta:
    """``"30m"``, ``"1h"``, ``"6h"``, ``"1d"`` -> a positive timedelta.

    Raises
    ------
    ConfigError
        Anything else, or zero.
    """
    m = _EVERY_RE.match(text or "")
    if not m or int(m.group(1)) == 0:
        raise ConfigError(f"{option}: {text!r} is not a step like 30m, 1h, 6h or 1d")
    return timedelta(**{_UNITS[m.group(2)]: int(m.group(1))})


@dataclass(frozen=True)
class AlertTimeline:
    """The life of one alert in the replay.

    Attributes
    ----------
    experiment, check, scope : str
        The alert key.
    opened_at : datetime
        The first step (data time) at which the alert was open.
    severity_opened : str
        Severity name when it opened (``warn``, ``alert``, ``critical``).
    escalations : tuple of (datetime, str)
        Each escalation and the new severity.
    closed_at : datetime or None
        The step at which it resolved; None when still open at the end.
    max_severity : str
    onset : datetime or None
        The known onset supplied for this experiment (and check), if any.
    delay_hours : float or None
        ``opened_at - onset`` in hours; negative means it opened before the
        supplied onset.
    summary : str
        The finding's summary when it opened.
    returns : int
        Times the finding went clear and failed again within the clear span, so the
        episode went on without a new notification.
    """

    experiment: str
    check: str
    scope: str
    opened_at: datetime
    severity_opened: str
    escalations: tuple[tuple[datetime, str], ...]
    closed_at: datetime | None
    max_severity: str
    onset: datetime | None
    delay_hours: float | None
    summary: str
    returns: int = 0


@dataclass(frozen=True)
class MissedOnset:
    """A supplied onset for which no alert opened during the replay."""

    experiment: str
    check: str | None
    onset: datetime


@dataclass(frozen=True)
class CheckQuietness:
    """How noisy one check was over the replay.

    Attributes
    ----------
    check : str
    episodes : int
        Alert episodes (timelines) of the check.
    flaps : int
        Episodes that closed within 24 h of opening.
    reopened : int
        Episodes that opened within 24 h of the previous episode on the same
        (experiment, check, scope) closing.
    returns : int
        Times a finding went clear and failed again inside an episode (absorbed
        by the clear span: no new episode, no new notification).
    """

    check: str
    episodes: int
    flaps: int
    reopened: int
    returns: int


@dataclass(frozen=True)
class ReplayReport:
    """The outcome of :func:`replay`.

    Attributes
    ----------
    start, end : datetime
        First and last step (aware UTC).
    every : timedelta
    steps : int
        Cycles run.
    seconds : float
        Wall time of the replay.
    timelines : tuple of AlertTimeline
        Ordered by opening time, then key.
    missed : tuple of MissedOnset
    skipped : tuple of (datetime, str)
        Steps whose cycle (or metric checks) failed, with the one-line reason (the replay goes on).
    mode : str
        ``fast`` or ``cycles``.
    quietness : tuple of CheckQuietness
        Per check with at least one episode, ordered by check name.
    clear_hours : float
        The ledger's clear span the replay ran with (``checks.episode_clear_hours``).
    """

    start: datetime
    end: datetime
    every: timedelta
    steps: int
    seconds: float
    timelines: tuple[AlertTimeline, ...]
    missed: tuple[MissedOnset, ...]
    skipped: tuple[tuple[datetime, str], ...]
    mode: str = "fast"
    quietness: tuple[CheckQuietness, ...] = ()
    clear_hours: float = 0.0


def _onset_for(onsets: Mapping[Any, datetime], experiment: str, check: str) -> datetime | None:
    if (experiment, check) in onsets:
        return onsets[(experiment, check)]
    return onsets.get(experiment)


def replay(
    cfg: Any,
    start: datetime,
    end: datetime,
    *,
    every: timedelta = timedelta(hours=1),
    onsets: Mapping[Any, datetime] | None = None,
    allocation_only: bool = False,
    mode: str = "fast",
    metrics_every: timedelta = timedelta(days=1),
    on_step: Callable[[int, int, datetime], None] | None = None,
    clock: Callable[[], datetime] = lambda: datetime.now(timezone.utc),
) -> ReplayReport:
    """Replay the monitor from ``start`` to ``end`` without touching the configured state store.

    Parameters
    ----------
    cfg : Config
        The configuration (the replay never uses its ``state.url``).
    start, end : datetime
        Aware times; steps are ``start, start + every, ...`` up to and including ``end``.
    every : timedelta
        Step between evaluations (positive). ``mode="fast"`` needs ``start`` on a
        whole hour and ``every`` a whole number of hours.
    onsets : mapping, optional
        Known problem onsets, keyed by experiment id or by ``(experiment, check)``;
        the more specific key wins.
    allocation_only : bool
        Drop the configured metrics (guardrails) so only the allocation checks
        run: no metric queries.
    mode : {"fast", "cycles"}
        See the module docstring.
    metrics_every : timedelta
        ``mode="fast"``: the metric checks run at the first step, then at every
        step at least this long after the previous metric step, and at the last
        step; in between, their last findings stand. A positive multiple of
        ``every`` is the natural choice. ``mode="cycles"`` runs them every step.
    on_step : callable, optional
        Called as ``on_step(i, n, as_of)`` before each step.
    clock : callable
        Now (aware UTC); ``end`` may not be after it.

    Returns
    -------
    ReplayReport

    Raises
    ------
    ConfigError
        Naive times, ``end`` before ``start`` or in the future, a non-positive
        step, more than 20,000 steps, an unknown mode, or (fast mode) steps that
        are not whole hours.
    WarehouseError
        ``mode="fast"``: the one-time pull failed (nothing to replay).

    Notes
    -----
    ``mode="cycles"``: a step whose cycle fails (warehouse error) is listed in
    ``skipped`` and the replay continues; the next cycle pulls the hours the
    failed one missed. ``mode="fast"``: a failed metric step is listed in
    ``skipped`` and the previous metric findings stand. Notifications are never
    sent.
    """
    if start.tzinfo is None or end.tzinfo is None:
        raise ConfigError("replay: --from and --to must carry a time zone")
    start, end = start.astimezone(timezone.utc), end.astimezone(timezone.utc)
    if end < start:
        raise ConfigError(f"replay: --to {end:%Y-%m-%dT%H:%MZ} is before --from {start:%Y-%m-%dT%H:%MZ}")
    if end > clock():
        raise ConfigError(f"replay: --to {end:%Y-%m-%dT%H:%MZ} is in the future")
    if every <= timedelta(0):
        raise ConfigError("replay: --every must be positive")
    if mode not in ("fast", "cycles"):
        raise ConfigError(f"replay: mode {mode!r} is not fast or cycles")
    n = int((end - start) // every) + 1
    if n > MAX_STEPS:
        raise ConfigError(f"replay: {n} steps is more than {MAX_STEPS}; use a larger --every")
    if mode == "fast":
        if start != start.replace(minute=0, second=0, microsecond=0) or every % timedelta(hours=1):
            raise ConfigError("replay: the fast replay steps on whole hours: --from must be on the hour and "
                              "--every a whole number of hours (or use --exact)")
        if metrics_every <= timedelta(0):
            raise ConfigError("replay: --metrics-every must be positive")
    steps = [start + i * every for i in range(n)]
    onsets = {k: v.astimezone(timezone.utc) for k, v in (onsets or {}).items()}
    if allocation_only and hasattr(cfg, "metrics"):
        cfg = cfg.model_copy(update={"metrics": []})
    t0 = time.monotonic()
    open_: dict[str, dict[str, Any]] = {}
    done: list[dict[str, Any]] = []
    skipped: list[tuple[datetime, str]] = []
    stream = (_fast_events(cfg, steps, metrics_every, skipped, on_step, with_metrics=not allocation_only)
              if mode == "fast"
              else _cycle_events(cfg, steps, skipped, on_step))
    for as_of, _found, events in stream:
        for ev in events:
            sev = SEVERITY_NAMES.get(ev.severity, str(ev.severity))
            if ev.kind == "opened":
                open_[ev.key] = {"experiment": ev.experiment, "check": ev.check, "scope": ev.scope, "opened_at": as_of,
                                 "severity_opened": sev, "escalations": [], "max": ev.severity, "summary": ev.summary,
                                 "returns": 0, "clearing": False}
            elif ev.key in open_:
                a = open_[ev.key]
                if ev.kind == "escalated":
                    a["escalations"].append((as_of, sev))
                a["returns"] += int(a["clearing"] and ev.kind in ("returned", "escalated"))
                a["clearing"] = ev.kind == "cleared"
                a["max"] = max(a["max"], ev.severity)
                if ev.kind == "resolved":
                    a["closed_at"] = as_of
                    done.append(open_.pop(ev.key))
    timelines = []
    for a in done + list(open_.values()):
        onset = _onset_for(onsets, a["experiment"], a["check"])
        delay = None if onset is None else (a["opened_at"] - onset).total_seconds() / 3600.0
        timelines.append(AlertTimeline(a["experiment"], a["check"], a["scope"], a["opened_at"], a["severity_opened"],
                                       tuple(a["escalations"]), a.get("closed_at"),
                                       SEVERITY_NAMES.get(a["max"], str(a["max"])), onset, delay, a["summary"],
                                       a["returns"]))
    timelines.sort(key=lambda t: (t.opened_at, t.experiment, t.check, t.scope))
    missed = []
    for key, onset in sorted(onsets.items(), key=lambda kv: str(kv[0])):
        exp, check = (key if isinstance(key, tuple) else (key, None))
        if not any(t.experiment == exp and (check is None or t.check == check) for t in timelines):
            missed.append(MissedOnset(exp, check, onset))
    checks_cfg = getattr(cfg, "checks", None)
    return ReplayReport(start, steps[-1], every, n, time.monotonic() - t0, tuple(timelines),
                        tuple(missed), tuple(skipped), mode, quietness(timelines),
                        float(getattr(checks_cfg, "episode_clear_hours", 0.0)))


def quietness(timelines: Sequence[AlertTimeline]) -> tuple[CheckQuietness, ...]:
    """Per check: episodes, flaps (closed within :data:`FLAP_WINDOW` of opening),
    reopenings (opened within :data:`FLAP_WINDOW` of the previous close on the same key)
    and returns absorbed inside episodes."""
    by_check: dict[str, list[int]] = {}
    last_close: dict[tuple[str, str, str], datetime | None] = {}
    for t in sorted(timelines, key=lambda t: t.opened_at):
        row = by_check.setdefault(t.check, [0, 0, 0, 0])
        key = (t.experiment, t.check, t.scope)
        before = last_close.get(key)
        row[0] += 1
        row[1] += int(t.closed_at is not None and t.closed_at - t.opened_at < FLAP_WINDOW)
        row[2] += int(before is not None and t.opened_at - before < FLAP_WINDOW)
        row[3] += t.returns
        last_close[key] = t.closed_at
    return tuple(CheckQuietness(c, *row) for c, row in sorted(by_check.items()))


def _cycle_events(cfg: Any, steps: list[datetime], skipped: list[tuple[datetime, str]],
                  on_step: Callable[[int, int, datetime], None] | None) -> Iterator[tuple[datetime, list[Finding], list[AlertEvent]]]:
    """One whole cycle per step against a temporary SQLite store."""
    from monitor.cycle import run_cycle

    with tempfile.TemporaryDirectory(prefix="expwatch-replay-") as tmp:
        url = f"sqlite:///{Path(tmp) / 'replay-state.sqlite'}"
        rcfg = cfg.model_copy(update={"state": cfg.state.model_copy(update={"url": url})})
        for i, as_of in enumerate(steps):
            if on_step:
                on_step(i, len(steps), as_of)
            try:
                result = run_cycle(rcfg, as_of=as_of, wait_seconds=0.0, notify=False)
            except MonitorError as exc:
                skipped.append((as_of, str(exc)))
                log.warning("replay step %s failed: %s", as_of.isoformat(), exc)
                continue
            yield as_of, result.findings, result.events


def _fast_events(cfg: Any, steps: list[datetime], metrics_every: timedelta, skipped: list[tuple[datetime, str]],
                 on_step: Callable[[int, int, datetime], None] | None, *, with_metrics: bool = True) -> Iterator[tuple[datetime, list[Finding], list[AlertEvent]]]:
    """Pull once, then evaluate every step on the counts as they stood then (see the module docstring)."""
    from monitor.checks import HourlyCounts, allocation_findings_from, design_findings, hour_index
    from monitor.cycle import load_registry, metric_findings
    from monitor.firsts import relation as first_relation
    from monitor.pull import _naive, _tidy, render_source_sql
    from monitor.warehouse import open_warehouse

    wh = open_warehouse(cfg.warehouse)
    try:
        wh.pin()  # DuckDB: one session, so each metric step's queries share one first-assignment relation
        exps, problems = load_registry(cfg, wh)
        live_sets = [[e for e in exps if e.live_at(t, cfg.registry.live_status)] for t in steps]
        ever = {e.id: e for live in live_sets for e in live}
        tables: dict[str, dict[str, HourlyCounts]] = {src.name: {} for src in cfg.sources}
        if ever:
            window_start = min(e.start for e in ever.values()).replace(minute=0, second=0, microsecond=0)
            params = {"window_start": _naive(window_start), "as_of": _naive(steps[-1]),
                      "since": _naive(window_start), "experiment_ids": list(ever)}
            for position, src in enumerate(cfg.sources):
                # the first source groups the first-assignment relation (DuckDB), which the metric
                # steps then read as of their own time (its leak times make that exact)
                firsts = (first_relation(wh, src, list(ever), window_start, steps[-1])
                          if position == 0 and cfg.metrics and with_metrics else None)
                raw = wh.query(f"assignments[{src.name}]", render_source_sql(src, wh, leak_hours=True, firsts=firsts),
                               params, expanding=("experiment_ids",))
                tables[src.name] = HourlyCounts.tables(_tidy(raw, src.segments or []))
        design = design_findings(problems)
        open_alerts: dict[str, dict[str, Any]] = {}
        metric_found: list[Finding] = []
        last_metric: datetime | None = None
        alert_ids = itertools.count(1)
        clear_for = timedelta(hours=cfg.checks.episode_clear_hours)
        for i, as_of in enumerate(steps):
            if on_step:
                on_step(i, len(steps), as_of)
            live = live_sets[i]
            h = hour_index(as_of)
            now = {name: {e.id: t[e.id].before(h) for e in live if e.id in t} for name, t in tables.items()}
            found = design + allocation_findings_from(live, now, cfg.sources[0].name, as_of, cfg.checks)
            if with_metrics and (last_metric is None or as_of - last_metric >= metrics_every or i == len(steps) - 1):
                try:
                    metric_found = metric_findings(cfg, wh, live, as_of)[0]
                    last_metric = as_of
                except MonitorError as exc:
                    skipped.append((as_of, f"metric checks: {exc}"))
                    log.warning("replay metric step %s failed: %s", as_of.isoformat(), exc)
            ids = {e.id for e in live}
            found = found + [f for f in metric_found if f.experiment in ids]
            events = ledger.plan(list(open_alerts.values()), found, [e.id for e in live] + [p.experiment for p in problems],
                                 as_of=as_of, clear_for=clear_for)
            ledger.advance(open_alerts, events, as_of, lambda: next(alert_ids))
            yield as_of, found, events
    finally:
        wh.dispose()


def _fmt(t: datetime | None) -> str:
    return "-" if t is None else f"{t:%Y-%m-%d %H:%M}"


def _severity_counts(report: ReplayReport) -> str:
    n = {name: sum(t.max_severity == name for t in report.timelines) for name in ("warn", "alert", "critical")}
    return ", ".join(f"{v} reached {k}" for k, v in n.items())


def _every_text(td: timedelta) -> str:
    s = int(td.total_seconds())
    for unit, size in (("d", 86400), ("h", 3600), ("m", 60)):
        if s % size == 0:
            return f"{s // size}{unit}"
    return f"{s}s"


def render_replay_text(report: ReplayReport) -> str:
    """The replay as a plain-text table (times UTC)."""
    lines = [f"replay {_fmt(report.start)} .. {_fmt(report.end)} UTC every {_every_text(report.every)}: "
             f"{report.steps} {'steps' if report.mode == 'fast' else 'cycles'} in {report.seconds:.0f}s, "
             f"{len(report.timelines)} alerts ({_severity_counts(report)})"]
    head = f"{'experiment':<26} {'check':<10} {'scope':<10} {'opened':<16} {'escalated':<26} {'closed':<16} {'max':<8} delay"
    lines += ["", head]
    for t in report.timelines:
        esc = ", ".join(f"{_fmt(at)} {s}" for at, s in t.escalations) or "-"
        delay = "-" if t.delay_hours is None else f"{t.delay_hours:+.0f}h"
        lines.append(f"{t.experiment[:26]:<26} {t.check:<10} {t.scope[:10]:<10} {_fmt(t.opened_at):<16} {esc:<26} "
                     f"{_fmt(t.closed_at) if t.closed_at else 'open':<16} {t.max_severity:<8} {delay}")
    if report.quietness:
        lines += ["", (f"quietness (an episode closes after {report.clear_hours:g} h clear; flap: closed within 24 h of "
                       "opening; reopened: opened within 24 h of the previous close on the same key; returns: failed "
                       "again while clearing, no new notification)"),
                  f"{'check':<16} {'episodes':>8} {'flaps':>6} {'reopened':>8} {'returns':>7}"]
        lines += [f"{q.check:<16} {q.episodes:>8} {q.flaps:>6} {q.reopened:>8} {q.returns:>7}" for q in report.quietness]
    for m in report.missed:
        lines.append(f"missed: {m.experiment}{' · ' + m.check if m.check else ''}: onset {_fmt(m.onset)} UTC, no alert opened")
    for at, why in report.skipped:
        lines.append(f"skipped step {_fmt(at)} UTC: {why}")
    return "\n".join(lines) + "\n"


def replay_to_json(report: ReplayReport) -> dict[str, Any]:
    """The replay as a JSON-ready document (``"format": "expwatch.replay/1"``)."""
    iso = (lambda t: None if t is None else t.isoformat())
    return {
        "format": "expwatch.replay/1",
        "start": iso(report.start), "end": iso(report.end), "every_seconds": int(report.every.total_seconds()),
        "mode": report.mode, "steps": report.steps, "seconds": round(report.seconds, 3),
        "alerts": [{"experiment": t.experiment, "check": t.check, "scope": t.scope, "opened_at": iso(t.opened_at),
                    "severity_opened": t.severity_opened,
                    "escalations": [{"at": iso(a), "severity": s} for a, s in t.escalations],
                    "closed_at": iso(t.closed_at), "max_severity": t.max_severity, "onset": iso(t.onset),
                    "delay_hours": None if t.delay_hours is None else round(t.delay_hours, 3), "summary": t.summary,
                    "returns": t.returns}
                   for t in report.timelines],
        "quietness": {"clear_hours": report.clear_hours, "flap_window_hours": FLAP_WINDOW.total_seconds() / 3600,
                      "by_check": [{"check": q.check, "episodes": q.episodes, "flaps": q.flaps, "reopened": q.reopened,
                                    "returns": q.returns} for q in report.quietness]},
        "missed": [{"experiment": m.experiment, "check": m.check, "onset": iso(m.onset)} for m in report.missed],
        "skipped": [{"at": iso(a), "reason": r} for a, r in report.skipped],
    }
