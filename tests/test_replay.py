"""Replay on the demo warehouse: every planted allocation problem is found at or
after its planted onset, as one episode that does not flap; healthy experiments
stay quiet; and the configured state store is never touched."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from monitor.config import load_config
from monitor.demo import DEMO_AS_OF
from monitor.errors import ConfigError
from monitor.replay import (
    AlertTimeline,
    CheckQuietness,
    parse_every,
    quietness,
    render_replay_text,
    replay,
    replay_to_json,
)

UTC = timezone.utc
ALLOCATION = ("srm", "leakage", "freshness")


@pytest.fixture(scope="module")
def replayed(demo):
    """Four weeks, hourly: the fast replay of the allocation checks (the metric checks are
    replayed in test_metric_checks_replay_daily, over a shorter period: each metric step
    re-reads the metric events)."""
    cfg = load_config(demo["config"])
    summary = demo["summary"]
    onsets = {(p.experiment, p.check): p.onset for p in summary.planted if p.onset is not None}
    start = DEMO_AS_OF - timedelta(days=28)
    store = Path(cfg.state.url.removeprefix("sqlite:///"))
    before = _fingerprint(store)
    report = replay(cfg, start, DEMO_AS_OF, every=timedelta(hours=1), onsets=onsets, allocation_only=True)
    return cfg, summary, report, (before, _fingerprint(store))


def _fingerprint(path: Path):
    return (path.stat().st_mtime_ns, path.stat().st_size) if path.exists() else None


@pytest.mark.slow
def test_every_planted_allocation_problem_is_detected_not_before_its_onset(replayed):
    cfg, summary, report, _ = replayed
    assert report.steps == 28 * 24 + 1 and report.end == DEMO_AS_OF and not report.skipped
    assert report.mode == "fast"
    planted = [p for p in summary.planted if p.check in ALLOCATION and p.experiment in summary.live]
    assert len(planted) >= 4
    for p in planted:
        hits = [t for t in report.timelines if t.experiment == p.experiment and t.check == p.check]
        assert hits, f"{p.experiment} · {p.check} was never detected"
        if p.stage is not None:
            assert any(t.scope == p.stage for t in hits)
        if p.onset is not None:
            assert all(t.opened_at >= p.onset for t in hits), (p, hits)
            assert all(t.delay_hours is not None and t.delay_hours >= 0 for t in hits)
    assert not report.missed


@pytest.mark.slow
def test_healthy_experiments_stay_quiet(replayed):
    """Over 673 hourly looks a one-look chi-square p dips below alpha on a healthy experiment
    now and then (kids-corner did, twice in a day); the SRM warn comes from the always-valid
    e-value instead, so no healthy experiment opens an allocation episode at all."""
    _, summary, report, _ = replayed
    assert summary.healthy
    assert [t for t in report.timelines if t.experiment in summary.healthy] == []


@pytest.mark.slow
def test_planted_allocation_problems_are_one_episode_each(replayed):
    """Each planted allocation problem is one episode per stage it reaches: no flap (closed
    within a day of opening) and no reopening within a day of a close, by the replay's own
    quietness report, which the JSON carries."""
    _, summary, report, _ = replayed
    planted = {(p.experiment, p.check) for p in summary.planted if p.check in ALLOCATION}
    keys = [(t.experiment, t.check, t.scope) for t in report.timelines if (t.experiment, t.check) in planted]
    assert len(keys) >= 5 and len(keys) == len(set(keys))
    assert report.clear_hours == 24.0
    for q in report.quietness:
        assert q.flaps == 0 and q.reopened == 0, q
    assert {q.check for q in report.quietness} >= {"srm", "leakage", "freshness"}
    doc = replay_to_json(report)["quietness"]
    assert doc["clear_hours"] == 24.0 and doc["by_check"] == [
        {"check": q.check, "episodes": q.episodes, "flaps": q.flaps, "reopened": q.reopened, "returns": q.returns}
        for q in report.quietness]
    assert "quietness (an episode closes after 24 h clear" in render_replay_text(report)


@pytest.mark.slow
def test_the_real_state_store_is_not_touched(replayed):
    before, after = replayed[3]
    assert before == after


@pytest.mark.slow
def test_report_renders_as_text_and_json(replayed):
    _, _, report, _ = replayed
    text = render_replay_text(report)
    assert text.startswith("replay 2026-11-02 09:00 .. 2026-11-30 09:00 UTC every 1h: 673 steps")
    doc = replay_to_json(report)
    assert doc["format"] == "expwatch.replay/1" and len(doc["alerts"]) == len(report.timelines)
    due = next(a for a in doc["alerts"] if a["experiment"] == "due-date-nudge")
    assert due["onset"] == "2026-11-29T03:00:00+00:00" and due["delay_hours"] >= 0


def test_parse_every_and_bad_ranges(demo):
    assert parse_every("6h") == timedelta(hours=6) and parse_every("30m") == timedelta(minutes=30)
    assert parse_every("1d") == timedelta(days=1)
    for bad in ("0h", "1w", "h", ""):
        with pytest.raises(ConfigError, match="--every"):
            parse_every(bad)
    cfg = load_config(demo["config"])
    with pytest.raises(ConfigError, match="before --from"):
        replay(cfg, DEMO_AS_OF, DEMO_AS_OF - timedelta(hours=1))
    with pytest.raises(ConfigError, match="in the future"):
        replay(cfg, DEMO_AS_OF, datetime.now(UTC) + timedelta(days=1))
    with pytest.raises(ConfigError, match="time zone"):
        replay(cfg, DEMO_AS_OF.replace(tzinfo=None), DEMO_AS_OF)


def _core(f):
    """What must agree between a replay step and a cycle: status, severity and the test statistics
    (an SRM alert's summary also carries its diagnosis, which the replay does not compute)."""
    keys = ("units", "log_e_value", "log_e_value_max", "first_crossed_at", "p_value", "chi2", "leaked_units",
            "share", "null_variant_units", "unknown_variant_units", "last_units_at", "gap_hours",
            "expected_units_in_gap", "phases")
    st = {k: f.statistics.get(k) for k in keys if k in f.statistics}
    st.get("phases") and st.update(phases=[{k: v for k, v in p.items() if k != "end"} for p in st["phases"]])
    return (f.key, f.status, f.severity, repr(st))


@pytest.mark.slow
def test_fast_replay_steps_equal_full_refresh_cycles(demo):
    """The fast replay pulls once (to the last step) and reads earlier steps off the leak hours;
    each step must equal a dry-run, full-refresh cycle at that time."""
    from monitor.cycle import run_cycle
    from monitor.replay import _fast_events

    cfg = load_config(demo["config"]).model_copy(update={"metrics": []})
    steps = [DEMO_AS_OF - timedelta(days=12, hours=5), DEMO_AS_OF - timedelta(days=3), DEMO_AS_OF]
    fast = {as_of: found for as_of, found, _ in _fast_events(cfg, steps, timedelta(days=1), [], None,
                                                             with_metrics=False)}
    checks = {"srm", "leakage", "unknown_variant", "freshness", "design"}
    for as_of in steps:
        slow = [f for f in run_cycle(cfg, as_of=as_of, dry_run=True, full_refresh=True, notify=False).findings
                if f.check in checks]
        assert len(slow) >= 5 * 12
        assert sorted(map(_core, fast[as_of])) == sorted(map(_core, slow)), as_of


@pytest.mark.slow
def test_exact_mode_runs_whole_cycles(demo):
    cfg = load_config(demo["config"])
    report = replay(cfg, DEMO_AS_OF - timedelta(hours=48), DEMO_AS_OF, every=timedelta(hours=48),
                    allocation_only=True, mode="cycles")
    assert report.mode == "cycles" and report.steps == 2 and not report.skipped
    assert {(t.experiment, t.check) for t in report.timelines} >= {("reader-font-size", "leakage")}


def test_fast_mode_needs_whole_hours(demo):
    cfg = load_config(demo["config"])
    with pytest.raises(ConfigError, match="whole hours"):
        replay(cfg, DEMO_AS_OF - timedelta(minutes=90), DEMO_AS_OF, every=timedelta(minutes=30))
    with pytest.raises(ConfigError, match="whole hours"):
        replay(cfg, DEMO_AS_OF - timedelta(minutes=30), DEMO_AS_OF)
    with pytest.raises(ConfigError, match="mode"):
        replay(cfg, DEMO_AS_OF - timedelta(hours=1), DEMO_AS_OF, mode="slow")


@pytest.mark.slow
def test_metric_checks_replay_daily(demo):
    """Two days, hourly, metric checks at the first step, after 24 h and at the last step:
    the planted guardrail harm alerts from the first step and stays open; nothing healthy alerts."""
    cfg = load_config(demo["config"])
    summary = demo["summary"]
    report = replay(cfg, DEMO_AS_OF - timedelta(days=2), DEMO_AS_OF, every=timedelta(hours=1),
                    metrics_every=timedelta(days=1))
    assert report.steps == 49 and not report.skipped
    guard = [t for t in report.timelines if t.check == "guardrail"]
    assert [(t.experiment, t.opened_at, t.closed_at) for t in guard] == [
        ("dark-mode-reader", DEMO_AS_OF - timedelta(days=2), None)]
    assert not [t for t in report.timelines if t.experiment in summary.healthy and t.max_severity != "warn"]


def _timeline(exp, check, opened, closed, returns=0, scope="assigned"):
    t0 = datetime(2026, 11, 1, tzinfo=UTC)
    return AlertTimeline(exp, check, scope, t0 + timedelta(hours=opened), "warn", (),
                         None if closed is None else t0 + timedelta(hours=closed), "warn", None, None, "s", returns)


def test_quietness_counts_flaps_and_reopenings():
    """Explicit clock (hours after 1 November): a flap closes within 24 h of opening; a
    reopening opens within 24 h of the previous close on the same key."""
    q = {r.check: r for r in quietness([
        _timeline("a", "srm", 0, 5),                      # flap (5 h)
        _timeline("a", "srm", 20, 60, returns=2),         # reopened 15 h after the close; 40 h long
        _timeline("a", "srm", 84, None),                  # 24 h after the close: not a reopening; still open
        _timeline("a", "srm", 70, 80, scope="filtered"),  # another key: a flap, not a reopening
        _timeline("b", "leakage", 0, 48),
        _timeline("b", "leakage", 100, 110, returns=1),   # 52 h after the close; a flap
    ])}
    assert q["srm"] == CheckQuietness("srm", episodes=4, flaps=2, reopened=1, returns=2)
    assert q["leakage"] == CheckQuietness("leakage", episodes=2, flaps=1, reopened=0, returns=1)
    assert list(q) == ["leakage", "srm"]


@pytest.mark.slow
def test_quietness_bench_script_runs(demo, capsys, tmp_path):
    """The quietness benchmark (tests/bench/quietness.py) end to end on two days of the demo
    (figures are not asserted), and again on the JSON it saved."""
    from bench.quietness import main as bench

    saved = tmp_path / "replay.json"
    args = ["--dir", str(demo["dir"]), "--from", "2026-11-28T09:00Z", "--to", "2026-11-30T09:00Z", "--allocation-only"]
    assert bench([*args, "--json", str(saved)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("replay 2026-11-28T09:00 .. 2026-11-30T09:00 every 1h: 49 steps")
    for line in ("episodes with no planted problem:", "their keys (experiment, check, scope) with exactly one episode:",
                 "episodes reopened within 24 h of the previous close:", "quietness (clear span 24 h):"):
        assert line in out
    assert bench(["--dir", str(demo["dir"]), "--saved", str(saved)]) == 0
    assert capsys.readouterr().out == out
