"""The spillover and collision templates against brute-force pandas computations on
raw rows, on DuckDB and on PostgreSQL.

Spillover: per unit, the metric over a fixed window after the first assignment and
the same window before it (numerator and denominator), only units whose window has
ended, summed per experiment x variant x hour with all cross-products. Collision:
units shared by each pair of experiments by ramp phase and variant of each, and the
guardrails aggregated from the later of the two first assignments. The raw rows are
those of tests/test_sql_metrics.py (leaked and all-NULL units, events before
assignment, members in no experiment, NULL values, quoted names)."""

from __future__ import annotations

from datetime import UTC, timedelta
from types import SimpleNamespace

import duckdb
import numpy as np
import pandas as pd
import pytest
from conftest import load_frames_into_postgres
from test_sql_metrics import AS_OF, METRICS, SRC, T0, WINDOW_START, _aggregate, _raw

from monitor.collision import _oriented, pull_collisions
from monitor.config import CheckConfig
from monitor.registry import Experiment, Phase
from monitor.spillover import SUM_COLUMNS, pull_spillover
from monitor.warehouse import Warehouse

IDS = ["alpha", "beta 'quoted' ü", "gamma"]
SPLIT = T0 + timedelta(hours=20)
WINDOW_DAYS = 1.0
GUARDS = [METRICS[k] for k in ("ratio_filtered", "mean", "count_value", "any_event_filtered")]


def _aware(t):
    return t.replace(tzinfo=UTC)


EXPS = [
    Experiment("alpha", "control", ("control", "treatment"), (
        Phase(1, _aware(WINDOW_START), _aware(SPLIT), {"control": 0.9, "treatment": 0.1}),
        Phase(2, _aware(SPLIT), None, {"control": 0.5, "treatment": 0.5}))),
    Experiment("beta 'quoted' ü", "control", ("control", "treatment"), (
        Phase(1, _aware(WINDOW_START), _aware(SPLIT), {"control": 0.8, "treatment": 0.2}),
        Phase(2, _aware(SPLIT + timedelta(hours=1)), None, {"control": 0.5, "treatment": 0.5}))),
    Experiment("gamma", "control", ("control", "treatment"), (
        Phase(1, _aware(WINDOW_START), None, {"control": 0.5, "treatment": 0.5}),)),
]


def _cfg(metrics):
    return SimpleNamespace(sources=[SRC], metrics=list(metrics),
                           checks=CheckConfig(spillover_window_days=WINDOW_DAYS, collision_min_overlap=2))


def _units(asg: pd.DataFrame) -> pd.DataFrame:
    r = asg[(asg["seen at"] >= WINDOW_START) & (asg["seen at"] < AS_OF) & asg["test name"].isin(IDS)]
    rows = []
    for (exp, unit), g in r.groupby(["test name", "member"]):
        named = g[g["arm"].notna()].sort_values(["seen at", "arm"])
        if named.empty or named["arm"].nunique() > 1:
            continue
        rows.append({"experiment": exp, "unit": unit, "variant": named.iloc[0]["arm"], "first": named.iloc[0]["seen at"]})
    return pd.DataFrame(rows)


def _window_value(spec, ev_all, unit, lo, hi, key_filter=True):
    g = ev_all.get(unit)
    if g is None:
        return _aggregate(spec.aggregate, pd.DataFrame({"amount": []}), spec.columns.value is not None)
    sel = g[(g["when at"] >= lo) & (g["when at"] < hi)]
    return _aggregate(spec.aggregate, sel, spec.columns.value is not None)


def _by_unit(ev, spec, lo, hi):
    ev = ev[(ev["when at"] >= lo) & (ev["when at"] < hi)]
    if spec.filter_values:
        ev = ev[ev["kind"].isin(spec.filter_values)]
    return {u: g for u, g in ev.groupby("who")}


def _spill_brute(m, asg, ev) -> pd.DataFrame:
    w = timedelta(days=WINDOW_DAYS)
    units = _units(asg)
    units = units[units["experiment"].isin(["alpha", "beta 'quoted' ü"]) & (units["first"] < AS_OF - w)]
    ev_y = _by_unit(ev, m, WINDOW_START - w, AS_OF)
    ev_x = _by_unit(ev, m.denominator, WINDOW_START - w, AS_OF) if m.denominator else None
    recs = []
    for u in units.itertuples():
        rec = {"experiment": u.experiment, "variant": u.variant, "hour": u.first.floor("h"), "n": 1.0,
               "y": _window_value(m, ev_y, u.unit, u.first, u.first + w),
               "cy": _window_value(m, ev_y, u.unit, u.first - w, u.first)}
        if ev_x is not None:
            rec["x"] = _window_value(m.denominator, ev_x, u.unit, u.first, u.first + w)
            rec["cx"] = _window_value(m.denominator, ev_x, u.unit, u.first - w, u.first)
        else:
            rec["x"] = rec["cx"] = 1.0
        recs.append(rec)
    df = pd.DataFrame(recs)
    names = ("y", "x", "cy", "cx")
    for v in names:
        df[f"s_{v}"] = df[v]
    for i, a in enumerate(names):
        for b in names[i:]:
            df[f"s_{a}_{b}"] = df[a] * df[b]
    return df.groupby(["experiment", "variant", "hour"])[list(SUM_COLUMNS)].sum().reset_index()


def _phase(e: Experiment, t) -> int | None:
    for p in e.phases:
        if _aware(t) >= p.start and (p.end is None or _aware(t) < p.end):
            return p.number
    return None


def _collision_brute(asg, ev) -> pd.DataFrame:
    units = _units(asg)
    by = {e.id: e for e in EXPS}
    units["phase"] = [_phase(by[e], t) for e, t in zip(units["experiment"], units["first"])]
    units = units[units["phase"].notna()]
    pairs = units.merge(units, on="unit", suffixes=("_a", "_b"))
    pairs = pairs[pairs["experiment_a"] < pairs["experiment_b"]].copy()
    pairs["since"] = pairs[["first_a", "first_b"]].max(axis=1)
    recs = []
    evs = []
    for m in GUARDS:
        evs.append((_by_unit(ev, m, WINDOW_START, AS_OF), _by_unit(ev, m.denominator, WINDOW_START, AS_OF) if m.denominator else None))
    for p in pairs.itertuples():
        rec = {"experiment_a": p.experiment_a, "experiment_b": p.experiment_b, "phase_a": int(p.phase_a),
               "phase_b": int(p.phase_b), "variant_a": p.variant_a, "variant_b": p.variant_b, "units": 1.0}
        for k, m in enumerate(GUARDS):
            y = _window_value(m, evs[k][0], p.unit, p.since, AS_OF)
            rec[f"sum_y_{k}"], rec[f"sum_y2_{k}"] = y, y * y
            if m.denominator:
                x = _window_value(m.denominator, evs[k][1], p.unit, p.since, AS_OF)
                rec[f"sum_x_{k}"], rec[f"sum_x2_{k}"], rec[f"sum_xy_{k}"] = x, x * x, x * y
        recs.append(rec)
    df = pd.DataFrame(recs)
    key = ["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b"]
    return df.groupby(key)[[c for c in df if c not in key]].sum().reset_index()


def _check_spillover(wh, asg, ev):
    for m in (METRICS["ratio_filtered"], METRICS["any_value_cuped"], METRICS["mean"]):
        (pull,) = pull_spillover(_cfg([m]), wh, EXPS, _aware(AS_OF))
        got = pull.frame.copy()
        got["hour"] = got["hour"].dt.tz_convert(None)
        want = _spill_brute(m, asg, ev)
        key = ["experiment", "variant", "hour"]
        j = want.merge(got, on=key, how="outer", suffixes=("_want", "_got"), indicator=True)
        assert (j["_merge"] == "both").all(), j[j["_merge"] != "both"][key]
        assert want["n"].sum() > 100 and want["s_cy"].sum() > 0 and want["s_y"].sum() > 0
        for c in SUM_COLUMNS:
            np.testing.assert_allclose(j[f"{c}_got"], j[f"{c}_want"], rtol=1e-9, atol=1e-9, err_msg=f"{m.name} {c}")


def _check_collision(wh, asg, ev):
    pull = pull_collisions(_cfg(GUARDS), wh, EXPS, _aware(AS_OF))
    want = _collision_brute(asg, ev)
    key = ["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b"]
    got = _oriented(pull.crosstab).astype({"phase_a": int, "phase_b": int})
    j = want.merge(got, on=key, how="outer", suffixes=("_want", "_got"), indicator=True)
    assert (j["_merge"] == "both").all(), j[j["_merge"] != "both"][key]
    np.testing.assert_allclose(j["units_got"].astype(float), j["units_want"], rtol=0, atol=0)
    assert len({(a, b) for a, b in zip(want["experiment_a"], want["experiment_b"])}) == 3  # every pair shares units
    assert set(want["phase_a"]) == {1, 2}
    for k, (m, frame) in enumerate(pull.metrics):
        g = _oriented(frame).astype({"phase_a": int, "phase_b": int})
        jj = want.merge(g, on=key, how="outer", indicator=True)
        assert (jj["_merge"] == "both").all()
        cols = ["sum_y", "sum_y2"] + (["sum_x", "sum_x2", "sum_xy"] if m.denominator else [])
        for c in cols:
            np.testing.assert_allclose(jj[c].astype(float), jj[f"{c}_{k}"], rtol=1e-9, atol=1e-9, err_msg=f"{m.name} {c}")
        assert jj[f"sum_y_{k}"].sum() > 0


@pytest.fixture(scope="module")
def raw():
    return _raw()


@pytest.fixture(scope="module", params=[False, True], ids=["own-cte", "first-assignment-relation"])
def duck_wh(raw, tmp_path_factory, request):
    asg, ev = raw
    path = tmp_path_factory.mktemp("interference") / "w.duckdb"
    con = duckdb.connect(str(path))
    con.register("a", asg)
    con.register("e", ev)
    con.execute('CREATE TABLE "exposure log" AS SELECT * FROM a')
    con.execute('CREATE TABLE "event log" AS SELECT * FROM e')
    con.close()
    wh = Warehouse(f"duckdb:///{path}")
    if request.param:  # pinned: the queries read units from the run's first-assignment relation
        assert wh.pin()
    yield wh
    wh.dispose()


def test_spillover_windows_match_brute_force_duckdb(raw, duck_wh):
    _check_spillover(duck_wh, *raw)


def test_collision_crosstab_and_guardrails_match_brute_force_duckdb(raw, duck_wh):
    _check_collision(duck_wh, *raw)


@pytest.mark.postgres
def test_interference_templates_match_brute_force_postgres(raw, pg_url):
    asg, ev = raw
    load_frames_into_postgres(pg_url, {"exposure log": asg, "event log": ev}, "public")
    wh = Warehouse(pg_url)
    try:
        _check_spillover(wh, asg, ev)
        _check_collision(wh, asg, ev)
    finally:
        wh.dispose()
