"""The metric template against a brute-force pandas computation on raw rows, on
DuckDB and on PostgreSQL: first assignment as in the assignment template (first
non-NULL variant, leaked and all-NULL units left out), zeros for assigned units
without events, events before the first assignment ignored (or used as the CUPED
covariate), the [window_start, as_of) bounds, the event filter, and each
per-unit aggregate (sum, count, any, mean) and the ratio cross-moments."""

from __future__ import annotations

from datetime import datetime, timedelta

import duckdb
import numpy as np
import pandas as pd
import pytest
from conftest import load_frames_into_postgres

from monitor.config import AssignmentColumns, MetricConfig, SourceConfig
from monitor.firsts import relation as first_relation
from monitor.guardrails import STAT_COLUMNS, metric_params, render_metric_sql
from monitor.guardrails import tidy_stat_frame as _tidy
from monitor.warehouse import Warehouse

T0 = datetime(2026, 3, 28, 20, 0)  # spans the Europe/Berlin DST change; warehouse times are UTC
WINDOW_START, AS_OF = T0 + timedelta(hours=2), T0 + timedelta(hours=60)
IDS = ["alpha", "beta 'quoted' ü"]

SRC = SourceConfig(name="assigned", table="exposure log",
                   columns=AssignmentColumns(unit="member", experiment="test name", variant="arm", timestamp="seen at"),
                   segments=[])

_EV = {"table": "event log", "columns": {"unit": "who", "timestamp": "when at", "value": "amount"}}
METRICS = {
    "ratio_filtered": MetricConfig(
        name="r", kind="ratio", bad_direction="increase", aggregate="sum",
        filter_column="kind", filter_values=["view", "edit"], **_EV,
        denominator={"table": "event log", "columns": {"unit": "who", "timestamp": "when at"}, "aggregate": "count"}),
    "sum_cuped": MetricConfig(name="s", kind="mean", role="primary", aggregate="sum", cuped={"pre_period_days": 2}, **_EV),
    "any_value_cuped": MetricConfig(name="a", kind="proportion", bad_direction="increase", aggregate="any",
                                    cuped={"pre_period_days": 1}, **_EV),
    "mean": MetricConfig(name="m", kind="mean", bad_direction="decrease", aggregate="mean", **_EV),
    "count_value": MetricConfig(name="c", kind="mean", bad_direction="increase", aggregate="count", **_EV),
    "any_event_filtered": MetricConfig(
        name="f", kind="proportion", bad_direction="increase", aggregate="any", filter_column="kind",
        filter_values=["error"], table="event log", columns={"unit": "who", "timestamp": "when at"}),
}


def _raw(seed: int = 11) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    n = 3000
    units = rng.integers(0, 700, n)
    exp = rng.choice(["alpha", "beta 'quoted' ü", "gamma"], n)
    variant = rng.choice(["control", "treatment"], n, p=[0.5, 0.5]).astype(object)
    variant[rng.random(n) < 0.03] = None
    leak_free = rng.random(700) < 0.9  # about 10% of members may leak; others keep one variant
    variant = np.where(leak_free[units] & (variant != None), np.where(units % 2 == 0, "control", "treatment"), variant)
    ts = [T0 + timedelta(minutes=int(m)) for m in rng.integers(0, 60 * 72, n)]
    asg = pd.DataFrame({"member": [f"m{u}" for u in units], "test name": exp, "arm": variant,
                        "seen at": pd.to_datetime(ts)})
    m = 6000
    ev_units = rng.integers(0, 800, m)  # members 700..799 were never assigned
    ev_ts = [T0 - timedelta(days=3) + timedelta(minutes=int(x)) for x in rng.integers(0, 60 * 24 * 7, m)]
    amount = np.round(rng.gamma(2.0, 3.0, m), 2)
    amount[rng.random(m) < 0.3] = 0.0
    amount_obj = amount.astype(object)
    amount_obj[rng.random(m) < 0.05] = None
    ev = pd.DataFrame({"who": [f"m{u}" for u in ev_units], "when at": pd.to_datetime(ev_ts),
                       "amount": pd.to_numeric(pd.Series(amount_obj), errors="coerce"),
                       "kind": rng.choice(["view", "edit", "error", "other"], m)})
    return asg, ev


def _first_assignments(asg: pd.DataFrame) -> pd.DataFrame:
    r = asg[(asg["seen at"] >= WINDOW_START) & (asg["seen at"] < AS_OF) & asg["test name"].isin(IDS)]
    rows = []
    for (exp, unit), g in r.groupby(["test name", "member"]):
        named = g[g["arm"].notna()].sort_values(["seen at", "arm"])
        if named.empty or named["arm"].nunique() > 1:
            continue  # all-NULL units and leaked units are not compared
        rows.append({"experiment": exp, "unit": unit, "variant": named.iloc[0]["arm"], "first": named.iloc[0]["seen at"]})
    return pd.DataFrame(rows)


def _aggregate(kind: str, ev: pd.DataFrame, has_value: bool) -> float:
    if kind == "sum":
        return float(ev["amount"].sum()) if len(ev) else 0.0
    if kind == "mean":
        vals = ev["amount"].dropna()
        return float(vals.mean()) if len(vals) else 0.0
    if kind == "count":
        return float(ev["amount"].notna().sum() if has_value else len(ev))
    return float(((ev["amount"].fillna(0) != 0).any()) if has_value else len(ev) > 0)


def _brute_force(m: MetricConfig, asg: pd.DataFrame, ev: pd.DataFrame) -> pd.DataFrame:
    units = _first_assignments(asg)
    pre = timedelta(days=m.cuped.pre_period_days) if m.cuped else timedelta(0)
    ev = ev[(ev["when at"] >= WINDOW_START - pre) & (ev["when at"] < AS_OF)]
    ev_y = ev[ev["kind"].isin(m.filter_values)] if m.filter_values else ev
    by_unit_y = {u: g for u, g in ev_y.groupby("who")}
    by_unit_x = {u: g for u, g in ev.groupby("who")}
    empty = ev.iloc[0:0]
    recs = []
    for u in units.itertuples():
        gy = by_unit_y.get(u.unit, empty)
        after = gy[gy["when at"] >= u.first]
        rec = {"experiment": u.experiment, "variant": u.variant, "hour": u.first.floor("h"), "n": 1.0,
               "y": _aggregate(m.aggregate, after, m.columns.value is not None)}
        if m.denominator is not None:
            gx = by_unit_x.get(u.unit, empty)
            rec["x"] = _aggregate(m.denominator.aggregate, gx[gx["when at"] >= u.first], False)
        if m.cuped:
            before = gy[(gy["when at"] < u.first) & (gy["when at"] >= u.first - pre)]
            rec["c"] = _aggregate(m.aggregate, before, m.columns.value is not None)
        recs.append(rec)
    df = pd.DataFrame(recs)
    df["sum_y"], df["sum_y2"] = df["y"], df["y"] ** 2
    if "x" in df:
        df["sum_x"], df["sum_x2"], df["sum_xy"] = df["x"], df["x"] ** 2, df["x"] * df["y"]
    if "c" in df:
        df["sum_c"], df["sum_c2"], df["sum_yc"] = df["c"], df["c"] ** 2, df["y"] * df["c"]
    cols = [c for c in STAT_COLUMNS if c in df]
    out = df.groupby(["experiment", "variant", "hour"])[cols].sum().reset_index()
    for c in STAT_COLUMNS:
        if c not in out:
            out[c] = 0.0
    return out


def _compare(wh: Warehouse, asg: pd.DataFrame, ev: pd.DataFrame, m: MetricConfig) -> None:
    # a pinned DuckDB session reads units from the run's first-assignment relation (monitor/firsts.py)
    firsts = first_relation(wh, SRC, IDS, WINDOW_START, AS_OF)
    assert (firsts is not None) == wh.pinned
    sql = render_metric_sql(m, SRC, wh, firsts=firsts)
    assert "beta" not in sql and "2026" not in sql and "'view'" not in sql  # values are bind parameters
    params, expanding = metric_params(m, WINDOW_START, AS_OF, IDS)
    got = _tidy(wh.query("metric", sql, params, expanding=expanding))
    got["hour"] = got["hour"].dt.tz_convert(None)
    want = _brute_force(m, asg, ev)
    key = ["experiment", "variant", "hour"]
    j = want.merge(got, on=key, how="outer", suffixes=("_want", "_got"), indicator=True)
    assert (j["_merge"] == "both").all(), j[j["_merge"] != "both"][key]
    for c in STAT_COLUMNS:
        np.testing.assert_allclose(j[f"{c}_got"], j[f"{c}_want"], rtol=1e-9, atol=1e-9, err_msg=c)
    # the data exercise what the template must get right
    assert want["n"].sum() > 200
    units = _first_assignments(asg)
    assert set(units["experiment"]) == set(IDS)
    if m.cuped:
        assert want["sum_c"].sum() > 0


def _check_fixture(asg: pd.DataFrame, ev: pd.DataFrame) -> None:
    """The raw rows contain every case the template must handle."""
    units = _first_assignments(asg)
    r = asg[(asg["seen at"] >= WINDOW_START) & (asg["seen at"] < AS_OF) & asg["test name"].isin(IDS)]
    per = r[r["arm"].notna()].groupby(["test name", "member"])["arm"].nunique()
    assert (per > 1).sum() > 10  # leaked units exist (and are left out)
    assert set(ev["who"]) - set(units["unit"])  # events of members in no experiment
    merged = units.merge(ev, left_on="unit", right_on="who")
    assert (merged["when at"] < merged["first"]).sum() > 100  # events before assignment exist
    active = set(merged.loc[merged["when at"] >= merged["first"], "unit"])
    assert len(set(units["unit"]) - active) > 10  # assigned units with no events after assignment (zeros)


@pytest.fixture(scope="module")
def raw():
    asg, ev = _raw()
    _check_fixture(asg, ev)
    return asg, ev


@pytest.fixture(scope="module", params=[False, True], ids=["own-cte", "first-assignment-relation"])
def duck_wh(raw, tmp_path_factory, request):
    asg, ev = raw
    path = tmp_path_factory.mktemp("metrics") / "w.duckdb"
    con = duckdb.connect(str(path))
    con.register("a", asg)
    con.register("e", ev)
    con.execute('CREATE TABLE "exposure log" AS SELECT * FROM a')
    con.execute('CREATE TABLE "event log" AS SELECT * FROM e')
    con.close()
    wh = Warehouse(f"duckdb:///{path}")
    if request.param:
        assert wh.pin()
    yield wh
    wh.dispose()


@pytest.mark.parametrize("name", sorted(METRICS))
def test_metric_statistics_match_brute_force_duckdb(raw, duck_wh, name):
    _compare(duck_wh, *raw, METRICS[name])


@pytest.mark.postgres
def test_metric_statistics_match_brute_force_postgres(raw, pg_url):
    asg, ev = raw
    load_frames_into_postgres(pg_url, {"exposure log": asg, "event log": ev}, "public")
    wh = Warehouse(pg_url)
    try:
        for m in METRICS.values():
            _compare(wh, asg, ev, m)
    finally:
        wh.dispose()
