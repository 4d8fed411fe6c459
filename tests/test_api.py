"""The Python API (monitor.api): frames that agree with the JSON documents the command line prints."""

from __future__ import annotations

from datetime import timedelta

import pandas as pd
import pytest

from monitor import api
from monitor.config import load_config
from monitor.demo import DEMO_AS_OF
from monitor.errors import ConfigError

AS_OF = f"{DEMO_AS_OF:%Y-%m-%dT%H:%MZ}"


def test_cycle_frames_match_the_json_document(demo):
    run = api.cycle(demo["config"], as_of=AS_OF, dry_run=True)
    doc = run.document
    assert doc["recorded"] is False and len(run.findings) == len(doc["findings"])
    assert list(run.findings.columns[:6]) == ["experiment", "check", "scope", "phase", "status", "severity"]
    alerts = run.findings[run.findings.severity >= 2]
    assert set(alerts.status) <= {"alert"}
    assert ("quick-borrow-button", "srm", "filtered") in set(zip(alerts.experiment, alerts.check, alerts.scope))
    assert ("dark-mode-reader", "guardrail") in set(zip(alerts.experiment, alerts.check))
    by_json = {(f["experiment"], f["check"], f["scope"]): f["severity"] for f in doc["findings"]}
    for row in run.findings.itertuples():
        assert by_json[(row.experiment, row.check, row.scope)] == row.severity_name
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
