"""The ``expwatch`` command line.

Exit codes: 0 the command did its job (whether or not experiments are healthy,
and also when another cycle held the lock and this one stepped aside); 1 the
monitor itself failed (warehouse unreachable, query error, state store
unusable); 2 a usage or configuration error. Expected errors print one line,
never a traceback (``--verbose`` adds it).
"""

from __future__ import annotations

import argparse
import logging
import shutil
import sys
import time
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path

from rich.console import Console

from monitor import __version__
from monitor.config import Config, load_config
from monitor.errors import ConfigError, MonitorError

__all__ = ["main"]

log = logging.getLogger("monitor")


def _parse_time(text: str) -> datetime:
    try:
        t = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise ConfigError(f"--as-of: {text!r} is not an ISO 8601 time (e.g. 2026-11-30T09:00Z)") from None
    return t.replace(tzinfo=timezone.utc) if t.tzinfo is None else t.astimezone(timezone.utc)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        self.exit(2, f"expwatch: {message} (see 'expwatch {self.prog.split()[-1]} --help')\n"
                  if " " in self.prog else f"expwatch: {message} (see 'expwatch --help')\n")


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

    v = sub.add_parser("validate", help="check the config, connect, and compile every query without running it",
                       description="Validate the configuration, connect to the warehouse and state store, and compile "
                                   "every SQL template against the warehouse (LIMIT 0) without reading data.")
    common(v)

    s = sub.add_parser("sql", help="print the rendered SQL for review",
                       description="Print every query expwatch would send, with its bind parameters, for a DBA to review.")
    common(s)

    d = sub.add_parser("demo", help="build a demo warehouse (DuckDB), run one cycle on it, print what it found",
                       description="Build the demo warehouse of a fictional e-book lending app as a DuckDB file, "
                                   "write a config beside it, and run one cycle.")
    common(d, config=False)
    d.add_argument("--dir", default="expwatch-demo", metavar="DIR", help="where to write the demo (default ./expwatch-demo)")
    d.add_argument("--format", choices=["text", "json"], default="text", help="output format")
    return p


def _setup_logging(verbose: bool, console: Console) -> None:
    root = logging.getLogger("monitor")
    root.handlers.clear()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S%z"))
    root.addHandler(handler)
    root.setLevel(logging.INFO if verbose else logging.WARNING)
    root.propagate = False


def _run(cfg: Config, args: argparse.Namespace, console: Console, err: Console, *, as_of: datetime | None) -> int:
    from monitor.cycle import run_cycle
    from monitor.report import print_text, to_json_text
    from monitor.state import LockHeld

    fmt = args.format or cfg.output
    t0 = time.monotonic()
    status = None
    if err.is_terminal and fmt == "text":
        status = err.status("starting", spinner="dots")
        status.start()

    def on_step(name: str) -> None:
        if status is not None:
            status.update(f"querying {name} ({time.monotonic() - t0:.1f}s)")
        else:
            log.info("step: %s", name)

    try:
        result = run_cycle(cfg, as_of=as_of, dry_run=getattr(args, "dry_run", False),
                           full_refresh=getattr(args, "full_refresh", False), wait_seconds=getattr(args, "wait", 0.0),
                           on_step=on_step)
    except LockHeld as exc:
        if status is not None:
            status.stop()
        err.print(f"expwatch: {exc}; this run stepped aside", highlight=False)
        return 0
    finally:
        if status is not None:
            status.stop()
    if fmt == "json":
        sys.stdout.write(to_json_text(result) + "\n")
    else:
        print_text(result, console)
    log.info("cycle done in %.2fs", time.monotonic() - t0)
    return 0


def _validate(cfg: Config, console: Console) -> int:
    from monitor.cycle import load_registry
    from monitor.pull import render_source_sql
    from monitor.state import StateStore
    from monitor.warehouse import Warehouse, safe_url

    wh = Warehouse(cfg.warehouse.url)
    try:
        console.print(f"config     ok    {cfg.where}")
        exps, problems = load_registry(cfg, wh)
        console.print(f"warehouse  ok    {safe_url(cfg.warehouse.url)} ({wh.dialect.name}, read-only)")
        console.print(f"registry   ok    {len(exps)} experiments" + (f", {len(problems)} with registry problems" if problems else ""))
        now = datetime.now(timezone.utc)
        params = {"window_start": now.replace(tzinfo=None), "as_of": now.replace(tzinfo=None),
                  "since": now.replace(tzinfo=None), "experiment_ids": ["expwatch-validate"]}
        for src in cfg.sources:
            cols = wh.probe(f"assignments[{src.name}]", render_source_sql(src, wh), params, expanding=("experiment_ids",))
            console.print(f"source     ok    {src.name}: compiles, returns {', '.join(cols)}")
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
    from monitor.warehouse import Warehouse

    wh = Warehouse(cfg.warehouse.url)
    try:
        out = []
        if cfg.registry.inline is None:
            out.append("-- registry (no bind parameters)\n" + render("registry.sql.j2", wh.dialect, **registry_context(cfg.registry, Quoter(wh.dialect))))
        for src in cfg.sources:
            out.append(f"-- assignments, stage {src.name}\n"
                       "-- binds: :window_start, :as_of, :since (UTC timestamps), :experiment_ids (list of live ids)\n"
                       + render_source_sql(src, wh))
        sys.stdout.write("\n".join(out))
    finally:
        wh.dispose()
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
    width = None if sys.stdout.isatty() else max(100, shutil.get_terminal_size((120, 24)).columns)
    console = Console(width=width, highlight=False)
    err = Console(stderr=True, highlight=False)
    _setup_logging(args.verbose, err)
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
    except MonitorError as exc:
        if args.verbose:
            log.exception("expwatch failed")
        sys.stderr.write(f"expwatch: {exc}\n")
        return exc.exit_code
    except KeyboardInterrupt:
        sys.stderr.write("expwatch: interrupted; nothing was recorded for this cycle\n")
        return 1
    except Exception as exc:  # a bug, not an expected error: say so in one line
        if args.verbose:
            log.exception("expwatch failed")
        sys.stderr.write(f"expwatch: internal error: {type(exc).__name__}: {exc} (run with --verbose for details)\n")
        return 1
    return 2
