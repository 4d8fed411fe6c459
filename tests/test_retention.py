"""State store retention (``state.keep_days``, ``expwatch prune``): what is removed,
what is kept, and that a cycle after pruning finds exactly what it finds without."""

from __future__ import annotations

import shutil
from datetime import datetime, timedelta, timezone

import pandas as pd
import sqlalchemy as sa
from test_cycle import CONFIG, START, make_warehouse

from monitor.cli import main
from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.state import StateStore, count_series, counts, findings, prune, runs, watermarks

RETIRED = sa.select(count_series.c.series_id).where(count_series.c.experiment == "retired")
EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def _n(url, table, where=None):
    eng = sa.create_engine(url)
    with eng.connect() as c:
        stmt = sa.select(sa.func.count()).select_from(table)
        n = c.execute(stmt if where is None else stmt.where(where)).scalar()
    eng.dispose()
    return n


def _setup(tmp_path):
    make_warehouse(tmp_path / "w.duckdb", skew_from_hour=120)
    (tmp_path / "c.yaml").write_text(CONFIG + "state: {keep_days: 3}\n")
    cfg = load_config(tmp_path / "c.yaml")
    by_hand = cfg.model_copy(update={"state": cfg.state.model_copy(update={"keep_days": None})})
    for h in (100, 124, 200):  # three runs, data times (explicit clock) 100 h, 124 h, 200 h after the start
        run_cycle(by_hand, as_of=START + timedelta(hours=h))  # no retention: prune() is tested on its own
    # an experiment the monitor stopped watching: last pulled 5 days before the latest run
    store = StateStore(cfg.state.url)
    old = START + timedelta(hours=200) - timedelta(days=5)
    frame = pd.DataFrame({"experiment": ["retired"] * 2, "variant": ["control", "treatment"], "hour": [old, old],
                          "segment": ["{}", "{}"], "units": [10, 11], "leaked": [0, 0]})
    with store.transaction() as conn:
        StateStore.replace_counts(conn, "assigned", old, old, ["retired"], frame)
    return cfg, store


def test_prune_removes_old_runs_and_retired_counts_and_keeps_live_ones(tmp_path):
    cfg, store = _setup(tmp_path)
    url = cfg.state.url
    live_counts = _n(url, counts, counts.c.series_id.not_in(RETIRED))
    latest_findings = _n(url, findings, findings.c.as_of == START + timedelta(hours=200))
    dry = prune(store, 3, dry_run=True)
    assert _n(url, runs) == 3 and _n(url, counts, counts.c.series_id.in_(RETIRED)) == 2  # dry run removes nothing
    out = prune(store, 3)
    assert out == dry
    assert out["cutoff"] == START + timedelta(hours=200) - timedelta(days=3)
    assert out["removed"]["expwatch_runs"] == 2
    assert out["removed"]["expwatch_counts"] == 2 and out["removed"]["expwatch_count_series"] == 2
    assert out["removed"]["expwatch_watermarks"] == 1
    assert out["removed"]["expwatch_findings"] > 0
    # kept: the latest run and its findings, every count of the live experiments (whole phase, from hour 0)
    assert _n(url, runs) == 1
    assert _n(url, findings) == latest_findings
    assert _n(url, counts, counts.c.series_id.not_in(RETIRED)) == live_counts
    assert _n(url, counts, counts.c.hour < (START - EPOCH) // timedelta(hours=1) + 24) > 0
    assert _n(url, counts, counts.c.series_id.in_(RETIRED)) == 0
    assert _n(url, watermarks) == 2
    # a second prune finds nothing left to remove
    assert set(prune(store, 3)["removed"].values()) == {0}
    store.dispose()


def test_cycle_after_pruning_finds_the_same(tmp_path):
    cfg, store = _setup(tmp_path)
    twin_dir = tmp_path / "twin"
    twin_dir.mkdir()
    path = cfg.state.url.removeprefix("sqlite:///")
    shutil.copy(path, twin_dir / "s.sqlite")
    twin = cfg.model_copy(update={"state": cfg.state.model_copy(update={"url": f"sqlite:///{twin_dir / 's.sqlite'}"})})
    prune(store, 3)
    store.dispose()
    as_of = START + timedelta(hours=230)
    pruned, kept = run_cycle(cfg, as_of=as_of), run_cycle(twin, as_of=as_of)
    key = lambda r: sorted((f.experiment, f.check, f.scope, f.status, f.summary) for f in r.findings)
    assert key(pruned) == key(kept)
    assert any(f.status == "alert" for f in pruned.findings)
    assert [(e.kind, e.key) for e in pruned.events] == [(e.kind, e.key) for e in kept.events]


def test_prune_command_reports_and_needs_a_retention(tmp_path, capsys):
    cfg, store = _setup(tmp_path)
    store.dispose()
    assert main(["prune", "--config", str(tmp_path / "c.yaml"), "--dry-run"]) == 0
    assert "would remove " in (e := capsys.readouterr().err) and "2 from expwatch_runs" in e
    assert _n(cfg.state.url, runs) == 3
    assert main(["prune", "--config", str(tmp_path / "c.yaml")]) == 0
    assert "2 from expwatch_runs" in (e := capsys.readouterr().err) and "removed " in e
    (tmp_path / "c2.yaml").write_text(CONFIG)
    assert main(["prune", "--config", str(tmp_path / "c2.yaml")]) == 2
    assert "state.keep_days" in capsys.readouterr().err


def _sizes(url):
    return {t.name: _n(url, t) for t in (runs, findings, counts, count_series, watermarks)}


def test_each_run_prunes_in_its_own_transaction_when_keep_days_is_set(tmp_path, caplog):
    make_warehouse(tmp_path / "w.duckdb", skew_from_hour=120)
    (tmp_path / "c.yaml").write_text(CONFIG + "state: {keep_days: 3}\n")
    cfg = load_config(tmp_path / "c.yaml")
    twin = cfg.model_copy(update={"state": cfg.state.model_copy(
        update={"keep_days": None, "url": f"sqlite:///{tmp_path / 'twin.sqlite'}"})})
    for h in (100, 124):
        run_cycle(cfg, as_of=START + timedelta(hours=h))
        run_cycle(twin, as_of=START + timedelta(hours=h))
    assert _n(cfg.state.url, runs) == 2  # both within 3 days of the latest: nothing removed yet
    caplog.clear()
    with caplog.at_level("INFO", logger="monitor"):
        run_cycle(cfg, as_of=START + timedelta(hours=200))
    run_cycle(twin, as_of=START + timedelta(hours=200))
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("state.keep_days")]
    assert len(lines) == 1 and "2 from expwatch_runs" in lines[0], lines
    # the same as the twin store pruned by hand afterwards
    twin_store = StateStore(twin.state.url)
    prune(twin_store, 3)
    twin_store.dispose()
    assert _sizes(cfg.state.url) == _sizes(twin.state.url)
    assert _n(cfg.state.url, runs) == 1
