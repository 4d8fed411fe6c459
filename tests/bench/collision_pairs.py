"""Benchmark: the collision check's pair search with many live experiments.

Builds a synthetic DuckDB assignment table (``--experiments`` live 50/50 experiments,
``--units`` units, each unit in ``--per-unit`` experiments on average, chosen at
random) and times the one collision query (cross-tab of shared units for every pair,
no guardrails) and the findings computed from it. Prints figures; asserts nothing.

    python -m tests.bench.collision_pairs --experiments 300 --units 200000 --per-unit 5
"""

from __future__ import annotations

import argparse
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import SimpleNamespace

import duckdb
import numpy as np
import pandas as pd

from monitor.collision import collision_findings, pull_collisions
from monitor.config import AssignmentColumns, CheckConfig, SourceConfig
from monitor.registry import Experiment, Phase
from monitor.warehouse import Warehouse

T0 = datetime(2026, 5, 1, tzinfo=UTC)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--experiments", type=int, default=300)
    ap.add_argument("--units", type=int, default=200_000)
    ap.add_argument("--per-unit", type=float, default=5.0)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(1)
    k = rng.poisson(args.per_unit, args.units).clip(1, args.experiments)
    unit = np.repeat(np.arange(args.units), k)
    exp = np.concatenate([rng.choice(args.experiments, size=m, replace=False) for m in k])
    ts = T0 + pd.to_timedelta(rng.integers(0, 14 * 86400, unit.size), unit="s")
    df = pd.DataFrame({"unit_id": [f"u{u}" for u in unit], "experiment_id": [f"e{e:04d}" for e in exp],
                       "variant": np.where(rng.random(unit.size) < 0.5, "control", "treatment"),
                       "assigned_at": ts.tz_convert(None)})
    exps = [Experiment(f"e{e:04d}", "control", ("control", "treatment"),
                       (Phase(1, T0, None, {"control": 0.5, "treatment": 0.5}),)) for e in range(args.experiments)]
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "w.duckdb"
        con = duckdb.connect(str(path))
        con.register("df", df)
        con.execute("CREATE TABLE assignments AS SELECT * FROM df")
        con.close()
        wh = Warehouse(f"duckdb:///{path}")
        cfg = SimpleNamespace(sources=[SourceConfig(name="assigned", table="assignments", columns=AssignmentColumns())],
                              metrics=[], checks=CheckConfig())
        t = time.perf_counter()
        pull = pull_collisions(cfg, wh, exps, T0 + timedelta(days=14))
        t_query = time.perf_counter() - t
        t = time.perf_counter()
        found = collision_findings(exps, pull, cfg.checks)
        t_stats = time.perf_counter() - t
        wh.dispose()
    triples = int((k * (k - 1) // 2).sum())
    pairs = pull.crosstab[["experiment_a", "experiment_b"]].drop_duplicates().shape[0]
    print(f"experiments {args.experiments}, units {args.units:,}, assignment rows {unit.size:,}, "
          f"unit-pair rows {triples:,}")
    print(f"pairs sharing units {pairs:,} of {args.experiments * (args.experiments - 1) // 2:,}; "
          f"result rows {len(pull.crosstab):,}")
    print(f"collision query {t_query:.2f} s, findings {t_stats:.2f} s, alerts "
          f"{sum(f.status == 'alert' for f in found)}")


if __name__ == "__main__":
    main()
