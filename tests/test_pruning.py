"""Every template bounds its scans by the event timestamp, so partitioned warehouses prune.

A warehouse table partitioned (or clustered, or zone-mapped) on its event time can
skip whatever lies outside the rows a query asks for, but only if the bounds reach
the scan of that table. Three checks:

* each template in ``sql/`` bounds every source it reads by a timestamp range
  (``>= :lower`` and ``< :as_of``), except the ones listed in ``EXEMPT``;
* on DuckDB, in the plan (``EXPLAIN (FORMAT json)``) of every query a demo cycle
  runs, every scan of an event or assignment table carries both bounds on its
  timestamp column as a pushed-down filter (DuckDB then skips row groups by their
  min/max statistics). DuckDB drops a bound its column statistics already imply
  (all rows inside it); such a missing bound is accepted only if the table's
  rows really all satisfy it. The cycle runs two days before the end of the demo
  data, so the upper bound ``< :as_of`` always has rows to cut;
* on PostgreSQL, with every event and assignment table partitioned by range on its
  timestamp, the plan of every query a demo cycle runs lists no partition that lies
  wholly outside the window (one long before, one long after it), but does list the
  partitions inside it (declarative partition pruning, PostgreSQL 15 documentation,
  section 5.11.4).
"""

from __future__ import annotations

import itertools
import re
from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import sqlalchemy as sa
import yaml

from monitor.config import Config, load_config, parse_config
from monitor.cycle import run_cycle
from monitor.demo import DEMO_AS_OF
from monitor.demo_config import DEMO_CONFIG

SQL_DIR = Path(__file__).resolve().parent.parent / "sql"

EXEMPT = {
    "_dialect.sql.j2": "dialect macros only; reads no table",
    "registry.sql.j2": "the experiment registry is a small dimension table without event time, read whole",
}

# before and after any window a cycle can ask for
OLD = (datetime(2000, 1, 1), datetime(2001, 1, 1))
FUTURE = (datetime(2100, 1, 1), datetime(2101, 1, 1))
# earlier than the end of the demo data, so that rows lie after the window too
AS_OF = DEMO_AS_OF - timedelta(days=2)


def _event_tables(cfg: Config) -> dict[str, tuple[str, str]]:
    """Table name -> (event timestamp column, unit column), from the assignment sources and metrics."""
    out: dict[str, tuple[str, str]] = {}
    for src in cfg.sources:
        if src.table and src.columns is not None:
            out[src.table] = (src.columns.timestamp, src.columns.unit)
    for m in cfg.metrics:
        for spec in (m, m.denominator):
            if spec is not None and spec.table:
                out[spec.table] = (spec.columns.timestamp, spec.columns.unit)
    return out


def _traced_cycle(cfg: Config) -> list[tuple[str, str, dict[str, Any]]]:
    """Every query a dry-run cycle at the demo's time runs, with its bind parameters."""
    seen: list[tuple[str, str, dict[str, Any]]] = []
    run_cycle(cfg, as_of=AS_OF, dry_run=True, notify=False,
              tracer=lambda name, sql, params: seen.append((name, sql, dict(params))))
    return [q for q in seen if q[0] != "registry"]


def _bound(sql: str, params: dict[str, Any]) -> Any:
    stmt = sa.text(sql)
    lists = [k for k, v in params.items() if isinstance(v, list | tuple)]
    if lists:
        stmt = stmt.bindparams(*(sa.bindparam(k, expanding=True) for k in lists))
    return stmt


def _explain(engine: sa.Engine | sa.Connection, sql: str, params: dict[str, Any]) -> Any:
    stmt = _bound("EXPLAIN (FORMAT JSON) " + sql, params)
    if isinstance(engine, sa.Connection):
        row = engine.execute(stmt, params).fetchall()[0]
    else:
        with engine.connect() as conn:
            row = conn.execute(stmt, params).fetchall()[0]
    plan = row[-1]
    return yaml.safe_load(plan) if isinstance(plan, str) else plan


def _nodes(plan: Any) -> Iterator[dict[str, Any]]:
    """Every node of a JSON plan tree (DuckDB's "children", PostgreSQL's "Plans"/"Plan")."""
    if isinstance(plan, list):
        for p in plan:
            yield from _nodes(p)
    elif isinstance(plan, dict):
        yield plan
        for key in ("children", "Plans", "Plan"):
            if key in plan:
                yield from _nodes(plan[key])


# ------------------------------------------------------------------------------ templates


def test_every_template_bounds_its_sources_by_time():
    templates = sorted(p.name for p in SQL_DIR.glob("*.sql.j2"))
    assert "assignments.sql.j2" in templates and "metrics.sql.j2" in templates
    lower = re.compile(r"\{\{[^}]*timestamp[^}]*\}\}\s*>=\s*:\w+")
    upper = re.compile(r"\{\{[^}]*timestamp[^}]*\}\}\s*<\s*:as_of\b")
    for name in templates:
        if name in EXEMPT:
            continue
        text = (SQL_DIR / name).read_text(encoding="utf-8")
        sources = len(re.findall(r"FROM\s+\{\{\s*[\w.]*source\s*\}\}", text))
        assert sources >= 1, f"{name}: reads no source table? (add it to EXEMPT with a reason)"
        assert len(lower.findall(text)) >= sources, f"{name}: a source without a lower time bound"
        assert len(upper.findall(text)) >= sources, f"{name}: a source without the upper bound < :as_of"


# ------------------------------------------------------------------------------ DuckDB


def test_duckdb_scans_carry_the_time_bounds(demo):
    cfg = load_config(demo["config"])
    ts = {t: cols[0] for t, cols in _event_tables(cfg).items()}
    queries = _traced_cycle(cfg)
    assert any(n.startswith("assignments") for n, _, _ in queries)
    assert any(n.startswith("metric") for n, _, _ in queries)
    # the run's first-assignment relation (monitor/firsts.py) is a temp table of the run's own session:
    # the plans are taken on one connection that builds it the same way, so later queries can read it
    assert any(n.startswith("first-assignments[") for n, _, _ in queries)
    engine = sa.create_engine(cfg.warehouse.url, connect_args={"read_only": True}, poolclass=sa.pool.NullPool)
    conn = engine.connect()
    try:
        for name, sql, params in queries:
            scans = [n for n in _nodes(_explain(conn, sql, params)) if "Table" in n.get("extra_info", {})]
            if sql.startswith("CREATE OR REPLACE TEMP TABLE"):
                conn.execute(_bound(sql, params), params)
                conn.commit()
            lowest = min(v for v in params.values() if isinstance(v, datetime))
            checked = 0
            for node in scans:
                table = node["extra_info"]["Table"].rsplit(".", 1)[-1]
                if table not in ts:
                    continue
                col = re.escape(ts[table])
                filters = str(node["extra_info"].get("Filters", ""))
                if not re.search(rf'"?{col}"?\s*>=', filters):
                    # dropped by DuckDB only if its statistics show every row is inside the bound
                    first = conn.execute(sa.text(f'SELECT min("{ts[table]}") FROM "{table}"')).scalar()
                    assert first >= lowest, f"{name}: scan of {table} without a lower bound: {filters!r}"
                assert re.search(rf'"?{col}"?\s*<[^=]', filters), f"{name}: scan of {table} without an upper bound: {filters!r}"
                checked += 1
            # a query that reads no source table reads the relation, whose own scans were checked above
            reads_relation = any("expwatch_tmp_" in str(n["extra_info"]["Table"]) for n in scans)
            assert checked or reads_relation, f"{name}: no scan of an event or assignment table found in the plan"
    finally:
        conn.close()
        engine.dispose()


# ------------------------------------------------------------------------------ PostgreSQL


_PG_TYPES = {"object": "TEXT", "str": "TEXT", "string": "TEXT", "float64": "DOUBLE PRECISION", "int64": "BIGINT",
             "int32": "INTEGER", "bool": "BOOLEAN", "boolean": "BOOLEAN"}


def _months(lo: pd.Timestamp, hi: pd.Timestamp) -> list[tuple[datetime, datetime]]:
    start = lo.to_period("M").start_time
    edges = pd.date_range(start, hi.to_period("M").end_time + pd.Timedelta(days=1), freq="MS")
    return [(a.to_pydatetime(), b.to_pydatetime()) for a, b in itertools.pairwise(edges)]


def _load_partitioned(url: str, frames: dict[str, pd.DataFrame], ts: dict[str, str], schema: str) -> dict[str, list[str]]:
    """Copy the frames into ``schema``; tables in ``ts`` partitioned by month on that column,
    plus an empty partition long before and one long after. Returns table -> partition names."""
    import io

    eng = sa.create_engine(url, poolclass=sa.pool.NullPool)
    parts: dict[str, list[str]] = {}
    with eng.begin() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
        raw = conn.connection.driver_connection
        for table, df in frames.items():
            cols = ", ".join(
                f'"{c}" {"TIMESTAMP" if str(t).startswith("datetime64") else _PG_TYPES.get(str(t), "TEXT")}'
                for c, t in df.dtypes.items())
            if table in ts:
                col = ts[table]
                conn.execute(sa.text(f'CREATE TABLE "{schema}"."{table}" ({cols}) PARTITION BY RANGE ("{col}")'))
                bounds = [OLD, *_months(df[col].min(), df[col].max()), FUTURE]
                parts[table] = []
                for i, (lo, hi) in enumerate(bounds):
                    pname = f"{table}_p{i}"
                    conn.execute(sa.text(f'CREATE TABLE "{schema}"."{pname}" PARTITION OF "{schema}"."{table}" '
                                         f"FOR VALUES FROM ('{lo:%Y-%m-%d}') TO ('{hi:%Y-%m-%d}')"))
                    parts[table].append(pname)
            else:
                conn.execute(sa.text(f'CREATE TABLE "{schema}"."{table}" ({cols})'))
            buf = io.StringIO()
            df.to_csv(buf, index=False, header=False, na_rep="\\N", date_format="%Y-%m-%d %H:%M:%S.%f")
            with raw.cursor() as cur, cur.copy(
                    f'COPY "{schema}"."{table}" FROM STDIN WITH (FORMAT csv, NULL \'\\N\')') as cp:
                cp.write(buf.getvalue())
            conn.execute(sa.text(f'ANALYZE "{schema}"."{table}"'))
    eng.dispose()
    return parts


def _prefixed(node: Any, schema: str) -> Any:
    """The config with every ``table:`` value qualified by ``schema``."""
    if isinstance(node, dict):
        return {k: (f"{schema}.{v}" if k == "table" and isinstance(v, str) else _prefixed(v, schema))
                for k, v in node.items()}
    if isinstance(node, list):
        return [_prefixed(v, schema) for v in node]
    return node


@pytest.mark.postgres
@pytest.mark.slow
def test_postgres_plans_prune_partitions_outside_the_window(demo, demo_frames, pg_url, tmp_path):
    frames, _ = demo_frames
    doc = yaml.safe_load(DEMO_CONFIG)
    base = load_config(demo["config"])
    tables = _event_tables(base)
    ts = {t: cols[0] for t, cols in tables.items()}
    # plans, not volumes, are under test: one unit in 20 keeps every query quick
    sample = {t: df[pd.util.hash_pandas_object(df[tables[t][1]], index=False) % 20 == 0]
              for t, df in frames.items() if t in tables}
    sample[base.registry.table] = frames[base.registry.table]
    parts = _load_partitioned(pg_url, sample, ts, "pruned")
    doc = _prefixed(doc, "pruned")
    doc["warehouse"] = {"url": pg_url}
    doc["state"] = {"url": f"sqlite:///{tmp_path / 'state.sqlite'}"}
    cfg = parse_config(doc, where="pruning-config")
    queries = _traced_cycle(cfg)
    assert any(n.startswith("assignments") for n, _, _ in queries)
    assert any(n.startswith("metric") for n, _, _ in queries)
    engine = sa.create_engine(pg_url, poolclass=sa.pool.NullPool)
    try:
        for name, sql, params in queries:
            scanned = {n["Relation Name"] for n in _nodes(_explain(engine, sql, params)) if "Relation Name" in n}
            read = [t for t in parts if f'"pruned"."{t}"' in sql or f"pruned.{t}" in sql]
            assert read, f"{name}: reads none of the partitioned tables?"
            for table in read:
                names = parts[table]
                outside = {names[0], names[-1]} & scanned
                assert not outside, f"{name}: {table} partitions outside the window scanned: {sorted(outside)}"
                assert set(names[1:-1]) & scanned, f"{name}: no partition of {table} in the plan"
    finally:
        engine.dispose()
