"""Benchmarks: how close a cycle is to the physical floor, and to the pandas baseline.

    python -m tests.bench.run --size M [--repeat 3] [--dir DIR] [--engine duckdb|postgres]

Builds a synthetic warehouse (``tests/bench/warehouse.py``; reused when ``--dir``
already holds one of the same size) and prints one table: the median seconds of
``--repeat`` runs and the peak resident memory (each measurement runs in its own
subprocess, so its peak RSS is its own) of

* cold: ``run_cycle`` with an empty state store (SRM sources and one guardrail metric);
* warm: ``run_cycle`` one hour after a recorded run (incremental pull);
* floor: the fewest hand-written statements that compute every output of the run (SRM
  counts, the guardrail's per-hour sums, the novelty check's per-age statistics and the
  collision cross-tab) scanning each source table once (``FLOOR_DUCKDB``, ``FLOOR_POSTGRES``);
* floor-lean: the same for the baseline's work only (SRM counts and the per-unit metric sums),
  one statement (``FLOOR_LEAN_DUCKDB``): what bounds how much faster than the baseline any run
  can be (DuckDB only);
* stats: the stats core alone as a run uses it, on 10,000 synthetic experiments x 720
  hourly looks: the SRM e-process over every look, the chi-square per experiment, and the
  guardrail confidence sequence and status of two metrics at the current look;
* stats-looks: the guardrail confidence sequences of one metric at every one of the 720
  looks (what a replay of 30 days asks of the stats core);
* baseline: unit-level rows loaded into pandas and a loop over experiments with scipy
  (chi-square and Welch t-test), what a user would otherwise write (DuckDB only);

then the ratios cold/floor, warm/cold and baseline/cold, and the seconds of each query
of the first cold and warm run. Figures, not asserts: the targets live in the README's
Performance section. ``--engine postgres`` loads the same tables into PostgreSQL with
COPY (``--pg-url``, default ``$EXPWATCH_BENCH_PG`` or the local server) and measures
cold, warm and floor there.
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

from .warehouse import DAYS, END, SIZES, build, write_config

KINDS = ("cold", "warm", "floor", "floor-lean", "stats", "stats-looks", "baseline")
PG_KINDS = ("cold", "warm", "floor")
PG_DEFAULT = "postgresql+psycopg://postgres@127.0.0.1:5432/expwatch_bench"
STATS_EXPERIMENTS, STATS_LOOKS = 10_000, 720

# The floor: the fewest hand-written statements that compute every output a run of the
# benchmark config computes (SRM counts, the guardrail's per-hour sums, the novelty
# check's per-age sums, cross products between ages and units at risk, and the collision
# cross-tab), scanning each source table once. Session temp tables carry what more than
# one output needs: the first assignment per unit (the one scan of `assignments`) and
# each clean unit's metric per day of age (the one scan of `page_views`, joined once).
# The novelty window is the whole 28 days (every bench experiment starts at midnight 28
# days before END) and ages stop below 28 (the default novelty_max_age_days).
FLOOR_DUCKDB = [
    """CREATE TEMP TABLE f_units AS
    SELECT experiment_id, unit_id, min(assigned_at) AS first_at,
           arg_min(variant, assigned_at) AS variant, arg_min(platform, assigned_at) AS platform,
           min(variant) = max(variant) AS clean,
           CAST(floor(epoch($end - min(assigned_at)) / 86400) AS INTEGER) AS observed
    FROM assignments WHERE assigned_at >= $start AND assigned_at < $end
    GROUP BY experiment_id, unit_id""",
    """CREATE TEMP TABLE f_age AS
    SELECT u.experiment_id, u.unit_id, u.variant, u.first_at, u.observed,
           CAST(floor(epoch(e.viewed_at - u.first_at) / 86400) AS INTEGER) AS age, sum(e.render_ms) AS y
    FROM f_units u JOIN page_views e ON e.unit_id = u.unit_id AND e.viewed_at >= u.first_at
    WHERE u.clean AND e.viewed_at >= $start AND e.viewed_at < $end
    GROUP BY ALL""",
    """SELECT experiment_id, variant, date_trunc('hour', first_at) AS hour, platform,
           count(*) FILTER (WHERE clean) AS units, count(*) FILTER (WHERE NOT clean) AS leaked
    FROM f_units GROUP BY ALL""",
    """SELECT u.experiment_id, u.variant, date_trunc('hour', u.first_at) AS hour,
           count(*) AS n, sum(coalesce(t.y, 0)) AS sum_y, sum(coalesce(t.y, 0) * coalesce(t.y, 0)) AS sum_y2
    FROM f_units u LEFT JOIN (SELECT experiment_id, unit_id, sum(y) AS y FROM f_age GROUP BY ALL) t
      ON t.experiment_id = u.experiment_id AND t.unit_id = u.unit_id
    WHERE u.clean GROUP BY ALL""",
    """CREATE TEMP TABLE f_nov AS SELECT * FROM f_age WHERE age < observed AND age < 28""",
    """SELECT experiment_id, variant, date_trunc('day', first_at) AS cohort, age, sum(y), sum(y * y)
    FROM f_nov GROUP BY ALL""",
    """SELECT p.experiment_id, p.variant, p.age, q.age AS age2, sum(p.y * q.y)
    FROM f_nov p JOIN f_nov q ON q.experiment_id = p.experiment_id AND q.unit_id = p.unit_id AND q.age > p.age
    GROUP BY ALL""",
    """SELECT experiment_id, variant, date_trunc('day', first_at) AS cohort, least(observed, 28) AS observed, count(*)
    FROM f_units WHERE clean AND observed >= 1 GROUP BY ALL""",
    """SELECT a.experiment_id, b.experiment_id, a.variant, b.variant, count(*)
    FROM f_units a JOIN f_units b ON b.unit_id = a.unit_id AND a.experiment_id < b.experiment_id
    WHERE a.clean AND b.clean GROUP BY ALL""",
]

# The work of the pandas baseline only (SRM counts and one metric per unit), in one statement
# scanning each source once: what bounds how much faster than the baseline any run can be.
FLOOR_LEAN_DUCKDB = """
WITH units AS MATERIALIZED (
    SELECT experiment_id, unit_id, min(assigned_at) AS first_at,
           arg_min(variant, assigned_at) AS variant, arg_min(platform, assigned_at) AS platform,
           min(variant) = max(variant) AS clean
    FROM assignments WHERE assigned_at >= $start AND assigned_at < $end
    GROUP BY experiment_id, unit_id
),
per_unit AS (
    SELECT u.experiment_id, u.variant, u.first_at, coalesce(sum(e.render_ms), 0) AS y
    FROM units u LEFT JOIN page_views e
      ON e.unit_id = u.unit_id AND e.viewed_at >= u.first_at AND e.viewed_at >= $start AND e.viewed_at < $end
    WHERE u.clean
    GROUP BY u.experiment_id, u.unit_id, u.variant, u.first_at
)
SELECT 'srm' AS part, experiment_id, variant, date_trunc('hour', first_at) AS hour, platform,
       count(*) FILTER (WHERE clean) AS units, count(*) FILTER (WHERE NOT clean) AS leaked,
       NULL::DOUBLE AS sum_y, NULL::DOUBLE AS sum_y2
FROM units GROUP BY experiment_id, variant, date_trunc('hour', first_at), platform
UNION ALL
SELECT 'metric', experiment_id, variant, date_trunc('hour', first_at), NULL, count(*), 0, sum(y), sum(y * y)
FROM per_unit GROUP BY experiment_id, variant, date_trunc('hour', first_at)
"""

FLOOR_POSTGRES = [
    """CREATE TEMP TABLE f_units AS
    SELECT DISTINCT ON (experiment_id, unit_id) experiment_id, unit_id, assigned_at AS first_at,
           variant, platform, min(variant) OVER w = max(variant) OVER w AS clean,
           floor(extract(epoch FROM %(end)s - assigned_at) / 86400)::int AS observed
    FROM assignments WHERE assigned_at >= %(start)s AND assigned_at < %(end)s
    WINDOW w AS (PARTITION BY experiment_id, unit_id)
    ORDER BY experiment_id, unit_id, assigned_at""",
    """CREATE TEMP TABLE f_age AS
    SELECT u.experiment_id, u.unit_id, u.variant, u.first_at, u.observed,
           floor(extract(epoch FROM e.viewed_at - u.first_at) / 86400)::int AS age, sum(e.render_ms) AS y
    FROM f_units u JOIN page_views e ON e.unit_id = u.unit_id AND e.viewed_at >= u.first_at
    WHERE u.clean AND e.viewed_at >= %(start)s AND e.viewed_at < %(end)s
    GROUP BY 1, 2, 3, 4, 5, 6""",
    """SELECT experiment_id, variant, date_trunc('hour', first_at) AS hour, platform,
           count(*) FILTER (WHERE clean) AS units, count(*) FILTER (WHERE NOT clean) AS leaked
    FROM f_units GROUP BY 1, 2, 3, 4""",
    """SELECT u.experiment_id, u.variant, date_trunc('hour', u.first_at) AS hour,
           count(*) AS n, sum(coalesce(t.y, 0)) AS sum_y, sum(coalesce(t.y, 0) * coalesce(t.y, 0)) AS sum_y2
    FROM f_units u LEFT JOIN (SELECT experiment_id, unit_id, sum(y) AS y FROM f_age GROUP BY 1, 2) t
      ON t.experiment_id = u.experiment_id AND t.unit_id = u.unit_id
    WHERE u.clean GROUP BY 1, 2, 3""",
    """CREATE TEMP TABLE f_nov AS SELECT * FROM f_age WHERE age < observed AND age < 28""",
    """SELECT experiment_id, variant, date_trunc('day', first_at) AS cohort, age, sum(y), sum(y * y)
    FROM f_nov GROUP BY 1, 2, 3, 4""",
    """SELECT p.experiment_id, p.variant, p.age, q.age AS age2, sum(p.y * q.y)
    FROM f_nov p JOIN f_nov q ON q.experiment_id = p.experiment_id AND q.unit_id = p.unit_id AND q.age > p.age
    GROUP BY 1, 2, 3, 4""",
    """SELECT experiment_id, variant, date_trunc('day', first_at) AS cohort, least(observed, 28) AS observed, count(*)
    FROM f_units WHERE clean AND observed >= 1 GROUP BY 1, 2, 3, 4""",
    """SELECT a.experiment_id, b.experiment_id, a.variant, b.variant, count(*)
    FROM f_units a JOIN f_units b ON b.unit_id = a.unit_id AND a.experiment_id < b.experiment_id
    WHERE a.clean AND b.clean GROUP BY 1, 2, 3, 4""",
]


# -- workers (run in a subprocess each) ---------------------------------------------------


def _cycle(directory: Path, as_of) -> dict:
    from monitor.config import load_config
    from monitor.cycle import run_cycle

    result = run_cycle(load_config(directory / "expwatch.yaml"), as_of=as_of, notify=False)
    return {k: round(v, 3) for k, v in result.query_seconds.items()}


def _window() -> tuple:
    start = (END - timedelta(days=DAYS)).replace(tzinfo=None)
    return start, END.replace(tzinfo=None)


def _synthetic_moments(rng, e: int, t: int, mean: float, sd: float = 2.0):
    """Cumulative (n, sum_y, sum_y2) of a per-unit metric, ``(e, t)``, consistent by construction."""
    import numpy as np

    nh = rng.poisson(20, size=(e, t)).astype(float)
    syh = nh * mean + rng.standard_normal((e, t)) * np.sqrt(nh) * sd
    sy2h = syh**2 / np.maximum(nh, 1) + sd**2 * rng.chisquare(np.maximum(nh - 1, 1))
    return np.cumsum(nh, 1), np.cumsum(syh, 1), np.cumsum(sy2h, 1)


def _stats(all_looks: bool, experiments: int) -> float:
    import numpy as np

    from monitor.stats import effects as fx
    from monitor.stats.allocation import chisquare_gof, srm_sequential

    rng = np.random.default_rng(1)
    e, t = experiments, STATS_LOOKS
    if all_looks:
        ctrl, trt = _synthetic_moments(rng, e, t, 3.0), _synthetic_moments(rng, e, t, 3.03)
        t0 = time.perf_counter()
        est = fx.compare_means(fx.moments(*ctrl), fx.moments(*trt), alpha=0.05, n_star=10_000)
        fx.guardrail_status(est.rel_cs_lower, est.rel_cs_upper, "increase", margin=0.02, defined=est.rel_defined)
        return time.perf_counter() - t0
    inc = rng.poisson(20, size=(e, t, 2))
    w = np.full((e, t, 2), 0.5)
    ph = np.ones((e, t), dtype=np.int64)
    # two metrics at the current look: a mean and a proportion
    mean_c = tuple(a[:, -1] for a in _synthetic_moments(rng, e, t, 3.0))
    mean_t = tuple(a[:, -1] for a in _synthetic_moments(rng, e, t, 3.03))
    n = inc.sum(axis=1).astype(float)
    hits = rng.binomial(n.astype(np.int64), [0.1, 0.102]).astype(float)
    t0 = time.perf_counter()
    srm_sequential(inc, w, ph, alpha=0.001)
    chisquare_gof(inc.sum(axis=1), w[:, 0, :])
    est = fx.compare_means(fx.moments(*mean_c), fx.moments(*mean_t), alpha=0.05, n_star=10_000)
    fx.guardrail_status(est.rel_cs_lower, est.rel_cs_upper, "increase", margin=0.02, defined=est.rel_defined)
    est = fx.compare_proportions(fx.proportion_moments(n[:, 0], hits[:, 0]),
                                 fx.proportion_moments(n[:, 1], hits[:, 1]), alpha=0.05, n_star=10_000)
    fx.guardrail_status(est.rel_cs_lower, est.rel_cs_upper, "increase", margin=0.02, defined=est.rel_defined)
    return time.perf_counter() - t0


def _baseline(directory: Path) -> float:
    import duckdb
    import numpy as np
    from scipy import stats

    t0 = time.perf_counter()
    con = duckdb.connect(str(directory / "warehouse.duckdb"), read_only=True)
    rows = con.execute("SELECT unit_id, experiment_id, variant, assigned_at, platform FROM assignments").df()
    events = con.execute("SELECT unit_id, viewed_at, render_ms FROM page_views").df()
    con.close()
    rows = rows.sort_values("assigned_at")
    n_var = rows.groupby(["experiment_id", "unit_id"])["variant"].transform("nunique")
    first = rows[n_var == 1].drop_duplicates(["experiment_id", "unit_id"])
    joined = events.merge(first[["experiment_id", "unit_id", "assigned_at"]], on="unit_id")
    joined = joined[joined["viewed_at"] >= joined["assigned_at"]]
    y = joined.groupby(["experiment_id", "unit_id"])["render_ms"].sum()
    first = first.join(y, on=["experiment_id", "unit_id"]).fillna({"render_ms": 0.0})
    for _, g in first.groupby("experiment_id"):
        counts = g["variant"].value_counts().reindex(["control", "treatment"], fill_value=0)
        stats.chisquare(counts.to_numpy())
        a = g.loc[g["variant"] == "control", "render_ms"].to_numpy()
        b = g.loc[g["variant"] == "treatment", "render_ms"].to_numpy()
        if len(a) > 1 and len(b) > 1 and np.var(a) + np.var(b) > 0:
            stats.ttest_ind(b, a, equal_var=False)
    return time.perf_counter() - t0


def _floor(directory: Path, pg_url: str | None) -> float:
    start, end = _window()
    t0 = time.perf_counter()
    if pg_url:
        import psycopg

        with psycopg.connect(_libpq(pg_url)) as con:
            con.execute("SET enable_nestloop = off")  # as expwatch's own sessions (monitor/warehouse.py)
            for stmt in FLOOR_POSTGRES:
                cur = con.execute(stmt, {"start": start, "end": end})
                if cur.description:
                    cur.fetchall()
    else:
        con = _duck(directory)
        for stmt in FLOOR_DUCKDB:
            rel = con.execute(stmt, {k: v for k, v in (("start", start), ("end", end)) if f"${k}" in stmt})
            if rel.description:
                rel.df()
        con.close()
    return time.perf_counter() - t0


def _duck(directory: Path):
    """A read-only DuckDB connection to the bench warehouse with the runs' memory_limit (if
    any) and a spill folder of its own, as expwatch's sessions have (monitor/warehouse.py);
    the worker process removes the folder when it exits."""
    import atexit

    import duckdb

    from monitor.config import load_config

    limit = load_config(directory / "expwatch.yaml").warehouse.memory_limit
    spill = tempfile.mkdtemp(prefix="expwatch-floor-")
    atexit.register(shutil.rmtree, spill, ignore_errors=True)
    con = duckdb.connect(str(directory / "warehouse.duckdb"), read_only=True)
    if limit:
        con.execute(f"SET memory_limit = '{limit}'")
    con.execute(f"SET temp_directory = '{spill}'")
    return con


def _floor_lean(directory: Path) -> float:
    start, end = _window()
    t0 = time.perf_counter()
    con = _duck(directory)
    con.execute(FLOOR_LEAN_DUCKDB, {"start": start, "end": end}).df()
    con.close()
    return time.perf_counter() - t0


def _worker(kind: str, directory: Path, pg_url: str | None, experiments: int) -> tuple[float, dict]:
    import monitor.cycle  # noqa: F401  (imports are not what is measured)

    if kind == "cold":
        (directory / "state.sqlite").unlink(missing_ok=True)
        t0 = time.perf_counter()
        queries = _cycle(directory, END)
        return time.perf_counter() - t0, queries
    if kind == "prepare":
        (directory / "state.sqlite").unlink(missing_ok=True)
        _cycle(directory, END - timedelta(hours=1))
        shutil.copy(directory / "state.sqlite", directory / "state.prepared")
        return 0.0, {}
    if kind == "warm":
        shutil.copy(directory / "state.prepared", directory / "state.sqlite")
        t0 = time.perf_counter()
        queries = _cycle(directory, END)
        return time.perf_counter() - t0, queries
    if kind == "floor":
        return _floor(directory, pg_url), {}
    if kind == "floor-lean":
        return _floor_lean(directory), {}
    if kind == "stats":
        return _stats(False, experiments), {}
    if kind == "stats-looks":
        return _stats(True, experiments), {}
    if kind == "baseline":
        return _baseline(directory), {}
    raise SystemExit(f"unknown kind {kind}")


# -- PostgreSQL loading --------------------------------------------------------------------


def _libpq(url: str) -> str:
    return url.replace("postgresql+psycopg://", "postgresql://", 1)


def load_postgres(duck_path: Path, pg_url: str, directory: Path) -> float:
    """Copy the three tables of the DuckDB warehouse into (a fresh) ``pg_url`` with COPY."""
    import duckdb
    import psycopg

    t0 = time.perf_counter()
    base, _, dbname = _libpq(pg_url).rpartition("/")
    with psycopg.connect(f"{base}/postgres", autocommit=True) as admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{dbname}"')
        admin.execute(f'CREATE DATABASE "{dbname}"')
    ddl = {
        "experiments": "experiment_id text, phase int, phase_start timestamp, phase_end timestamp, variant text, "
                       "weight float8, is_control boolean, status text, owner text, title text",
        "assignments": "unit_id text, experiment_id text, variant text, assigned_at timestamp, platform text",
        "page_views": "unit_id text, viewed_at timestamp, render_ms float8",
    }
    duck = duckdb.connect(str(duck_path), read_only=True)
    try:
        with psycopg.connect(_libpq(pg_url), autocommit=True) as con:
            for table, cols in ddl.items():
                csv = directory / f"{table}.csv"
                duck.execute(f"COPY {table} TO '{csv}' (HEADER false)")
                con.execute(f"CREATE TABLE {table} ({cols})")
                with con.cursor().copy(f"COPY {table} FROM STDIN (FORMAT csv)") as copy, csv.open("rb") as fh:
                    while chunk := fh.read(1 << 20):
                        copy.write(chunk)
                csv.unlink()
                con.execute(f"ANALYZE {table}")
    finally:
        duck.close()
    (directory / "postgres.loaded").write_text(pg_url)
    return time.perf_counter() - t0


# -- driver ------------------------------------------------------------------------------


class WorkerFailed(Exception):
    """A measurement's subprocess did not finish (e.g. the baseline out of memory at L)."""

    def __init__(self, why: str, rss_mib: float) -> None:
        super().__init__(why)
        self.rss_mib = rss_mib


def _hwm(pid: int | str = "self") -> float | None:
    """Peak resident memory (``VmHWM``, MiB) of a process's own address space, or None.

    Not ``ru_maxrss``: the kernel carries a forked child's pre-``exec`` peak, which is the
    parent's, into the child's ``ru_maxrss``, so a driver that built a warehouse or loaded
    PostgreSQL in-process would show its own peak for every worker. ``VmHWM`` starts afresh
    with the address space ``exec`` creates."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def _measure(kind: str, directory: Path, pg_url: str | None, experiments: int) -> tuple[float, float, dict]:
    """(seconds, peak RSS in MiB, per-query seconds) of one worker subprocess.

    The worker reports its own ``VmHWM`` when it finishes; while it runs the driver polls it
    too (once the worker has exec'd), so a worker killed for memory still has a peak."""
    import threading

    # The worker is this module under the name it was imported by (``tests.bench.run`` from the
    # checkout, or ``bench.run`` as the smoke test imports it to measure the installed package), with
    # only that module's root folder added to the path.
    name = __spec__.name
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[name.count(".")])}
    cmd = [sys.executable, "-P", "-m", name, "--worker", kind, "--dir", str(directory),
           "--stats-experiments", str(experiments)]
    if pg_url:
        cmd += ["--engine", "postgres", "--pg-url", pg_url]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, env=env)
    seen = [0.0]
    done = threading.Event()

    def poll() -> None:
        while not done.wait(0.1):
            try:
                if b"--worker" not in Path(f"/proc/{proc.pid}/cmdline").read_bytes():
                    continue  # not exec'd yet: the address space is still the driver's
            except OSError:
                return
            seen[0] = max(seen[0], _hwm(proc.pid) or 0.0)

    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    out = proc.stdout.read() if proc.stdout else b""
    _, status, rusage = os.wait4(proc.pid, 0)
    done.set()
    watcher.join()
    # without /proc (not Linux) only ru_maxrss is left, which may include the driver's peak
    fallback = rusage.ru_maxrss / 1024
    code = os.waitstatus_to_exitcode(status)
    proc.returncode = code  # reaped by wait4, not by Popen
    if proc.stdout:
        proc.stdout.close()
    if code != 0:
        raise WorkerFailed(f"exit code {code}" if code > 0 else f"killed by signal {-code}", seen[0] or fallback)
    data = json.loads(out)
    return float(data["seconds"]), max(seen[0], data.get("rss_mib") or 0.0) or fallback, data["queries"]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.run", description=__doc__.split("\n\n")[0])
    ap.add_argument("--size", choices=sorted(SIZES), default="S")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--dir", type=Path, default=None, help="where to build the warehouse (default: a temp dir)")
    ap.add_argument("--engine", choices=("duckdb", "postgres"), default="duckdb")
    ap.add_argument("--pg-url", default=os.environ.get("EXPWATCH_BENCH_PG", PG_DEFAULT),
                    help="PostgreSQL database to (re)create for --engine postgres")
    ap.add_argument("--memory-limit", default=None,
                    help="DuckDB memory_limit for the runs (config key warehouse.memory_limit, e.g. 1GB; "
                         "default: DuckDB's own, 80%% of RAM)")
    ap.add_argument("--worker", choices=(*KINDS, "prepare"), help=argparse.SUPPRESS)
    ap.add_argument("--kinds", default=None, help="comma-separated subset of " + ",".join(KINDS))
    ap.add_argument("--stats-experiments", type=int, default=STATS_EXPERIMENTS,
                    help=f"experiments of the stats-core measurements (default {STATS_EXPERIMENTS:,})")
    args = ap.parse_args(argv)
    pg_url = args.pg_url if args.engine == "postgres" else None
    if args.worker:
        seconds, queries = _worker(args.worker, args.dir, pg_url, args.stats_experiments)
        sys.stdout.write(json.dumps({"seconds": seconds, "queries": queries, "rss_mib": _hwm()}))
        return 0
    size = SIZES[args.size]
    directory = args.dir or Path(tempfile.mkdtemp(prefix=f"expwatch-bench-{size.name}-"))
    directory.mkdir(parents=True, exist_ok=True)
    marker = directory / "warehouse.size"
    t0 = time.perf_counter()
    if not ((directory / "warehouse.duckdb").exists() and marker.exists() and marker.read_text() == size.name):
        marker.unlink(missing_ok=True)
        (directory / "postgres.loaded").unlink(missing_ok=True)
        build(directory / "warehouse.duckdb", size)
        marker.write_text(size.name)
    built = time.perf_counter() - t0
    loaded = ""
    if pg_url:
        flag = directory / "postgres.loaded"
        if not (flag.exists() and flag.read_text() == pg_url):
            loaded = f"; loaded into PostgreSQL with COPY in {load_postgres(directory / 'warehouse.duckdb', pg_url, directory):.1f}s"
        write_config(directory, pg_url)
    else:
        write_config(directory, memory_limit=args.memory_limit)
    default = PG_KINDS if pg_url else KINDS
    kinds = [k for k in (args.kinds.split(",") if args.kinds else default) if k]
    skipped: dict[str, str] = {}
    if not args.kinds and size.name == "L" and "baseline" in kinds:
        # unit-level rows in pandas peak at 6.3 GB at M; five times that exceeds this machine
        kinds.remove("baseline")
        skipped["baseline"] = "its unit-level frames need about 5x M's 6.3 GB; --kinds baseline forces it"
    if pg_url and (bad := [k for k in kinds if k not in PG_KINDS]):
        raise SystemExit(f"--engine postgres measures {', '.join(PG_KINDS)} only, not {', '.join(bad)}")
    if "warm" in kinds:
        _measure("prepare", directory, pg_url, args.stats_experiments)
    results: dict[str, tuple[float, float]] = {}
    queries: dict[str, dict] = {}
    failed: dict[str, WorkerFailed] = {}
    for kind in kinds:
        try:
            runs = [_measure(kind, directory, pg_url, args.stats_experiments) for _ in range(args.repeat)]
        except WorkerFailed as exc:  # reported in the table; the other measurements still run
            failed[kind] = exc
            continue
        results[kind] = (statistics.median(r[0] for r in runs), max(r[1] for r in runs))
        if runs[0][2]:
            queries[kind] = runs[0][2]
    load = os.getloadavg()[0]
    print(f"size {size.name}: {size.assignments:,} assignment rows, {size.events:,} metric events, "
          f"{size.experiments:,} experiments; engine {args.engine}; built in {built:.1f}s{loaded}; "
          f"median of {args.repeat}; {os.cpu_count()} cores; load average {load:.2f}; "
          f"DuckDB memory_limit {args.memory_limit or 'default'}; "
          f"stats core on {args.stats_experiments:,} experiments x {STATS_LOOKS} looks")
    print(f"{'measurement':<12} {'seconds':>10} {'peak RSS MiB':>14}")
    for kind in kinds:
        if kind in results:
            sec, rss = results[kind]
            print(f"{kind:<12} {sec:>10.3f} {rss:>14.0f}")
        else:
            print(f"{kind:<12} {'failed':>10} {failed[kind].rss_mib:>14.0f}  ({failed[kind]})")
    for kind in skipped:
        print(f"{kind:<12} {'skipped':>10} {'':>14}  ({skipped[kind]})")
    for kind, q in queries.items():
        print(f"queries of the first {kind} run (s): " + ", ".join(f"{k} {v:.2f}" for k, v in q.items()))

    def ratio(a: str, b: str) -> str:
        return f"{results[a][0] / results[b][0]:.2f}" if a in results and b in results and results[b][0] > 0 else "n/a"

    # the warm/cold target is about the assignment path: the query that pulls the SRM counts,
    # plus the first-assignment relation when the pull built it (listed before that query)
    def path(kind: str) -> float:
        total, seen_counts = 0.0, False
        for k, v in queries.get(kind, {}).items():
            if k.startswith("assignments["):
                total, seen_counts = total + v, True
            elif k.startswith("first-assignments[") and not seen_counts:
                total += v
        return total

    def frac(a: float, b: float) -> str:
        return f"{a / b:.2f}" if a and b else "n/a"

    def counts(kind: str) -> float:
        return sum(v for k, v in queries.get(kind, {}).items() if k.startswith("assignments["))

    cold_q = sum(queries.get("cold", {}).values())
    queries_ratio = f"{cold_q / results['floor'][0]:.2f}" if cold_q and "floor" in results else "n/a"
    print(f"ratios: cold/floor {ratio('cold', 'floor')} (the cold run's warehouse queries alone: {queries_ratio}), "
          f"warm/cold {ratio('warm', 'cold')}, baseline/cold {ratio('baseline', 'cold')}, "
          f"baseline/floor-lean {ratio('baseline', 'floor-lean')}")
    # on DuckDB the first-assignment relation is built every run for the metric and collision
    # queries (not incremental: a unit's metric sum and its overlaps change with every event),
    # so what a warm run adds for its counts is the counts query alone
    print(f"warm/cold on the assignment path: {frac(path('warm'), path('cold'))} "
          f"(the counts query alone: {frac(counts('warm'), path('cold'))})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
