"""Benchmark: how big the state store gets on the demo.

    PYTHONPATH=tests python -P -m bench.state_size [--dir DIR] [--hours 168] [--keep-days D]

Builds the demo warehouse and config in ``--dir`` (reused when it already holds
them; ``monitor/demo.py``), then into fresh SQLite stores beside it:

* one cycle: ``run_cycle`` once at the demo's data time (``DEMO_AS_OF``), what
  ``expwatch demo`` records;
* hourly: ``run_cycle`` at every hour of the ``--hours`` hours ending at
  ``DEMO_AS_OF`` (168: a week), one store, each run incremental after the first,
  exactly what an hourly ``expwatch run --as-of T`` writes (in one process, so
  the interpreter starts once); with ``--keep-days`` each run also prunes.

Prints the file size after the one cycle and after every simulated day, then the
bytes per table and index of each store (SQLite ``dbstat``, pages in use), the
rows of the large tables, and the wall time (MB: 10^6 bytes). Figures, not asserts; the measured
values are in docs/reliability.md.
"""

from __future__ import annotations

import argparse
import logging
import sqlite3
import time
from datetime import timedelta
from pathlib import Path

from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.demo import DEMO_AS_OF, build_demo_warehouse
from monitor.demo_config import write_demo_config

MB = 1_000_000  # decimal megabytes, as `ls -l` sizes divide


def _store_config(demo_dir: Path, name: str, keep_days: float | None):
    cfg = load_config(demo_dir / "expwatch.yaml")
    store = demo_dir / name
    for suffix in ("", "-journal", "-wal"):
        Path(f"{store}{suffix}").unlink(missing_ok=True)
    state = cfg.state.model_copy(update={"url": f"sqlite:///{store}", "keep_days": keep_days})
    return cfg.model_copy(update={"state": state}), store


def table_bytes(path: Path) -> list[tuple[str, int, int]]:
    """(table or index, bytes in pages, rows or -1 for an index) by size, largest first."""
    con = sqlite3.connect(path)
    try:
        sizes = con.execute("SELECT name, sum(pgsize) FROM dbstat GROUP BY name ORDER BY 2 DESC").fetchall()
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_schema WHERE type = 'table'")}
        out = []
        for name, size in sizes:
            rows = con.execute(f'SELECT count(*) FROM "{name}"').fetchone()[0] if name in tables else -1
            out.append((name, int(size), int(rows)))
        return out
    finally:
        con.close()


def _print_tables(label: str, path: Path) -> None:
    print(f"{label}: {path.stat().st_size / MB:.1f} MB file; largest tables and indexes (MB in pages, rows):")
    for name, size, rows in table_bytes(path)[:8]:
        print(f"  {name:<44} {size / MB:8.2f}  {'' if rows < 0 else f'{rows:,}'}")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--dir", type=Path, default=Path("bench-state-size"), help="demo warehouse folder (built if missing)")
    ap.add_argument("--hours", type=int, default=168, help="hourly runs ending at the demo's data time (default 168)")
    ap.add_argument("--keep-days", type=float, default=None, help="state.keep_days for the hourly runs (default: none)")
    args = ap.parse_args(argv)
    logging.getLogger("monitor").setLevel(logging.WARNING)
    args.dir.mkdir(parents=True, exist_ok=True)
    if not (args.dir / "warehouse.duckdb").exists():
        t = time.perf_counter()
        build_demo_warehouse(args.dir / "warehouse.duckdb")
        print(f"built the demo warehouse in {time.perf_counter() - t:.0f}s")
    if not (args.dir / "expwatch.yaml").exists():
        write_demo_config(args.dir)
    wh_mb = (args.dir / "warehouse.duckdb").stat().st_size / MB

    cfg, one = _store_config(args.dir, "one-cycle.sqlite", None)
    t = time.perf_counter()
    run_cycle(cfg, as_of=DEMO_AS_OF)
    print(f"one demo cycle: state store {one.stat().st_size / MB:.1f} MB (warehouse {wh_mb:.1f} MB), "
          f"{time.perf_counter() - t:.0f}s")
    _print_tables("one demo cycle", one)

    if args.hours > 0:
        cfg, hourly = _store_config(args.dir, "hourly.sqlite", args.keep_days)
        first = DEMO_AS_OF - timedelta(hours=args.hours - 1)
        t = time.perf_counter()
        for i in range(args.hours):
            run_cycle(cfg, as_of=first + timedelta(hours=i))
            if (i + 1) % 24 == 0 or i + 1 == args.hours:
                print(f"after {i + 1:4d} hourly runs: {hourly.stat().st_size / MB:7.1f} MB "
                      f"({time.perf_counter() - t:.0f}s so far)", flush=True)
        keep = f", state.keep_days {args.keep_days:g}" if args.keep_days else ""
        print(f"{args.hours} hourly runs ({first:%Y-%m-%d %H:%M} to {DEMO_AS_OF:%Y-%m-%d %H:%M} UTC{keep}): "
              f"{time.perf_counter() - t:.0f}s, {(time.perf_counter() - t) / args.hours:.1f}s per run")
        _print_tables(f"after {args.hours} hourly runs", hourly)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
