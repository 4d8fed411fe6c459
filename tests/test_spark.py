"""The Spark SQL backend, run for real in local mode: the demo's tables exported
to Parquet give the same findings on Spark as on DuckDB; values travel as named
parameters; scans are reported and recorded.

Needs Java 17+ and pyspark (both in CI; pyspark is in the `test` extra). Without
them these tests skip, unless EXPWATCH_REQUIRE_SPARK=1 (CI sets it), which turns
the skip into a failure. One SparkSession (local[2], small shuffle partitions,
no UI) serves the whole module.
"""

from __future__ import annotations

import importlib.util
import os
import shutil
from datetime import datetime, timedelta, timezone
from pathlib import Path

import duckdb
import pytest
import yaml

from monitor.config import load_config, parse_config
from monitor.cycle import run_cycle
from monitor.demo import DEMO_AS_OF
from monitor.demo_config import DEMO_CONFIG
from monitor.errors import ConfigError, WarehouseError
from monitor.observe import read_status
from monitor.state import StateStore

TEST_CONF = {"spark.ui.enabled": False, "spark.ui.showConsoleProgress": False, "spark.sql.shuffle.partitions": 2,
             "spark.default.parallelism": 2, "spark.driver.memory": "2g"}


def _unavailable(reason: str) -> None:
    if os.environ.get("EXPWATCH_REQUIRE_SPARK") == "1":
        pytest.fail(f"Spark is required (EXPWATCH_REQUIRE_SPARK=1) but unavailable: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="module")
def spark():
    """The module's SparkSession; SparkWarehouse's getOrCreate reuses it."""
    if importlib.util.find_spec("pyspark") is None:
        _unavailable("pyspark is not installed")
    if not (shutil.which("java") or os.environ.get("JAVA_HOME")):
        _unavailable("no Java runtime (java on PATH or JAVA_HOME)")
    from monitor.warehouse import _import_pyspark

    builder = _import_pyspark().builder.master("local[2]").appName("expwatch-tests")
    for k, v in TEST_CONF.items():
        builder = builder.config(k, str(v).lower() if isinstance(v, bool) else str(v))
    try:
        session = builder.getOrCreate()
    except Exception as exc:  # the JVM did not start
        _unavailable(f"Spark did not start: {exc}")
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()


@pytest.fixture(scope="module")
def parquet_dir(demo, tmp_path_factory) -> Path:
    """Every table of the demo warehouse, one Parquet file each (written by DuckDB)."""
    out = tmp_path_factory.mktemp("parquet")
    con = duckdb.connect(str(demo["dir"] / "warehouse.duckdb"), read_only=True)
    try:
        tables = [r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()]
        for t in tables:
            con.execute(f"COPY {t} TO '{out / (t + '.parquet')}' (FORMAT parquet)")
    finally:
        con.close()
    assert "experiments" in tables and "assignments" in tables
    return out


def _spark_config(parquet_dir: Path, state: Path):
    raw = yaml.safe_load(DEMO_CONFIG)
    # relative Parquet paths: resolved against the config's folder (base_dir here)
    views = {p.stem: p.name for p in sorted(parquet_dir.glob("*.parquet"))}
    raw["warehouse"] = {"spark": {"master": "local[2]", "conf": TEST_CONF, "parquet": views}}
    raw["state"] = {"url": f"sqlite:///{state}"}
    return parse_config(raw, where="spark-config", base_dir=parquet_dir)


@pytest.fixture(scope="module")
def duckdb_run(demo, tmp_path_factory):
    cfg = load_config(demo["config"])
    state = tmp_path_factory.mktemp("duck-state") / "state.sqlite"
    cfg = cfg.model_copy(update={"state": cfg.state.model_copy(update={"url": f"sqlite:///{state}"})})
    return cfg, run_cycle(cfg, as_of=DEMO_AS_OF)


@pytest.fixture(scope="module")
def spark_run(spark, parquet_dir, tmp_path_factory):
    cfg = _spark_config(parquet_dir, tmp_path_factory.mktemp("spark-state") / "state.sqlite")
    return cfg, run_cycle(cfg, as_of=DEMO_AS_OF)


def _verdicts(result):
    return {f.key: (f.experiment, f.check, f.scope, f.status, f.severity) for f in result.findings}


@pytest.mark.slow
def test_demo_findings_on_spark_equal_duckdb(spark_run, duckdb_run):
    _, sp = spark_run
    _, dd = duckdb_run
    assert sp.recorded and dd.recorded
    assert {e.id for e in sp.experiments} == {e.id for e in dd.experiments}
    assert _verdicts(sp) == _verdicts(dd)
    assert any(f.status == "alert" for f in sp.findings)  # the demo's planted problems are among them
    for check in ("srm", "leakage", "unknown_variant"):
        spk = {f.key: f.statistics.get("units") for f in sp.findings if f.check == check}
        ddk = {f.key: f.statistics.get("units") for f in dd.findings if f.check == check}
        assert spk == ddk  # the same counts, not only the same verdicts
    for check in ("guardrail", "metric"):
        spk = {f.key: f.statistics for f in sp.findings if f.check == check}
        ddk = {f.key: f.statistics for f in dd.findings if f.check == check}
        assert spk.keys() == ddk.keys() and spk
        for k in spk:
            assert spk[k]["n"] == ddk[k]["n"]
            assert spk[k]["effect_relative"] == pytest.approx(ddk[k]["effect_relative"], rel=1e-9, abs=1e-12)


@pytest.mark.slow
def test_spark_scans_are_reported_and_recorded(spark_run, duckdb_run, parquet_dir):
    cfg, sp = spark_run
    store = StateStore(cfg.state.url or "")
    try:
        costs = store.query_costs(sp.run_id)
    finally:
        store.dispose()
    names = [c["query"] for c in costs]
    assert names[0] == "registry" and any(n.startswith("metric[") for n in names)
    assert all(c["rows_scanned"] is not None and c["rows_scanned"] > 0 for c in costs)
    assert all(c["bytes_scanned"] is not None and c["bytes_scanned"] > 0 for c in costs)
    # the registry query reads the whole experiments table: its row count, by construction
    con = duckdb.connect()
    try:
        n_reg = con.execute(f"SELECT count(*) FROM '{parquet_dir / 'experiments.parquet'}'").fetchall()[0][0]
    finally:
        con.close()
    reg = costs[0]
    assert reg["rows_scanned"] == n_reg == reg["rows_returned"]
    assert reg["bytes_scanned"] == (parquet_dir / "experiments.parquet").stat().st_size
    status = read_status(cfg.state.url or "", limit=1)
    run = status.runs[0]
    assert run.rows_scanned == sum(c["rows_scanned"] for c in costs)
    assert run.rows_returned == sum(c["rows_returned"] for c in costs)
    # DuckDB reports scanned rows too (its profiler); the same registry table has the same rows
    dcfg, dd = duckdb_run
    store = StateStore(dcfg.state.url or "")
    try:
        dcosts = store.query_costs(dd.run_id)
    finally:
        store.dispose()
    assert dcosts[0]["query"] == "registry" and dcosts[0]["rows_scanned"] == n_reg
    assert all(c["rows_scanned"] is not None for c in dcosts)


def test_values_are_named_parameters_and_lists_expand(spark, parquet_dir):
    from monitor.config import SparkConfig
    from monitor.warehouse import SparkWarehouse

    wh = SparkWarehouse(SparkConfig(parquet={"experiments": str(parquet_dir / "experiments.parquet")}))
    try:
        nasty = "o'clock\"; DROP TABLE experiments; --"
        naive = datetime(2026, 11, 30, 9, 0)  # naive = UTC, although the tests' local zone is Europe/Berlin
        row = wh.query("echo", "SELECT :v AS v, CAST(:t AS TIMESTAMP) AS t, :d AS d", {"v": nasty, "t": naive,
                                                                                     "d": timedelta(days=2)}).iloc[0]
        assert row["v"] == nasty
        assert row["t"].to_pydatetime() == naive
        aware = datetime(2026, 11, 30, 10, 0, tzinfo=timezone(timedelta(hours=1)))
        assert wh.query("echo", "SELECT CAST(:t AS TIMESTAMP) AS t", {"t": aware}).iloc[0]["t"].to_pydatetime() == naive
        ids = list(wh.query("ids", "SELECT DISTINCT experiment_id FROM experiments ORDER BY 1", {})["experiment_id"])
        sql = "SELECT COUNT(DISTINCT experiment_id) AS n FROM experiments WHERE experiment_id IN :ids"
        for chosen in ([], ids[:1], ids[:3]):
            n = wh.query("in-list", sql, {"ids": chosen}, expanding=("ids",)).iloc[0]["n"]
            assert n == len(chosen)
        assert wh.stats[-1].rows_scanned is not None
    finally:
        wh.dispose()
    assert "experiments" not in {t.name for t in spark.catalog.listTables()}  # dispose dropped its view


def test_spark_errors_are_one_line(spark, parquet_dir):
    from monitor.config import SparkConfig
    from monitor.warehouse import SparkWarehouse

    with pytest.raises(ConfigError, match=r"^warehouse\.spark\.parquet\.missing: .*nope\.parquet: "):
        SparkWarehouse(SparkConfig(parquet={"missing": str(parquet_dir / "nope.parquet")}))
    wh = SparkWarehouse(SparkConfig())
    try:
        with pytest.raises(WarehouseError, match=r"^query broken failed on spark: ") as err:
            wh.query("broken", "SELECT no_such_column FROM no_such_table", {})
        assert "\n" not in str(err.value)
    finally:
        wh.dispose()


def test_warehouse_section_takes_url_or_spark(tmp_path):
    base = yaml.safe_load(DEMO_CONFIG)
    for wh in ({"url": "duckdb:///w.duckdb", "spark": {"master": "local[1]"}}, {}):
        raw = {**base, "warehouse": wh}
        with pytest.raises(ConfigError, match=r"warehouse: give exactly one of 'url' \(a SQLAlchemy URL\) or 'spark'"):
            parse_config(raw, where="cfg.yaml", base_dir=tmp_path)
    raw = {**base, "warehouse": {"spark": {"parquet": {"events.loans": "x.parquet"}}}}
    with pytest.raises(ConfigError, match=r"warehouse\.spark\.parquet: .*'events\.loans'.*no schema part"):
        parse_config(raw, where="cfg.yaml", base_dir=tmp_path)
    raw = {**base, "warehouse": {"spark": {"parquet": {"loans": "lake/loans", "remote": "s3a://bucket/loans"}}}}
    cfg = parse_config(raw, where="cfg.yaml", base_dir=tmp_path)
    assert cfg.warehouse.spark.parquet == {"loans": str((tmp_path / "lake" / "loans").resolve()), "remote": "s3a://bucket/loans"}


def test_status_and_digest_show_the_scan_cost(duckdb_run):
    """The DuckDB run (its profiler reports scans): totals in `expwatch status` and the digest."""
    import sqlalchemy as sa

    from monitor.digest import build_digest
    from monitor.observe import format_count, render_status_text, status_to_json

    cfg, dd = duckdb_run
    store = StateStore(cfg.state.url or "")
    try:
        costs = store.query_costs(dd.run_id)
    finally:
        store.dispose()
    assert costs and all(c["rows_scanned"] is not None for c in costs)
    report = read_status(cfg.state.url or "", limit=1)
    run = report.runs[0]
    assert run.rows_scanned == sum(c["rows_scanned"] for c in costs) > run.rows_returned > 0
    assert f"{format_count(run.rows_scanned):>8}" in render_status_text(report)
    assert status_to_json(report)["runs"][0]["rows_scanned"] == run.rows_scanned
    assert format_count(None) == "-" and format_count(1234) == "1.2k" and format_count(5_600_000) == "5.6M"
    eng = sa.create_engine(cfg.state.url or "", poolclass=sa.pool.NullPool)
    try:
        digest = build_digest(eng, charts=False)
    finally:
        eng.dispose()
    line = f"Warehouse cost of this run: {len(costs)} warehouse queries, {format_count(run.rows_returned)} rows returned, " \
           f"{format_count(run.rows_scanned)} rows scanned"
    assert line in digest.text and line in digest.html
