"""PostgreSQL session settings of the warehouse connection, on the real server on loopback
(the ``pg_url`` fixture; CI sets EXPWATCH_REQUIRE_POSTGRES=1, so these fail instead of skipping):
every session is read-only, in UTC, with the statement timeout and nested loops off, and the
config key warehouse.work_mem reaches every session."""

from __future__ import annotations

import pytest
import sqlalchemy as sa

from monitor.config import load_config
from monitor.errors import ConfigError, WarehouseError
from monitor.warehouse import open_warehouse


def _config(tmp_path, url: str, extra: str = ""):
    p = tmp_path / "expwatch.yaml"
    p.write_text(f'warehouse: {{url: "{url}"{extra}}}\nregistry: {{table: experiments}}\nassignments: {{table: assignments}}\n')
    return load_config(p)


def _settings(wh):
    return wh.query("settings", "SELECT current_setting('work_mem') AS work_mem, "
                    "current_setting('default_transaction_read_only') AS ro, current_setting('TimeZone') AS tz, "
                    "current_setting('statement_timeout') AS timeout, current_setting('enable_nestloop') AS nl", {}).iloc[0]


@pytest.mark.postgres
def test_session_defaults(tmp_path, pg_url):
    wh = open_warehouse(_config(tmp_path, pg_url, ", query_timeout_seconds: 90").warehouse)
    try:
        row = _settings(wh)
        assert (row["ro"], row["tz"], row["timeout"], row["nl"]) == ("on", "UTC", "90s", "off")
        plain = sa.create_engine(pg_url, poolclass=sa.pool.NullPool)  # a session not opened by expwatch
        try:
            with plain.connect() as c:
                server_default = c.execute(sa.text("SHOW work_mem")).scalar()
        finally:
            plain.dispose()
        assert row["work_mem"] == server_default  # untouched without the key
        with pytest.raises(WarehouseError, match="read-only transaction"):
            wh.query("write", "CREATE TABLE expwatch_must_not_exist AS SELECT 1 AS x", {})
    finally:
        wh.dispose()


@pytest.mark.postgres
def test_work_mem_reaches_every_session(tmp_path, pg_url):
    wh = open_warehouse(_config(tmp_path, pg_url, ', work_mem: "256MB"').warehouse)
    try:
        # one short connection per query on PostgreSQL: each of them carries the setting
        assert [_settings(wh)["work_mem"] for _ in range(2)] == ["256MB", "256MB"]
    finally:
        wh.dispose()


@pytest.mark.parametrize("extra, url, message", [
    (', work_mem: "lots"', "postgresql://postgres@127.0.0.1/test", r"warehouse.work_mem: String should match pattern"),
    (', work_mem: "64mb"', "postgresql://postgres@127.0.0.1/test", r"warehouse.work_mem: String should match pattern"),
    (', work_mem: "64MB"', "duckdb:///w.duckdb",
     r"warehouse: work_mem: a PostgreSQL setting, but the warehouse is not a postgresql URL"),
])
def test_bad_work_mem_is_a_config_error(tmp_path, extra, url, message):
    with pytest.raises(ConfigError, match=message) as info:
        _config(tmp_path, url, extra)
    assert "\n" not in str(info.value) and info.value.exit_code == 2
