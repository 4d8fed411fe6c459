"""Shared fixtures: the demo warehouse (built once), a PostgreSQL database on
loopback, and a non-UTC local time zone for every test.

PostgreSQL tests skip when no server answers on 127.0.0.1:5432, unless
EXPWATCH_REQUIRE_POSTGRES=1 (CI sets it), which turns the skip into a failure.

The suite tests the installed package: run it as ``.venv/bin/pytest`` (the README's
command), which does not put the checkout on ``sys.path``. The report header names
the ``monitor`` under test; with EXPWATCH_REQUIRE_INSTALLED=1 (CI sets it) the run
stops at once if that is the checkout's own ``monitor/`` folder.
"""

from __future__ import annotations

import importlib
import io
import os
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest

# Every test runs with a local zone that is not UTC and has DST, so any code that
# silently uses local time shows up.
os.environ["TZ"] = "Europe/Berlin"
time.tzset()

ROOT = Path(__file__).resolve().parent.parent
UNDER_TEST = Path(importlib.import_module("monitor").__file__).resolve().parent

if os.environ.get("EXPWATCH_REQUIRE_INSTALLED") == "1" and UNDER_TEST == ROOT / "monitor":
    pytest.exit(f"the tests imported the checkout's {UNDER_TEST}, not the installed package: run them as "
                "'.venv/bin/pytest' after 'pip install .[test]' (EXPWATCH_REQUIRE_INSTALLED=1)", returncode=4)


def pytest_report_header(config: pytest.Config) -> str:
    return f"expwatch under test: {UNDER_TEST}"


PG_DSN = os.environ.get("EXPWATCH_TEST_PG", "postgresql+psycopg://postgres@127.0.0.1:5432/test")


@pytest.fixture(scope="session")
def demo(tmp_path_factory: pytest.TempPathFactory):
    """The demo warehouse as a DuckDB file, plus its summary and a config path."""
    from monitor.demo import build_demo_warehouse
    from monitor.demo_config import write_demo_config

    d = tmp_path_factory.mktemp("demo")
    summary = build_demo_warehouse(d / "warehouse.duckdb")
    config = write_demo_config(d)
    return {"dir": d, "summary": summary, "config": config}


@pytest.fixture(scope="session")
def demo_frames():
    from monitor.demo import demo_tables

    frames, summary = demo_tables()
    return frames, summary


def _pg_admin_engine():
    import sqlalchemy as sa

    return sa.create_engine(PG_DSN, isolation_level="AUTOCOMMIT", poolclass=sa.pool.NullPool)


@pytest.fixture(scope="session")
def pg_url() -> Iterator[str]:
    """A fresh PostgreSQL database for this test session; dropped afterwards."""
    import sqlalchemy as sa

    try:
        import psycopg  # noqa: F401

        admin = _pg_admin_engine()
        with admin.connect() as c:
            c.execute(sa.text("SELECT 1"))
    except Exception as exc:  # no driver or no server
        if os.environ.get("EXPWATCH_REQUIRE_POSTGRES") == "1":
            pytest.fail(f"PostgreSQL is required (EXPWATCH_REQUIRE_POSTGRES=1) but unavailable: {exc}")
        pytest.skip(f"PostgreSQL not available on 127.0.0.1:5432: {exc}")
    name = f"expwatch_test_{uuid.uuid4().hex[:10]}"
    with admin.connect() as c:
        c.execute(sa.text(f'CREATE DATABASE "{name}"'))
    url = sa.make_url(PG_DSN).set(database=name).render_as_string(hide_password=False)
    try:
        yield url
    finally:
        with admin.connect() as c:
            c.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def load_frames_into_postgres(url: str, frames: dict[str, pd.DataFrame], schema: str) -> None:
    """Copy DataFrames into PostgreSQL tables (COPY, so millions of rows take seconds)."""
    import sqlalchemy as sa

    eng = sa.create_engine(url, poolclass=sa.pool.NullPool)
    types = {"object": "TEXT", "str": "TEXT", "string": "TEXT", "float64": "DOUBLE PRECISION", "int64": "BIGINT",
             "int32": "INTEGER", "bool": "BOOLEAN", "boolean": "BOOLEAN"}
    with eng.begin() as conn:
        conn.execute(sa.text(f'CREATE SCHEMA IF NOT EXISTS "{schema}"'))
        raw = conn.connection.driver_connection
        for table, df in frames.items():
            cols = []
            for col, dt in df.dtypes.items():
                kind = "TIMESTAMP" if str(dt).startswith("datetime64") else types.get(str(dt), "TEXT")
                cols.append(f'"{col}" {kind}')
            conn.execute(sa.text(f'DROP TABLE IF EXISTS "{schema}"."{table}"'))
            conn.execute(sa.text(f'CREATE TABLE "{schema}"."{table}" ({", ".join(cols)})'))
            buf = io.StringIO()
            df.to_csv(buf, index=False, header=False, na_rep="\\N", date_format="%Y-%m-%d %H:%M:%S.%f")
            with raw.cursor() as cur:
                with cur.copy(f'COPY "{schema}"."{table}" FROM STDIN WITH (FORMAT csv, NULL \'\\N\')') as cp:
                    cp.write(buf.getvalue())
            # planner statistics, as a real warehouse would have them (without them the metric
            # queries pick nested loops on freshly loaded tables)
            conn.execute(sa.text(f'ANALYZE "{schema}"."{table}"'))
    eng.dispose()


def write_config(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def registry_frame(experiments, start, owner: str = "shelf-team") -> pd.DataFrame:
    """Registry rows for 50/50 single-phase experiments starting at ``start`` (aware UTC)."""
    return pd.DataFrame([
        {"experiment_id": e, "phase": 1, "phase_start": start.replace(tzinfo=None), "phase_end": None, "variant": v,
         "weight": 0.5, "is_control": v == "control", "status": "running", "owner": owner, "title": e}
        for e in experiments for v in ("control", "treatment")
    ])


def write_duckdb_warehouse(path: Path, registry: pd.DataFrame, assignments: pd.DataFrame) -> None:
    """Write the registry and assignment tables into a DuckDB file and close it."""
    import duckdb

    con = duckdb.connect(str(path))
    for name, df in {"experiments": registry, "assignments": assignments}.items():
        con.register("df", df)
        con.execute(f"CREATE OR REPLACE TABLE {name} AS SELECT * FROM df")
        con.unregister("df")
    con.execute("ALTER TABLE experiments ALTER phase_end TYPE TIMESTAMP")
    con.close()
