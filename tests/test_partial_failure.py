"""One failure must not hide the other checks: a metric check whose query fails
(its table is missing) leaves an error finding, while the SRM result of the same
run is recorded and alerted; a --metrics-file that cannot be written after the
run was recorded is a warning, not a failed run."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import sqlalchemy as sa

from conftest import registry_frame, write_config, write_duckdb_warehouse
from monitor.cli import main
from monitor.state import alerts, findings, runs

START = datetime(2026, 10, 1, tzinfo=UTC)
AS_OF = "2026-10-03T00:00Z"
CONFIG = """warehouse: {url: 'duckdb:///w.duckdb'}
registry: {table: experiments}
assignments: {table: assignments}
"""
MISSING_METRIC = """metrics:
  - {name: loan_errors, role: guardrail, bad_direction: increase, table: app_errors_typo, aggregate: count}
"""


def _warehouse(tmp_path, extra: str = ""):
    """'hold-queue' loses 30% of its treatment units: an SRM alert by construction."""
    rng = np.random.default_rng(11)
    n = 6000
    v = rng.choice(["control", "treatment"], n)
    keep = (v == "control") | (rng.random(n) > 0.3)
    rows = pd.DataFrame({"unit_id": [f"u{i}" for i in range(n)], "experiment_id": "hold-queue", "variant": v,
                         "assigned_at": [START.replace(tzinfo=None) + timedelta(seconds=int(s))
                                         for s in rng.integers(0, 40 * 3600, n)]})[keep]
    write_duckdb_warehouse(tmp_path / "w.duckdb", registry_frame(["hold-queue"], START), rows)
    return write_config(tmp_path / "c.yaml", CONFIG + extra)


def _rows(tmp_path, table):
    eng = sa.create_engine(f"sqlite:///{tmp_path / 'expwatch-state.sqlite'}")
    try:
        with eng.connect() as c:
            return [dict(r) for r in c.execute(sa.select(table)).mappings()]
    finally:
        eng.dispose()


def test_a_failed_metric_check_leaves_the_srm_result_recorded(tmp_path, capsys):
    cfg = _warehouse(tmp_path, MISSING_METRIC)
    code = main(["run", "--config", str(cfg), "--as-of", AS_OF])
    err = capsys.readouterr().err
    assert code == 1  # the monitor partly failed ...
    assert "check guardrail could not run" in err and "app_errors_typo" in err and "Traceback" not in err
    # ... but the run and every other check's findings are recorded, and the SRM alert opened
    assert len(_rows(tmp_path, runs)) == 1
    recorded = {(f["check_name"], f["scope"]): f for f in _rows(tmp_path, findings)}
    assert recorded[("srm", "assigned")]["status"] == "alert"
    error = recorded[("guardrail", "error")]
    assert error["status"] == "warn" and "could not be evaluated this run" in error["summary"]
    assert "app_errors_typo" in error["statistics"]
    assert {(a["check_name"], a["state"]) for a in _rows(tmp_path, alerts)} >= {("srm", "open")}
    # the other metric checks ran on the same (recovered) warehouse session
    assert ("novelty", "error") not in recorded and ("collision", "error") not in recorded


def test_a_metrics_file_that_cannot_be_written_is_a_warning(tmp_path, capsys):
    cfg = _warehouse(tmp_path)
    code = main(["run", "--config", str(cfg), "--as-of", AS_OF, "--metrics-file", str(tmp_path / "absent" / "m.prom")])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "warning: the run was recorded, but --metrics-file" in err
    assert len(_rows(tmp_path, runs)) == 1


def test_the_failed_checks_open_alerts_are_neither_resolved_nor_changed(tmp_path, capsys):
    cfg = _warehouse(tmp_path, MISSING_METRIC)
    assert main(["run", "--config", str(cfg), "--as-of", AS_OF]) == 1
    # an alert the guardrail check opened in an earlier, healthy run
    eng = sa.create_engine(f"sqlite:///{tmp_path / 'expwatch-state.sqlite'}")
    at = datetime(2026, 10, 2, tzinfo=UTC)
    with eng.begin() as c:
        c.execute(sa.insert(alerts).values(
            key="hold-queue\x1fguardrail\x1floan_errors", experiment="hold-queue", check_name="guardrail",
            scope="loan_errors", state="open", severity=2, max_severity=2, summary="errors up", opened_at=at,
            updated_at=at, opened_run="earlier", last_run="earlier"))
    eng.dispose()
    assert main(["run", "--config", str(cfg), "--as-of", "2026-10-03T01:00Z"]) == 1
    assert len(_rows(tmp_path, runs)) == 2  # the second run was recorded too
    kept = next(a for a in _rows(tmp_path, alerts) if a["scope"] == "loan_errors")
    assert (kept["state"], kept["summary"], kept["last_run"]) == ("open", "errors up", "earlier")
