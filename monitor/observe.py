"""Observability: structured log lines, a Prometheus text-format metrics file and
the run history shown by ``expwatch status``.

Library code here never installs a handler: :class:`JsonFormatter` and
:class:`RunContextFilter` are attached by the command line (``--log-format json``).
"""

from __future__ import annotations

import json
import logging
import os
import sys
import tempfile
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import sqlalchemy as sa

from monitor.errors import ConfigError
from monitor.findings import SEVERITY_NAMES

__all__ = [
    "JsonFormatter",
    "QueryRecord",
    "RUN_ID",
    "RunContextFilter",
    "RunSummary",
    "StatusReport",
    "format_count",
    "log_cycle",
    "metrics_text",
    "query_records",
    "read_status",
    "run_context",
    "render_status_text",
    "status_to_json",
    "write_metrics_file",
]

log = logging.getLogger("monitor")

#: LogRecord attributes that are not user ``extra=`` fields.
_STANDARD = set(vars(logging.LogRecord("x", 0, "x", 0, "", None, None))) | {"message", "asctime"}


class JsonFormatter(logging.Formatter):
    """One JSON object per line: ``time`` (ISO 8601 UTC), ``level``, ``logger``,
    ``message`` and every ``extra=`` field of the record (``run_id``, ``event``,
    ``query``, ``seconds``, ``rows``...).

    Notes
    -----
    Values that JSON cannot hold are written as their ``str``; non-finite floats
    become ``null``, so every line parses with a strict JSON reader.
    """

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        for k, v in vars(record).items():
            if k not in _STANDARD and not k.startswith("_"):
                out[k] = _jsonable(v)
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, ensure_ascii=False, allow_nan=False, sort_keys=False)


def _jsonable(v: Any) -> Any:
    if isinstance(v, float):
        return v if v == v and abs(v) != float("inf") else None
    if isinstance(v, (str, int, bool)) or v is None:
        return v
    if isinstance(v, datetime):
        return v.astimezone(timezone.utc).isoformat()
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    return str(v)


#: the run id of the cycle this thread or task is working for (see :func:`run_context`)
RUN_ID: ContextVar[str | None] = ContextVar("expwatch_run_id", default=None)


@contextmanager
def run_context(run_id: str) -> Iterator[str]:
    """Every record logged inside the ``with`` block (in this thread or task) carries
    ``run_id`` when a :class:`RunContextFilter` is attached to the handler."""
    token = RUN_ID.set(run_id)
    try:
        yield run_id
    finally:
        RUN_ID.reset(token)


class RunContextFilter(logging.Filter):
    """Adds the ``run_id`` of the current :func:`run_context`, then the fields in
    :attr:`context` (defaults: ``expwatch serve`` puts its session id there as
    ``run_id`` and ``serve_id``), to every record that lacks them."""

    def __init__(self) -> None:
        super().__init__()
        self.context: dict[str, Any] = {}

    def filter(self, record: logging.LogRecord) -> bool:
        run_id = RUN_ID.get()
        if run_id is not None and not hasattr(record, "run_id"):
            record.run_id = run_id
        for k, v in self.context.items():
            if not hasattr(record, k):
                setattr(record, k, v)
        return True


@dataclass(frozen=True)
class QueryRecord:
    """One warehouse query of a cycle: ``rows`` is None when not known."""

    name: str
    seconds: float
    rows: int | None


def query_records(result: Any, state_url: str | None = None) -> list[QueryRecord]:
    """Per-query durations and row counts of a finished cycle.

    Parameters
    ----------
    result : CycleResult
        What :func:`monitor.cycle.run_cycle` returned.
    state_url : str, optional
        The state store; the recorded run's detail holds row counts.

    Returns
    -------
    list of QueryRecord
        In query order. Row counts come from ``result.query_stats`` when the
        cycle exposes the warehouse statistics, else from the recorded run; for
        a run that was not recorded (dry run, backtest) ``rows`` is None.
    """
    stats = getattr(result, "query_stats", None)
    if stats:
        return [QueryRecord(s.name, float(s.seconds), int(s.rows)) for s in stats]
    if state_url and getattr(result, "recorded", False):
        detail = _run_detail(state_url, result.run_id)
        if detail and detail.get("queries"):
            return [QueryRecord(q["name"], float(q["seconds"]), int(q["rows"])) for q in detail["queries"]]
    return [QueryRecord(n, float(s), None) for n, s in (getattr(result, "query_seconds", {}) or {}).items()]


def _run_detail(state_url: str, run_id: str) -> dict[str, Any] | None:
    from monitor.state import runs

    eng = sa.create_engine(state_url, poolclass=sa.pool.NullPool)
    try:
        with eng.connect() as c:
            text = c.execute(sa.select(runs.c.detail).where(runs.c.run_id == run_id)).scalar()
    except sa.exc.SQLAlchemyError:
        return None
    finally:
        eng.dispose()
    try:
        return json.loads(text) if text else None
    except ValueError:
        return None


#: the alert ledger events that get a log record of their own
ALERT_EVENTS = ("opened", "escalated", "resolved")

#: check-timing groups of :func:`monitor.cycle.run_cycle` and the finding check names they produce
_CHECK_GROUPS = {"allocation": ("srm", "leakage", "unknown_variant", "unattributed", "freshness", "design")}


def log_cycle(result: Any, seconds: float, state_url: str | None = None, logger: logging.Logger = log) -> None:
    """Log one line per check (computation time, including its own queries for the metric
    checks, and findings), one per alert that opened, escalated or resolved, and one
    summary line for a finished cycle, each carrying ``run_id`` (structured fields for
    :class:`JsonFormatter`).

    Each warehouse query is logged once, by the warehouse when it finishes (``event``
    ``query``, with its own time), not again here. Alert events are ``warning`` records
    when an alert opened or escalated and ``info`` when it resolved; their ``event`` is
    ``alert_opened``, ``alert_escalated`` or ``alert_resolved``.
    """
    by_check: dict[str, int] = {}
    for f in result.findings:
        by_check[f.check] = by_check.get(f.check, 0) + 1
    for name, secs in (getattr(result, "check_seconds", {}) or {}).items():
        n = sum(v for k, v in by_check.items() if k in _CHECK_GROUPS.get(name, (name,)))
        logger.info("checks %s: %.3fs, %d findings", name, secs, n,
                    extra={"event": "check", "run_id": result.run_id, "check": name,
                           "seconds": round(secs, 4), "findings": n})
    kinds: dict[str, int] = {}
    for e in result.events:
        kinds[e.kind] = kinds.get(e.kind, 0) + 1
        if e.kind in ALERT_EVENTS:
            sev = SEVERITY_NAMES.get(e.severity, str(e.severity))
            logger.log(logging.INFO if e.kind == "resolved" else logging.WARNING,
                       "alert %s: %s · %s · %s (%s): %s", e.kind, e.experiment, e.check, e.scope, sev, e.summary,
                       extra={"event": f"alert_{e.kind}", "run_id": result.run_id, "experiment": e.experiment,
                              "check": e.check, "scope": e.scope, "severity": sev, "summary": e.summary})
    logger.info("cycle %s as of %s: %d experiments, %d findings, events %s, %.2fs%s",
                result.run_id, result.as_of.isoformat(), len(result.experiments), len(result.findings),
                kinds or "none", seconds, "" if result.recorded else " (not recorded)",
                extra={"event": "cycle", "run_id": result.run_id, "as_of": result.as_of, "seconds": round(seconds, 4),
                       "experiments": len(result.experiments), "findings": len(result.findings),
                       "events": kinds, "recorded": bool(result.recorded)})


# -- the state store's view -------------------------------------------------------------


@dataclass(frozen=True)
class RunSummary:
    """One recorded run."""

    run_id: str
    started_at: datetime
    finished_at: datetime | None
    as_of: datetime
    outcome: str
    seconds: float | None
    experiments: int | None
    findings: int | None
    rows_returned: int | None = None
    """Rows the run's warehouse queries returned (None: not recorded)."""
    rows_scanned: int | None = None
    """Rows the engine reports its scans read, summed over the run's queries; None
    unless every query reported it (DuckDB and Spark do, PostgreSQL does not)."""
    bytes_scanned: int | None = None
    """Bytes the engine reports, likewise (DuckDB: read from storage; Spark: size of the files scanned)."""


@dataclass(frozen=True)
class StatusReport:
    """What ``expwatch status`` shows.

    Attributes
    ----------
    runs : tuple of RunSummary
        Most recent first.
    open_alerts : dict of (check, severity name) to int
        Open alerts counted by check and severity.
    last_success : datetime or None
        ``finished_at`` of the latest run with outcome ``ok``.
    store_exists : bool
        False when the state store has never been written (no run yet).
    clearing_alerts : dict of str to int
        Episodes whose check is ok again but which have not yet stayed clear for
        ``checks.episode_clear_hours`` (state ``clearing``), counted by check; not
        counted in ``open_alerts``.
    """

    runs: tuple[RunSummary, ...]
    open_alerts: dict[tuple[str, str], int]
    last_success: datetime | None
    store_exists: bool
    clearing_alerts: dict[str, int] = field(default_factory=dict)

    @property
    def open_total(self) -> int:
        return sum(self.open_alerts.values())


def _sqlite_missing(url: str) -> bool:
    if url.startswith("sqlite:///"):
        path = url.removeprefix("sqlite:///").split("?")[0]
        return path not in ("", ":memory:") and not Path(path).exists()
    return False


def read_status(state_url: str, limit: int = 10) -> StatusReport:
    """Recent runs and open alerts from the state store, read-only.

    Parameters
    ----------
    state_url : str
        SQLAlchemy URL of the state store.
    limit : int
        How many recent runs (at least 1).

    Returns
    -------
    StatusReport
        Empty (``store_exists=False``) when the store has no schema yet; a
        SQLite file that does not exist is not created.

    Raises
    ------
    ConfigError
        ``limit`` below 1.
    StateError
        The store cannot be read.
    """
    from monitor.state import StateStore, alerts, query_costs, runs

    if limit < 1:
        raise ConfigError(f"--limit: must be at least 1, got {limit}")
    if _sqlite_missing(state_url):
        return StatusReport((), {}, None, False)
    store = StateStore(state_url, migrate=False)
    try:
        version = store.schema_version()
        if version == 0:
            return StatusReport((), {}, None, False)
        rows = store.recent_runs(limit)
        with store.engine.connect() as c:
            costs = _cost_totals(c, query_costs, [r["run_id"] for r in rows]) if version >= 4 else {}
            last_ok = c.execute(sa.select(sa.func.max(runs.c.finished_at)).where(runs.c.outcome == "ok")).scalar()
            grouped = c.execute(sa.select(alerts.c.check_name, alerts.c.severity, sa.func.count())
                                .where(alerts.c.state == "open").group_by(alerts.c.check_name, alerts.c.severity)).all()
            clearing = dict(c.execute(sa.select(alerts.c.check_name, sa.func.count())
                                      .where(alerts.c.state == "clearing").group_by(alerts.c.check_name)).all())
    finally:
        store.dispose()
    if isinstance(last_ok, str):
        last_ok = datetime.fromisoformat(last_ok)
    if last_ok is not None and last_ok.tzinfo is None:
        last_ok = last_ok.replace(tzinfo=timezone.utc)
    summaries = []
    for r in rows:
        try:
            detail = json.loads(r["detail"]) if r["detail"] else {}
        except ValueError:
            detail = {}
        secs = (r["finished_at"] - r["started_at"]).total_seconds() if r["finished_at"] else None
        summaries.append(RunSummary(r["run_id"], r["started_at"], r["finished_at"], r["as_of"], r["outcome"],
                                    None if secs is None else max(0.0, secs),
                                    detail.get("experiments"), detail.get("findings"), *costs.get(r["run_id"], (None, None, None))))
    open_by: dict[tuple[str, str], int] = {}
    for check, sev, n in grouped:
        key = (str(check), SEVERITY_NAMES.get(int(sev), str(sev)))
        open_by[key] = open_by.get(key, 0) + int(n)
    return StatusReport(tuple(summaries), dict(sorted(open_by.items())), last_ok, True, {str(k): int(v) for k, v in clearing.items()})


def _cost_totals(conn: sa.Connection, table: sa.Table, run_ids: list[str]) -> dict[str, tuple[int, int | None, int | None]]:
    """Per run: rows returned, rows scanned and bytes scanned (a scan total is None
    when any query of the run did not report it)."""
    if not run_ids:
        return {}
    n = sa.func.count()
    q = (sa.select(table.c.run_id, sa.func.sum(table.c.rows_returned), sa.func.sum(table.c.rows_scanned),
                   sa.func.count(table.c.rows_scanned), sa.func.sum(table.c.bytes_scanned), sa.func.count(table.c.bytes_scanned), n)
         .where(table.c.run_id.in_(run_ids)).group_by(table.c.run_id))
    out = {}
    for run_id, returned, scanned, n_scanned, nbytes, n_bytes, total in conn.execute(q).all():
        out[str(run_id)] = (int(returned or 0), int(scanned) if n_scanned == total and scanned is not None else None,
                            int(nbytes) if n_bytes == total and nbytes is not None else None)
    return out


def format_count(n: int | None) -> str:
    """A row or byte count for people: 1234 -> 1.2k, 5600000 -> 5.6M; None -> '-'."""
    if n is None:
        return "-"
    for div, unit in ((10**12, "T"), (10**9, "G"), (10**6, "M"), (10**3, "k")):
        if abs(n) >= div:
            return f"{n / div:.1f}{unit}"
    return str(n)


def render_status_text(report: StatusReport) -> str:
    """The plain-text status table."""
    if not report.store_exists:
        return "no run recorded yet (the state store is empty)\n"
    lines = [f"last successful run finished {_fmt(report.last_success)}; open alerts: {report.open_total}"]
    for (check, sev), n in report.open_alerts.items():
        lines.append(f"  {check:<16} {sev:<9} {n}")
    for check, n in sorted(report.clearing_alerts.items()):
        lines.append(f"  {check:<16} {'clearing':<9} {n}")
    lines.append("")
    lines.append(f"{'started (UTC)':<17}  {'as of (UTC)':<17}  {'outcome':<8}  {'seconds':>8}  {'exps':>5}  {'findings':>8}  "
                 f"{'returned':>8}  {'scanned':>8}  {'bytes':>8}  run id")
    for r in report.runs:
        secs = "" if r.seconds is None else f"{r.seconds:.2f}"
        lines.append(f"{_fmt(r.started_at):<17}  {_fmt(r.as_of):<17}  {r.outcome:<8}  {secs:>8}  "
                     f"{'' if r.experiments is None else r.experiments:>5}  {'' if r.findings is None else r.findings:>8}  "
                     f"{format_count(r.rows_returned):>8}  {format_count(r.rows_scanned):>8}  {format_count(r.bytes_scanned):>8}  {r.run_id}")
    if report.runs:
        lines.append("returned: rows the warehouse queries returned; scanned / bytes: what the engine reports its scans "
                     "read ('-': the engine does not report it)")
    return "\n".join(lines) + "\n"


def status_to_json(report: StatusReport) -> dict[str, Any]:
    """The status as a JSON-ready document (``"format": "expwatch.status/1"``)."""
    return {
        "format": "expwatch.status/1",
        "store_exists": report.store_exists,
        "last_success": _iso(report.last_success),
        "open_alerts": report.open_total,
        "open_alerts_by": [{"check": c, "severity": s, "count": n} for (c, s), n in report.open_alerts.items()],
        "clearing_alerts": sum(report.clearing_alerts.values()),
        "clearing_alerts_by": [{"check": c, "count": n} for c, n in sorted(report.clearing_alerts.items())],
        "runs": [{"run_id": r.run_id, "started_at": _iso(r.started_at), "finished_at": _iso(r.finished_at),
                  "as_of": _iso(r.as_of), "outcome": r.outcome, "seconds": None if r.seconds is None else round(r.seconds, 4),
                  "experiments": r.experiments, "findings": r.findings, "rows_returned": r.rows_returned,
                  "rows_scanned": r.rows_scanned, "bytes_scanned": r.bytes_scanned} for r in report.runs],
    }


def _fmt(t: datetime | None) -> str:
    return "never" if t is None else f"{t.astimezone(timezone.utc):%Y-%m-%d %H:%M}"


def _iso(t: datetime | None) -> str | None:
    return None if t is None else t.astimezone(timezone.utc).isoformat()


# -- Prometheus text format -------------------------------------------------------------


def _label(v: str) -> str:
    return v.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def metrics_text(report: StatusReport, *, last_attempt_ok: bool | None = None, checks: Sequence[str] = (),
                 counters: dict[str, int] | None = None) -> str:
    """Prometheus text exposition format (version 0.0.4) of a status report.

    Parameters
    ----------
    report : StatusReport
        From :func:`read_status`.
    last_attempt_ok : bool, optional
        Whether the cycle that just ran succeeded (a failed cycle writes no run row).
    checks : sequence of str
        Check names to write with a zero count when nothing is open, so a
        resolved alert shows as 0 rather than as a vanished series.

    Returns
    -------
    str
        ``expwatch_last_success_timestamp_seconds``,
        ``expwatch_last_run_duration_seconds``, ``expwatch_last_run_as_of_timestamp_seconds``,
        ``expwatch_open_alerts{check,severity}`` and, when given,
        ``expwatch_last_attempt_success``.

    Notes
    -----
    With no successful run yet the timestamp gauge is 0 (an alerting rule on
    ``time() - expwatch_last_success_timestamp_seconds`` then fires, as it should).
    """
    out: list[str] = []

    def gauge(name: str, help_: str, samples: list[tuple[dict[str, str], float]]) -> None:
        out.append(f"# HELP {name} {help_}")
        out.append(f"# TYPE {name} gauge")
        for labels, value in samples:
            lab = ",".join(f'{k}="{_label(v)}"' for k, v in labels.items())
            out.append(f"{name}{{{lab}}} {_num(value)}" if lab else f"{name} {_num(value)}")

    last = report.last_success.timestamp() if report.last_success else 0.0
    gauge("expwatch_last_success_timestamp_seconds", "Unix time the latest successful cycle finished.", [({}, last)])
    latest = report.runs[0] if report.runs else None
    gauge("expwatch_last_run_duration_seconds", "Wall time of the latest recorded cycle.",
          [({}, latest.seconds if latest and latest.seconds is not None else 0.0)])
    gauge("expwatch_last_run_as_of_timestamp_seconds", "Unix time of the data time (as of) of the latest recorded cycle.",
          [({}, latest.as_of.timestamp() if latest else 0.0)])
    counts = dict(report.open_alerts)
    for c in checks:
        for s in ("warn", "alert", "critical"):
            counts.setdefault((c, s), 0)
    gauge("expwatch_open_alerts", "Open alerts by check and severity.",
          [({"check": c, "severity": s}, float(n)) for (c, s), n in sorted(counts.items())])
    clearing = {c: report.clearing_alerts.get(c, 0) for c in set(checks) | set(report.clearing_alerts)}
    gauge("expwatch_clearing_alerts", "Episodes clear again but not yet for checks.episode_clear_hours, by check.",
          [({"check": c}, float(n)) for c, n in sorted(clearing.items())])
    if last_attempt_ok is not None:
        gauge("expwatch_last_attempt_success", "1 if the latest cycle attempt succeeded, else 0.",
              [({}, 1.0 if last_attempt_ok else 0.0)])
    gauge("expwatch_build_info", "Always 1; the labels say which expwatch and Python wrote the file.",
          [({"version": _version(), "python": ".".join(map(str, sys.version_info[:3]))}, 1.0)])
    for name, help_ in COUNTERS.items():
        if counters is not None:
            out.append(f"# HELP {name} {help_}")
            out.append(f"# TYPE {name} counter")
            out.append(f"{name} {counters.get(name, 0)}")
    return "\n".join(out) + "\n"


#: the counters of the metrics file, kept by whoever rewrites it (see :func:`write_metrics_file`)
COUNTERS = {
    "expwatch_runs_total": "Cycles that ran to an end (succeeded or failed) and wrote this file; stepped-aside runs are not counted.",
    "expwatch_run_failures_total": "Cycles that failed (exit code 1), of expwatch_runs_total.",
}


def _version() -> str:
    from monitor import __version__

    return __version__


def _previous_counters(path: Path) -> dict[str, int]:
    """The counters of an earlier metrics file at ``path`` (none: all 0, which Prometheus
    reads as a counter reset)."""
    try:
        text = path.read_text(encoding="utf-8")
    except OSError:
        return {}
    out = {}
    for ln in text.splitlines():
        name, _, value = ln.partition(" ")
        if name in COUNTERS:
            try:
                out[name] = int(float(value))
            except ValueError:
                continue
    return out


def _num(v: float) -> str:
    return str(int(v)) if float(v).is_integer() and abs(v) < 1e15 else repr(float(v))


def write_metrics_file(path: str | os.PathLike[str], state_url: str, *, last_attempt_ok: bool | None = None) -> Path:
    """Write :func:`metrics_text` of the state store atomically (a temporary file in
    the same directory, then ``os.replace``), as the node_exporter textfile
    collector expects.

    The counters ``expwatch_runs_total`` and ``expwatch_run_failures_total`` go on
    from the file being replaced: each call with ``last_attempt_ok`` adds one run
    (and one failure when it is False). A new file starts them from 0.

    Raises
    ------
    ConfigError
        The directory does not exist or cannot be written.
    """
    from monitor.findings import CHECKS

    target = Path(path)
    counters = _previous_counters(target)
    if last_attempt_ok is not None:  # one more cycle came to an end
        counters["expwatch_runs_total"] = counters.get("expwatch_runs_total", 0) + 1
        counters["expwatch_run_failures_total"] = counters.get("expwatch_run_failures_total", 0) + (not last_attempt_ok)
    text = metrics_text(read_status(state_url, limit=1), last_attempt_ok=last_attempt_ok, checks=sorted(CHECKS),
                        counters=counters)
    directory = target.parent if str(target.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=directory)
    except OSError as exc:
        raise ConfigError(f"--metrics-file {target}: cannot write in {directory} ({exc.strerror})") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.chmod(tmp, 0o644)
        os.replace(tmp, target)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise ConfigError(f"--metrics-file {target}: cannot be written ({exc.strerror})") from None
    return target
