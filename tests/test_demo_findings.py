"""The demo: every planted allocation-ratio, leakage and freshness problem is
found, and nothing else raises an alert (the ramp and unequal-weights experiments
included), on DuckDB and on the same data loaded into PostgreSQL."""

from __future__ import annotations

import pytest

from monitor.config import load_config, parse_config
from monitor.cycle import run_cycle
from monitor.demo import DEMO_AS_OF

from conftest import load_frames_into_postgres

ALLOCATION_CHECKS = {"srm", "leakage", "freshness", "unknown_variant", "design"}


def _expected(summary):
    exp = set()
    for p in summary.planted:
        if p.check not in ALLOCATION_CHECKS or p.experiment not in summary.live:
            continue
        exp.add((p.experiment, p.check, p.stage or "assigned"))
    return exp


def _assert_demo(result, summary):
    alerts = {(f.experiment, f.check, f.scope) for f in result.findings if f.status == "alert"}
    expected = _expected(summary)
    # each planted problem is found at its stage (an SRM planted at the first stage shows downstream too)
    assert expected <= alerts, f"missed: {expected - alerts}"
    extra = {a for a in alerts if (a[0], a[1]) not in {(e[0], e[1]) for e in expected}}
    assert not extra, f"alerts nobody planted: {extra}"
    for exp in summary.healthy:
        bad = [(f.check, f.scope, f.status, f.summary) for f in result.findings if f.experiment == exp and f.status != "ok"]
        assert not bad, f"healthy experiment {exp} flagged: {bad}"
    assert {e.id for e in result.experiments} == set(summary.live)
    assert not set(summary.ended) & {f.experiment for f in result.findings}


def _by_key(result):
    return {(f.experiment, f.check, f.scope): f.status for f in result.findings}


@pytest.fixture(scope="module")
def duckdb_result(demo):
    cfg = load_config(demo["config"])
    return run_cycle(cfg, as_of=DEMO_AS_OF)


def test_demo_findings_on_duckdb(demo, duckdb_result):
    _assert_demo(duckdb_result, demo["summary"])


def test_platform_srm_detected_after_its_onset(demo, duckdb_result):
    planted = next(p for p in demo["summary"].planted if p.experiment == "offline-download-prompt" and p.check == "srm")
    srm = next(f for f in duckdb_result.findings if f.experiment == "offline-download-prompt" and f.check == "srm"
               and f.scope == "assigned")
    assert srm.statistics["first_crossed_at"] > planted.onset


@pytest.mark.postgres
@pytest.mark.slow
def test_demo_findings_on_postgres(demo, demo_frames, duckdb_result, pg_url, tmp_path):
    frames, summary = demo_frames
    load_frames_into_postgres(pg_url, {k: frames[k] for k in ("experiments", "assignments", "assignments_filtered")}, "library")
    cfg = parse_config({
        "warehouse": {"url": pg_url},
        "state": {"url": f"sqlite:///{tmp_path / 'pg-state.sqlite'}"},
        "registry": {"table": "library.experiments"},
        "assignments": {"name": "assigned", "table": "library.assignments", "segments": ["platform", "region", "patron_type"]},
        "stages": [{"name": "filtered", "table": "library.assignments_filtered"}],
    }, where="pg-config")
    result = run_cycle(cfg, as_of=DEMO_AS_OF)
    _assert_demo(result, summary)
    assert _by_key(result) == _by_key(duckdb_result)
    srm_pg = {f.key: f.statistics["units"] for f in result.findings if f.check == "srm"}
    srm_dd = {f.key: f.statistics["units"] for f in duckdb_result.findings if f.check == "srm"}
    assert srm_pg == srm_dd  # the same counts, not just the same verdicts
