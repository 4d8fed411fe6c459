"""One monitoring cycle end to end on small synthetic warehouses whose answers are
known by construction: incremental pulls, idempotent reruns, the alert ledger,
backtests, a user's own schema, and failures that must leave the state untouched."""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import duckdb
import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.errors import WarehouseError
from monitor.state import StateStore, alert_events, counts, findings, runs

from conftest import registry_frame, write_duckdb_warehouse

UTC = timezone.utc
START = datetime(2026, 10, 1, tzinfo=UTC)


def _units(rng, exp, n, start, hours, weights, prefix="u"):
    names = list(weights)
    v = rng.choice(names, n, p=list(weights.values()))
    t = [start + timedelta(seconds=int(s)) for s in rng.integers(0, hours * 3600, n)]
    return pd.DataFrame({"unit_id": [f"{prefix}{i}" for i in range(n)], "experiment_id": exp, "variant": v,
                         "assigned_at": pd.to_datetime([x.replace(tzinfo=None) for x in t]),
                         "platform": rng.choice(["android", "ios"], n)})


def make_warehouse(path, *, skew_from_hour=None, seed=1, hours=240):
    """Two 50/50 experiments over `hours`; 'tilted' loses 30% of treatment units
    after `skew_from_hour` when given."""
    rng = np.random.default_rng(seed)
    a = _units(rng, "steady", 20000, START, hours, {"control": 0.5, "treatment": 0.5}, "s")
    b = _units(rng, "tilted", 20000, START, hours, {"control": 0.5, "treatment": 0.5}, "t")
    if skew_from_hour is not None:
        late = (b["assigned_at"] >= pd.Timestamp(START.replace(tzinfo=None) + timedelta(hours=skew_from_hour)))
        drop = late & (b["variant"] == "treatment") & (rng.random(len(b)) < 0.3)
        b = b[~drop]
    write_duckdb_warehouse(path, registry_frame(("steady", "tilted"), START), pd.concat([a, b], ignore_index=True))


CONFIG = """
warehouse: {url: "duckdb:///w.duckdb"}
registry: {table: experiments}
assignments: {table: assignments, segments: [platform]}
"""


@pytest.fixture
def setup(tmp_path):
    make_warehouse(tmp_path / "w.duckdb", skew_from_hour=120)
    (tmp_path / "c.yaml").write_text(CONFIG)
    return load_config(tmp_path / "c.yaml")


def _status(result, exp, check):
    return next(f.status for f in result.findings if f.experiment == exp and f.check == check)


def _table_counts(url):
    eng = sa.create_engine(url)
    with eng.connect() as c:
        out = {t.name: c.execute(sa.select(sa.func.count()).select_from(t)).scalar() for t in (runs, counts, findings, alert_events)}
    eng.dispose()
    return out


def test_srm_found_only_where_planted_and_rerun_is_idempotent(setup):
    as_of = START + timedelta(hours=240)
    r1 = run_cycle(setup, as_of=as_of)
    assert _status(r1, "tilted", "srm") == "alert"
    assert _status(r1, "steady", "srm") == "ok"
    assert [e.kind for e in r1.events] == ["opened"]
    crossed = next(f for f in r1.findings if f.experiment == "tilted" and f.check == "srm").statistics["first_crossed_at"]
    assert crossed > START + timedelta(hours=120)  # not before the planted onset
    r2 = run_cycle(setup, as_of=as_of)
    assert r2.events == []  # same hour twice: nothing new
    assert StateStore(setup.state.url).open_alerts()[0]["experiment"] == "tilted"


def test_incremental_pull_equals_full_refresh(setup, tmp_path):
    run_cycle(setup, as_of=START + timedelta(hours=100))
    run_cycle(setup, as_of=START + timedelta(hours=170))
    inc = run_cycle(setup, as_of=START + timedelta(hours=240))
    assert inc.sources[0].since == START + timedelta(hours=170 - 48)  # watermark minus the default lookback
    full = run_cycle(setup.model_copy(update={"state": setup.state.model_copy(update={"url": f"sqlite:///{tmp_path / 'other.sqlite'}"})}),
                     as_of=START + timedelta(hours=240))
    a = {(f.key): json.dumps(f.to_json()["statistics"], sort_keys=True) for f in inc.findings}
    b = {(f.key): json.dumps(f.to_json()["statistics"], sort_keys=True) for f in full.findings}
    assert a == b


def test_incremental_template_pull_equals_full_refresh(setup, tmp_path):
    """With one live experiment and no metric nothing later reads the first-assignment
    relation, so an incremental pull runs the incremental template instead; with two the
    collision check builds the relation anyway and the pull groups it. Both paths give
    the full refresh's findings."""
    def queries(r):
        return [k for k in r.query_seconds if k != "registry"]

    two = run_cycle(setup, as_of=START + timedelta(hours=100))
    assert queries(run_cycle(setup, as_of=START + timedelta(hours=170)))[:2] == [
        "first-assignments[assigned]", "assignments[assigned]"]
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("DELETE FROM experiments WHERE experiment_id = 'steady'")
    con.close()
    inc = run_cycle(setup, as_of=START + timedelta(hours=240))
    assert two.recorded and inc.sources[0].since == START + timedelta(hours=170 - 48)
    assert queries(inc) == ["assignments[assigned]", "unattributed[assigned]"]
    full = run_cycle(setup.model_copy(update={"state": setup.state.model_copy(update={"url": f"sqlite:///{tmp_path / 'other.sqlite'}"})}),
                     as_of=START + timedelta(hours=240))
    assert queries(full) == ["first-assignments[assigned]", "assignments[assigned]", "unattributed[assigned]"]
    a = {(f.key): json.dumps(f.to_json()["statistics"], sort_keys=True) for f in inc.findings}
    b = {(f.key): json.dumps(f.to_json()["statistics"], sort_keys=True) for f in full.findings}
    assert a == b and any(f.experiment == "tilted" and f.check == "srm" for f in inc.findings)


def test_late_rows_inside_lookback_are_picked_up(tmp_path):
    make_warehouse(tmp_path / "w.duckdb", skew_from_hour=None)
    (tmp_path / "c.yaml").write_text(CONFIG)
    cfg = load_config(tmp_path / "c.yaml")
    as_of = START + timedelta(hours=200)
    first = run_cycle(cfg, as_of=as_of)
    n0 = sum(next(f for f in first.findings if f.experiment == "steady" and f.check == "srm").statistics["units"].values())
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("INSERT INTO assignments VALUES ('late1', 'steady', 'control', TIMESTAMP '2026-10-09 05:30:00', 'ios')")
    con.close()
    r = run_cycle(cfg, as_of=as_of)  # 2026-10-09 05:30 is 24 h before as_of: inside the 48 h lookback
    srm = next(f for f in r.findings if f.experiment == "steady" and f.check == "srm")
    assert sum(srm.statistics["units"].values()) == n0 + 1


def test_alert_resolves_when_experiment_ends(setup, tmp_path):
    run_cycle(setup, as_of=START + timedelta(hours=240))
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("UPDATE experiments SET phase_end = TIMESTAMP '2026-10-11 01:00:00' WHERE experiment_id = 'tilted'")
    con.close()
    r = run_cycle(setup, as_of=START + timedelta(hours=241))
    assert [(e.kind, e.experiment, e.summary) for e in r.events] == [("resolved", "tilted", "the experiment is no longer live")]


def test_backtest_records_nothing(setup):
    run_cycle(setup, as_of=START + timedelta(hours=240))
    before = _table_counts(setup.state.url)
    r = run_cycle(setup, as_of=START + timedelta(hours=100))
    assert not r.recorded and "backtest" in r.note
    assert _status(r, "tilted", "srm") == "ok"  # the skew starts at hour 120
    assert _table_counts(setup.state.url) == before


def test_unreachable_warehouse_leaves_state_untouched(setup, tmp_path):
    run_cycle(setup, as_of=START + timedelta(hours=100))
    before = _table_counts(setup.state.url)
    (tmp_path / "w.duckdb").unlink()
    with pytest.raises(WarehouseError):
        run_cycle(setup, as_of=START + timedelta(hours=101))
    assert _table_counts(setup.state.url) == before


def test_dry_run_records_nothing(setup):
    r = run_cycle(setup, as_of=START + timedelta(hours=240), dry_run=True)
    assert not r.recorded and _status(r, "tilted", "srm") == "alert"
    assert not (setup.path.parent / "expwatch-state.sqlite").exists()


def test_users_own_schema_through_column_mapping(tmp_path):
    """A warehouse whose tables and columns have other names works through the mapping alone."""
    rng = np.random.default_rng(5)
    df = _units(rng, "reading-list", 8000, START, 120, {"base": 0.5, "shiny": 0.5})
    df = df.rename(columns={"unit_id": "Member Key", "experiment_id": "test", "variant": "arm", "assigned_at": "first_seen",
                            "platform": "Device"})
    reg = pd.DataFrame([{"name": "reading-list", "ramp": 1, "from": START.replace(tzinfo=None), "arm": a, "share": 0.5,
                         "baseline": a == "base", "state": "ON"} for a in ("base", "shiny")])
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("CREATE SCHEMA lab")
    for name, d in {"lab.exposures": df, "lab.tests": reg}.items():
        con.register("d", d)
        con.execute(f"CREATE TABLE {name} AS SELECT * FROM d")
        con.unregister("d")
    con.close()
    (tmp_path / "c.yaml").write_text("""
warehouse: {url: "duckdb:///w.duckdb"}
registry:
  table: lab.tests
  columns: {experiment: name, phase: ramp, phase_start: from, phase_end: null, variant: arm, weight: share,
            is_control: baseline, status: state, owner: null, title: null}
  live_status: ["ON"]
assignments:
  table: lab.exposures
  columns: {unit: "Member Key", experiment: test, variant: arm, timestamp: first_seen}
  segments: [Device]
""")
    r = run_cycle(load_config(tmp_path / "c.yaml"), as_of=START + timedelta(hours=120))
    srm = next(f for f in r.findings if f.check == "srm")
    assert srm.status == "ok" and sum(srm.statistics["units"].values()) == 8000
    assert set(srm.statistics["units"]) == {"base", "shiny"}


def test_user_sql_source(tmp_path):
    make_warehouse(tmp_path / "w.duckdb")
    (tmp_path / "c.yaml").write_text("""
warehouse: {url: "duckdb:///w.duckdb"}
registry: {table: experiments}
assignments:
  sql: |
    SELECT unit_id, experiment_id, variant, assigned_at FROM assignments WHERE platform = 'ios'
""")
    r = run_cycle(load_config(tmp_path / "c.yaml"), as_of=START + timedelta(hours=240))
    srm = next(f for f in r.findings if f.check == "srm" and f.experiment == "steady")
    assert 9000 < sum(srm.statistics["units"].values()) < 11000  # about half the units are on ios


def test_empty_warehouse_runs_with_no_experiments(tmp_path):
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("CREATE TABLE experiments (experiment_id VARCHAR, phase INTEGER, phase_start TIMESTAMP, phase_end TIMESTAMP,"
                " variant VARCHAR, weight DOUBLE, is_control BOOLEAN, status VARCHAR, owner VARCHAR, title VARCHAR)")
    con.execute("CREATE TABLE assignments (unit_id VARCHAR, experiment_id VARCHAR, variant VARCHAR, assigned_at TIMESTAMP,"
                " platform VARCHAR)")
    con.close()
    (tmp_path / "c.yaml").write_text(CONFIG)
    r = run_cycle(load_config(tmp_path / "c.yaml"), as_of=START)
    assert r.experiments == [] and r.findings == [] and r.recorded


def test_missing_table_is_a_query_error_naming_the_query(tmp_path):
    duckdb.connect(str(tmp_path / "w.duckdb")).close()
    (tmp_path / "c.yaml").write_text(CONFIG)
    with pytest.raises(WarehouseError, match=r"query registry failed on duckdb: .*experiments"):
        run_cycle(load_config(tmp_path / "c.yaml"), as_of=START)
