"""Benchmarks: how close a cycle is to the physical floor, and to the pandas baseline.

    python -m tests.bench.run --size S [--repeat 3] [--dir DIR]

Prints one table: median seconds and peak resident memory (each measurement runs
in its own subprocess, so its peak RSS is its own) of

* cold: ``run_cycle`` with an empty state store;
* warm: ``run_cycle`` one hour after a recorded run (incremental pull);
* floor: the fewest hand-written DuckDB queries that scan each source once with
  the same GROUP BYs (first assignment per unit, then experiment x variant x
  hour x segment);
* stats: the stats core alone on 10,000 synthetic experiments x 720 hourly looks
  (SRM e-process and chi-square);
* baseline: unit-level rows loaded into pandas and a loop over experiments with
  scipy, what a user would otherwise write;

then the ratios cold/floor, warm/cold and baseline/cold. Figures, not asserts:
targets live in the README's Performance section.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import timedelta
from pathlib import Path

from tests.bench.warehouse import END, SIZES, build, write_config

KINDS = ("cold", "warm", "floor", "stats", "baseline")


# -- workers (run in a subprocess each) ---------------------------------------------------


def _cycle(directory: Path, as_of) -> None:
    from monitor.config import load_config
    from monitor.cycle import run_cycle

    run_cycle(load_config(directory / "expwatch.yaml"), as_of=as_of)


def _worker(kind: str, directory: Path) -> float:
    import monitor.cycle  # noqa: F401  (imports are not what is measured)

    if kind == "cold":
        (directory / "state.sqlite").unlink(missing_ok=True)
        t0 = time.perf_counter()
        _cycle(directory, END)
        return time.perf_counter() - t0
    if kind == "prepare":
        (directory / "state.sqlite").unlink(missing_ok=True)
        _cycle(directory, END - timedelta(hours=1))
        shutil.copy(directory / "state.sqlite", directory / "state.prepared")
        return 0.0
    if kind == "warm":
        shutil.copy(directory / "state.prepared", directory / "state.sqlite")
        t0 = time.perf_counter()
        _cycle(directory, END)
        return time.perf_counter() - t0
    if kind == "floor":
        import duckdb

        t0 = time.perf_counter()
        con = duckdb.connect(str(directory / "warehouse.duckdb"), read_only=True)
        con.execute(
            """
            SELECT experiment_id, variant, date_trunc('hour', first_at) AS hour, platform, count(*) AS units
            FROM (SELECT experiment_id, unit_id, min(assigned_at) AS first_at, arg_min(variant, assigned_at) AS variant,
                         arg_min(platform, assigned_at) AS platform
                  FROM assignments GROUP BY experiment_id, unit_id)
            GROUP BY ALL
            """
        ).df()
        con.close()
        return time.perf_counter() - t0
    if kind == "stats":
        import numpy as np

        from monitor.stats.allocation import chisquare_gof, srm_sequential

        rng = np.random.default_rng(1)
        e, t = 10_000, 720
        inc = rng.poisson(20, size=(e, t, 2))
        w = np.full((e, t, 2), 0.5)
        ph = np.ones((e, t), dtype=np.int64)
        t0 = time.perf_counter()
        srm_sequential(inc, w, ph, alpha=0.001)
        chisquare_gof(inc.sum(axis=1), w[:, 0, :])
        return time.perf_counter() - t0
    if kind == "baseline":
        import duckdb
        from scipy import stats

        t0 = time.perf_counter()
        con = duckdb.connect(str(directory / "warehouse.duckdb"), read_only=True)
        rows = con.execute("SELECT unit_id, experiment_id, variant, assigned_at, platform FROM assignments").df()
        con.close()
        for _, g in rows.groupby("experiment_id"):
            first = g.sort_values("assigned_at").drop_duplicates("unit_id")
            counts = first["variant"].value_counts().reindex(["control", "treatment"], fill_value=0)
            stats.chisquare(counts.to_numpy())
        return time.perf_counter() - t0
    raise SystemExit(f"unknown kind {kind}")


# -- driver ------------------------------------------------------------------------------


def _measure(kind: str, directory: Path) -> tuple[float, float]:
    """(seconds, peak RSS in MiB) of one worker subprocess."""
    proc = subprocess.Popen([sys.executable, "-m", "tests.bench.run", "--worker", kind, "--dir", str(directory)],
                            stdout=subprocess.PIPE, cwd=Path(__file__).resolve().parents[2])
    out = proc.stdout.read() if proc.stdout else b""
    _, status, rusage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"benchmark worker {kind} failed")
    return float(json.loads(out)["seconds"]), rusage.ru_maxrss / 1024


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.run", description=__doc__.split("\n\n")[0])
    ap.add_argument("--size", choices=sorted(SIZES), default="S")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--dir", type=Path, default=None, help="where to build the warehouse (default: a temp dir)")
    ap.add_argument("--worker", choices=(*KINDS, "prepare"), help=argparse.SUPPRESS)
    ap.add_argument("--kinds", default=",".join(KINDS), help="comma-separated subset of " + ",".join(KINDS))
    args = ap.parse_args(argv)
    if args.worker:
        sys.stdout.write(json.dumps({"seconds": _worker(args.worker, args.dir)}))
        return 0
    size = SIZES[args.size]
    directory = args.dir or Path(tempfile.mkdtemp(prefix=f"expwatch-bench-{size.name}-"))
    directory.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    build(directory / "warehouse.duckdb", size)
    write_config(directory)
    built = time.perf_counter() - t0
    kinds = [k for k in args.kinds.split(",") if k]
    if "warm" in kinds:
        _measure("prepare", directory)
    results: dict[str, tuple[float, float]] = {}
    for kind in kinds:
        runs = [_measure(kind, directory) for _ in range(args.repeat)]
        results[kind] = (statistics.median(r[0] for r in runs), max(r[1] for r in runs))
    print(f"size {size.name}: {size.assignments:,} assignment rows, {size.events:,} metric events, "
          f"{size.experiments:,} experiments; built in {built:.1f}s; median of {args.repeat}; {os.cpu_count()} cores")
    print(f"{'measurement':<12} {'seconds':>10} {'peak RSS MiB':>14}")
    for kind, (sec, rss) in results.items():
        print(f"{kind:<12} {sec:>10.3f} {rss:>14.0f}")
    def ratio(a: str, b: str) -> str:
        return f"{results[a][0] / results[b][0]:.2f}" if a in results and b in results and results[b][0] > 0 else "n/a"
    print(f"ratios: cold/floor {ratio('cold', 'floor')}, warm/cold {ratio('warm', 'cold')}, "
          f"baseline/cold {ratio('baseline', 'cold')}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
