"""DuckDB session settings of the warehouse connection (config keys warehouse.memory_limit,
threads, spill_directory) on a real DuckDB file: applied to every session, checked by the
config, the default spill folder removed at dispose, and an out-of-memory error that says
which config key to change."""

from __future__ import annotations

import os
import tempfile

import duckdb
import pytest

from monitor.config import load_config
from monitor.errors import ConfigError, WarehouseError
from monitor.warehouse import open_warehouse


def _config(tmp_path, extra: str, url: str | None = None):
    if url is None:
        duckdb.connect(str(tmp_path / "w.duckdb")).close()
        url = "duckdb:///w.duckdb"
    p = tmp_path / "expwatch.yaml"
    p.write_text(f'warehouse: {{url: "{url}"{extra}}}\nregistry: {{table: experiments}}\nassignments: {{table: assignments}}\n')
    return load_config(p)


def _settings(wh):
    return wh.query("settings", "SELECT current_setting('memory_limit') AS m, current_setting('threads') AS t, "
                    "current_setting('temp_directory') AS d", {}).iloc[0]


@pytest.mark.parametrize("pinned", [False, True])
def test_settings_reach_every_session(tmp_path, pinned):
    cfg = _config(tmp_path, f', memory_limit: "64MB", threads: 1, spill_directory: "{tmp_path / "spill"}"')
    wh = open_warehouse(cfg.warehouse)
    try:
        if pinned:
            assert wh.pin()
        row = _settings(wh)
        reference = duckdb.connect()  # how DuckDB itself reports the same limit
        reference.execute("SET memory_limit = '64MB'")
        assert row["m"] == reference.execute("SELECT current_setting('memory_limit')").fetchone()[0]
        assert int(row["t"]) == 1
        assert row["d"] == str(tmp_path / "spill")
    finally:
        wh.dispose()


def test_default_spill_folder_is_the_runs_own_and_goes_at_dispose(tmp_path):
    cfg = _config(tmp_path, ', memory_limit: "32MB", threads: 1')
    wh = open_warehouse(cfg.warehouse)
    wh.pin()
    folder = _settings(wh)["d"]
    assert os.path.dirname(folder) == tempfile.gettempdir() and os.path.basename(folder).startswith("expwatch-duckdb-")
    # a sort larger than the limit spills into it
    wh.query("spill", "SELECT i FROM range(3000000) t(i) ORDER BY hash(i)", {})
    wh.dispose()
    assert not os.path.exists(folder)


def test_out_of_memory_names_the_config_keys(tmp_path):
    cfg = _config(tmp_path, ', memory_limit: "16MB", threads: 1')
    wh = open_warehouse(cfg.warehouse)
    try:
        with pytest.raises(WarehouseError) as info:
            wh.query("too-big", "SELECT list(i) AS l FROM range(20000000) t(i)", {})  # a list cannot spill
    finally:
        wh.dispose()
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith("query too-big failed on duckdb: Out of Memory Error")
    assert msg.endswith("; raise warehouse.memory_limit (now 16MB) or lower warehouse.threads in the config")


@pytest.mark.parametrize("extra, url, message", [
    (', memory_limit: "lots"', None, r"warehouse.memory_limit: String should match pattern"),
    (", threads: 0", None, r"warehouse.threads: Input should be greater than or equal to 1"),
    (', memory_limit: "1GB"', "postgresql://postgres@127.0.0.1/test",
     r"warehouse: memory_limit: DuckDB settings, but the warehouse is not a duckdb: URL"),
])
def test_bad_settings_are_config_errors(tmp_path, extra, url, message):
    with pytest.raises(ConfigError, match=message) as info:
        _config(tmp_path, extra, url)
    assert "\n" not in str(info.value) and info.value.exit_code == 2
