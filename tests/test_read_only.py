"""expwatch never writes to the warehouse, nor, through it, to the file system.

Each escape route a user-supplied ``sql:`` was found to open is tried on DuckDB and
on PostgreSQL, end to end through ``expwatch run``: the config is refused with one
line naming the key, and the warehouse table and the file system are unchanged. The
session layer is tried on its own too (the same strings handed straight to
:meth:`Warehouse.query`), so it holds even if the parser check were bypassed.
"""

from __future__ import annotations

import tempfile
import uuid
from datetime import UTC, datetime, timedelta
from pathlib import Path

import duckdb
import pandas as pd
import pytest
import sqlalchemy as sa

from conftest import load_frames_into_postgres, registry_frame, write_config, write_duckdb_warehouse
from monitor.cli import main
from monitor.config import load_config
from monitor.errors import ConfigError, WarehouseError
from monitor.sqlguard import check_select
from monitor.warehouse import Warehouse

START = datetime(2026, 11, 1, tzinfo=UTC)
AS_OF = "2026-11-03T12:00Z"


def _assignments() -> pd.DataFrame:
    return pd.DataFrame({
        "unit_id": [f"u{i}" for i in range(40)],
        "experiment_id": "shelf-sort",
        "variant": ["control", "treatment"] * 20,
        "assigned_at": [START.replace(tzinfo=None) + timedelta(hours=i) for i in range(40)],
    })


# The escape routes: a subquery closed early, then statements of the user's choosing.
def _multi_statement(schema: str) -> str:
    return (f"SELECT * FROM {schema}experiments) AS s; SET SESSION CHARACTERISTICS AS TRANSACTION READ WRITE; "
            f"COMMIT; INSERT INTO {schema}victim VALUES (2); COMMIT; SELECT * FROM (SELECT * FROM {schema}experiments")


def _copy_to_file(schema: str, target: str) -> str:
    return (f"SELECT * FROM {schema}experiments) AS s; COPY (SELECT 1 AS x) TO '{target}'; "
            f"SELECT * FROM (SELECT * FROM {schema}experiments")


ROUTES = ["multi_statement", "copy_to_file"]


def _escape(route: str, schema: str, target: str) -> str:
    return _multi_statement(schema) if route == "multi_statement" else _copy_to_file(schema, target)


def _yaml(url: str, registry_sql: str, schema: str) -> str:
    sql = registry_sql.replace("'", "''")
    return (f"warehouse: {{url: '{url}'}}\n"
            f"registry:\n  sql: '{sql}'\n"
            f"assignments: {{table: {schema}assignments}}\n")


def _duckdb(tmp_path):
    path = tmp_path / "warehouse.duckdb"
    write_duckdb_warehouse(path, registry_frame(["shelf-sort"], START), _assignments())
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE victim (x INTEGER); INSERT INTO victim VALUES (1)")
    con.close()
    return f"duckdb:///{path}"


def _duckdb_victim(url: str) -> list:
    con = duckdb.connect(url.removeprefix("duckdb:///"), read_only=True)
    try:
        return con.execute("SELECT x FROM victim ORDER BY x").fetchall()
    finally:
        con.close()


def _postgres(pg_url: str, schema: str) -> str:
    load_frames_into_postgres(pg_url, {"experiments": registry_frame(["shelf-sort"], START),
                                       "assignments": _assignments(),
                                       "victim": pd.DataFrame({"x": [1]})}, schema)
    return pg_url


def _pg_victim(url: str, schema: str) -> list:
    eng = sa.create_engine(url, poolclass=sa.pool.NullPool)
    try:
        with eng.connect() as c:
            return [tuple(r) for r in c.execute(sa.text(f'SELECT x FROM "{schema}".victim ORDER BY x'))]
    finally:
        eng.dispose()


def _server_writable_target() -> Path:
    """A path the PostgreSQL server process (on this machine) could write: a COPY would land here."""
    return Path(tempfile.gettempdir()) / f"expwatch-leak-{uuid.uuid4().hex[:8]}.csv"


def _run_refused(tmp_path, capsys, text: str) -> str:
    cfg = write_config(tmp_path / "expwatch.yaml", text)
    code = main(["run", "--config", str(cfg), "--as-of", AS_OF])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.strip().count("\n") == 0 and "Traceback" not in err
    return err


@pytest.mark.parametrize("route", ROUTES)
def test_duckdb_escape_routes_are_refused(tmp_path, capsys, route):
    url = _duckdb(tmp_path)
    target = tmp_path / "leak.csv"
    err = _run_refused(tmp_path, capsys, _yaml(url, _escape(route, "", str(target)), ""))
    assert "registry.sql:" in err
    assert _duckdb_victim(url) == [(1,)]
    assert not target.exists()


@pytest.mark.postgres
@pytest.mark.parametrize("route", ROUTES)
def test_postgres_escape_routes_are_refused(tmp_path, capsys, pg_url, route):
    schema = f"ro_{route}"
    url = _postgres(pg_url, schema)
    target = _server_writable_target()
    err = _run_refused(tmp_path, capsys, _yaml(url, _escape(route, f"{schema}.", str(target)), f"{schema}."))
    assert "registry.sql:" in err
    assert _pg_victim(url, schema) == [(1,)]
    assert not target.exists()


_KEYS = {
    "registry.sql": "registry:\n  sql: '{sql}'\nassignments: {{table: assignments}}\n",
    "assignments.sql": "registry: {{table: experiments}}\nassignments:\n  sql: '{sql}'\n",
    "stages[0].sql": "registry: {{table: experiments}}\nassignments: {{table: assignments}}\n"
                     "stages:\n  - name: filtered\n    sql: '{sql}'\n",
    "metrics[0].sql": "registry: {{table: experiments}}\nassignments: {{table: assignments}}\nmetrics:\n"
                      "  - {{name: m, role: diagnostic, sql: '{sql}', aggregate: count}}\n",
    "metrics[0].denominator.sql": "registry: {{table: experiments}}\nassignments: {{table: assignments}}\nmetrics:\n"
                                  "  - name: m\n    role: diagnostic\n    kind: ratio\n    table: events\n"
                                  "    aggregate: count\n    denominator: {{sql: '{sql}', aggregate: count}}\n",
}


@pytest.mark.parametrize("url", ["duckdb:///w.duckdb", "postgresql+psycopg://reader@db.internal/wh"])
@pytest.mark.parametrize("key", sorted(_KEYS))
def test_every_sql_key_is_checked(tmp_path, key, url):
    sql = _multi_statement("").replace("'", "''")
    p = write_config(tmp_path / "c.yaml", f"warehouse: {{url: '{url}'}}\n" + _KEYS[key].format(sql=sql))
    with pytest.raises(ConfigError) as info:
        load_config(p)
    assert f"c.yaml: {key}: is not one valid SQL statement" in str(info.value)
    good = write_config(tmp_path / "ok.yaml", f"warehouse: {{url: '{url}'}}\n"
                        + _KEYS[key].format(sql="WITH a AS (SELECT * FROM t) SELECT * FROM a"))
    load_config(good)


@pytest.mark.parametrize("sql, problem", [
    ("SELECT 1; SELECT 2", "holds 2 statements"),
    ("", "holds no statements"),
    ("COPY (SELECT 1) TO '/tmp/x.csv'", "is a COPY statement"),
    ("SET SESSION CHARACTERISTICS AS TRANSACTION READ WRITE", "is a SET statement"),
    ("COMMIT", "is a COMMIT statement"),
    ("INSERT INTO t VALUES (1)", "is an INSERT statement"),
    ("WITH d AS (DELETE FROM t RETURNING *) SELECT * FROM d", "contains DELETE"),
    ("SELECT * INTO copy_of_t FROM t", "contains SELECT ... INTO"),
    ("SELECT * FROM t FOR UPDATE", "contains FOR UPDATE"),
    ("SELECT set_config('transaction_read_only', 'off', false)", "calls set_config()"),
    ("SELECT lo_export(1, '/tmp/x')", "calls lo_export()"),
    ("SELECT nextval('s')", "calls nextval()"),
    ("SELECT 1 /* never closed", "an unclosed string or comment"),
    ("SELECT 'never closed", "an unclosed string or comment"),
])
@pytest.mark.parametrize("dialect", ["postgres", "duckdb"])
def test_what_is_not_a_read_only_select(sql, problem, dialect):
    got = check_select(sql, dialect)
    assert got is not None and problem in got


@pytest.mark.parametrize("sql", [
    "SELECT * FROM s.t WHERE ts >= now() - INTERVAL '3 days'",
    "WITH a AS (SELECT 1 AS x) SELECT x FROM a",
    "SELECT 1 AS x UNION ALL SELECT 2",
    "(SELECT 1 AS x)",
    "SELECT * FROM t;",
])
def test_plain_queries_pass(sql):
    assert check_select(sql, "postgres") is None and check_select(sql, "duckdb") is None


# -- the session layer on its own --------------------------------------------------------


_SORT = ("SELECT SUM(LENGTH(h)) AS n FROM (SELECT h FROM (SELECT random() AS r, md5(range::VARCHAR) AS h "
         "FROM range(2000000)) AS g ORDER BY r LIMIT 10 OFFSET 1999980) AS q")


def test_duckdb_session_refuses_file_writes_but_reads_and_spills(tmp_path):
    url = _duckdb(tmp_path)
    target = tmp_path / "leak.csv"
    spill = tmp_path / "spill"
    wh = Warehouse(url, memory_limit="40MB", threads=1, spill_directory=str(spill))
    try:
        with pytest.raises(WarehouseError, match="disabled by configuration"):
            wh.query("copy", f"COPY (SELECT 1 AS x) TO '{target}'", {})
        with pytest.raises(WarehouseError, match="locked"):
            wh.query("unlock", "SET enable_external_access = true", {})
        assert wh.query("read", "SELECT COUNT(*) AS n FROM assignments", {}).n.iloc[0] == 40
        # a full sort of 2 million 32-character strings under a 40 MB cap finishes here ...
        assert wh.query("spill", _SORT, {}).n.iloc[0] == 320
    finally:
        wh.dispose()
    no_spill = Warehouse(url, memory_limit="40MB", threads=1, spill_directory="")
    try:  # ... and runs out of memory with spilling off: it finished because it spilled
        with pytest.raises(WarehouseError, match="Out of Memory"):
            no_spill.query("spill", _SORT, {})
    finally:
        no_spill.dispose()
    assert not target.exists() and _duckdb_victim(url) == [(1,)]


def test_duckdb_readable_directories(tmp_path):
    url = _duckdb(tmp_path)
    (tmp_path / "lake").mkdir()
    (tmp_path / "other").mkdir()
    for d in ("lake", "other"):
        pd.DataFrame({"x": [1, 2]}).to_parquet(tmp_path / d / "t.parquet")
    p = write_config(tmp_path / "c.yaml", f"warehouse: {{url: '{url}', readable_directories: [lake]}}\n"
                     "registry: {table: experiments}\nassignments: {table: assignments}\n")
    cfg = load_config(p)
    assert cfg.warehouse.readable_directories == [str((tmp_path / "lake").resolve())]
    wh = Warehouse(url, readable_directories=cfg.warehouse.readable_directories)
    try:
        assert len(wh.query("lake", f"SELECT * FROM read_parquet('{tmp_path / 'lake' / 't.parquet'}')", {})) == 2
        with pytest.raises(WarehouseError, match="disabled by configuration"):
            wh.query("other", f"SELECT * FROM read_parquet('{tmp_path / 'other' / 't.parquet'}')", {})
    finally:
        wh.dispose()


@pytest.mark.postgres
@pytest.mark.parametrize("route", ROUTES)
def test_postgres_session_refuses_a_script(tmp_path, pg_url, route):
    schema = f"ro_session_{route}"
    url = _postgres(pg_url, schema)
    target = _server_writable_target()
    wh = Warehouse(url)
    try:
        assert wh.query("ro", "SELECT current_setting('transaction_read_only') AS ro", {}).ro.iloc[0] == "on"
        with pytest.raises(WarehouseError, match="multiple commands"):
            wh.query("registry", f"SELECT * FROM (\n{_escape(route, schema + '.', str(target))}\n) AS r", {})
    finally:
        wh.dispose()
    assert _pg_victim(url, schema) == [(1,)]
    assert not target.exists()
