"""The Python API, for notebooks and orchestrator tasks.

Three functions compute, each taking a config (a path or a loaded
:class:`~monitor.config.Config`) and returning pandas frames together with the same
JSON document the command line prints, so a task can branch on a frame and archive
the document::

    from monitor import api

    run = api.cycle("expwatch.yaml")                       # expwatch run --format json
    bad = run.findings[run.findings.severity >= "alert"]  # alert or critical
    why = api.explain("expwatch.yaml", "quick-borrow-button")
    past = api.replay("expwatch.yaml", "2026-11-02T09:00Z", "2026-11-30T09:00Z")

Four read what the state store already holds, without running a cycle (read-only;
a store that does not exist is refused, never created)::

    api.runs("expwatch.yaml")              # recent runs
    api.findings("expwatch.yaml")          # the findings of the latest run (or run_id=...)
    api.alert_history("expwatch.yaml")     # every alert ledger event, oldest first
    api.hourly_counts("expwatch.yaml")     # the stored hourly counts, per experiment x variant x hour x segment

Every frame follows the same types: times are aware UTC ``datetime64[us, UTC]``
(:data:`TIME`), ``phase`` is a nullable integer (``Int64``; none for registry
findings), ``severity`` is the ordered categorical :data:`SEVERITY`
(``ok < warn < alert < critical``), so ``frame.severity >= "alert"`` selects
alerts in every frame.

Errors are the package's own: :class:`~monitor.errors.ConfigError` for a bad config
or argument, :class:`~monitor.errors.MonitorError` subclasses when the warehouse or
the state store fails; nothing of a failed cycle is recorded.
"""

from __future__ import annotations

import html
import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd

from monitor.config import Config, load_config
from monitor.errors import ConfigError, StateError
from monitor.findings import SEVERITY_NAMES

__all__ = ["SEVERITY", "TIME", "CycleFrames", "ExplainResult", "ReplayFrames", "alert_history", "cycle", "explain",
           "findings", "hourly_counts", "replay", "runs"]

#: the one severity type of every frame: ordered, so ``severity >= "alert"`` works
SEVERITY = pd.CategoricalDtype([SEVERITY_NAMES[i] for i in sorted(SEVERITY_NAMES)], ordered=True)
#: the one time type of every frame: aware UTC, microseconds (what a Python datetime holds)
TIME = pd.DatetimeTZDtype("us", "UTC")

FINDING_COLUMNS = ["run_id", "as_of", "experiment", "check", "scope", "phase", "status", "severity", "summary",
                   "statistics"]
STAGE_COLUMNS = ["phase", "stage", "units", "chi2", "p_value", "broken"]
SEGMENT_COLUMNS = ["phase", "dimension", "value", "units", "p_value", "p_holm", "removed"]
EVENT_COLUMNS = ["event", "experiment", "check", "scope", "severity", "summary"]
ALERT_COLUMNS = ["experiment", "check", "scope", "opened_at", "severity_opened", "max_severity", "closed_at",
                 "onset", "delay_hours", "summary"]
HISTORY_COLUMNS = ["as_of", "run_id", "alert_id", "event", "experiment", "check", "scope", "severity", "summary"]
RUN_COLUMNS = ["run_id", "started_at", "finished_at", "as_of", "outcome", "experiments", "findings"]
COUNT_COLUMNS = ["experiment", "variant", "hour", "segment", "units", "leaked"]


def _typed(frame: pd.DataFrame, *, times: Iterable[str] = (), severities: Iterable[str] = (),
           integers: Iterable[str] = ()) -> pd.DataFrame:
    """Give ``frame`` the API's column types (:data:`TIME`, :data:`SEVERITY`, ``Int64``)."""
    for c in times:
        frame[c] = pd.to_datetime(frame[c], utc=True).astype(TIME)
    for c in severities:
        frame[c] = frame[c].map(lambda v: SEVERITY_NAMES[v] if isinstance(v, int) else v).astype(SEVERITY)
    for c in integers:
        frame[c] = pd.array(frame[c].tolist(), dtype="Int64")
    return frame


def _findings_frame(rows: Sequence[dict[str, Any]]) -> pd.DataFrame:
    return _typed(pd.DataFrame(list(rows), columns=FINDING_COLUMNS), times=["as_of"], severities=["severity"],
                  integers=["phase"])


@dataclass(frozen=True, repr=False)
class CycleFrames:
    """One cycle.

    Attributes
    ----------
    findings : DataFrame
        One row per finding: ``run_id, as_of`` (the data time), ``experiment, check,
        scope, phase, status, severity`` (:data:`SEVERITY`), ``summary`` and
        ``statistics`` (a dict, as in the JSON output).
    events : DataFrame
        Alert ledger events of the run (``opened``, ``escalated``, ``resolved``).
    document : dict
        The JSON document of ``expwatch run --format json`` (README "JSON output").

    Printed, or shown in a notebook, it is a short summary (the findings that need a
    look, at most :attr:`SHOWN` of them), not the whole document.
    """

    findings: pd.DataFrame
    events: pd.DataFrame
    document: dict[str, Any]

    SHOWN = 25

    def _headline(self) -> str:
        d = self.document
        by = self.findings.severity.value_counts()
        counts = ", ".join(f"{by[s]} {s}" for s in reversed(SEVERITY.categories) if by.get(s, 0)) or "no findings"
        events = ", ".join(f"{n} {k}" for k, n in self.events.event.value_counts().items()) or "no alert events"
        return (f"expwatch run {d['run_id']} as of {d['as_of']}: {len(d['experiments'])} live experiments; "
                f"findings {counts}; {events}; {'recorded' if d['recorded'] else 'not recorded'}")

    def __repr__(self) -> str:
        return f"<CycleFrames {self._headline()}>"

    def _repr_html_(self) -> str:
        look = self.findings[self.findings.severity > "ok"].sort_values(["severity", "experiment", "check", "scope"],
                                                                         ascending=[False, True, True, True])
        rows = "".join(
            "<tr>" + "".join(f"<td>{html.escape(str(v))}</td>" for v in (
                r.severity, r.experiment, r.check, r.scope, "" if pd.isna(r.phase) else r.phase, r.summary)) + "</tr>"
            for r in look.head(self.SHOWN).itertuples())
        more = (f"<p>… and {len(look) - self.SHOWN} more in <code>.findings</code></p>"
                if len(look) > self.SHOWN else "")
        table = ("<table><thead><tr><th>severity</th><th>experiment</th><th>check</th><th>scope</th><th>phase</th>"
                 f"<th>summary</th></tr></thead><tbody>{rows}</tbody></table>" if rows else "<p>all clear</p>")
        return (f"<div><p><b>{html.escape(self._headline())}</b></p>{table}{more}"
                "<p><small>Decision support: each finding names the statistics behind it "
                "(<code>.findings.statistics</code>).</small></p></div>")


@dataclass(frozen=True, repr=False)
class ExplainResult:
    """One experiment's allocation diagnosis.

    Attributes
    ----------
    stages : DataFrame
        One row per ramp phase and pipeline stage: ``phase, stage, units`` (a dict by
        variant), ``chi2, p_value, broken``.
    segments : DataFrame
        One row per phase, segment dimension and value: ``phase, dimension, value,
        units, p_value, p_holm, removed`` (removed: part of the set whose removal
        explains the mismatch).
    document : dict
        The JSON document of ``expwatch explain --format json``.
    text : str
        The plain-text report.
    """

    stages: pd.DataFrame
    segments: pd.DataFrame
    document: dict[str, Any]
    text: str

    def __repr__(self) -> str:
        return (f"<ExplainResult {self.document.get('experiment')}: {len(self.stages)} stage rows, "
                f"{len(self.segments)} segment rows; .text has the report>")


@dataclass(frozen=True, repr=False)
class ReplayFrames:
    """A replay.

    Attributes
    ----------
    alerts : DataFrame
        One row per alert that would have opened (times aware UTC; ``closed_at``
        NaT while still open; ``delay_hours`` against a supplied onset).
    document : dict
        The JSON document of ``expwatch replay --format json``.
    """

    alerts: pd.DataFrame
    document: dict[str, Any]

    def __repr__(self) -> str:
        return f"<ReplayFrames {self.document.get('steps')} steps, {len(self.alerts)} alerts>"


def _config(config: Config | str | Path) -> Config:
    if isinstance(config, Config):
        return config
    if isinstance(config, (str, Path)):
        return load_config(Path(config))
    raise ConfigError(f"config: expected a path or a Config, got {type(config).__name__}")


def _time(value: datetime | str | None, what: str) -> datetime | None:
    if value is None or isinstance(value, datetime):
        if isinstance(value, datetime) and value.tzinfo is None:
            raise ConfigError(f"{what}: {value.isoformat()} has no time zone")
        return value
    try:
        t = datetime.fromisoformat(str(value).replace("Z", "+00:00"))
    except ValueError:
        raise ConfigError(f"{what}: {value!r} is not an ISO 8601 time") from None
    if t.tzinfo is None:
        raise ConfigError(f"{what}: {value!r} has no time zone (add Z or +01:00)")
    return t


def cycle(config: Config | str | Path, *, as_of: datetime | str | None = None, dry_run: bool = False,
          notify: bool = True) -> CycleFrames:
    """Run one cycle, as ``expwatch run`` does, and return its findings and events.

    Parameters
    ----------
    config : Config or path
    as_of : datetime or ISO 8601 str, optional
        Compute as of this (aware) time; default now. An earlier time than the
        last recorded run is a backtest and records nothing.
    dry_run : bool
        Compute everything, record and send nothing.
    notify : bool
        Queue and deliver webhook notifications of the run's events (default
        True, as the command line does); False records without sending.
    """
    from monitor.cycle import run_cycle
    from monitor.report import to_json

    result = run_cycle(_config(config), as_of=_time(as_of, "as_of"), dry_run=dry_run, notify=notify)
    doc = to_json(result)
    found = _findings_frame([{**f.to_json(), "run_id": result.run_id, "as_of": result.as_of} for f in result.findings])
    events = _typed(pd.DataFrame(doc["events"], columns=EVENT_COLUMNS), severities=["severity"])
    return CycleFrames(found, events, doc)


def explain(config: Config | str | Path, experiment: str, *, as_of: datetime | str | None = None) -> ExplainResult:
    """Diagnose one live experiment's allocation ratio, as ``expwatch explain`` does (read-only)."""
    from monitor import explain as ex

    d = ex.explain_experiment(_config(config), experiment, as_of=_time(as_of, "as_of"))
    doc = ex.to_json(d)
    stages = pd.DataFrame([{"phase": p["phase"], "stage": s["stage"], "units": s["units"], "chi2": s["chi2"],
                            "p_value": s["p_value"], "broken": s["broken"]}
                           for p in doc["phases"] for s in p["stages"]], columns=STAGE_COLUMNS)
    segments = pd.DataFrame([{"phase": p["phase"], "dimension": m["dimension"], "value": sl["value"],
                              "units": sl["units"], "p_value": sl["p_value"], "p_holm": sl["p_holm"],
                              "removed": sl["removed"]}
                             for p in doc["phases"] for m in p["segments"] for sl in m["slices"]],
                            columns=SEGMENT_COLUMNS)
    return ExplainResult(stages, segments, doc, ex.render_text(d))


def replay(config: Config | str | Path, start: datetime | str, end: datetime | str, *, every: str = "1h",
           metrics_every: str = "1d", onsets: dict[Any, datetime] | None = None, allocation_only: bool = False,
           exact: bool = False) -> ReplayFrames:
    """Replay a past period, as ``expwatch replay`` does (nothing recorded or sent).

    ``every`` and ``metrics_every`` are steps like ``"1h"`` or ``"1d"``; ``onsets`` maps
    an experiment id (or ``(experiment, check)``) to a known onset; ``exact`` runs a
    whole cycle per step instead of the fast replay.
    """
    from monitor import replay as rp

    report = rp.replay(_config(config), _time(start, "start"), _time(end, "end"),  # type: ignore[arg-type]
                       every=rp.parse_every(every), metrics_every=rp.parse_every(metrics_every, "metrics_every"),
                       onsets=onsets, allocation_only=allocation_only, mode="cycles" if exact else "fast")
    doc = rp.replay_to_json(report)
    rows = [{c: getattr(t, c) for c in ALERT_COLUMNS} for t in report.timelines]
    alerts = _typed(pd.DataFrame(rows, columns=ALERT_COLUMNS), times=["opened_at", "closed_at", "onset"],
                    severities=["severity_opened", "max_severity"])
    return ReplayFrames(alerts, doc)


# -- what the state store already holds (read-only) ---------------------------------------


def _read(config: Config | str | Path, what: str) -> Any:
    """The state store of ``config``, opened read-only: never created, never migrated."""
    from monitor.cli import _require_state
    from monitor.state import SCHEMA_VERSION, StateStore

    cfg = _config(config)
    _require_state(cfg, f"api.{what}")
    store = StateStore(cfg.state.url or "", migrate=False)
    if store.schema_version() > SCHEMA_VERSION:
        store.dispose()
        raise StateError(f"api.{what}: the state store has schema version {store.schema_version()}, newer than "
                         f"this expwatch understands ({SCHEMA_VERSION}); upgrade expwatch")
    return store


def runs(config: Config | str | Path, *, limit: int = 20) -> pd.DataFrame:
    """The most recent recorded runs, newest first: ``run_id, started_at, finished_at,
    as_of`` (the data time), ``outcome, experiments, findings`` (counts)."""
    if limit < 1:
        raise ConfigError(f"limit: must be at least 1, got {limit}")
    store = _read(config, "runs")
    try:
        rows = store.recent_runs(limit)
    finally:
        store.dispose()
    out = []
    for r in rows:
        detail = json.loads(r["detail"]) if r["detail"] else {}
        out.append({**{c: r[c] for c in RUN_COLUMNS[:5]}, "experiments": detail.get("experiments"),
                    "findings": detail.get("findings")})
    return _typed(pd.DataFrame(out, columns=RUN_COLUMNS), times=["started_at", "finished_at", "as_of"],
                  integers=["experiments", "findings"])


def findings(config: Config | str | Path, run_id: str | None = None) -> pd.DataFrame:
    """The findings a recorded run stored (default: the latest successful run), with the
    columns of :attr:`CycleFrames.findings`; nothing is computed again.

    Raises
    ------
    ConfigError
        No such run, or no run recorded yet.
    """
    store = _read(config, "findings")
    try:
        if run_id is None:
            latest = [r for r in store.recent_runs(50) if r["outcome"] == "ok"]
            if not latest:
                raise ConfigError("api.findings: the state store holds no successful run yet")
            run_id = str(latest[0]["run_id"])
        rows = store.findings_for_run(run_id)
        if not rows and not any(r["run_id"] == run_id for r in store.recent_runs(10_000)):
            raise ConfigError(f"api.findings: no run {run_id!r} in the state store (see api.runs)")
    finally:
        store.dispose()
    return _findings_frame([{"run_id": r["run_id"], "as_of": r["as_of"], "experiment": r["experiment"],
                             "check": r["check_name"], "scope": r["scope"], "phase": r["phase"],
                             "status": r["status"], "severity": r["severity"], "summary": r["summary"],
                             "statistics": json.loads(r["statistics"])} for r in rows])


def alert_history(config: Config | str | Path) -> pd.DataFrame:
    """Every alert ledger event in time order: ``as_of`` (the data time of the run that
    wrote it), ``run_id, alert_id, event`` (the ledger's kinds: ``opened``, ``escalated``,
    ``changed``, ``cleared``, ``returned``, ``resolved``), ``experiment, check, scope, severity, summary``."""
    store = _read(config, "alert_history")
    try:
        rows = store.alert_history()
    finally:
        store.dispose()
    frame = pd.DataFrame([{**{c: r.get(c) for c in HISTORY_COLUMNS}, "as_of": r["at"], "check": r["check_name"]}
                          for r in rows], columns=HISTORY_COLUMNS)
    return _typed(frame, times=["as_of"], severities=["severity"], integers=["alert_id"])


def hourly_counts(config: Config | str | Path, experiments: Sequence[str] | None = None, *,
                  source: str | None = None) -> pd.DataFrame:
    """The hourly counts the monitor has stored for ``source`` (default: the first
    configured source): ``experiment, variant, hour`` (start of the hour), ``segment``
    (canonical JSON of segment name -> value), ``units`` (new units first assigned in
    that hour, seen in one variant) and ``leaked`` (seen in more than one). Default:
    every experiment the source has been pulled for."""
    cfg = _config(config)
    name = source or cfg.sources[0].name
    if name not in {s.name for s in cfg.sources}:
        raise ConfigError(f"source: {name!r} is not a configured source ({', '.join(s.name for s in cfg.sources)})")
    store = _read(cfg, "hourly_counts")
    try:
        wanted = list(store.watermarks(name)) if experiments is None else list(experiments)
        frame = store.read_counts(name, wanted)
    finally:
        store.dispose()
    frame = frame.sort_values(["experiment", "hour", "variant", "segment"], kind="stable", ignore_index=True)
    return _typed(frame[COUNT_COLUMNS], times=["hour"])
