"""One monitoring cycle: registry -> pull -> checks -> ledger -> state store.

Everything that can fail against the warehouse happens before anything is
written, and everything the run writes (counts, watermarks, findings, alert
ledger, the run record) is written in one transaction. So a run that fails
leaves the state store exactly as it was, and a run killed half-way leaves
either all of its work or none of it.
"""

from __future__ import annotations

import logging
import time
import uuid
from contextlib import nullcontext
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy.exc import SQLAlchemyError
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone

from monitor import ledger, outbox
from monitor.checks import allocation_findings, design_findings
from monitor.collision import collision_findings, pull_collisions
from monitor.config import Config
from monitor.errors import ConfigError, MonitorError, StateError, WarehouseError
from monitor.explain import attach_diagnoses
from monitor.findings import Finding
from monitor.guardrails import MetricSnapshot, guardrail_findings, pull_metrics
from monitor.ledger import AlertEvent
from monitor.novelty import novelty_findings, pull_novelty
from monitor.observe import RUN_ID
from monitor.pull import PulledSource, pull_sources
from monitor.registry import Experiment, RegistryProblem, experiments_from_frame, experiments_from_inline
from monitor.spillover import pull_spillover, spillover_findings
from monitor.state import StateStore, prune_in
from monitor.templates import Quoter, registry_context, render
from monitor.unattributed import pull_unattributed, unattributed_findings
from monitor.warehouse import Tracer, Warehouse, open_warehouse

__all__ = ["CYCLE_STEPS", "METRIC_CHECKS", "CycleResult", "error_findings", "load_registry", "metric_findings", "run_cycle"]

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
    metric_snapshots: list[MetricSnapshot] = field(default_factory=list)
    check_seconds: dict[str, float] = field(default_factory=dict)
    """Wall time per check (``allocation`` and each metric check, its own queries included)."""
    failed_checks: dict[str, str] = field(default_factory=dict)
    """Checks whose queries failed this run (name -> one-line error); the others were recorded."""


def load_registry(cfg: Config, wh: Warehouse | None) -> tuple[list[Experiment], list[RegistryProblem]]:
    if cfg.registry.inline is not None:
        return experiments_from_inline(cfg.registry)
    assert wh is not None
    sql = render("registry.sql.j2", wh.dialect, **registry_context(cfg.registry, Quoter(wh.dialect)))
    frame = wh.query("registry", sql, {})
    return experiments_from_frame(frame, cfg.registry)


def metric_findings(
    cfg: Config, wh: Warehouse, live: list[Experiment], as_of: datetime,
    *, on_step: Callable[[str], None] | None = None, timings: dict[str, float] | None = None,
    failures: dict[str, str] | None = None,
) -> tuple[list[Finding], list[MetricSnapshot]]:
    """Every check that reads metric events: read-only queries, then findings.

    A cycle calls it once; a replay (:mod:`monitor.replay`) calls it at its metric
    steps, so a metric-level check added here is replayed too.

    With ``failures`` (a dict), a check whose query fails does not stop the others:
    its one-line error is stored under the check's name and it contributes no
    findings (see :func:`error_findings`); without it the first failure is raised.
    """
    timings = {} if timings is None else timings
    found: list[Finding] = []
    snapshots: list[MetricSnapshot] = []

    def guarded(check: str, step: Callable[[], list[Finding]]) -> None:
        t = time.perf_counter()
        try:
            found.extend(step())
        except WarehouseError as exc:
            if failures is None:
                raise
            failures[check] = str(exc)
            log.warning("check %s could not run this cycle: %s", check, exc)
        timings[check] = time.perf_counter() - t

    def guardrail() -> list[Finding]:  # one read-only query per metric
        pulls = pull_metrics(cfg, wh, live, as_of, on_query=(lambda n: on_step(f"metric[{n}]")) if on_step else None)
        result = guardrail_findings(live, pulls, as_of, cfg.checks)
        snapshots.extend(result.snapshots)
        return list(result.findings)

    guarded("guardrail", guardrail)
    # novelty: one read-only per-age query per primary/guardrail metric
    guarded("novelty", lambda: novelty_findings(live, pull_novelty(cfg, wh, live, as_of, on_query=on_step),
                                                as_of, cfg.checks))
    # interference: spillover (one windowed query per metric, ramped experiments only) and
    # collision (one cross-tab of shared units for all pairs, one query per guardrail)
    guarded("spillover", lambda: spillover_findings(live, pull_spillover(
        cfg, wh, live, as_of, on_query=(lambda n: on_step(f"spillover[{n}]")) if on_step else None), as_of, cfg.checks))
    guarded("collision", lambda: collision_findings(live, pull_collisions(
        cfg, wh, live, as_of, on_query=(lambda n: on_step(f"collision[{n}]")) if on_step else None), cfg.checks))
    return found, snapshots


#: The checks :func:`metric_findings` runs, in order (a failed one is reported by :func:`error_findings`).
METRIC_CHECKS = ("guardrail", "novelty", "spillover", "collision")

#: The steps of a cycle, in order, as ``on_step`` names them (the part before ``[``) and as a
#: person reads them; a step with nothing to do (no metric configured) is passed over.
CYCLE_STEPS = (("registry", "reading the registry"), ("assignments", "pulling assignment counts"),
               ("checks", "allocation checks"), ("metric", "guardrail metrics"), ("novelty", "novelty"),
               ("spillover", "spillover"), ("collision", "collision"), ("record", "recording the run"))


def error_findings(live: list[Experiment], failures: dict[str, str]) -> list[Finding]:
    """One ``warn`` finding per live experiment and failed check (scope ``error``): the check
    could not be evaluated this run. Its earlier alerts are left as they were (the cycle keeps
    them out of the ledger plan), so a failed query neither hides nor resolves anything."""
    return [Finding(e.id, check, "error", "warn",
                    f"{check} could not be evaluated this run ({message}); its open alerts are kept as they were",
                    {"error": message}) for check, message in failures.items() for e in live]


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
    notify: bool = True,
    run_id: str | None = None,
) -> CycleResult:
    """Run one cycle and (unless ``dry_run``) record it.

    With ``notify`` (the default) the run's notifiable alert events are queued in
    the outbox inside the same transaction that records them, then delivered
    (webhooks, heartbeat); a failed delivery stays queued for the next run.
    ``dry_run``, backtests and ``notify=False`` (replay) send nothing.

    Raises
    ------
    WarehouseError, StateError, ConfigError
        Nothing of the run has been written to the state store when one is
        raised; a warehouse failure queues one "monitor failing" notice when
        webhooks are configured (not one per failed run). Exception: a
        ``StateError`` from the delivery after the run was recorded (the store
        could not be written while marking messages); its message says so.
    """
    started = clock()
    as_of = (as_of or started).astimezone(timezone.utc)
    if as_of > started:
        raise ConfigError(f"--as-of {as_of.isoformat()} is in the future")
    run_id = run_id or str(uuid.uuid4())  # a caller that logs under the id before the cycle starts passes it
    if dry_run and _absent(cfg):  # nothing to read and nothing may be written: an empty store in memory
        state = StateStore("sqlite://", engine=sa.create_engine("sqlite://", poolclass=sa.pool.StaticPool))
    else:
        state = StateStore(cfg.state.url or "", migrate=not dry_run)
    notifying = notify and not dry_run and _wants_notifications(cfg)
    wh = open_warehouse(cfg.warehouse, tracer=tracer)
    run_token = RUN_ID.set(run_id)  # every record logged during the cycle carries its run id (RunContextFilter)
    try:
        # the cycle's place in the order of cycles, taken before it reads anything (monitor health)
        number = outbox.begin_cycle(state.engine) if notifying else None
        wh.pin()  # one session for the run's queries (DuckDB): one snapshot, one shared first-assignment relation
        lock_cm = state.lock(wait_seconds=wait_seconds) if not dry_run else nullcontext()
        with lock_cm:
            if on_step:
                on_step("registry")
            exps, problems = load_registry(cfg, wh)
            live = [e for e in exps if e.live_at(as_of, cfg.registry.live_status)]
            sources = pull_sources(cfg, wh, state, live, as_of, full_refresh=full_refresh,
                                   on_query=(lambda n: on_step(f"assignments[{n}]")) if on_step else None)
            # rows the assignment query leaves out (NULL unit, timestamp or experiment) are counted, not lost
            unattributed = pull_unattributed(cfg, wh, live, as_of)
            if on_step:
                on_step("checks")
            counts = {s.name: s.counts for s in sources}
            timings: dict[str, float] = {}
            t_check = time.perf_counter()
            found = design_findings(problems) + allocation_findings(live, counts, cfg.sources[0].name, as_of, cfg.checks)
            found += unattributed_findings(live, unattributed, cfg.checks)
            # every SRM alert carries its diagnosis (when, which slice, which stage), from the counts already pulled
            found = attach_diagnoses(found, counts, live, cfg, as_of=as_of)
            timings["allocation"] = time.perf_counter() - t_check
            # guardrails: one read-only query per metric, before anything is written; a check whose
            # query fails leaves an error finding and the other checks' results stand
            failures: dict[str, str] = {}
            metric_found, snapshots = metric_findings(cfg, wh, live, as_of, on_step=on_step, timings=timings,
                                                      failures=failures)
            found += metric_found + error_findings(live, failures)
            result = CycleResult(run_id, as_of, live, found, [], sources, problems,
                                 query_seconds={s.name: s.seconds for s in wh.stats},
                                 metric_snapshots=snapshots, check_seconds=timings, failed_checks=dict(failures))
            last = state.last_run_as_of() if not dry_run else None
            live_ids = [e.id for e in live] + [p.experiment for p in problems]
            clear_for = timedelta(hours=cfg.checks.episode_clear_hours)
            backtest = any(not s.persist for s in sources) or (last is not None and as_of < last)
            if dry_run:
                result.note = "dry run: nothing was recorded"
                result.events = ledger.plan([a for a in state.open_alerts() if a["check_name"] not in failures], found,
                                            live_ids, as_of=as_of, clear_for=clear_for)
                return result
            if backtest:
                result.note = (f"--as-of is earlier than the latest recorded run ({last:%Y-%m-%d %H:%M} UTC): "
                               "computed as a backtest, nothing was recorded") if last else "backtest: nothing was recorded"
                return result
            if on_step:
                on_step("record")
            with state.transaction() as conn:
                for s in sources:
                    StateStore.replace_counts(conn, s.name, s.since, as_of, s.experiments, s.fresh)
                kept = [a for a in state.open_alerts(conn) if a["check_name"] not in failures]  # failed: left as they were
                events = ledger.plan(kept, found, live_ids, as_of=as_of, clear_for=clear_for)
                result.events = ledger.apply(conn, run_id, as_of, found, events)
                if notifying:
                    outbox.enqueue(conn, run_id, as_of, result.events, cfg.notify, live)
                StateStore.record_metric_snapshots(conn, run_id, as_of, result.metric_snapshots)
                StateStore.record_query_costs(conn, run_id, wh.stats)
                StateStore.record_run(conn, run_id, started, as_of, "ok", {
                    "experiments": len(live), "findings": len(found), "failed_checks": dict(failures),
                    "queries": [{"name": q.name, "seconds": round(q.seconds, 4), "rows": q.rows} for q in wh.stats],
                })
                if cfg.state.keep_days is not None:  # retention, in the transaction that records the run
                    _log_pruned(prune_in(conn, cfg.state.keep_days))
            result.recorded = True
        if notifying:  # a check that could not run is a monitor-health notice, once, like a failed run
            _deliver(cfg, state, healthy=not failures, cycle=number,
                     failure="; ".join(f"check {k} failed: {v}" for k, v in failures.items()) or None)
        return result
    except WarehouseError as exc:
        if notifying:
            _deliver(cfg, state, healthy=False, failure=str(exc), cycle=number)
        raise
    finally:
        wh.dispose()
        state.dispose()
        RUN_ID.reset(run_token)


def _log_pruned(out: dict) -> None:
    """One log line for what a run's retention removed (nothing when it removed nothing)."""
    removed = {k: v for k, v in out["removed"].items() if v}
    if removed:
        log.info("state.keep_days: removed what is older than %s UTC: %s", f"{out['cutoff']:%Y-%m-%d %H:%M}",
                 ", ".join(f"{n} from {t}" for t, n in removed.items()),
                 extra={"event": "pruned", "removed": removed})


def _wants_notifications(cfg: Config) -> bool:
    n = cfg.notify
    return bool(n.webhooks or n.heartbeat_url)


def _deliver(cfg: Config, state: StateStore, *, healthy: bool, failure: str | None = None,
             cycle: int | None = None) -> None:
    """Deliver what the outbox holds. A delivery failure never fails a run that has
    already been decided (the messages stay queued); a state store that cannot be
    written does: :class:`StateError` (one line, exit 1)."""
    try:
        if healthy:
            outbox.record_success(state.engine, cfg.notify, cycle=cycle)
        else:
            outbox.record_failure(state.engine, failure or "the monitor failed", cfg.notify, cycle=cycle)
        report = outbox.deliver_pending(state.engine, cfg.notify)
        if report.failed:
            log.warning("notifications: %d delivered, %d failed and stay queued", report.delivered, report.failed)
        if healthy:
            outbox.send_heartbeat(cfg.notify)
    except StateError as exc:  # reported once by the caller: `run` prints it, `serve` logs it as an error
        raise StateError(f"the run was recorded, but {exc}" if healthy else str(exc)) from exc
    except (MonitorError, SQLAlchemyError) as exc:
        log.warning("notifications not delivered this run (they stay queued): %s", exc)


def _absent(cfg: Config) -> bool:
    """True when the state store is a SQLite file that does not exist yet."""
    url = cfg.state.url or ""
    if url.startswith("sqlite:///"):
        return not Path(url.removeprefix("sqlite:///").split("?")[0]).exists()
    return False
