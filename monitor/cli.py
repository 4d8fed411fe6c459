"""The ``expwatch`` command line.

Exit codes: 0 the command did its job (whether or not experiments are healthy,
and also when another cycle held the lock and this one stepped aside); 1 the
monitor itself failed (warehouse unreachable, query error, state store
unusable); 2 a usage or configuration error. Expected errors print one line,
never a traceback (``--verbose`` adds it).
"""

from __future__ import annotations

import argparse
import difflib
import logging
import sys
import time
import uuid
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor import __version__
from monitor.errors import ConfigError, MonitorError

if TYPE_CHECKING:  # imported when a command runs, so that --version and --help stay light
    from rich.console import Console

    from monitor.config import Config

__all__ = ["main"]

log = logging.getLogger("monitor")


def _parse_time(text: str, option: str = "--as-of") -> datetime:
    try:
        t = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise ConfigError(f"{option}: {text!r} is not an ISO 8601 time (e.g. 2026-11-30T09:00Z)") from None
    return t.replace(tzinfo=timezone.utc) if t.tzinfo is None else t.astimezone(timezone.utc)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        self.exit(2, f"expwatch: {message} (see 'expwatch {self.prog.split()[-1]} --help')\n"
                  if " " in self.prog else f"expwatch: {message} (see 'expwatch --help')\n")


#: The alert ledger's episode rule, as the ledger-facing commands state it (monitor/ledger.py).
EPISODE_RULE = ("An alert episode opens when a check goes to warn or alert and closes only after the check has been ok "
                "for checks.episode_clear_hours (default 24 h); a check that fails again within that span continues "
                "the same episode without a new notification, unless it is more severe than the episode has been "
                "(escalation is notified at once).")


def _build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="expwatch", description="Trust checks for every live online controlled experiment.")
    p.add_argument("--version", action="version", version=f"expwatch {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    def common(sp: argparse.ArgumentParser, config: bool = True) -> None:
        if config:
            sp.add_argument("--config", "-c", required=True, metavar="FILE", help="the YAML configuration file")
        sp.add_argument("--verbose", "-v", action="store_true", help="log every query and show tracebacks")

    r = sub.add_parser("run", help="run one monitoring cycle: pull, check, record",
                       description="Run one cycle: pull new hourly counts, run every check, update the alert ledger.")
    common(r)
    r.add_argument("--as-of", metavar="TIME", help="compute as it would have looked at TIME (ISO 8601; default now)")
    r.add_argument("--format", choices=["text", "json"], default=None, help="output format (default: the config's 'output', text)")
    r.add_argument("--dry-run", action="store_true", help="compute everything, record nothing")
    r.add_argument("--full-refresh", action="store_true", help="re-pull every hour instead of only recent ones")
    r.add_argument("--wait", type=float, default=0.0, metavar="SECONDS",
                   help="wait this long for another running cycle to finish (default: step aside at once)")
    r.add_argument("--quiet", "-q", action="store_true",
                   help="for cron: print nothing unless alerts opened, escalated or resolved (one line each) "
                        "or the run failed")
    _observability_options(r)

    v = sub.add_parser("validate", help="check the config, connect, and compile every query without running it",
                       description="Validate the configuration, connect to the warehouse and state store, and compile "
                                   "every SQL template against the warehouse (LIMIT 0) without reading data.")
    common(v)

    s = sub.add_parser("sql", help="print the rendered SQL for review",
                       description="Print every query expwatch would send, with its bind parameters, for a DBA to review.")
    common(s)

    x = sub.add_parser("explain", help="say why an experiment's allocation ratio broke",
                       description="Explain the allocation ratio of one live experiment: the stage where it breaks, "
                                   "when it started, which segment values hold it, covariate balance and likely causes. "
                                   "Read-only: nothing is recorded.")
    x.add_argument("experiment", metavar="EXPERIMENT", help="the experiment id, as in the registry")
    common(x)
    x.add_argument("--as-of", metavar="TIME", help="explain as of TIME (ISO 8601; default now)")
    x.add_argument("--format", choices=["text", "json", "html"], default="text", help="output format (default text)")
    x.add_argument("--out", metavar="FILE", help="write to FILE instead of standard output")

    d = sub.add_parser("demo", help="build a demo warehouse (DuckDB), run one cycle on it, print what it found",
                       description="Build the demo warehouse of a fictional e-book lending app as a DuckDB file, "
                                   "write a config beside it, and run one cycle.")
    common(d, config=False)
    d.add_argument("--dir", default="expwatch-demo", metavar="DIR", help="where to write the demo (default ./expwatch-demo)")
    d.add_argument("--format", choices=["text", "json"], default="text", help="output format")
    sv = sub.add_parser("serve", help="run cycles (and the digest) on a schedule until stopped",
                        description="Run monitoring cycles on the config's schedule (schedule.checks, a cron expression in "
                                    "the config's timezone) and the digest on schedule.digest, until SIGTERM or SIGINT; "
                                    "the running cycle is allowed to finish and the exit code is 0.")
    common(sv)
    _observability_options(sv)

    rp = sub.add_parser("replay", help="replay the monitor over a past period on a throw-away state store",
                        description="Evaluate the checks at every step from --from to --to on a throw-away state "
                                    "(the configured store is neither read nor written, nothing is sent) and report when "
                                    "each alert would have opened, escalated and closed. By default the assignment "
                                    "counts are pulled once and the allocation checks evaluated at every step on the "
                                    "counts as they stood then; metric checks run every --metrics-every. --exact runs "
                                    "a whole cycle at every step instead (slow). " + EPISODE_RULE + " A quietness "
                                    "report follows the table: per check, the episodes, the flaps (closed within 24 h "
                                    "of opening) and the reopenings (opened within 24 h of the previous close on the "
                                    "same experiment, check and scope).")
    common(rp)
    rp.add_argument("--from", dest="start", required=True, metavar="TIME", help="first step (ISO 8601)")
    rp.add_argument("--to", dest="end", required=True, metavar="TIME", help="last step (ISO 8601)")
    rp.add_argument("--every", default="1h", metavar="STEP", help="step between evaluations: 1h, 6h, 1d (default 1h)")
    rp.add_argument("--metrics-every", default="1d", metavar="STEP",
                    help="how often the metric (guardrail) checks run during the replay (default 1d); "
                         "their findings stand in between")
    rp.add_argument("--exact", action="store_true",
                    help="run a whole cycle (incremental pulls, lookback and all) at every step, as a scheduled "
                         "deployment would: slow, for checking the fast replay")
    rp.add_argument("--onset", action="append", default=[], metavar="EXPERIMENT[:CHECK]=TIME",
                    help="a known onset, to report the detection delay (repeatable)")
    rp.add_argument("--allocation-only", action="store_true",
                    help="skip the metric (guardrail) queries and checks: only allocation checks, much faster")
    rp.add_argument("--format", choices=["text", "json"], default="text", help="output format (default text)")

    st = sub.add_parser("status", help="show recent runs and open alerts from the state store",
                        description="Show the recent runs (outcome, duration) and the open alerts by check and severity, "
                                    "read from the state store; nothing is queried in the warehouse.")
    common(st)
    st.add_argument("--format", choices=["text", "json"], default="text", help="output format (default text)")
    st.add_argument("--limit", type=int, default=10, metavar="N", help="how many recent runs (default 10)")
    st.add_argument("--max-age", metavar="AGE",
                    help="a health check: exit 1 when no run succeeded within AGE (30m, 3h, 1d), e.g. for a container HEALTHCHECK")
    _notify_parsers(sub, common)
    return p


def _notify_parsers(sub: Any, common: Any) -> None:
    dg = sub.add_parser("digest", help="build the alert digest from the state store; print, save or e-mail it",
                        description="Build the digest (every live experiment's latest status, new / ongoing / resolved "
                                    "alerts since the last digest, charts) from the state store. Without --send or --out "
                                    "the plain-text version is printed.")
    common(dg)
    out = dg.add_mutually_exclusive_group()
    out.add_argument("--send", action="store_true", help="e-mail it to notify.email.recipients and start the next window")
    out.add_argument("--out", metavar="FILE", help="write the HTML version (charts embedded) to FILE")
    dg.add_argument("--force", action="store_true",
                    help="with --send: send today's digest again even if every recipient already has it")

    al = sub.add_parser("alerts", help="list the open alerts, with mutes and queued notifications",
                        description="List the open alerts from the state store, most severe first, marking muted ones, "
                                    "then the episodes whose finding is clear but not yet for long enough to close, "
                                    "and the webhook messages still waiting for delivery. " + EPISODE_RULE)
    common(al)
    al.add_argument("--format", choices=["text", "json"], default="text", help="output format (default text)")

    mu = sub.add_parser("mute", help="stop pushing an experiment's alerts to webhooks until a date",
                        description="Mute an experiment's alerts (all checks, or one with --check) until --until: they are "
                                    "not pushed to webhooks but still appear, marked, in the digest and in 'alerts'.")
    mu.add_argument("experiment", metavar="EXPERIMENT", help="the experiment id, as in the registry")
    common(mu)
    mu.add_argument("--check", metavar="CHECK", help="mute only this check (srm, leakage, freshness, guardrail, ...)")
    mu.add_argument("--until", required=True, metavar="DATE",
                    help="ISO 8601 time, or a date meaning the end of that day (UTC)")
    mu.add_argument("--reason", required=True, metavar="TEXT", help="why; shown beside the muted alerts")
    mu.add_argument("--not-yet-seen", action="store_true",
                    help="allow an experiment neither the registry nor the alert ledger knows yet (else: a usage error)")

    um = sub.add_parser("unmute", help="remove a mute", description="Remove the mute of an experiment (or of one check).")
    um.add_argument("experiment", metavar="EXPERIMENT", help="the experiment id")
    common(um)
    um.add_argument("--check", metavar="CHECK", help="remove only the mute of this check")


    pr = sub.add_parser("prune", help="remove old runs and the counts of experiments no longer watched (state.keep_days)",
                        description="Remove, in one transaction, runs older than state.keep_days before the latest recorded "
                                    "run (with their findings, metric snapshots and query costs) and the hourly counts of "
                                    "experiments no run has pulled since then. Open and past alerts are kept.")
    common(pr)
    pr.add_argument("--keep-days", type=float, metavar="DAYS", help="retention in days (default: state.keep_days)")
    pr.add_argument("--dry-run", action="store_true", help="count what would be removed; remove nothing")


def _observability_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--log-format", choices=["text", "json"], default="text",
                    help="log lines as text or as one JSON object per line (with run id, per-query durations and rows)")
    sp.add_argument("--metrics-file", metavar="PATH",
                    help="after each cycle, write Prometheus text-format metrics to PATH (atomically)")


def _not_an_alert_event(record: logging.LogRecord) -> bool:
    """Text logs leave out the alert events: the run table, or --quiet's lines, show them."""
    return not str(getattr(record, "event", "")).startswith("alert_")


def _setup_logging(verbose: bool, console: Console) -> None:
    root = logging.getLogger("monitor")
    root.handlers.clear()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S%z"))
    handler.addFilter(_not_an_alert_event)
    root.addHandler(handler)
    root.setLevel(logging.INFO if verbose else logging.WARNING)
    root.propagate = False


def _json_logs() -> bool:
    """Whether the log goes out as JSON lines (``--log-format json``): then stderr carries
    nothing else, and stdout no table."""
    from monitor.observe import JsonFormatter

    return any(isinstance(h.formatter, JsonFormatter) for h in logging.getLogger("monitor").handlers)


def _run(cfg: Config, args: argparse.Namespace, console: Console, err: Console, *, as_of: datetime | None) -> int:
    from monitor.cycle import run_cycle
    from monitor.findings import SEVERITY_NAMES
    from monitor.observe import log_cycle, run_context
    from monitor.report import print_text, to_json_text
    from monitor.state import LockHeld

    fmt = args.format or cfg.output
    quiet = bool(getattr(args, "quiet", False))
    json_logs = _json_logs()
    t0 = time.monotonic()
    status = None
    if err.is_terminal and fmt == "text" and not quiet and not json_logs:
        from rich.live import Live
        from rich.spinner import Spinner

        from monitor.report import CycleProgress

        progress = CycleProgress()  # redrawn 4 times a second: its clock runs while a step computes
        status = Live(Spinner("dots", text=progress), console=err, refresh_per_second=4, transient=True)
        status.start()

    def on_step(name: str) -> None:
        if status is not None:
            progress.step(name)
            status.refresh()
        else:
            log.info("step: %s", name, extra={"event": "step", "step": name})

    run_id = getattr(args, "run_id", None) or str(uuid.uuid4())
    try:
        with run_context(run_id):
            result = run_cycle(cfg, as_of=as_of, dry_run=getattr(args, "dry_run", False),
                               full_refresh=getattr(args, "full_refresh", False), wait_seconds=getattr(args, "wait", 0.0),
                               on_step=on_step, run_id=run_id)
    except LockHeld as exc:
        if status is not None:
            status.stop()
        if json_logs:
            log.warning("%s; this run stepped aside", exc, extra={"event": "stepped_aside"})
        elif quiet:  # for cron: a stepped-aside run is no news
            log.info("%s; this run stepped aside", exc, extra={"event": "stepped_aside"})
        else:
            sys.stderr.write(f"expwatch: {exc}; this run stepped aside\n")
        return 0
    except MonitorError:
        _write_metrics(cfg, args, ok=False)
        raise
    finally:
        if status is not None:
            status.stop()
    if fmt == "json":
        sys.stdout.write(to_json_text(result) + "\n")
    elif json_logs:
        pass  # the alert events and the summary are log records; no table between the JSON lines
    elif quiet:
        for ev in result.events:
            if ev.notifiable:
                sys.stdout.write(f"{ev.kind} {SEVERITY_NAMES.get(ev.severity, ev.severity)}: "
                                 f"{ev.experiment} · {ev.check} · {ev.scope}: {ev.summary}\n")
    else:
        print_text(result, console)
    log_cycle(result, time.monotonic() - t0, cfg.state.url)
    try:
        _write_metrics(cfg, args, ok=not result.failed_checks)
    except MonitorError as exc:  # the run is recorded: a metrics file we cannot write is not a failed run
        err.print(f"expwatch: warning: the run was recorded, but {exc}", highlight=False, soft_wrap=True)
    for check, message in result.failed_checks.items():
        err.print(f"expwatch: check {check} could not run ({message}); the other checks were recorded",
                  highlight=False, soft_wrap=True)
    return 1 if result.failed_checks else 0


def _write_metrics(cfg: Config, args: argparse.Namespace, *, ok: bool) -> None:
    path = getattr(args, "metrics_file", None)
    if path:
        from monitor.observe import write_metrics_file

        write_metrics_file(path, cfg.state.url or "", last_attempt_ok=ok)


def _setup_json_logging(level: int, session_id: str | None = None) -> None:
    """JSON lines on stderr. With ``session_id`` (``serve``), a line logged outside any
    cycle carries it as ``run_id`` and every line as ``serve_id``; the scheduler library's
    own warnings (a missed run) go out as JSON lines too."""
    from monitor.observe import JsonFormatter, RunContextFilter

    root = logging.getLogger("monitor")
    root.handlers.clear()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    context = RunContextFilter()
    handler.addFilter(context)
    root.addHandler(handler)
    root.setLevel(level)
    root.propagate = False
    if session_id is not None:
        context.context.update(run_id=session_id, serve_id=session_id)
        scheduler = logging.getLogger("apscheduler")
        scheduler.handlers.clear()
        scheduler.addHandler(handler)
        scheduler.setLevel(logging.WARNING)
        scheduler.propagate = False


def _serve(cfg: Config, args: argparse.Namespace) -> int:
    from monitor.serve import serve

    return serve(cfg, metrics_file=args.metrics_file)


def _parse_onsets(items: Sequence[str]) -> dict[object, datetime]:
    out: dict[object, datetime] = {}
    for item in items:
        key, sep, when = item.rpartition("=")
        if not sep or not key:
            raise ConfigError(f"--onset: {item!r} is not EXPERIMENT[:CHECK]=TIME")
        exp, _, check = key.partition(":")
        out[(exp, check) if check else exp] = _parse_time(when, option="--onset")
    return out


def _replay(cfg: Config, args: argparse.Namespace, err: Console) -> int:
    import json

    from monitor.replay import parse_every, render_replay_text, replay, replay_to_json

    every = parse_every(args.every)
    start, end = _parse_time(args.start, option="--from"), _parse_time(args.end, option="--to")
    onsets = _parse_onsets(args.onset)
    if onsets:
        known = _registry_names(cfg)
        for key in onsets:
            name = key[0] if isinstance(key, tuple) else key
            if name not in known:
                raise ConfigError(f"--onset: unknown experiment {name!r} (not in the registry)")
    t0 = time.monotonic()

    def on_step(i: int, n: int, as_of: datetime) -> None:
        log.info("replay step %d/%d: %s (%.0fs)", i + 1, n, as_of.isoformat(), time.monotonic() - t0)

    report = replay(cfg, start, end, every=every, onsets=onsets, allocation_only=args.allocation_only,
                    mode="cycles" if args.exact else "fast", metrics_every=parse_every(args.metrics_every, "--metrics-every"),
                    on_step=on_step)
    if args.format == "json":
        sys.stdout.write(json.dumps(replay_to_json(report), indent=2, ensure_ascii=False, allow_nan=False) + "\n")
    else:
        sys.stdout.write(render_replay_text(report))
    return 0


def _status(cfg: Config, args: argparse.Namespace) -> int:
    import json

    from monitor.observe import read_status, render_status_text, status_to_json

    max_age = None
    if args.max_age is not None:
        from monitor.replay import parse_every

        max_age = parse_every(args.max_age, "--max-age")
    report = read_status(cfg.state.url or "", limit=args.limit)
    if args.format == "json":
        sys.stdout.write(json.dumps(status_to_json(report), indent=2, ensure_ascii=False, allow_nan=False) + "\n")
    else:
        sys.stdout.write(render_status_text(report))
    if max_age is not None:
        last = report.last_success
        if last is None or datetime.now(timezone.utc) - last > max_age:
            when = "no run has succeeded yet" if last is None else f"the latest successful run finished {last:%Y-%m-%d %H:%M} UTC"
            sys.stderr.write(f"expwatch: unhealthy: {when}, more than --max-age {args.max_age} ago\n"
                             if last is not None else f"expwatch: unhealthy: {when}\n")
            return 1
    return 0


def _notify_cfg(cfg: Config) -> Any:
    from monitor.notify_config import NotifyConfig

    return getattr(cfg, "notify", None) or NotifyConfig()


def _until(text: str) -> datetime:
    """``--until``: a date is the end of that day (UTC); a time without zone is UTC."""
    from datetime import date, timedelta

    try:
        d = date.fromisoformat(text.strip())
    except ValueError:
        return _parse_time(text, "--until")
    return datetime(d.year, d.month, d.day, tzinfo=timezone.utc) + timedelta(days=1)


def _require_state(cfg: Config, command: str) -> None:
    """Commands that only read the state store refuse one that does not exist (a mistyped
    state.url would otherwise create an empty store and report "0 open alerts")."""
    from monitor.state import StateStore
    from monitor.warehouse import safe_url

    url = cfg.state.url or ""
    if url.startswith("sqlite:///"):
        path = Path(url.removeprefix("sqlite:///").split("?")[0])
        if not path.is_file():
            raise ConfigError(f"{command}: no state store at {path} (state.url in {cfg.where}); "
                              "'expwatch run' creates it")
        return
    state = StateStore(url, migrate=False)
    try:
        if not state.schema_version():
            raise ConfigError(f"{command}: the state store {safe_url(url)} holds no expwatch tables "
                              f"(state.url in {cfg.where}); 'expwatch run' creates them")
    finally:
        state.dispose()


def _known_experiments(cfg: Config, state: Any) -> set[str]:
    """Experiment ids the alert ledger has seen, else those the registry names now."""
    import sqlalchemy as sa

    from monitor.state import findings

    with state.engine.connect() as conn:
        if sa.inspect(conn).has_table(findings.name):
            seen = {r[0] for r in conn.execute(sa.select(findings.c.experiment).distinct())}
            if seen:
                return seen
    return _registry_names(cfg)


def _registry_names(cfg: Config) -> set[str]:
    from monitor.cycle import load_registry
    from monitor.warehouse import open_warehouse

    wh = open_warehouse(cfg.warehouse) if cfg.registry.inline is None else None
    try:
        exps, problems = load_registry(cfg, wh)
    finally:
        if wh is not None:
            wh.dispose()
    return {e.id for e in exps} | {p.experiment for p in problems}


def _notify_command(cfg: Config, args: argparse.Namespace, err: Console) -> int:
    from monitor.state import StateStore

    if args.command in ("digest", "alerts"):
        _require_state(cfg, args.command)
    state = StateStore(cfg.state.url or "")
    try:
        if args.command == "digest":
            return _digest(cfg, args, state, err)
        if args.command == "alerts":
            return _alerts(args, state, cfg.checks.episode_clear_hours)
        if args.command == "mute":
            return _mute(args, state, err)
        return _unmute(args, state, err)
    finally:
        state.dispose()


def _check_arg(check: str | None) -> str | None:
    from monitor.findings import CHECKS

    if check is not None and check not in CHECKS:
        raise ConfigError(f"--check: unknown check {check!r} (one of {', '.join(CHECKS)})")
    return check


def _digest(cfg: Config, args: argparse.Namespace, state: Any, err: Console) -> int:
    from monitor.digest import build_digest

    ncfg = _notify_cfg(cfg)
    meta = None
    if cfg.registry.inline is not None:  # titles and owners without asking the warehouse
        from monitor.registry import experiments_from_inline

        meta = experiments_from_inline(cfg.registry)[0]
    if args.send and ncfg.email is None:
        raise ConfigError(f"{cfg.where}: notify.email: --send needs an e-mail configuration (smtp_host, sender, recipients)")
    prefix = ncfg.email.subject_prefix if ncfg.email is not None else "[expwatch]"
    if args.send:
        from monitor.digest import run_digest

        sent = run_digest(cfg, force=args.force)
        if sent.already:
            err.print(f"digest {sent.day}: already delivered to {len(sent.delivered)} recipient(s), nothing sent "
                      f"(--force sends it again): {sent.subject}", highlight=False, markup=False, soft_wrap=True)
        else:  # markup=False: a subject such as "[expwatch] ..." is printed as sent, not read as a style tag
            err.print(f"digest {sent.day}: sent to {len(sent.delivered)} recipient(s): {sent.subject}",
                      highlight=False, markup=False, soft_wrap=True)
        return 0
    if args.force:
        raise ConfigError("--force: only with --send")
    digest = build_digest(state.engine, experiments_meta=meta, subject_prefix=prefix, charts=bool(args.out),
                          image_budget=None)  # a file is not an e-mail: every chart
    if args.out:
        out = Path(args.out)
        try:
            out.write_text(digest.standalone_html(), encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"--out {out}: cannot be written ({exc.strerror})") from None
        n = len(digest.images)
        err.print(f"digest: wrote {out} ({n} chart{'' if n == 1 else 's'})", highlight=False, soft_wrap=True)
    else:
        sys.stdout.write(digest.text if digest.text.endswith("\n") else digest.text + "\n")
    return 0


def _alerts(args: argparse.Namespace, state: Any, clear_hours: float) -> int:
    import json
    from datetime import timedelta

    from monitor.digest import open_alerts
    from monitor.findings import SEVERITY_NAMES
    from monitor.outbox import pending_messages

    items = open_alerts(state.engine)
    pending = pending_messages(state.engine)
    clearing = [a for a in state.open_alerts() if a["state"] == "clearing"]
    if args.format == "json":
        doc = {"format": "expwatch.alerts/1", "alerts": [
            {"experiment": a.experiment, "check": a.check, "scope": a.scope, "severity": a.severity, "highest": a.peak,
             "summary": a.summary, "opened_at": a.opened_at.isoformat().replace("+00:00", "Z"),
             "muted_until": a.muted.until.isoformat().replace("+00:00", "Z") if a.muted else None,
             "mute_reason": a.muted.reason if a.muted else None} for a in items],
            "clearing": [{"experiment": a["experiment"], "check": a["check_name"], "scope": a["scope"],
                          "highest": SEVERITY_NAMES[a["max_severity"]],
                          "opened_at": a["opened_at"].isoformat().replace("+00:00", "Z"),
                          "clear_since": a["updated_at"].isoformat().replace("+00:00", "Z"),
                          "closes_at": (a["updated_at"] + timedelta(hours=clear_hours)).isoformat().replace("+00:00", "Z")}
                         for a in clearing],
            "undelivered_notifications": len(pending)}
        sys.stdout.write(json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n")
        return 0
    lines = [f"{len(items)} open alert{'s' if len(items) != 1 else ''}"]
    for a in items:
        mute_note = f" [muted until {a.muted.until:%Y-%m-%d %H:%M} UTC: {a.muted.reason}]" if a.muted else ""
        lines.append(f"{a.severity.upper():8} {a.experiment} · {a.check} · {a.scope}{mute_note}: {a.summary} "
                     f"(open since {a.opened_at:%Y-%m-%d %H:%M} UTC)")
    if clearing:
        lines.append(f"{len(clearing)} episode{'s' if len(clearing) != 1 else ''} clear, closing after "
                     f"{clear_hours:g} h clear unless the check fails again:")
    for a in clearing:
        lines.append(f"{'CLEARING':8} {a['experiment']} · {a['check_name']} · {a['scope']}: clear since "
                     f"{a['updated_at']:%Y-%m-%d %H:%M} UTC, closes at "
                     f"{a['updated_at'] + timedelta(hours=clear_hours):%Y-%m-%d %H:%M} UTC "
                     f"(highest {SEVERITY_NAMES[a['max_severity']]}, open since {a['opened_at']:%Y-%m-%d %H:%M} UTC)")
    if pending:
        lines.append(f"{len(pending)} webhook message(s) not delivered yet; oldest from "
                     f"{pending[0]['created_at']:%Y-%m-%d %H:%M} UTC, last error: {pending[-1]['last_error'] or 'not tried yet'}")
    sys.stdout.write("\n".join(lines) + "\n")
    return 0


def _mute(args: argparse.Namespace, state: Any, err: Console) -> int:
    from monitor.outbox import mute

    if not args.not_yet_seen:
        known = _known_experiments(args.cfg, state)
        if args.experiment not in known:
            close = difflib.get_close_matches(args.experiment, sorted(known), n=1)
            hint = f"; did you mean {close[0]!r}?" if close else ""
            raise ConfigError(f"mute: unknown experiment {args.experiment!r}: neither the alert ledger nor the "
                              f"registry knows it{hint} (--not-yet-seen mutes it anyway)")
    m = mute(state.engine, args.experiment, _check_arg(args.check), _until(args.until), args.reason)
    what = f"{m.experiment} · {m.check}" if m.check else f"{m.experiment} (every check)"
    err.print(f"mute: {what} muted until {m.until:%Y-%m-%d %H:%M} UTC", highlight=False, soft_wrap=True)
    return 0


def _unmute(args: argparse.Namespace, state: Any, err: Console) -> int:
    from monitor.outbox import unmute

    n = unmute(state.engine, args.experiment, _check_arg(args.check))
    if n == 0:
        raise ConfigError(f"unmute: {args.experiment}{' · ' + args.check if args.check else ''} is not muted")
    err.print(f"unmute: removed {n} mute{'s' if n != 1 else ''} of {args.experiment}", highlight=False, soft_wrap=True)
    return 0


def _prune(cfg: Config, args: argparse.Namespace, err: Console) -> int:
    from monitor.state import StateStore, prune

    keep = args.keep_days if args.keep_days is not None else cfg.state.keep_days
    if keep is None:
        raise ConfigError("prune: no retention; set state.keep_days in the config or give --keep-days")
    if keep <= 0:
        raise ConfigError(f"--keep-days: must be greater than 0, got {keep:g}")
    state = StateStore(cfg.state.url or "")
    try:
        out = prune(state, keep, dry_run=args.dry_run)
        if not args.dry_run and any(out["removed"].values()):
            state.vacuum()  # SQLite: the file shrinks by what was removed
    finally:
        state.dispose()
    if out["cutoff"] is None:
        err.print("prune: no run recorded yet; nothing removed", highlight=False, soft_wrap=True)
        return 0
    verb = "would remove" if args.dry_run else "removed"
    parts = ", ".join(f"{n} from {t}" for t, n in out["removed"].items())
    err.print(f"prune: kept everything from {out['cutoff']:%Y-%m-%d %H:%M} UTC on; {verb} {parts}",
              highlight=False, soft_wrap=True)
    return 0


#: A message with every field the outbox puts in an alert notice, for checking templates.
_SAMPLE_NOTICE = {
    "format": "expwatch.notice/1", "kind": "alerts", "run_id": "validate", "as_of": "2026-01-01T00:00:00Z",
    "header": "expwatch · 1 opened · as of 2026-01-01 00:00 UTC", "lines": ["ALERT sample · srm · assigned: sample"],
    "events": [{"event": "opened", "experiment": "sample", "title": "sample", "owner": "sample", "check": "srm",
                "scope": "assigned", "severity": "alert", "summary": "sample"}],
}


def _validate_webhooks(cfg: Config, console: Console) -> None:
    """What would otherwise fail only at send time: a missing or unreadable template, one
    that does not render JSON, an unset hmac_secret_env."""
    import os

    from monitor.notify import render_body

    for i, hook in enumerate(cfg.notify.webhooks):
        key = f"{cfg.where}: notify.webhooks[{i}]"
        if hook.template is not None and not Path(hook.template).is_file():
            raise ConfigError(f"{key}.template: no such file {hook.template}")
        try:
            render_body(_SAMPLE_NOTICE, hook)
        except ConfigError as exc:
            raise ConfigError(f"{key}.template: {exc}") from None
        if hook.hmac_secret_env and not os.environ.get(hook.hmac_secret_env):
            raise ConfigError(f"{key}.hmac_secret_env: environment variable {hook.hmac_secret_env} is not set")
        console.print(f"webhook    ok    {hook.name}: template renders JSON"
                      + (", signing secret set" if hook.hmac_secret_env else ""))


def _validate(cfg: Config, console: Console) -> int:
    from monitor.cycle import load_registry
    from monitor.pull import render_source_sql
    from monitor.state import StateStore
    from monitor.warehouse import open_warehouse, safe_url

    console.print(f"config     ok    {cfg.where}")
    _validate_webhooks(cfg, console)
    wh = open_warehouse(cfg.warehouse)
    try:
        exps, problems = load_registry(cfg, wh)
        console.print(f"warehouse  ok    {wh.label} ({wh.dialect.name}, read-only)")
        console.print(f"registry   ok    {len(exps)} experiments" + (f", {len(problems)} with registry problems" if problems else ""))
        now = datetime.now(timezone.utc)
        params = {"window_start": now.replace(tzinfo=None), "as_of": now.replace(tzinfo=None),
                  "since": now.replace(tzinfo=None), "experiment_ids": ["expwatch-validate"]}
        for src in cfg.sources:
            cols = wh.probe(f"assignments[{src.name}]", render_source_sql(src, wh), params, expanding=("experiment_ids",))
            console.print(f"source     ok    {src.name}: compiles, returns {', '.join(cols)}")
        if cfg.metrics:
            from monitor.guardrails import metric_params, render_metric_sql

            for metric in cfg.metrics:
                mparams, mexp = metric_params(metric, now, now, ["expwatch-validate"])
                wh.probe(f"metric[{metric.name}]", render_metric_sql(metric, cfg.sources[0], wh), mparams, expanding=mexp)
                console.print(f"metric     ok    {metric.name}: compiles")
        state = StateStore(cfg.state.url or "", migrate=False)
        try:
            version = state.schema_version()
        finally:
            state.dispose()
        console.print(f"state      ok    {safe_url(cfg.state.url or '')} (schema version {version or 'new'})")
        for p in problems:
            console.print(f"registry   warn  {p.experiment}: {p.message}", highlight=False)
    finally:
        wh.dispose()
    return 0


def _sql(cfg: Config) -> int:
    from monitor.pull import render_source_sql
    from monitor.templates import Quoter, registry_context, render
    from monitor.warehouse import open_warehouse

    wh = open_warehouse(cfg.warehouse)
    try:
        out = []
        if cfg.registry.inline is None:
            out.append("-- registry (no bind parameters)\n" + render("registry.sql.j2", wh.dialect, **registry_context(cfg.registry, Quoter(wh.dialect))))
        for src in cfg.sources:
            out.append(f"-- assignments, stage {src.name}\n"
                       "-- binds: :window_start, :as_of, :since (UTC timestamps), :experiment_ids (list of live ids)\n"
                       + render_source_sql(src, wh))
        if cfg.metrics:
            from monitor.guardrails import metric_params, render_metric_sql

            now = datetime.now(timezone.utc)
            for metric in cfg.metrics:
                names = ", ".join(f":{k}" for k in metric_params(metric, now, now, [])[0])
                out.append(f"-- metric {metric.name}\n-- binds: {names}\n" + render_metric_sql(metric, cfg.sources[0], wh))
        sys.stdout.write("\n".join(out))
    finally:
        wh.dispose()
    return 0


def _explain(cfg: Config, args: argparse.Namespace, err: Console) -> int:
    from monitor.explain import explain_experiment, render_html, render_text, to_json

    as_of = _parse_time(args.as_of) if args.as_of else None
    t0 = time.monotonic()
    diagnosis = explain_experiment(cfg, args.experiment, as_of=as_of)
    if args.format == "json":
        import json

        text = json.dumps(to_json(diagnosis), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    elif args.format == "html":
        text = render_html(diagnosis)
    else:
        text = render_text(diagnosis)
    if args.out:
        out = Path(args.out)
        try:
            out.write_text(text, encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"--out {out}: cannot be written ({exc.strerror})") from None
        err.print(f"explain: wrote {out}", highlight=False)
    else:
        sys.stdout.write(text)
    log.info("explain done in %.2fs", time.monotonic() - t0)
    return 0


def _demo(args: argparse.Namespace, console: Console, err: Console) -> int:
    from monitor.demo import DEMO_AS_OF, build_demo_warehouse
    from monitor.demo_config import write_demo_config
    from monitor.findings import CHECKS

    target = Path(args.dir)
    if target.exists() and not target.is_dir():
        raise ConfigError(f"--dir {target}: exists and is not a directory")
    target.mkdir(parents=True, exist_ok=True)
    for stale in ("expwatch-state.sqlite",):
        (target / stale).unlink(missing_ok=True)
    t0 = time.monotonic()
    summary = build_demo_warehouse(target / "warehouse.duckdb")
    config_path = write_demo_config(target)
    err.print(f"demo warehouse built in {time.monotonic() - t0:.1f}s: {summary.path} "
              f"({sum(summary.rows.values()):,} rows); config: {config_path}", highlight=False)
    from monitor.config import load_config

    cfg = load_config(config_path)
    args.format = args.format or "text"
    code = _run(cfg, args, console, err, as_of=DEMO_AS_OF)
    if args.format == "text":
        console.print()
        console.print("planted in the demo data (the answer key):", highlight=False)
        for p in summary.planted:
            if p.check not in CHECKS:
                continue  # metric-level problems, for checks this version does not have
            ended = " (ended, so not checked)" if p.experiment in summary.ended else ""
            console.print(f"  - {p.experiment}{ended} · {p.check}{' · ' + p.stage if p.stage else ''}: {p.description}",
                          highlight=False)
        console.print()
        console.print("repeat this cycle with:", highlight=False)
        console.print(f"  expwatch run --config {config_path} --as-of {DEMO_AS_OF:%Y-%m-%dT%H:%MZ}", highlight=False, soft_wrap=True)
        console.print(f"demo finished in {time.monotonic() - t0:.1f}s", highlight=False)
    return code


def main(argv: Sequence[str] | None = None) -> int:
    parser = _build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    from rich.console import Console

    # without a terminal nothing is hard-wrapped: lines are as long as their text (tables at their natural width)
    tty = sys.stdout.isatty()
    console = Console(width=None if tty else _UNWRAPPED, highlight=False, soft_wrap=not tty)
    err = Console(stderr=True, highlight=False, soft_wrap=not sys.stderr.isatty())
    _setup_logging(args.verbose, err)
    # run: the cycle's id; serve: the session's id (each cycle's lines carry that cycle's own id)
    args.run_id = str(uuid.uuid4()) if args.command in ("run", "serve") else None
    if getattr(args, "log_format", "text") == "json":
        _setup_json_logging(logging.DEBUG if args.verbose else logging.INFO,
                            args.run_id if args.command == "serve" else None)
    elif args.command in ("serve", "replay"):
        logging.getLogger("monitor").setLevel(logging.INFO)  # a long-running command says what it does
    if args.run_id is None:
        return _dispatch(args, console, err)
    from monitor.observe import run_context

    with run_context(args.run_id):  # the id on every log line from here on, errors included
        return _dispatch(args, console, err)


#: the width rich lays out in when the output is not a terminal: wide enough that nothing wraps
_UNWRAPPED = 100_000


def _fail(exc: BaseException | None, message: str, event: str, code: int, verbose: bool) -> int:
    """Report a failure in one line: a plain ``expwatch: ...`` line, or one ``error``
    record with ``--log-format json``; the traceback only with ``--verbose``."""
    if _json_logs():
        log.error(message, exc_info=exc if verbose else None, extra={"event": event, "exit_code": code})
    else:
        if verbose and exc is not None:
            log.error("expwatch failed", exc_info=exc)
        sys.stderr.write(f"expwatch: {message}\n")
    return code


def _dispatch(args: argparse.Namespace, console: Console, err: Console) -> int:
    from monitor.config import load_config

    try:
        if args.command == "demo":
            return _demo(args, console, err)
        cfg = load_config(args.config)
        if args.command == "run":
            as_of = _parse_time(args.as_of) if args.as_of else None
            return _run(cfg, args, console, err, as_of=as_of)
        if args.command == "validate":
            return _validate(cfg, console)
        if args.command == "sql":
            return _sql(cfg)
        if args.command == "explain":
            return _explain(cfg, args, err)
        if args.command == "serve":
            return _serve(cfg, args)
        if args.command == "replay":
            return _replay(cfg, args, err)
        if args.command == "status":
            try:
                _require_state(cfg, "status")
            except ConfigError as exc:
                if args.max_age is None:
                    raise
                # a health check before the first run: unhealthy (exit 1), and the line says why
                sys.stderr.write(f"expwatch: unhealthy: no run has succeeded yet ({exc})\n")
                return 1
            return _status(cfg, args)
        if args.command == "prune":
            _require_state(cfg, "prune")
            return _prune(cfg, args, err)
        if args.command in ("digest", "alerts", "mute", "unmute"):
            args.cfg = cfg
            return _notify_command(cfg, args, err)
    except MonitorError as exc:
        return _fail(exc, str(exc), "error", exc.exit_code, args.verbose)
    except KeyboardInterrupt:
        return _fail(None, "interrupted; nothing was recorded for this cycle", "interrupted", 1, False)
    except Exception as exc:  # a bug, not an expected error: say so in one line
        return _fail(exc, f"internal error: {type(exc).__name__}: {exc} (run with --verbose for details)",
                     "internal_error", 1, args.verbose)
    return 2
