"""The per-age template (sql/novelty.sql.j2) against a brute-force pandas computation
on raw rows, on DuckDB and on PostgreSQL: first assignment as in the metric template
(leaked and all-NULL units left out), each experiment's window (current ramp phase,
whole looks), age = whole days since the first assignment, only whole observed days,
units without events counted in the units at risk, the age cap, the event filter, the
ratio sums and the cross products between ages."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import duckdb
import numpy as np
import pandas as pd
import pytest
from conftest import load_frames_into_postgres

from monitor.config import parse_config
from monitor.novelty import pull_novelty, window
from monitor.registry import Experiment, Phase
from monitor.warehouse import Warehouse

T0 = datetime(2026, 3, 20, 7, 30, tzinfo=UTC)  # spans the Europe/Berlin DST change
AS_OF = T0 + timedelta(days=23, hours=5)
MAX_AGE = 9
EXPS = [
    Experiment("alpha", "control", ("control", "treatment"),
               (Phase(1, T0, None, {"control": 0.5, "treatment": 0.5}),)),
    # ramped: only units of phase 2 (from its first midnight) count
    Experiment("beta 'quoted' ü", "control", ("control", "treatment"),
               (Phase(1, T0, T0 + timedelta(days=4), {"control": 0.9, "treatment": 0.1}),
                Phase(2, T0 + timedelta(days=4), None, {"control": 0.5, "treatment": 0.5}))),
]
_EV = {"table": "event log", "columns": {"unit": "who", "timestamp": "when at", "value": "amount"}}
METRICS = [
    {"name": "r", "kind": "ratio", "bad_direction": "increase", "aggregate": "sum", "filter_column": "kind",
     "filter_values": ["view", "edit"], **_EV,
     "denominator": {"table": "event log", "columns": {"unit": "who", "timestamp": "when at"}, "aggregate": "count"}},
    {"name": "s", "kind": "mean", "role": "primary", "aggregate": "sum", **_EV},
    {"name": "a", "kind": "proportion", "bad_direction": "increase", "aggregate": "any", **_EV},
    {"name": "c", "kind": "mean", "bad_direction": "increase", "aggregate": "count", "filter_column": "kind",
     "filter_values": ["error"], "table": "event log", "columns": {"unit": "who", "timestamp": "when at"}},
    {"name": "m", "kind": "mean", "bad_direction": "decrease", "aggregate": "mean", **_EV},  # not evaluated
]


def _cfg(url):
    return parse_config({
        "warehouse": {"url": url},
        "registry": {"inline": [{"experiment": "x", "control": "c", "phases": [{"start": T0, "weights": {"c": 1}}]}]},
        "assignments": {"table": "exposure log",
                        "columns": {"unit": "member", "experiment": "test name", "variant": "arm",
                                    "timestamp": "seen at"}},
        "checks": {"novelty_max_age_days": MAX_AGE},
        "metrics": METRICS,
    }, where="test")


def _raw(seed=5):
    rng = np.random.default_rng(seed)
    n = 2500
    units = rng.integers(0, 900, n)
    exp = rng.choice(["alpha", "beta 'quoted' ü", "gamma"], n)
    variant = rng.choice(["control", "treatment"], n).astype(object)
    variant[rng.random(n) < 0.03] = None
    stable = rng.random(900) < 0.9
    variant = np.where(stable[units] & (variant != None), np.where(units % 2 == 0, "control", "treatment"), variant)
    ts = [T0 + timedelta(minutes=int(m)) for m in rng.integers(0, 60 * 24 * 24, n)]
    asg = pd.DataFrame({"member": [f"m{u}" for u in units], "test name": exp, "arm": variant,
                        "seen at": pd.to_datetime([t.replace(tzinfo=None) for t in ts])})
    m = 9000
    ev_units = rng.integers(0, 950, m)
    ev_ts = [T0 - timedelta(days=2) + timedelta(minutes=int(x)) for x in rng.integers(0, 60 * 24 * 28, m)]
    amount = np.round(rng.gamma(2.0, 3.0, m), 2)
    amount[rng.random(m) < 0.2] = 0.0
    ev = pd.DataFrame({"who": [f"m{u}" for u in ev_units],
                       "when at": pd.to_datetime([t.replace(tzinfo=None) for t in ev_ts]),
                       "amount": amount, "kind": rng.choice(["view", "edit", "error", "other"], m)})
    return asg, ev


def _per_unit_age(units, src, kind, has_value):
    """Per (experiment, unit, age) the aggregate of the unit's events at that age."""
    j = units.merge(src, left_on="unit", right_on="who")
    j = j[j["when at"] >= j["first"]]
    j["age"] = (j["when at"] - j["first"]) // timedelta(days=1)
    j = j[(j["age"] < j["observed"]) & (j["age"] < MAX_AGE)]
    g = j.groupby(["experiment", "unit", "age"])
    if kind == "sum":
        out = g["amount"].sum()
    elif kind == "count":
        out = g["amount"].count() if has_value else g.size()
    else:
        out = g["amount"].apply(lambda v: float((v.fillna(0) != 0).any())) if has_value else g.size().clip(upper=1)
    return out.astype(float)


def _brute_force(mcfg, asg, ev):
    """Expected rows of each kind, keyed; values are arrays of sums."""
    windows = {e.id: tuple(t.replace(tzinfo=None) for t in window(e, AS_OF, 7)) for e in EXPS}
    end = max(u for _, u in windows.values())
    start = T0.replace(tzinfo=None).replace(hour=0, minute=0)
    r = asg[(asg["seen at"] >= start) & (asg["seen at"] < end) & asg["test name"].isin(windows)]
    ev = ev[(ev["when at"] >= start) & (ev["when at"] < end)]
    ev_y = ev[ev["kind"].isin(mcfg.filter_values)] if mcfg.filter_values else ev
    named = r[r["arm"].notna()]
    per = named.groupby(["test name", "member"]).agg(first=("seen at", "min"), variant=("arm", "first"),
                                                      arms=("arm", "nunique")).reset_index()
    # units with no named row, or with two variants (leaked), are left out
    units = per[per["arms"] == 1].rename(columns={"test name": "experiment", "member": "unit"})
    units["since"] = units["experiment"].map(lambda e: windows[e][0])
    units["until"] = units["experiment"].map(lambda e: windows[e][1])
    units = units[(units["first"] >= units["since"]) & (units["first"] < units["until"])].copy()
    units["observed"] = (units["until"] - units["first"]) // timedelta(days=1)
    units = units[units["observed"] >= 1]
    units["cohort"] = units["first"].dt.floor("D")
    units["capped"] = units["observed"].clip(upper=MAX_AGE)
    risk = units.groupby(["experiment", "variant", "cohort", "capped"]).size()
    y = _per_unit_age(units, ev_y, mcfg.aggregate, mcfg.columns.value is not None).rename("y")
    parts = [y]
    if mcfg.denominator is not None:
        parts.append(_per_unit_age(units, ev, mcfg.denominator.aggregate, False).rename("x"))
    ua = pd.concat(parts, axis=1).fillna(0.0).reset_index()
    if "x" not in ua:
        ua["x"] = 0.0
    ua = ua.merge(units[["experiment", "unit", "variant", "cohort"]], on=["experiment", "unit"])
    ua = ua.assign(yy=ua["y"] ** 2, xx=ua["x"] ** 2, xy=ua["x"] * ua["y"])
    cells = ua.groupby(["experiment", "variant", "cohort", "age"])[["y", "yy", "x", "xx", "xy"]].sum()
    pq = ua.merge(ua, on=["experiment", "unit", "variant"], suffixes=("_a", "_b"))
    pq = pq[pq["age_a"] < pq["age_b"]]
    pq = pq.assign(cyy=pq["y_a"] * pq["y_b"], cxx=pq["x_a"] * pq["x_b"], cxy=pq["x_a"] * pq["y_b"],
                   cyx=pq["y_a"] * pq["x_b"])
    pairs = pq.groupby(["experiment", "variant", "age_a", "age_b"])[["cyy", "cxx", "cxy", "cyx"]].sum()
    return ({k: v.to_numpy() for k, v in cells.iterrows()}, {k: int(v) for k, v in risk.items()},
            {k: v.to_numpy() for k, v in pairs.iterrows()})


def _compare(wh, asg, ev):
    cfg = _cfg("duckdb:///:memory:")
    pulls = pull_novelty(cfg, wh, EXPS, AS_OF)
    assert [p.metric.name for p in pulls] == ["r", "s", "a", "c"]  # the mean aggregate is not evaluated
    assert [q.name for q in wh.stats][-4:] == ["novelty[r]", "novelty[s]", "novelty[a]", "novelty[c]"]
    for pull in pulls:
        cells, risk, pairs = _brute_force(pull.metric, asg, ev)
        f = pull.frame
        f = f.assign(cohort=f["cohort"].dt.tz_convert(None))
        got_cells = {(r.experiment, r.variant, r.cohort, r.age): np.array([r.sum_y, r.sum_y2, r.sum_x, r.sum_x2, r.sum_xy])
                     for r in f[(f["age"] >= 0) & (f["age2"] < 0)].itertuples()}
        got_risk = {(r.experiment, r.variant, r.cohort, r.observed): r.units for r in f[f["observed"] >= 0].itertuples()}
        got_pairs = {(r.experiment, r.variant, r.age, r.age2): np.array([r.cross_yy, r.cross_xx, r.cross_xy, r.cross_yx])
                     for r in f[f["age2"] >= 0].itertuples()}
        assert got_risk == risk, pull.metric.name
        ratio = pull.metric.kind == "ratio"
        for want, got in ((cells, got_cells), (pairs, got_pairs)):
            # the query only returns cells with events; a zero-sum key is a unit-age with a 0 value
            keys = {k for k, v in want.items() if np.any(v)} | set(got)
            for k in keys:
                w = want.get(k, np.zeros(5 if want is cells else 4))
                g = got.get(k, np.zeros_like(w))
                if not ratio:
                    w, g = w[:2] if want is cells else w[:1], g[:2] if want is cells else g[:1]
                np.testing.assert_allclose(g, w, rtol=1e-9, atol=1e-9, err_msg=f"{pull.metric.name} {k}")
        # the data exercise what the template must get right
        assert len(risk) > 20 and len(cells) > 50 and len(pairs) > 20
        assert {k[0] for k in risk} == {"alpha", "beta 'quoted' ü"}
        assert max(k[3] for k in risk) == MAX_AGE and max(k[3] for k in cells) == MAX_AGE - 1


@pytest.fixture(scope="module")
def raw():
    return _raw()


@pytest.mark.parametrize("shared", [False, True], ids=["own-cte", "first-assignment-relation"])
def test_per_age_statistics_match_brute_force_duckdb(raw, tmp_path, shared):
    asg, ev = raw
    path = tmp_path / "w.duckdb"
    con = duckdb.connect(str(path))
    con.register("a", asg)
    con.register("e", ev)
    con.execute('CREATE TABLE "exposure log" AS SELECT * FROM a')
    con.execute('CREATE TABLE "event log" AS SELECT * FROM e')
    con.close()
    wh = Warehouse(f"duckdb:///{path}")
    if shared:  # the query reads units from the run's first-assignment relation, as of its own end
        assert wh.pin()
    try:
        _compare(wh, asg, ev)
        assert any(q.name.startswith("first-assignments[") for q in wh.stats) == shared
    finally:
        wh.dispose()


@pytest.mark.postgres
def test_per_age_statistics_match_brute_force_postgres(raw, pg_url):
    asg, ev = raw
    load_frames_into_postgres(pg_url, {"exposure log": asg, "event log": ev}, "public")
    wh = Warehouse(pg_url)
    try:
        _compare(wh, asg, ev)
    finally:
        wh.dispose()
