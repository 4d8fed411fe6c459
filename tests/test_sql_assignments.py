"""The assignment template against a brute-force pandas computation on raw rows,
on DuckDB and on PostgreSQL: first assignment, leaked units, NULL variants,
segment values of the first row, the [window_start, as_of) bound and `since`."""

from __future__ import annotations

import json
from datetime import datetime, timedelta

import duckdb
import numpy as np
import pandas as pd
import pytest

from monitor.config import AssignmentColumns, SourceConfig
from monitor.firsts import relation as first_relation
from monitor.pull import _tidy, render_source_sql
from monitor.warehouse import Warehouse

from conftest import load_frames_into_postgres

T0 = datetime(2026, 3, 28, 20, 0)  # spans the Europe/Berlin DST change; warehouse times are UTC


def _raw_rows(seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 4000
    units = rng.integers(0, 900, n)
    exp = rng.choice(["alpha", "beta 'quoted' ü", "gamma"], n)
    variant = rng.choice(["control", "treatment", "t2"], n, p=[0.49, 0.49, 0.02]).astype(object)
    variant[rng.random(n) < 0.03] = None
    ts = [T0 + timedelta(minutes=int(m)) for m in rng.integers(0, 60 * 72, n)]
    plat = rng.choice(["android", "ios", "web"], n).astype(object)
    plat[rng.random(n) < 0.05] = None
    return pd.DataFrame({"member": [f"m{u}" for u in units], "test name": exp, "arm": variant,
                         "seen at": pd.to_datetime(ts), "device": plat})


def _brute_force(raw: pd.DataFrame, window_start, as_of, since, ids) -> pd.DataFrame:
    r = raw[(raw["seen at"] >= window_start) & (raw["seen at"] < as_of) & raw["test name"].isin(ids)].copy()
    rows = []
    for (exp, _unit), g in r.groupby(["test name", "member"]):
        named = g[g["arm"].notna()].sort_values(["seen at", "arm"])
        first = named.iloc[0] if len(named) else g.sort_values("seen at").iloc[0]
        n_var = named["arm"].nunique()
        if first["seen at"] < since:
            continue
        rows.append({"experiment": exp, "variant": first["arm"] if len(named) else None,
                     "hour": first["seen at"].floor("h"), "seg_0": first["device"],
                     "units": int(n_var <= 1), "leaked": int(n_var > 1)})
    df = pd.DataFrame(rows)
    return (df.groupby(["experiment", "variant", "hour", "seg_0"], dropna=False)[["units", "leaked"]].sum().reset_index())


SRC = SourceConfig(name="assigned", table="exposure log",
                   columns=AssignmentColumns(unit="member", experiment="test name", variant="arm", timestamp="seen at"),
                   segments=["device"])


def _counts(wh: Warehouse, sql: str, window_start, as_of, since, ids) -> pd.DataFrame:
    got = wh.query("assignments", sql, {"window_start": window_start, "as_of": as_of, "since": since, "experiment_ids": ids},
                   expanding=("experiment_ids",))
    got = _tidy(got, ["device"])
    got["seg_0"] = got["segment"].map(lambda s: json.loads(s)["device"])
    got["hour"] = got["hour"].dt.tz_convert(None)
    key = ["experiment", "variant", "hour", "seg_0"]
    return got.groupby(key, dropna=False)[["units", "leaked"]].sum().reset_index()


def _compare(wh: Warehouse, raw: pd.DataFrame) -> None:
    window_start, as_of, since = T0 + timedelta(hours=2), T0 + timedelta(hours=60), T0 + timedelta(hours=20)
    ids = ["alpha", "beta 'quoted' ü"]
    # a pinned DuckDB session groups the run's first-assignment relation instead (monitor/firsts.py),
    # for full pulls (since = window_start) and for incremental ones (the incremental template's rules)
    firsts = first_relation(wh, SRC, ids, window_start, as_of)
    assert (firsts is not None) == wh.pinned
    if firsts is not None:
        since = window_start
    sql = render_source_sql(SRC, wh, firsts=firsts)
    assert "beta" not in sql and "2026" not in sql  # values travel as bind parameters only
    g = _counts(wh, sql, window_start, as_of, since, ids)
    key = ["experiment", "variant", "hour", "seg_0"]
    want = _brute_force(raw, window_start, as_of, since, ids)
    m = want.merge(g, on=key, how="outer", suffixes=("_want", "_got"), indicator=True)
    assert (m["_merge"] == "both").all(), m[m["_merge"] != "both"]
    assert (m["units_want"] == m["units_got"]).all()
    assert (m["leaked_want"] == m["leaked_got"]).all()
    assert want["leaked"].sum() > 0 and want["variant"].isna().any() and want["seg_0"].isna().any()
    if firsts is not None:
        later = window_start + timedelta(hours=30)
        inc = _counts(wh, render_source_sql(SRC, wh, incremental=True), window_start, as_of, later, ids)
        rel = _counts(wh, sql, window_start, as_of, later, ids)
        pd.testing.assert_frame_equal(rel, inc)
        assert len(inc) > 50 and inc["leaked"].sum() > 0


@pytest.mark.parametrize("shared", [False, True], ids=["own-cte", "first-assignment-relation"])
def test_assignment_counts_match_brute_force_duckdb(tmp_path, shared):
    raw = _raw_rows()
    # the same time at two variants: the tie resolves to the smaller variant, in both paths
    tie = raw[raw["arm"].notna()].iloc[[0]].assign(arm="zz-late-arm")
    raw = pd.concat([raw, tie], ignore_index=True)
    path = tmp_path / "w.duckdb"
    con = duckdb.connect(str(path))
    con.register("raw", raw)
    con.execute('CREATE TABLE "exposure log" AS SELECT * FROM raw')
    con.close()
    wh = Warehouse(f"duckdb:///{path}")
    if shared:
        assert wh.pin()
    try:
        _compare(wh, raw)
    finally:
        wh.dispose()


@pytest.mark.postgres
def test_assignment_counts_match_brute_force_postgres(pg_url):
    raw = _raw_rows()
    load_frames_into_postgres(pg_url, {"exposure log": raw}, "public")
    wh = Warehouse(pg_url)
    try:
        _compare(wh, raw)
    finally:
        wh.dispose()


@pytest.mark.postgres
def test_postgres_connection_is_read_only(pg_url):
    from monitor.errors import WarehouseError

    wh = Warehouse(pg_url)
    try:
        with pytest.raises(WarehouseError, match="read-only"):
            wh.query("write attempt", "CREATE TABLE expwatch_should_not_exist (x int)", {})
    finally:
        wh.dispose()


def test_duckdb_connection_is_read_only(tmp_path):
    from monitor.errors import WarehouseError

    path = tmp_path / "w.duckdb"
    duckdb.connect(str(path)).close()
    wh = Warehouse(f"duckdb:///{path}")
    try:
        with pytest.raises(WarehouseError, match="read-only"):
            wh.query("write attempt", "CREATE TABLE t (x int)", {})
    finally:
        wh.dispose()
