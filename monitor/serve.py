"""``expwatch serve``: a long-running scheduler for monitoring cycles and the digest.

One process runs APScheduler 3 (a background scheduler; the main thread waits
for a stop signal). Cycles run on the ``schedule.checks`` cron expression in the
config's ``timezone`` (or every ``schedule.interval_seconds``), with one
instance at a time, a misfire grace time and coalescing of missed runs. Every
cycle calls :func:`monitor.cycle.run_cycle` with ``wait_seconds=0``, so the
lock in the state store keeps a scheduler and a cron-started ``expwatch run``
from overlapping: the one that finds the lock taken logs and skips.

A digest that could not be delivered to every recipient stays queued in the
outbox; the scheduler adds a one-off ``digest-retry`` job at the time its next
attempt (or its deadline) is due, and again after each retry, until every
recipient has it or the deadline closes it (see :func:`monitor.digest.run_digest`).
Undelivered digest e-mails found when the scheduler starts are retried the same way.

SIGTERM or SIGINT stops the scheduler: no new cycle starts, the one running is
allowed to finish (its work is one transaction, so even a hard kill leaves all
or nothing), and the process exits 0.
"""

from __future__ import annotations

import importlib
import logging
import signal
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

from sqlalchemy.exc import SQLAlchemyError

from monitor.serve_config import ScheduleConfig, parse_cron, schedule_of

__all__ = ["CycleOutcome", "Server", "check_job", "digest_job", "digest_retry_job", "serve"]

log = logging.getLogger("monitor")

DIGEST_FUNCTIONS = ("run_digest",)


@dataclass(frozen=True)
class CycleOutcome:
    """What one scheduled job did.

    Attributes
    ----------
    job : str
        ``"checks"`` or ``"digest"``.
    outcome : str
        ``"ok"``, ``"skipped"`` (lock held, or no digest module) or ``"failed"``.
    run_id : str or None
        The cycle's run id (also of a skipped or failed cycle: its log lines carry it).
    seconds : float
    message : str
        One line for the log.
    """

    job: str
    outcome: str
    run_id: str | None
    seconds: float
    message: str


def check_job(cfg: Any, *, metrics_file: str | None = None,
              run: Callable[..., Any] | None = None) -> CycleOutcome:
    """Run one monitoring cycle now; never raises.

    Parameters
    ----------
    cfg : Config
    metrics_file : str, optional
        Rewrite this Prometheus textfile after the cycle (success or failure).
    run : callable, optional
        The cycle function (default :func:`monitor.cycle.run_cycle`).

    Returns
    -------
    CycleOutcome
        ``skipped`` when another cycle holds the state store lock, ``failed``
        (logged as an error with its one-line cause) when the cycle raised.
    """
    from monitor.observe import run_context

    run_id = str(uuid.uuid4())
    with run_context(run_id):  # every line of the job carries the cycle's id, a skipped or failed one's too
        return _check_job(cfg, run_id, metrics_file, run)


def _check_job(cfg: Any, run_id: str, metrics_file: str | None, run: Callable[..., Any] | None) -> CycleOutcome:
    from monitor.errors import MonitorError
    from monitor.observe import log_cycle, write_metrics_file
    from monitor.state import LockHeld

    if run is None:
        from monitor.cycle import run_cycle as run
    t0 = time.monotonic()
    ok: bool | None = None
    try:
        result = run(cfg, wait_seconds=0.0, run_id=run_id)
    except LockHeld as exc:
        out = CycleOutcome("checks", "skipped", run_id, time.monotonic() - t0, f"cycle skipped: {exc}")
        log.warning(out.message, extra={"event": "cycle_skipped"})
    except MonitorError as exc:
        ok = False
        out = CycleOutcome("checks", "failed", run_id, time.monotonic() - t0, f"cycle failed: {exc}")
        log.error(out.message, extra={"event": "cycle_failed"})
    except Exception as exc:  # a bug: keep the scheduler alive, log it with its traceback
        ok = False
        out = CycleOutcome("checks", "failed", run_id, time.monotonic() - t0, f"cycle failed: internal error: {type(exc).__name__}: {exc}")
        log.exception(out.message, extra={"event": "cycle_failed"})
    else:
        ok = True
        secs = time.monotonic() - t0
        log_cycle(result, secs, getattr(getattr(cfg, "state", None), "url", None))
        out = CycleOutcome("checks", "ok", result.run_id, secs, f"cycle {result.run_id} done in {secs:.2f}s")
    if metrics_file:
        try:
            write_metrics_file(metrics_file, cfg.state.url or "", last_attempt_ok=ok)
        except MonitorError as exc:
            log.error("metrics file not written: %s", exc, extra={"event": "metrics_failed"})
    return out


def digest_job(cfg: Any, *, module: str = "monitor.digest") -> CycleOutcome:
    """Send the digest through ``monitor.digest`` when that module is installed.

    The module is imported lazily and its ``run_digest(cfg)`` is called (build the
    digest, send it as configured, start the next window). Without the module or
    that function the job logs one line and returns ``skipped``. Never raises.
    """
    from monitor.errors import MonitorError

    t0 = time.monotonic()
    try:
        mod = importlib.import_module(module)
    except ModuleNotFoundError as exc:
        if exc.name != module:
            raise
        out = CycleOutcome("digest", "skipped", None, 0.0, f"digest skipped: {module} is not available in this version")
        log.info(out.message, extra={"event": "digest_skipped"})
        return out
    fn = next((getattr(mod, n) for n in DIGEST_FUNCTIONS if callable(getattr(mod, n, None))), None)
    if fn is None:
        out = CycleOutcome("digest", "skipped", None, 0.0, f"digest skipped: {module} has no {' or '.join(f + '(cfg)' for f in DIGEST_FUNCTIONS)}")
        log.warning(out.message, extra={"event": "digest_skipped"})
        return out
    try:
        sent = fn(cfg)
    except MonitorError as exc:
        out = CycleOutcome("digest", "failed", None, time.monotonic() - t0, f"digest failed: {exc}")
        log.error(out.message, extra={"event": "digest_failed"})
        return out
    except Exception as exc:
        out = CycleOutcome("digest", "failed", None, time.monotonic() - t0, f"digest failed: internal error: {type(exc).__name__}: {exc}")
        log.exception(out.message, extra={"event": "digest_failed"})
        return out
    what = (f"digest {sent.day}: {'already delivered' if sent.already else 'sent'} to {len(sent.delivered)} "
            f"recipient(s): {sent.subject}" if hasattr(sent, "subject") and hasattr(sent, "delivered") else "digest sent")
    out = CycleOutcome("digest", "ok", None, time.monotonic() - t0, f"{what} ({time.monotonic() - t0:.2f}s)")
    log.info(out.message, extra={"event": "digest"})
    return out


def digest_retry_job(cfg: Any) -> tuple[CycleOutcome, datetime | None]:
    """Retry the undelivered digest e-mails that are due; returns the outcome and when
    the next retry (or deadline) is due (None: nothing is left). Never raises."""
    from monitor.digest import retry_digest
    from monitor.errors import MonitorError

    t0 = time.monotonic()
    try:
        nxt = retry_digest(cfg)
    except MonitorError as exc:
        out = CycleOutcome("digest", "failed", None, time.monotonic() - t0, f"digest retry failed: {exc}")
        log.error(out.message, extra={"event": "digest_failed"})
        return out, None
    except Exception as exc:
        out = CycleOutcome("digest", "failed", None, time.monotonic() - t0,
                           f"digest retry failed: internal error: {type(exc).__name__}: {exc}")
        log.exception(out.message, extra={"event": "digest_failed"})
        return out, None
    msg = "digest retry done" + (f"; next attempt at {nxt:%Y-%m-%d %H:%M:%S} UTC" if nxt else "; nothing left to send")
    out = CycleOutcome("digest", "ok" if nxt is None else "failed", None, time.monotonic() - t0, msg)
    log.info(out.message, extra={"event": "digest_retry"})
    return out, nxt


@dataclass
class Server:
    """A configured scheduler; :meth:`start`, then :meth:`stop` (or :func:`serve`).

    Parameters
    ----------
    cfg : Config
    metrics_file : str, optional
    check : callable, optional
        Replaces :func:`check_job` (tests).
    digest : callable, optional
        Replaces :func:`digest_job` (tests).
    """

    cfg: Any
    metrics_file: str | None = None
    check: Callable[[Any], CycleOutcome] | None = None
    digest: Callable[[Any], CycleOutcome] | None = None
    outcomes: list[CycleOutcome] = field(default_factory=list)

    def __post_init__(self) -> None:
        from apscheduler.schedulers.background import BackgroundScheduler
        from apscheduler.triggers.interval import IntervalTrigger

        sched: ScheduleConfig = schedule_of(self.cfg)
        tz = getattr(self.cfg, "timezone", "UTC")
        self.scheduler = BackgroundScheduler(timezone=tz)
        common = {"max_instances": 1, "coalesce": sched.coalesce, "misfire_grace_time": sched.misfire_grace_seconds,
                  "replace_existing": True}
        if sched.interval_seconds is not None:
            checks_trigger: Any = IntervalTrigger(seconds=sched.interval_seconds, timezone=tz)
        else:
            checks_trigger = parse_cron(sched.checks, key="schedule.checks", timezone=tz)
        self.scheduler.add_job(self._run_check, checks_trigger, id="checks", name="monitoring cycle", **common)
        if sched.digest is not None:
            self.scheduler.add_job(self._run_digest, parse_cron(sched.digest, key="schedule.digest", timezone=tz),
                                   id="digest", name="digest", **common)
        self.schedule = sched
        self._lock = threading.Lock()

    def _record(self, out: CycleOutcome) -> None:
        with self._lock:
            self.outcomes.append(out)

    def _run_check(self) -> None:
        fn = self.check or (lambda cfg: check_job(cfg, metrics_file=self.metrics_file))
        self._record(fn(self.cfg))

    def _run_digest(self) -> None:
        self._record((self.digest or digest_job)(self.cfg))
        self._schedule_digest_retry()

    def _run_digest_retry(self) -> None:
        out, nxt = digest_retry_job(self.cfg)
        self._record(out)
        self._schedule_digest_retry(nxt)

    def _schedule_digest_retry(self, at: datetime | None = None) -> None:
        """Add (or move) the one-off ``digest-retry`` job to when the next undelivered
        digest e-mail is due; no job when none is left or the store cannot tell."""
        from apscheduler.triggers.date import DateTrigger

        if getattr(getattr(self.cfg, "notify", None), "email", None) is None:
            return
        if at is None:
            from monitor.errors import MonitorError
            from monitor.outbox import next_email_attempt
            from monitor.state import StateStore

            try:
                state = StateStore(self.cfg.state.url or "")
                try:
                    at = next_email_attempt(state.engine)
                finally:
                    state.dispose()
            except (MonitorError, SQLAlchemyError) as exc:
                log.error("digest retry not scheduled: %s", exc, extra={"event": "digest_failed"})
                return
        if at is None:
            return
        at = max(at, datetime.now(timezone.utc))
        self.scheduler.add_job(self._run_digest_retry, DateTrigger(run_date=at), id="digest-retry",
                               name="digest retry", replace_existing=True, misfire_grace_time=None)
        log.info("digest retry scheduled at %s UTC", f"{at:%Y-%m-%d %H:%M:%S}", extra={"event": "digest_retry_scheduled"})

    def next_runs(self) -> dict[str, datetime | None]:
        """The next fire time of each job (aware UTC); only after :meth:`start`."""
        return {j.id: (j.next_run_time.astimezone(timezone.utc) if j.next_run_time else None) for j in self.scheduler.get_jobs()}

    def start(self) -> None:
        self.scheduler.start()
        self._schedule_digest_retry()
        nxt = self.next_runs()
        how = (f"every {self.schedule.interval_seconds}s" if self.schedule.interval_seconds
               else f"on '{self.schedule.checks}' ({getattr(self.cfg, 'timezone', 'UTC')})")
        log.info("scheduler started: cycles %s, next at %s; digest %s", how,
                 nxt.get("checks"), nxt.get("digest") or "off",
                 extra={"event": "serve_started", "next_checks": nxt.get("checks"), "next_digest": nxt.get("digest")})

    def stop(self, *, wait: bool = True) -> None:
        """Start no new job; with ``wait`` let the running one finish."""
        if self.scheduler.running:
            self.scheduler.shutdown(wait=wait)
        log.info("scheduler stopped", extra={"event": "serve_stopped"})


def serve(cfg: Any, *, metrics_file: str | None = None, stop: threading.Event | None = None,
          install_signals: bool = True) -> int:
    """Run the scheduler until SIGTERM/SIGINT (or ``stop`` is set); returns 0.

    Parameters
    ----------
    cfg : Config
    metrics_file : str, optional
        Prometheus textfile rewritten after every cycle.
    stop : threading.Event, optional
        Set it to stop (tests, embedding).
    install_signals : bool
        Install SIGTERM and SIGINT handlers (only possible in the main thread).

    Notes
    -----
    On a stop signal the running cycle, if any, is allowed to finish; a second
    signal does not interrupt it either (use SIGKILL for that: the cycle's work
    is a single transaction, so nothing half-written remains).
    """
    stop = stop or threading.Event()
    server = Server(cfg, metrics_file=metrics_file)
    previous: dict[int, Any] = {}
    if install_signals:
        def handler(signum: int, _frame: Any) -> None:
            log.info("received %s: stopping after the running cycle", signal.Signals(signum).name,
                     extra={"event": "serve_signal"})
            stop.set()

        for sig in (signal.SIGTERM, signal.SIGINT):
            previous[sig] = signal.signal(sig, handler)
    try:
        server.start()
        while not stop.wait(0.5):
            pass
    finally:
        server.stop(wait=True)
        for sig, h in previous.items():
            signal.signal(sig, h)
    return 0
