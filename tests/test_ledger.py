"""Alert ledger rules: open, stay open without re-notifying, escalate only above the
highest severity seen, resolve on ok or when the experiment stops being live."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

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
