"""One monitoring cycle: registry -> pull -> checks -> ledger -> state store.

Everything that can fail against the warehouse happens before anything is
written, and everything the run writes (counts, watermarks, findings, alert
ledger, the run record) is written in one transaction. So a run that fails
leaves the state store exactly as it was, and a run killed half-way leaves
either all of its work or none of it.
"""

from __future__ import annotations

import logging
import uuid
from contextlib import nullcontext
from pathlib import Path

import sqlalchemy as sa
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone

from monitor import ledger
from monitor.checks import allocation_findings, design_findings
from monitor.config import Config
from monitor.errors import ConfigError
from monitor.findings import Finding
from monitor.ledger import AlertEvent
from monitor.pull import PulledSource, pull_sources
from monitor.registry import Experiment, RegistryProblem, experiments_from_frame, experiments_from_inline
from monitor.state import StateStore
from monitor.templates import Quoter, registry_context, render
from monitor.warehouse import Tracer, Warehouse

__all__ = ["CycleResult", "load_registry", "run_cycle"]

log = logging.getLogger("monitor")


@dataclass
class CycleResult:
    run_id: str
    as_of: datetime
    experiments: list[Experiment]
    findings: list[Finding]
    events: list[AlertEvent]
    sources: list[PulledSource]
    problems: list[RegistryProblem] = field(default_factory=list)
    recorded: bool = False
    note: str | None = None
    query_seconds: dict[str, float] = field(default_factory=dict)


def load_registry(cfg: Config, wh: Warehouse | None) -> tuple[list[Experiment], list[RegistryProblem]]:
    if cfg.registry.inline is not None:
        return experiments_from_inline(cfg.registry)
    assert wh is not None
    sql = render("registry.sql.j2", wh.dialect, **registry_context(cfg.registry, Quoter(wh.dialect)))
    frame = wh.query("registry", sql, {})
    return experiments_from_frame(frame, cfg.registry)


def _now() -> datetime:
    return datetime.now(timezone.utc)


def run_cycle(
    cfg: Config,
    *,
    as_of: datetime | None = None,
    dry_run: bool = False,
    full_refresh: bool = False,
    wait_seconds: float = 0.0,
    tracer: Tracer | None = None,
    on_step: Callable[[str], None] | None = None,
    clock: Callable[[], datetime] = _now,
) -> CycleResult:
    """Run one cycle and (unless ``dry_run``) record it.

    Raises
    ------
    WarehouseError, StateError, ConfigError
        Nothing has been written to the state store when one is raised.
    """
    started = clock()
    as_of = (as_of or started).astimezone(timezone.utc)
    if as_of > started:
        raise ConfigError(f"--as-of {as_of.isoformat()} is in the future")
    run_id = str(uuid.uuid4())
    if dry_run and _absent(cfg):  # nothing to read and nothing may be written: an empty store in memory
        state = StateStore("sqlite://", engine=sa.create_engine("sqlite://", poolclass=sa.pool.StaticPool))
    else:
        state = StateStore(cfg.state.url or "", migrate=not dry_run)
    wh = Warehouse(cfg.warehouse.url, tracer=tracer, timeout_seconds=cfg.warehouse.query_timeout_seconds)
    try:
        lock_cm = state.lock(wait_seconds=wait_seconds) if not dry_run else nullcontext()
        with lock_cm:
            if on_step:
                on_step("registry")
            exps, problems = load_registry(cfg, wh)
            live = [e for e in exps if e.live_at(as_of, cfg.registry.live_status)]
            sources = pull_sources(cfg, wh, state, live, as_of, full_refresh=full_refresh,
                                   on_query=(lambda n: on_step(f"assignments[{n}]")) if on_step else None)
            if on_step:
                on_step("checks")
            counts = {s.name: s.counts for s in sources}
            found = design_findings(problems) + allocation_findings(live, counts, cfg.sources[0].name, as_of, cfg.checks)
            result = CycleResult(run_id, as_of, live, found, [], sources, problems,
                                 query_seconds={s.name: s.seconds for s in wh.stats})
            last = state.last_run_as_of() if not dry_run else None
            backtest = any(not s.persist for s in sources) or (last is not None and as_of < last)
            if dry_run:
                result.note = "dry run: nothing was recorded"
                result.events = ledger.plan(state.open_alerts(), found, [e.id for e in live] + [p.experiment for p in problems])
                return result
            if backtest:
                result.note = (f"--as-of is earlier than the latest recorded run ({last:%Y-%m-%d %H:%M} UTC): "
                               "computed as a backtest, nothing was recorded") if last else "backtest: nothing was recorded"
                return result
            with state.transaction() as conn:
                for s in sources:
                    StateStore.replace_counts(conn, s.name, s.since, as_of, s.experiments, s.fresh)
                events = ledger.plan(state.open_alerts(conn), found, [e.id for e in live] + [p.experiment for p in problems])
                result.events = ledger.apply(conn, run_id, as_of, found, events)
                StateStore.record_run(conn, run_id, started, as_of, "ok", {
                    "experiments": len(live), "findings": len(found),
                    "queries": [{"name": q.name, "seconds": round(q.seconds, 4), "rows": q.rows} for q in wh.stats],
                })
            result.recorded = True
            return result
    finally:
        wh.dispose()
        state.dispose()


def _absent(cfg: Config) -> bool:
    """True when the state store is a SQLite file that does not exist yet."""
    url = cfg.state.url or ""
    if url.startswith("sqlite:///"):
        return not Path(url.removeprefix("sqlite:///").split("?")[0]).exists()
    return False
