"""Replay on the demo warehouse: every planted allocation problem is found at or
after its planted onset, healthy experiments never alert, and the configured
state store is never touched."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from monitor.config import load_config
from monitor.demo import DEMO_AS_OF
from monitor.errors import ConfigError
from monitor.replay import parse_every, render_replay_text, replay, replay_to_json

UTC = timezone.utc
ALLOCATION = ("srm", "leakage", "freshness")


@pytest.fixture(scope="module")
def replayed(demo):
    cfg = load_config(demo["config"])
    summary = demo["summary"]
    onsets = {(p.experiment, p.check): p.onset for p in summary.planted if p.onset is not None}
    start = DEMO_AS_OF - timedelta(days=12)
    store = Path(cfg.state.url.removeprefix("sqlite:///"))
    before = _fingerprint(store)
    report = replay(cfg, start, DEMO_AS_OF, every=timedelta(hours=48), onsets=onsets, allocation_only=True)
    return cfg, summary, report, (before, _fingerprint(store))


def _fingerprint(path: Path):
    return (path.stat().st_mtime_ns, path.stat().st_size) if path.exists() else None


@pytest.mark.slow
def test_every_planted_allocation_problem_is_detected_not_before_its_onset(replayed):
    cfg, summary, report, _ = replayed
    assert report.steps == 7 and report.end == DEMO_AS_OF and not report.skipped
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
def test_healthy_experiments_never_alert(replayed):
    _, summary, report, _ = replayed
    assert summary.healthy
    noisy = [t for t in report.timelines if t.experiment in summary.healthy]
    assert noisy == []


@pytest.mark.slow
def test_the_real_state_store_is_not_touched(replayed):
    before, after = replayed[3]
    assert before == after


@pytest.mark.slow
def test_report_renders_as_text_and_json(replayed):
    _, _, report, _ = replayed
    text = render_replay_text(report)
    assert text.startswith("replay 2026-11-18 09:00 .. 2026-11-30 09:00 UTC every 2d: 7 cycles")
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
