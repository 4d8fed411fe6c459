"""Alert ledger rules: open, stay open without re-notifying, escalate only above the
highest severity seen, resolve on ok or when the experiment stops being live."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import pytest

from monitor import ledger
from monitor.findings import Finding
from monitor.state import StateStore

T = datetime(2026, 11, 1, tzinfo=timezone.utc)


def f(status, critical=False, exp="e1", check="srm", scope="assigned"):
    return Finding(exp, check, scope, status, f"{check} is {status}", {}, 1, critical)


def _step(store, i, found, live=("e1", "e2")):
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), found, live)
        return [e.kind for e in ledger.apply(conn, f"run{i}", T + timedelta(hours=i), found, ev)]


def test_lifecycle(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    assert _step(store, 0, [f("ok")]) == []
    assert _step(store, 1, [f("warn")]) == ["opened"]
    assert _step(store, 2, [f("warn")]) == []                 # still failing: no new event
    assert _step(store, 3, [f("alert")]) == ["escalated"]
    assert _step(store, 4, [f("warn")]) == ["changed"]        # eased: recorded, not notifiable
    assert _step(store, 5, [f("alert")]) == ["changed"]       # back to a level it already had: no re-notify
    assert _step(store, 6, [f("alert", critical=True)]) == ["escalated"]
    assert _step(store, 7, [f("ok")]) == ["resolved"]
    assert _step(store, 8, [f("alert")]) == ["opened"]        # a new alert after resolution
    assert _step(store, 9, [], live=("e2",)) == ["resolved"]  # experiment no longer live
    kinds = [h["event"] for h in store.alert_history()]
    assert kinds == ["opened", "escalated", "changed", "changed", "escalated", "resolved", "opened", "resolved"]
    assert store.open_alerts() == []


def test_keys_are_separate_per_scope(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    assert _step(store, 0, [f("alert", scope="assigned"), f("alert", scope="filtered")]) == ["opened", "opened"]
    assert _step(store, 1, [f("ok", scope="assigned"), f("alert", scope="filtered")]) == ["resolved"]
    assert [a["scope"] for a in store.open_alerts()] == ["filtered"]


def test_notifiable_events():
    ev = ledger.plan([], [f("alert")], ["e1"])
    assert ev[0].notifiable and ev[0].to_json()["severity"] == "alert"


# -- episodes with a clear span (hysteresis) -------------------------------------------------
# Explicit clock: step i is T + i hours; the span is 24 h unless said otherwise.

DAY = timedelta(hours=24)


def _tick(store, i, found, live=("e1", "e2"), clear_for=DAY):
    """One run at hour ``i`` against the state store: (kind, notifiable) of each event."""
    as_of = T + timedelta(hours=i)
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), found, live, as_of=as_of, clear_for=clear_for)
        return [(e.kind, e.notifiable) for e in ledger.apply(conn, f"run{i}", as_of, found, ev)]


def test_a_finding_back_within_the_span_continues_the_episode(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    assert _tick(store, 0, [f("warn")]) == [("opened", True)]
    assert _tick(store, 1, [f("ok")]) == [("cleared", False)]
    assert store.open_alerts()[0]["state"] == "clearing"
    assert _tick(store, 2, [f("ok")]) == []
    assert _tick(store, 11, [f("warn")]) == [("returned", False)]   # 10 h later: same episode, no notification
    assert _tick(store, 12, [f("warn")]) == []
    assert _tick(store, 13, [f("ok")]) == [("cleared", False)]
    assert _tick(store, 36, [f("ok")]) == []                        # clear for 23 h: still the same episode
    assert _tick(store, 37, [f("ok")]) == [("resolved", True)]      # clear for 24 h: closes
    history = store.alert_history()
    assert len({h["alert_id"] for h in history}) == 1
    assert [h["event"] for h in history] == ["opened", "cleared", "returned", "cleared", "resolved"]
    assert store.open_alerts() == []
    assert _tick(store, 38, [f("warn")]) == [("opened", True)]      # after the close: a new episode


def test_escalation_while_clearing_is_immediate(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    assert _tick(store, 0, [f("warn")]) == [("opened", True)]
    assert _tick(store, 1, [f("ok")]) == [("cleared", False)]
    assert _tick(store, 2, [f("alert")]) == [("escalated", True)]
    assert _tick(store, 3, [f("ok")]) == [("cleared", False)]
    assert _tick(store, 4, [f("alert")]) == [("returned", False)]   # a level it has had: not re-notified
    assert _tick(store, 5, [f("alert", critical=True)]) == [("escalated", True)]
    (a,) = store.open_alerts()
    assert a["state"] == "open" and a["max_severity"] == 3


def test_clearing_episodes_close_at_once_when_the_experiment_ends(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    _tick(store, 0, [f("warn")])
    _tick(store, 1, [f("ok")])
    assert _tick(store, 2, [], live=("e2",)) == [("resolved", True)]
    assert store.alert_history()[-1]["summary"] == "the experiment is no longer live"


def test_rerunning_an_hour_while_clearing_adds_nothing(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    _tick(store, 0, [f("warn")])
    assert _tick(store, 5, [f("ok")]) == [("cleared", False)]
    assert _tick(store, 5, [f("ok")]) == []
    assert _tick(store, 29, [f("ok")]) == [("resolved", True)]
    assert _tick(store, 29, [f("ok")]) == []
    # the span is measured from when the finding went clear (hour 5), kept in updated_at
    assert store.alert_history()[-1]["summary"].endswith("(clear since 2026-11-01 05:00 UTC)")


def test_plan_needs_a_time_with_a_span():
    with pytest.raises(ValueError, match="as_of"):
        ledger.plan([], [f("warn")], ["e1"], clear_for=DAY)


def test_in_memory_ledger_matches_the_state_store(tmp_path):
    """The replay's in-memory ledger (``ledger.advance``) gives the events a cycle writes."""
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    memory: dict = {}
    ids = iter(range(1, 100))
    script = ["ok", "warn", "ok", "ok", "alert", "ok", "warn", "ok"] + ["ok"] * 30 + ["warn", "ok"]
    for i, status in enumerate(script):
        found = [f(status), f("warn" if i % 5 == 0 else "ok", check="leakage")]
        as_of = T + timedelta(hours=i)
        mem = ledger.plan(list(memory.values()), found, ["e1"], as_of=as_of, clear_for=DAY)
        ledger.advance(memory, mem, as_of, lambda: next(ids))
        assert [(e.kind, e.key, e.severity) for e in mem] == [(k, key, s) for k, key, s in _tick_full(store, i, found)]


def _tick_full(store, i, found):
    as_of = T + timedelta(hours=i)
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), found, ["e1"], as_of=as_of, clear_for=DAY)
        return [(e.kind, e.key, e.severity) for e in ledger.apply(conn, f"run{i}", as_of, found, ev)]


def test_alerts_command_lists_clearing_episodes(tmp_path, capsys):
    import json

    from test_digest import _cli_config

    from monitor.cli import main

    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    _tick(store, 0, [f("alert"), f("warn", exp="e2")])
    _tick(store, 3, [f("ok"), f("warn", exp="e2")])
    store.dispose()
    cfg = _cli_config(tmp_path, tmp_path / "s.sqlite")  # the digest tests' config (experiment 'ramped')
    cfg.write_text(cfg.read_text() + "checks: {episode_clear_hours: 6}\n")
    assert main(["alerts", "--config", str(cfg)]) == 0
    text = capsys.readouterr().out
    assert text.startswith("1 open alert\n")
    assert ("CLEARING e1 · srm · assigned: clear since 2026-11-01 03:00 UTC, closes at 2026-11-01 09:00 UTC "
            "(highest alert, open since 2026-11-01 00:00 UTC)") in text
    assert main(["alerts", "--config", str(cfg), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert [a["experiment"] for a in doc["alerts"]] == ["e2"]
    assert doc["clearing"] == [{"experiment": "e1", "check": "srm", "scope": "assigned", "highest": "alert",
                                "opened_at": "2026-11-01T00:00:00Z", "clear_since": "2026-11-01T03:00:00Z",
                                "closes_at": "2026-11-01T09:00:00Z"}]


def test_ledger_commands_state_the_episode_rule(capsys):
    from monitor.cli import main

    for command in ("alerts", "replay"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = " ".join(capsys.readouterr().out.split())
        assert "closes only after the check has been ok for checks.episode_clear_hours (default 24 h)" in text
        assert "escalation is notified at once" in text
