"""Rows no check can attribute: the ``unattributed`` data-quality check.

The assignment query counts units, so a row without a unit id, without a timestamp
(it falls in no hour) or without an experiment id (it belongs to no experiment) is
left out of every count. For a trust check such rows are themselves a pipeline
fault, so one query per assignment source (``sql/unattributed.sql.j2``) counts
them in the experiment window, and each becomes a finding:

* per live experiment and source (scope: the source): rows with a NULL unit or a
  NULL timestamp, as a share of the experiment's rows in the window;
* per source, rows with a NULL experiment id, under the experiment name
  :data:`NO_EXPERIMENT` (only when there are some), as a share of those rows plus
  the live experiments' rows.

Status follows the share thresholds ``checks.unattributed_warn_share`` and
``checks.unattributed_alert_share`` (critical at ``critical_factor`` times the
alert share), like the leakage check.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime

import pandas as pd

from monitor.config import CheckConfig, Config
from monitor.findings import Finding
from monitor.registry import NO_EXPERIMENT, Experiment
from monitor.templates import Quoter, naive_utc, render, source_context
from monitor.warehouse import Warehouse

__all__ = ["NO_EXPERIMENT", "pull_unattributed", "unattributed_findings"]

def pull_unattributed(cfg: Config, wh: Warehouse, live: Sequence[Experiment], as_of: datetime) -> dict[str, pd.DataFrame]:
    """Per source: experiment (None for NULL), n_rows, null_unit, null_timestamp, unattributed (either)."""
    if not live:
        return {}
    window_start = min(e.start for e in live).replace(minute=0, second=0, microsecond=0)
    params = {"window_start": naive_utc(window_start), "as_of": naive_utc(as_of), "experiment_ids": [e.id for e in live]}
    out = {}
    for src in cfg.sources:
        sql = render("unattributed.sql.j2", wh.dialect, **source_context(src, Quoter(wh.dialect)))
        out[src.name] = wh.query(f"unattributed[{src.name}]", sql, params, expanding=("experiment_ids",))
    return out


def _int(v: object) -> int:
    return 0 if v is None or pd.isna(v) else int(v)  # type: ignore[call-overload]


def _status(share: float, bad: int, cfg: CheckConfig) -> tuple[str, bool]:
    if bad and share >= cfg.unattributed_alert_share:
        return "alert", share >= cfg.critical_factor * cfg.unattributed_alert_share
    if bad and share >= cfg.unattributed_warn_share:
        return "warn", False
    return "ok", False


def unattributed_findings(live: Sequence[Experiment], pulled: dict[str, pd.DataFrame], cfg: CheckConfig) -> list[Finding]:
    found: list[Finding] = []
    for source, frame in pulled.items():
        rows = {(None if pd.isna(r.experiment) else str(r.experiment)): r for r in frame.itertuples(index=False)}
        for e in live:
            r = rows.get(e.id)
            n, null_unit, null_ts, bad = ((int(r.n_rows), _int(r.null_unit), _int(r.null_timestamp), _int(r.unattributed))
                                          if r is not None else (0, 0, 0, 0))
            share = bad / n if n else 0.0
            stats = {"rows": n, "unattributed_rows": bad, "null_unit_rows": null_unit, "null_timestamp_rows": null_ts,
                     "share": share,
                     "warn_share": cfg.unattributed_warn_share, "alert_share": cfg.unattributed_alert_share}
            status, critical = _status(share, bad, cfg)
            if status == "ok":
                summary = f"{bad:,} of {n:,} rows lack a unit id or a timestamp"
            else:
                parts = [f"{k:,} with a NULL {what}" for k, what in ((null_unit, "unit id"), (null_ts, "timestamp")) if k]
                summary = (f"{bad:,} rows ({' and '.join(parts)}): {100 * share:.2f}% of {n:,} assignment rows in {source} cannot be "
                           "attributed and are in no count; check the pipeline that writes them")
            found.append(Finding(e.id, "unattributed", source, status, summary, stats, critical=critical))  # type: ignore[arg-type]
        orphan = rows.get(None)
        if orphan is not None and int(orphan.n_rows):
            n_null = int(orphan.n_rows)
            total = int(frame["n_rows"].sum())
            share = n_null / total if total else 0.0
            status, critical = _status(share, n_null, cfg)
            stats = {"rows": total, "null_experiment_rows": n_null, "share": share,
                     "warn_share": cfg.unattributed_warn_share, "alert_share": cfg.unattributed_alert_share}
            summary = (f"{n_null:,} assignment rows in {source} ({100 * share:.2f}% of the rows read) have a NULL "
                       "experiment id: they belong to no experiment and are in no count")
            found.append(Finding(NO_EXPERIMENT, "unattributed", source, status, summary, stats, critical=critical))  # type: ignore[arg-type]
    return found
