"""The Python API (monitor.api): frames that agree with the JSON documents the command line prints."""

from __future__ import annotations

from datetime import timedelta

import pandas as pd
import pytest

from monitor import api
from monitor.config import load_config
from monitor.demo import DEMO_AS_OF
from monitor.errors import ConfigError

from test_serve import CONFIG, START, make_warehouse

AS_OF = f"{DEMO_AS_OF:%Y-%m-%dT%H:%MZ}"


def test_cycle_frames_match_the_json_document(demo):
    run = api.cycle(demo["config"], as_of=AS_OF, dry_run=True)
    doc = run.document
    assert doc["recorded"] is False and len(run.findings) == len(doc["findings"])
    assert list(run.findings.columns[:8]) == ["run_id", "as_of", "experiment", "check", "scope", "phase", "status", "severity"]
    alerts = run.findings[run.findings.severity >= "alert"]
    assert set(alerts.status) <= {"alert"}
    assert ("quick-borrow-button", "srm", "filtered") in set(zip(alerts.experiment, alerts.check, alerts.scope))
    assert ("dark-mode-reader", "guardrail") in set(zip(alerts.experiment, alerts.check))
    by_json = {(f["experiment"], f["check"], f["scope"]): f["severity"] for f in doc["findings"]}
    for row in run.findings.itertuples():
        assert by_json[(row.experiment, row.check, row.scope)] == row.severity
    assert set(run.findings.run_id) == {doc["run_id"]} and (run.findings.as_of == DEMO_AS_OF).all()
    # a dry run plans the events it would record
    assert set(run.events.event) <= {"opened", "escalated", "resolved"} and len(run.events) == len(doc["events"])


def test_explain_frames(demo):
    res = api.explain(load_config(demo["config"]), "quick-borrow-button", as_of=AS_OF)
    assert res.document["format"].startswith("expwatch.explain/")
    broken = res.stages[res.stages.broken]
    assert list(broken.stage) == ["filtered"]
    assert set(res.segments.dimension) >= {"platform"}
    assert "filtered" in res.text


def test_replay_frame(demo):
    res = api.replay(demo["config"], DEMO_AS_OF - timedelta(hours=24), DEMO_AS_OF, every="6h",
                     allocation_only=True)
    assert res.document["steps"] == 5 and len(res.alerts) == len(res.document["alerts"])
    assert isinstance(res.alerts.opened_at.dtype, pd.DatetimeTZDtype)
    assert "reader-font-size" in set(res.alerts.experiment)


def test_bad_arguments_are_config_errors(demo):
    with pytest.raises(ConfigError, match="time zone"):
        api.cycle(demo["config"], as_of="2026-11-30T09:00", dry_run=True)
    with pytest.raises(ConfigError, match="ISO 8601"):
        api.replay(demo["config"], "yesterday", AS_OF)
    with pytest.raises(ConfigError, match="expected a path or a Config"):
        api.cycle(42)  # type: ignore[arg-type]


def test_readme_orchestrator_example_runs(demo, tmp_path):
    """The README's orchestrator task, executed as printed, against its own state store."""
    import re
    from pathlib import Path

    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    section = readme.split("## Python API", 1)[1].split("\n## ", 1)[0]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    text = Path(demo["config"]).read_text(encoding="utf-8").replace(
        'url: "duckdb:///warehouse.duckdb"', f'url: "duckdb:///{(Path(demo["dir"]) / "warehouse.duckdb").as_posix()}"')
    config = tmp_path / "expwatch.yaml"
    config.write_text(text, encoding="utf-8")
    scope: dict = {}
    exec(compile(code, "README.md", "exec"), scope)
    from monitor.state import StateStore

    out = scope["expwatch_hourly"](str(config))
    assert out["run_id"] and {"experiment": "quick-borrow-button", "check": "srm", "scope": "filtered"} in out["alerts"]
    store = StateStore(load_config(config).state.url)
    with store.lock():
        assert scope["expwatch_hourly"](str(config)) == {"skipped": "another cycle was running"}
    store.dispose()


# -- reading what the state store holds, without a cycle -----------------------------------------


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """A small warehouse (one healthy, one SRM experiment; tests/test_serve.py) and a state
    store written by three real, recorded cycles at hours 48, 72 and 96."""
    d = tmp_path_factory.mktemp("api_store")
    make_warehouse(d / "w.duckdb")
    config = d / "expwatch.yaml"
    config.write_text(CONFIG.replace('"duckdb:///w.duckdb"', f'"duckdb:///{(d / "w.duckdb").as_posix()}"')
                      + f'state: {{url: "sqlite:///{(d / "state.sqlite").as_posix()}"}}\n', encoding="utf-8")
    cycles = [api.cycle(config, as_of=START + timedelta(hours=h), notify=False) for h in (48, 72, 96)]
    return {"config": config, "cycles": cycles, "dir": d}


def test_stored_findings_equal_what_the_cycle_computed(recorded):
    last = recorded["cycles"][-1]
    stored = api.findings(recorded["config"])  # the latest run: nothing recomputed
    cols = ["run_id", "as_of", "experiment", "check", "scope", "phase", "status", "severity", "summary"]
    pd.testing.assert_frame_equal(stored[cols], last.findings[cols])
    assert list(stored.statistics) == [f["statistics"] for f in last.document["findings"]]
    first = recorded["cycles"][0]
    older = api.findings(load_config(recorded["config"]), run_id=first.document["run_id"])
    assert (older.as_of == START + timedelta(hours=48)).all() and len(older) == len(first.findings)
    with pytest.raises(ConfigError, match="no run 'nope'"):
        api.findings(recorded["config"], run_id="nope")


def test_runs_and_alert_history(recorded):
    runs = api.runs(recorded["config"])
    ids = [c.document["run_id"] for c in recorded["cycles"]]
    assert list(runs.run_id) == ids[::-1] and set(runs.outcome) == {"ok"}
    assert list(runs.as_of) == [START + timedelta(hours=h) for h in (96, 72, 48)]
    assert (runs.findings == [len(c.findings) for c in recorded["cycles"][::-1]]).all()
    hist = api.alert_history(recorded["config"])
    opened = hist[(hist.event == "opened") & (hist.experiment == "tilted") & (hist.check == "srm")]
    assert len(opened) >= 1 and opened.run_id.iloc[0] == ids[0] and opened.as_of.iloc[0] == START + timedelta(hours=48)
    assert (opened.severity >= "alert").all()
    assert "steady" not in set(hist.experiment[hist.event == "opened"])
    # the events the cycles returned are the ledger's history, in order
    returned = [(e.event, e.experiment, e.check, e.scope) for c in recorded["cycles"] for e in c.events.itertuples()]
    assert [(h.event, h.experiment, h.check, h.scope) for h in hist.itertuples() if h.event != "changed"] == returned


def test_hourly_counts_match_the_raw_assignments(recorded):
    """The stored counts against a brute-force count of the warehouse rows (each unit has one
    row there, so no unit leaked): units first assigned before the latest run's data time."""
    import duckdb

    counts = api.hourly_counts(recorded["config"])
    as_of = START + timedelta(hours=96)
    assert set(counts.experiment) == {"steady", "tilted"} and (counts.hour < as_of).all()
    assert (counts.hour == counts.hour.dt.floor("h")).all() and counts.leaked.sum() == 0
    con = duckdb.connect(str(recorded["dir"] / "w.duckdb"), read_only=True)
    raw = con.execute("SELECT experiment_id, variant, count(*) FROM assignments WHERE assigned_at < ? "
                      "GROUP BY 1, 2", [as_of.replace(tzinfo=None)]).fetchall()
    con.close()
    assert counts.groupby(["experiment", "variant"]).units.sum().to_dict() == {(e, v): n for e, v, n in raw}
    one = api.hourly_counts(recorded["config"], ["tilted"], source="assigned")
    pd.testing.assert_frame_equal(one, counts[counts.experiment == "tilted"].reset_index(drop=True))
    with pytest.raises(ConfigError, match="not a configured source"):
        api.hourly_counts(recorded["config"], source="clicks")


def test_one_time_type_and_one_severity_type_in_every_frame(recorded):
    cfg = recorded["config"]
    last = recorded["cycles"][-1]
    replayed = api.replay(cfg, START + timedelta(hours=48), START + timedelta(hours=96), every="24h",
                          allocation_only=True)
    frames = {"cycle.findings": last.findings, "cycle.events": last.events, "findings": api.findings(cfg),
              "alert_history": api.alert_history(cfg), "runs": api.runs(cfg), "hourly_counts": api.hourly_counts(cfg),
              "replay.alerts": replayed.alerts}
    times = severities = 0
    for name, frame in frames.items():
        for col, dtype in frame.dtypes.items():
            if col in ("as_of", "hour", "opened_at", "closed_at", "onset") or col.endswith("_at"):
                assert dtype == api.TIME, (name, col, dtype)  # aware UTC, microseconds everywhere
                times += 1
            if "severity" in col:
                assert dtype == api.SEVERITY, (name, col, dtype)
                severities += 1
            if col == "phase":
                assert dtype == "Int64", (name, col, dtype)
    assert times >= 10 and severities >= 6
    assert list(api.SEVERITY.categories) == ["ok", "warn", "alert", "critical"] and api.SEVERITY.ordered


def test_reading_a_store_that_does_not_exist_creates_nothing(tmp_path):
    config = tmp_path / "expwatch.yaml"
    config.write_text(CONFIG + f'state: {{url: "sqlite:///{(tmp_path / "none.sqlite").as_posix()}"}}\n',
                      encoding="utf-8")
    for read in (api.runs, api.findings, api.alert_history, api.hourly_counts):
        with pytest.raises(ConfigError, match="no state store at"):
            read(config)
    assert not (tmp_path / "none.sqlite").exists()


def test_a_run_result_prints_compactly(demo):
    """Printing the demo's run result once emitted the whole JSON document (about 490,000
    characters); now it is a summary and at most CycleFrames.SHOWN findings."""
    run = api.cycle(demo["config"], as_of=AS_OF, dry_run=True)
    assert len(repr(run.document)) > 100_000  # what the summary stands in for
    text, page = repr(run), run._repr_html_()
    assert len(text) < 400 and "findings" in text and "not recorded" in text
    assert len(page) < 12_000, len(page)
    shown = run.findings[run.findings.severity > "ok"]
    assert page.count("<tr>") == 1 + min(len(shown), api.CycleFrames.SHOWN)
    assert "quick-borrow-button" in page and "Decision support" in page
    if len(shown) > api.CycleFrames.SHOWN:
        assert f"and {len(shown) - api.CycleFrames.SHOWN} more" in page
    evil = api.CycleFrames(run.findings.assign(summary="<script>alert(1)</script>"), run.events, run.document)
    assert "<script>" not in evil._repr_html_() and "&lt;script&gt;" in evil._repr_html_()
