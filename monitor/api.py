"""The Python API, for notebooks and orchestrator tasks.

Three functions, each taking a config (a path or a loaded :class:`~monitor.config.Config`)
and returning pandas frames together with the same JSON document the command line
prints, so a task can branch on a frame and archive the document::

    from monitor import api

    run = api.cycle("expwatch.yaml")                  # expwatch run --format json
    bad = run.findings[run.findings.severity >= 2]   # alert or critical
    why = api.explain("expwatch.yaml", "quick-borrow-button")
    past = api.replay("expwatch.yaml", "2026-11-02T09:00Z", "2026-11-30T09:00Z")

Errors are the package's own: :class:`~monitor.errors.ConfigError` for a bad config
or argument, :class:`~monitor.errors.MonitorError` subclasses when the warehouse or
the state store fails; nothing of a failed cycle is recorded.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import pandas as pd

from monitor.config import Config, load_config
from monitor.errors import ConfigError

__all__ = ["CycleFrames", "ExplainResult", "ReplayFrames", "cycle", "explain", "replay"]

FINDING_COLUMNS = ["experiment", "check", "scope", "phase", "status", "severity", "severity_name", "summary", "statistics"]
STAGE_COLUMNS = ["phase", "stage", "units", "chi2", "p_value", "broken"]
SEGMENT_COLUMNS = ["phase", "dimension", "value", "units", "p_value", "p_holm", "removed"]
EVENT_COLUMNS = ["event", "experiment", "check", "scope", "severity", "summary"]
ALERT_COLUMNS = ["experiment", "check", "scope", "opened_at", "severity_opened", "max_severity", "closed_at",
                 "onset", "delay_hours", "summary"]


@dataclass(frozen=True)
class CycleFrames:
    """One cycle.

    Attributes
    ----------
    findings : DataFrame
        One row per finding: ``experiment, check, scope, phase, status, severity``
        (0 ok, 1 warn, 2 alert, 3 critical), ``severity_name, summary`` and
        ``statistics`` (a dict, as in the JSON output).
    events : DataFrame
        Alert ledger events of the run (``opened``, ``escalated``, ``resolved``).
    document : dict
        The JSON document of ``expwatch run --format json`` (README "JSON output").
    """

    findings: pd.DataFrame
    events: pd.DataFrame
    document: dict[str, Any]


@dataclass(frozen=True)
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


@dataclass(frozen=True)
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
    findings = pd.DataFrame(
        [{**f.to_json(), "severity": f.severity, "severity_name": f.to_json()["severity"]} for f in result.findings],
        columns=FINDING_COLUMNS)
    events = pd.DataFrame(doc["events"], columns=EVENT_COLUMNS)
    return CycleFrames(findings, events, doc)


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
    alerts = pd.DataFrame(rows, columns=ALERT_COLUMNS)
    for c in ("opened_at", "closed_at", "onset"):
        alerts[c] = pd.to_datetime(alerts[c], utc=True)
    return ReplayFrames(alerts, doc)
