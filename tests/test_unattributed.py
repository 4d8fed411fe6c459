"""Nothing is dropped without a finding: assignment rows with a NULL unit id, timestamp
or experiment id, registry rows with a NULL experiment id, and a key written twice in
the YAML file. Counts are planted, so the expected numbers are known by construction."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from conftest import load_frames_into_postgres, registry_frame, write_config, write_duckdb_warehouse
from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.errors import ConfigError
from monitor.registry import NO_EXPERIMENT

START = datetime(2026, 10, 1, tzinfo=UTC)
AS_OF = START + timedelta(hours=48)


def _assignments(null_unit: int, null_ts: int, null_exp: int, seed: int = 3) -> pd.DataFrame:
    """3,000 clean rows of 'shelf-sort' over 48 hours, then the planted rows."""
    rng = np.random.default_rng(seed)
    n = 3000
    t0 = START.replace(tzinfo=None)
    clean = pd.DataFrame({
        "unit_id": [f"u{i}" for i in range(n)], "experiment_id": "shelf-sort",
        "variant": rng.choice(["control", "treatment"], n),
        "assigned_at": [t0 + timedelta(seconds=int(s)) for s in rng.integers(0, 47 * 3600, n)],
    })

    def planted(k: int, **over) -> pd.DataFrame:
        rows = clean.iloc[:k].copy()
        rows["unit_id"] = [f"p{i}" for i in range(k)]
        for col, value in over.items():
            rows[col] = value
        return rows

    frames = [clean, planted(null_unit, unit_id=None), planted(null_ts, assigned_at=pd.NaT),
              planted(null_exp, experiment_id=None)]
    out = pd.concat([f for f in frames if len(f)], ignore_index=True)
    out["assigned_at"] = pd.to_datetime(out["assigned_at"])
    return out


CONFIG = "warehouse: {{url: '{url}'}}\nregistry: {{table: {s}experiments}}\nassignments: {{table: {s}assignments}}\n"


def _duckdb(tmp_path, assignments, registry=None):
    write_duckdb_warehouse(tmp_path / "w.duckdb", registry if registry is not None else registry_frame(["shelf-sort"], START),
                           assignments)
    return load_config(write_config(tmp_path / "c.yaml", CONFIG.format(url="duckdb:///w.duckdb", s="")))


def _one(result, experiment, check):
    got = [f for f in result.findings if f.experiment == experiment and f.check == check]
    assert len(got) == 1, got
    return got[0]


def _check_planted(result):
    f = _one(result, "shelf-sort", "unattributed")
    assert f.scope == "assigned"
    assert f.statistics["rows"] == 3000 + 120 + 60
    assert (f.statistics["null_unit_rows"], f.statistics["null_timestamp_rows"], f.statistics["unattributed_rows"]) == (120, 60, 180)
    assert f.status == "alert" and f.statistics["share"] == pytest.approx(180 / 3180)
    assert "180 rows" in f.summary
    orphan = _one(result, NO_EXPERIMENT, "unattributed")
    assert orphan.statistics["null_experiment_rows"] == 30
    assert orphan.statistics["share"] == pytest.approx(30 / 3210)
    assert orphan.status == "warn"  # 0.93%: between the default 0.1% and 1% shares
    # the clean units are still counted in the SRM check as before
    assert sum(_one(result, "shelf-sort", "srm").statistics["units"].values()) == 3000


def test_null_rows_are_counted_and_reported_duckdb(tmp_path):
    cfg = _duckdb(tmp_path, _assignments(null_unit=120, null_ts=60, null_exp=30))
    _check_planted(run_cycle(cfg, as_of=AS_OF, dry_run=True))


@pytest.mark.postgres
def test_null_rows_are_counted_and_reported_postgres(tmp_path, pg_url):
    load_frames_into_postgres(pg_url, {"experiments": registry_frame(["shelf-sort"], START),
                                       "assignments": _assignments(null_unit=120, null_ts=60, null_exp=30)}, "unattr")
    cfg = load_config(write_config(tmp_path / "c.yaml", CONFIG.format(url=pg_url, s="unattr.")))
    _check_planted(run_cycle(cfg, as_of=AS_OF, dry_run=True))


def test_clean_rows_give_an_ok_finding_and_no_orphans(tmp_path):
    result = run_cycle(_duckdb(tmp_path, _assignments(0, 0, 0)), as_of=AS_OF, dry_run=True)
    f = _one(result, "shelf-sort", "unattributed")
    assert f.status == "ok" and f.statistics["unattributed_rows"] == 0
    assert not [f for f in result.findings if f.experiment == NO_EXPERIMENT]


def test_thresholds_follow_the_config(tmp_path):
    cfg = _duckdb(tmp_path, _assignments(null_unit=120, null_ts=60, null_exp=30))
    cfg = cfg.model_copy(update={"checks": cfg.checks.model_copy(
        update={"unattributed_warn_share": 0.1, "unattributed_alert_share": 0.2})})
    result = run_cycle(cfg, as_of=AS_OF, dry_run=True)
    assert _one(result, "shelf-sort", "unattributed").status == "ok"  # 5.7% is under the 10% warn share


def test_a_registry_row_without_experiment_id_is_a_design_finding(tmp_path):
    registry = registry_frame(["shelf-sort", "due-date-nudge"], START)
    registry.loc[registry["experiment_id"] == "due-date-nudge", "experiment_id"] = None
    result = run_cycle(_duckdb(tmp_path, _assignments(0, 0, 0), registry), as_of=AS_OF, dry_run=True)
    f = _one(result, NO_EXPERIMENT, "design")
    assert f.status == "alert"
    assert "2 registry rows have a NULL experiment id (variants control, treatment)" in f.summary
    assert [e.id for e in result.experiments] == ["shelf-sort"]


@pytest.mark.parametrize("text, where", [
    ("metrics: []\nmetrics: []\n", "line 2: key 'metrics' is given twice"),
    ("checks:\n  alpha: 0.01\n  alpha: 0.2\n", "line 3: key 'checks.alpha' is given twice"),
])
def test_a_key_written_twice_is_a_config_error(tmp_path, text, where):
    p = write_config(tmp_path / "c.yaml",
                     "warehouse: {url: 'duckdb:///w.duckdb'}\nregistry: {table: e}\nassignments: {table: a}\n" + text)
    with pytest.raises(ConfigError) as info:
        load_config(p)
    msg = str(info.value)
    assert msg.startswith(f"{p}: ") and "\n" not in msg
    assert where.replace("line 2", "line 5").replace("line 3", "line 6") in msg
