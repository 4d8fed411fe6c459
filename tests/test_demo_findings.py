"""The demo: every planted allocation-ratio, leakage, freshness and guardrail
problem is found, and nothing else raises an alert (the ramp and unequal-weights
experiments included, and the real improvement of a primary metric), on DuckDB
and on the same data loaded into PostgreSQL."""

from __future__ import annotations

import pytest
import yaml
from conftest import load_frames_into_postgres

from monitor.config import load_config, parse_config
from monitor.cycle import run_cycle
from monitor.demo import DEMO_AS_OF, EXPERIMENTS
from monitor.demo_config import DEMO_CONFIG
from monitor.state import SCHEMA_VERSION, StateStore

ALLOCATION_CHECKS = {"srm", "leakage", "freshness", "unknown_variant", "design"}
#: the demo config's metric built on each event column a planted effect scales
METRIC_OF = {("page_renders", "render_ms"): "render_ms_per_view", ("reading_sessions", "minutes"): "reading_minutes"}
#: the demo config's metric on the hold waits a licence contention distorts
SPILLOVER_METRIC = "hold_wait_hours"


def _guardrail_scope(experiment):
    spec = next(s for s in EXPERIMENTS if s.experiment_id == experiment)
    (eff,) = [e for e in spec.effects if e.check == "guardrail"]
    return METRIC_OF[(eff.table, eff.column)]


def _expected(summary):
    exp = set()
    for p in summary.planted:
        if p.experiment not in summary.live:
            continue
        if p.check in ALLOCATION_CHECKS:
            exp.add((p.experiment, p.check, p.stage or "assigned"))
        elif p.check == "guardrail":
            exp.add((p.experiment, "guardrail", _guardrail_scope(p.experiment)))
        elif p.check == "spillover":
            exp.add((p.experiment, "spillover", SPILLOVER_METRIC))
        elif p.check == "collision":
            # planted on both sides; reported once, under the id that sorts first
            spec = next(s for s in EXPERIMENTS if s.experiment_id == p.experiment)
            first, second = sorted((p.experiment, spec.bucketing.partner))
            exp.add((first, "collision", second))
        # "effect" entries are real effects that must not alert (checked below)
    return exp


def _assert_demo(result, summary):
    alerts = {(f.experiment, f.check, f.scope) for f in result.findings if f.status == "alert"}
    expected = _expected(summary)
    # each planted problem is found at its stage (an SRM planted at the first stage shows downstream too)
    assert expected <= alerts, f"missed: {expected - alerts}"
    extra = {a for a in alerts if a not in expected
             and (a[1] == "guardrail" or (a[0], a[1]) not in {(e[0], e[1]) for e in expected})}
    assert not extra, f"alerts nobody planted: {extra}"
    # guardrails and metrics: exactly the planted breach is not ok, every other comparison is
    guard = {(f.experiment, f.check, f.scope): f.status for f in result.findings if f.check in ("guardrail", "metric")}
    assert {k for k, st in guard.items() if st != "ok"} == {e for e in expected if e[1] == "guardrail"}
    assert all(f.status == "ok" for f in result.findings if f.check == "metric")
    n_metrics = len(yaml.safe_load(DEMO_CONFIG)["metrics"])
    n_treatments = sum(len(e.variants) - 1 for e in result.experiments)
    assert len(guard) == n_metrics * n_treatments  # every metric x live experiment x treatment
    for p in summary.planted:
        if p.check == "effect" and p.experiment in summary.live:
            assert not [f for f in result.findings if f.experiment == p.experiment and f.status != "ok"]
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


def test_metric_snapshots_are_recorded_with_the_run(demo, duckdb_result):
    assert duckdb_result.recorded
    store = StateStore(load_config(demo["config"]).state.url)
    try:
        assert store.schema_version() == SCHEMA_VERSION >= 2
        snaps = store.metric_snapshots(duckdb_result.run_id)
    finally:
        store.dispose()
    f = next(f for f in duckdb_result.findings if f.experiment == "dark-mode-reader" and f.scope == "render_ms_per_view")
    got = {s["variant"]: s for s in snaps if s["experiment"] == "dark-mode-reader" and s["metric"] == "render_ms_per_view"}
    assert {v: int(s["n"]) for v, s in got.items()} == f.statistics["n"]
    assert got["dark"]["sum_y"] / got["dark"]["sum_x"] == pytest.approx(f.statistics["mean"]["dark"])


def test_platform_srm_detected_after_its_onset(demo, duckdb_result):
    planted = next(p for p in demo["summary"].planted if p.experiment == "offline-download-prompt" and p.check == "srm")
    srm = next(f for f in duckdb_result.findings if f.experiment == "offline-download-prompt" and f.check == "srm"
               and f.scope == "assigned")
    assert srm.statistics["first_crossed_at"] > planted.onset


def test_interference_flags_exactly_the_planted_cases(demo, duckdb_result):
    """spillover and collision: exactly the planted shared-resource experiment and the
    correlated pair alert; the ramped experiment without interference and every other
    pair of the shared patron population stay quiet."""
    summary = demo["summary"]
    want = {k for k in _expected(summary) if k[1] in ("spillover", "collision")}
    got = {(f.experiment, f.check, f.scope) for f in duckdb_result.findings
           if f.check in ("spillover", "collision") and f.status != "ok"}
    assert want and got == want
    spill = {f.experiment for f in duckdb_result.findings if f.check == "spillover"}
    assert spill == {"audiobook-sample-ramp", "licence-queue-reminder"}  # the ramped live experiments
    f = next(f for f in duckdb_result.findings if f.key == "licence-queue-reminder\x1fspillover\x1fhold_wait_hours")
    st = f.statistics
    phases = [p for p in st["phases"] if p["used"]]
    assert [round(p["treatment_share"], 2) for p in phases] == [0.1, 0.25, 0.5]
    eff = [p["effect_relative"] for p in phases]
    assert eff[0] < eff[-1] < 0  # waits are shorter for treatment, less so as the share grows
    assert st["effect_trend"]["slope_per_share"] > 0 and st["likely_bias"] == "overstated"
    assert all(p["control_drift"] > 0 for p in phases)  # control waits rose against their pre-period
    pairs = [f for f in duckdb_result.findings if f.check == "collision" and f.scope == "pairs"]
    assert len(pairs) == len(summary.live)  # every live experiment shares units with others in the demo
    assert max(len(f.statistics["pairs"]) for f in pairs) >= len(summary.live) - 1
    hit = next(f for f in duckdb_result.findings if f.key == "review-after-return\x1fcollision\x1ftitle-page-reviews")
    assert hit.statistics["cramers_v"] > 0.9 and hit.statistics["units_shared"] >= 1000
    assert hit.statistics["multiplicity"] == "bh" and hit.statistics["family_size"] >= 50


def _analyze(url):
    import sqlalchemy as sa

    eng = sa.create_engine(url, isolation_level="AUTOCOMMIT", poolclass=sa.pool.NullPool)
    with eng.connect() as c:
        c.execute(sa.text("ANALYZE"))
    eng.dispose()


@pytest.mark.postgres
@pytest.mark.slow
def test_demo_findings_on_postgres(demo, demo_frames, duckdb_result, pg_url, tmp_path):
    frames, summary = demo_frames
    tables = ("experiments", "assignments", "assignments_filtered", "reading_sessions", "page_renders", "loans", "app_errors",
              "holds")
    load_frames_into_postgres(pg_url, {k: frames[k] for k in tables}, "library")
    _analyze(pg_url)  # a warehouse has planner statistics; freshly copied tables do not
    metrics = yaml.safe_load(DEMO_CONFIG)["metrics"]
    for m in metrics:
        for spec in (m, m.get("denominator")):
            if spec:
                spec["table"] = f"library.{spec['table']}"
    cfg = parse_config({
        "warehouse": {"url": pg_url},
        "state": {"url": f"sqlite:///{tmp_path / 'pg-state.sqlite'}"},
        "registry": {"table": "library.experiments"},
        "assignments": {"name": "assigned", "table": "library.assignments", "segments": ["platform", "region", "patron_type"]},
        "stages": [{"name": "filtered", "table": "library.assignments_filtered"}],
        "checks": yaml.safe_load(DEMO_CONFIG)["checks"],
        "metrics": metrics,
    }, where="pg-config")
    result = run_cycle(cfg, as_of=DEMO_AS_OF)
    _assert_demo(result, summary)
    assert _by_key(result) == _by_key(duckdb_result)
    srm_pg = {f.key: f.statistics["units"] for f in result.findings if f.check == "srm"}
    srm_dd = {f.key: f.statistics["units"] for f in duckdb_result.findings if f.check == "srm"}
    assert srm_pg == srm_dd  # the same counts, not just the same verdicts
    for check in ("guardrail", "metric"):
        pg = {f.key: f.statistics for f in result.findings if f.check == check}
        dd = {f.key: f.statistics for f in duckdb_result.findings if f.check == check}
        assert pg.keys() == dd.keys() and pg
        for k in pg:
            assert pg[k]["n"] == dd[k]["n"]
            assert pg[k]["effect_relative"] == pytest.approx(dd[k]["effect_relative"], rel=1e-9, abs=1e-12)


def test_novelty_warns_exactly_on_the_planted_time_varying_effects(demo, duckdb_result):
    """novelty: the planted fading (reading-streak badge) and growing (swipe pages) effects
    on reading minutes warn with the right classification and a long-run interval that covers
    the planted long-run lift; the constant planted effects (shelf-carousel +6% minutes,
    dark-mode-reader +9% render time) and everything else are stable."""
    import numpy as np

    planted = {s.experiment_id: e for s in EXPERIMENTS for e in s.effects if e.check == "novelty"}
    assert set(planted) == {"reading-streak-badge", "reader-swipe-pages"}
    found = [f for f in duckdb_result.findings if f.check == "novelty"]
    flagged = {(f.experiment, f.scope): f for f in found if f.status != "ok"}
    assert set(flagged) == {(e, METRIC_OF[(eff.table, eff.column)]) for e, eff in planted.items()}
    assert all(f.status == "warn" for f in flagged.values())
    for exp, kind in (("reading-streak-badge", "fading"), ("reader-swipe-pages", "growing")):
        eff = planted[exp]
        st = flagged[(exp, "reading_minutes")].statistics
        assert st["classification"] == kind
        assert st["converged"]["lower"] <= eff.long_run_lift <= st["converged"]["upper"]
        early = np.mean([a["effect_relative"] for a in st["ages"] if a["age"] <= 2])
        truth = np.mean([eff.long_run_lift + (eff.lift - eff.long_run_lift)
                         * np.exp(-max(a + 0.5 - eff.hold_days, 0) / eff.fade_days) for a in (0, 1, 2)])
        assert early == pytest.approx(truth, abs=0.04)  # the per-age estimates see the planted start
        assert st["trend"]["p_value"] < st["threshold"]
    for exp, eff in ((s.experiment_id, e) for s in EXPERIMENTS for e in s.effects if e.check != "novelty"):
        if exp not in demo["summary"].live:
            continue
        f = next(f for f in found if f.experiment == exp and f.scope == METRIC_OF[(eff.table, eff.column)])
        assert f.status == "ok" and f.statistics["classification"] == "stable", f.summary
        assert f.statistics["pooled"]["effect_relative"] == pytest.approx(eff.lift, abs=0.03)
    # every evaluated metric (primary and guardrail, not mean-aggregated) x live experiment x treatment
    evaluated = [m for m in yaml.safe_load(DEMO_CONFIG)["metrics"]
                 if m.get("role", "guardrail") != "diagnostic" and m.get("aggregate", "sum") != "mean"]
    n_treatments = sum(len(e.variants) - 1 for e in duckdb_result.experiments)
    assert len(found) == len(evaluated) * n_treatments


def test_the_readme_digest_picture_shows_the_current_demo(duckdb_result):
    """``docs/digest.png`` carries a fingerprint of the demo's findings; a change to what the demo
    finds or how a finding is worded makes the picture stale: regenerate it with
    ``.venv/bin/python -P docs/make_digest_png.py`` and commit it."""
    import importlib.util
    from pathlib import Path

    script = Path(__file__).resolve().parent.parent / "docs" / "make_digest_png.py"
    spec = importlib.util.spec_from_file_location("make_digest_png", script)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.recorded_fingerprint() == module.fingerprint(duckdb_result), (
        "docs/digest.png shows an older demo: run .venv/bin/python -P docs/make_digest_png.py")
