"""The outbox: one message per destination per run, idempotent reruns, routing,
severity floor, mutes, retry schedule, and one monitor-failing notice plus one
recovery notice however many runs fail."""

from __future__ import annotations

import json
import random
from datetime import datetime, timedelta, timezone

import pytest
import sqlalchemy as sa

from monitor import ledger
from monitor.errors import ConfigError
from monitor.findings import Finding
from monitor.notify_config import NotifyConfig, WebhookConfig
from monitor.outbox import (ExperimentMeta, active_mutes, backoff_seconds, deliver_pending, enqueue,
                            ensure_notify_tables, migration_outbox, mute, outbox, pending_messages,
                            record_failure, record_success, unmute)
from monitor.registry import Experiment, Phase
from monitor.state import StateStore

T0 = datetime(2026, 11, 20, 9, tzinfo=timezone.utc)


@pytest.fixture()
def store():
    s = StateStore("sqlite://", engine=sa.create_engine("sqlite://", poolclass=sa.pool.StaticPool))
    with s.engine.begin() as conn:
        migration_outbox(conn)
    yield s
    s.dispose()


def hook(name, **kw):
    return WebhookConfig(name=name, url=f"http://127.0.0.1:9/{name}/TOKEN", **kw)


def run(store, i, found, live=("e1", "e2", "e3")):
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), found, live)
        return ledger.apply(conn, f"run-{i}", T0 + timedelta(hours=i), found, ev)


def enq(store, i, events, cfg, meta=None):
    with store.transaction() as conn:
        return enqueue(conn, f"run-{i}", T0 + timedelta(hours=i), events, cfg, meta)


def messages(store):
    with store.engine.connect() as conn:
        return [dict(r) | {"payload": json.loads(r["payload"])} for r in conn.execute(outbox.select().order_by(outbox.c.id)).mappings()]


def F(exp, status, check="srm", critical=False):
    return Finding(exp, check, "assigned", status, f"{exp} {check} {status}", {}, 1, critical)


def test_same_run_twice_gives_one_message(store):
    cfg = NotifyConfig(webhooks=[hook("a"), hook("b")])
    evs = run(store, 0, [F("e1", "alert"), F("e2", "alert")])
    k1 = enq(store, 0, evs, cfg)
    k2 = enq(store, 0, evs, cfg)
    assert len(k1) == 2 and k2 == []
    msgs = messages(store)
    assert len(msgs) == 2 and {m["destination"] for m in msgs} == {"a", "b"}
    assert all(len(m["payload"]["events"]) == 2 for m in msgs)
    # the key depends on the destination, the run and the events, nothing else
    other = enq(store, 1, evs, cfg)
    assert len(other) == 2 and not set(other) & set(k1)


def test_routing_by_owner_tag_and_experiment_pattern(store):
    cfg = NotifyConfig(webhooks=[
        hook("all"),
        hook("reading-team", route={"owners": ["reading-team"]}),
        hook("loans", route={"tags": ["loans"]}),
        hook("pattern", route={"experiments": ["e[12]"]}),
        hook("both", route={"owners": ["reading-team"], "tags": ["loans"]}),
    ])
    meta = {"e1": ExperimentMeta(owner="reading-team", tags=("ui",)),
            "e2": {"owner": "loans-team", "tags": ["loans"]},
            "e3": ExperimentMeta(owner="reading-team", tags=("loans",))}
    evs = run(store, 0, [F("e1", "alert"), F("e2", "alert"), F("e3", "alert")])
    enq(store, 0, evs, cfg, meta)
    got = {m["destination"]: sorted(e["experiment"] for e in m["payload"]["events"]) for m in messages(store)}
    assert got == {"all": ["e1", "e2", "e3"], "reading-team": ["e1", "e3"], "loans": ["e2", "e3"],
                   "pattern": ["e1", "e2"], "both": ["e3"]}


def test_registry_experiments_are_accepted_as_meta(store):
    ph = (Phase(1, T0 - timedelta(days=3), None, {"control": 0.5, "treatment": 0.5}),)
    exps = [Experiment("e1", "control", ("control", "treatment"), ph, "running", "reading-team", "Bigger fonts")]
    evs = run(store, 0, [F("e1", "alert")])
    enq(store, 0, evs, NotifyConfig(webhooks=[hook("a", route={"owners": ["reading-team"]})]), exps)
    (m,) = messages(store)
    assert m["payload"]["events"][0]["title"] == "Bigger fonts"


def test_severity_floor_and_resolutions(store):
    cfg = NotifyConfig(webhooks=[hook("a")])  # notify_on: alert
    assert enq(store, 0, run(store, 0, [F("e1", "warn"), F("e2", "alert")]), cfg)
    assert [e["experiment"] for e in messages(store)[0]["payload"]["events"]] == ["e2"]
    # e1 resolves: it never reached the floor, so its resolution is not pushed either; e2's is
    assert enq(store, 1, run(store, 1, [F("e1", "ok"), F("e2", "ok")]), cfg)
    last = messages(store)[-1]["payload"]
    assert [(e["event"], e["experiment"]) for e in last["events"]] == [("resolved", "e2")]
    assert last["lines"][0].startswith("RESOLVED e2 · srm · assigned")
    # warn -> critical escalation passes a 'critical' floor; a plain alert does not
    crit = NotifyConfig(webhooks=[hook("a")], notify_on="critical")
    assert enq(store, 2, run(store, 2, [F("e3", "alert")]), crit) == []
    assert enq(store, 3, run(store, 3, [F("e3", "alert", critical=True)]), crit)
    assert messages(store)[-1]["payload"]["lines"][0].startswith("ESCALATED to CRITICAL e3")
    # 'changed' events (eased) are never pushed
    evs = run(store, 4, [F("e3", "warn")])
    assert [e.kind for e in evs] == ["changed"] and enq(store, 4, evs, NotifyConfig(webhooks=[hook("a")], notify_on="warn")) == []


def test_muted_alerts_are_not_enqueued(store):
    cfg = NotifyConfig(webhooks=[hook("a")])
    mute(store.engine, "e1", "srm", T0 + timedelta(days=2), "known logging bug, fix shipping", clock=lambda: T0)
    mute(store.engine, "e2", None, T0 + timedelta(hours=1, minutes=30), "ramp in progress", clock=lambda: T0)
    evs = run(store, 0, [F("e1", "alert"), F("e1", "alert", check="leakage"), F("e2", "alert", check="freshness")])
    enq(store, 0, evs, cfg)
    assert [(e["experiment"], e["check"]) for e in messages(store)[0]["payload"]["events"]] == [("e1", "leakage")]
    with store.engine.connect() as conn:
        assert {(m.experiment, m.check) for m in active_mutes(conn, T0 + timedelta(hours=1))} == {("e1", "srm"), ("e2", None)}
        assert {(m.experiment, m.check) for m in active_mutes(conn, T0 + timedelta(hours=2))} == {("e1", "srm")}
    assert unmute(store.engine, "e1", "srm") == 1 and unmute(store.engine, "e1", "srm") == 0
    with pytest.raises(ConfigError, match="not in the future"):
        mute(store.engine, "e1", None, T0 - timedelta(hours=1), "late", clock=lambda: T0)
    with pytest.raises(ConfigError, match="reason"):
        mute(store.engine, "e1", None, T0 + timedelta(hours=1), "  ", clock=lambda: T0)


def test_backoff_doubles_with_jitter_inside_its_band():
    cfg = NotifyConfig(retry_base_seconds=60, retry_max_seconds=3600)
    rng = random.Random(7)
    for k in range(1, 10):
        d = min(60 * 2 ** (k - 1), 3600)
        waits = [backoff_seconds(k, cfg, rng) for _ in range(200)]
        assert d / 2 <= min(waits) and max(waits) <= d
        assert max(waits) - min(waits) > 0.3 * d / 2  # jittered, not constant


def test_failed_delivery_is_scheduled_and_kept(store):
    cfg = NotifyConfig(webhooks=[hook("a", timeout_seconds=0.5, max_attempts=2)], retry_base_seconds=60)
    enq(store, 0, run(store, 0, [F("e1", "alert")]), cfg)
    sleeps = []
    rep = deliver_pending(store.engine, cfg, clock=lambda: T0, rng=random.Random(1), sleep=sleeps.append)
    assert (rep.attempted, rep.delivered, rep.failed, rep.requests, rep.pending) == (1, 0, 1, 2, 1)
    assert sleeps == [0.25]
    (p,) = pending_messages(store.engine)
    assert p["attempts"] == 2 and "connection failed" in p["last_error"] and "TOKEN" not in p["last_error"]
    assert T0 + timedelta(seconds=30) <= p["next_attempt_at"] <= T0 + timedelta(seconds=60)
    # not due yet: nothing is tried
    rep = deliver_pending(store.engine, cfg, clock=lambda: T0 + timedelta(seconds=29), sleep=sleeps.append)
    assert rep.attempted == 0 and rep.pending == 1
    # a destination removed from the config keeps its messages queued
    rep = deliver_pending(store.engine, NotifyConfig(), clock=lambda: T0 + timedelta(hours=1))
    assert (rep.attempted, rep.pending, rep.orphaned) == (0, 1, 1)


def test_monitor_failing_once_and_recovered_once(store):
    cfg = NotifyConfig(webhooks=[hook("a"), hook("b")])
    assert record_success(store.engine, cfg, clock=lambda: T0) is False  # healthy: nothing to say
    firsts = [record_failure(store.engine, f"warehouse unreachable (attempt {i})", cfg, clock=lambda i=i: T0 + timedelta(hours=i))
              for i in range(1, 6)]
    assert firsts == [True, False, False, False, False]
    kinds = [(m["destination"], m["payload"]["kind"]) for m in messages(store)]
    assert kinds == [("a", "monitor_failing"), ("b", "monitor_failing")]
    assert record_success(store.engine, cfg, clock=lambda: T0 + timedelta(hours=6)) is True
    assert record_success(store.engine, cfg, clock=lambda: T0 + timedelta(hours=7)) is False
    msgs = messages(store)
    assert [m["payload"]["kind"] for m in msgs] == ["monitor_failing"] * 2 + ["monitor_recovered"] * 2
    assert "5 failed run(s)" in msgs[-1]["payload"]["header"] and "attempt 5" in msgs[-1]["payload"]["header"]
    # a new failing spell is a new notice
    assert record_failure(store.engine, "query error", cfg, clock=lambda: T0 + timedelta(hours=8)) is True
    assert len(messages(store)) == 6


def test_record_failure_on_an_unusable_store_returns_false(tmp_path):
    eng = sa.create_engine(f"sqlite:///{tmp_path / 'missing-dir' / 's.sqlite'}")
    assert record_failure(eng, "boom", NotifyConfig(webhooks=[hook("a")])) is False
    eng.dispose()


def test_tables_are_created_on_a_store_that_predates_them(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    ensure_notify_tables(s.engine)
    ensure_notify_tables(s.engine)  # idempotent
    assert {"expwatch_outbox", "expwatch_notify_state", "expwatch_mutes"} <= set(sa.inspect(s.engine).get_table_names())
    s.dispose()


def test_the_commented_example_block_parses_and_lists_every_key():
    import re
    from pathlib import Path

    import yaml
    from pydantic import BaseModel

    text = (Path(__file__).resolve().parent.parent / "config" / "example.yaml").read_text()
    block = text[text.index("# notify:"):]
    block = block[: block.index("\n\n")]
    data = yaml.safe_load("\n".join(ln[2:] if ln.startswith("# ") else ln.lstrip("#") for ln in block.splitlines()))
    env = {"EXPWATCH_HEARTBEAT_URL": "https://beat.library.example/x", "READING_CHAT_WEBHOOK": "https://chat.library.example/x"}

    def interp(v):
        if isinstance(v, str):
            return re.sub(r"\$\{(\w+)\}", lambda m: env[m.group(1)], v)
        if isinstance(v, dict):
            return {k: interp(x) for k, x in v.items()}
        if isinstance(v, list):
            return [interp(x) for x in v]
        return v

    cfg = NotifyConfig.model_validate(interp(data["notify"]))
    assert cfg.webhooks[0].route.experiments == ["reader-*"] and cfg.email.security == "starttls"

    def keys(model):
        out = set()
        for name, field in model.model_fields.items():
            out.add(name)
            for t in (field.annotation, *getattr(field.annotation, "__args__", ())):
                for u in (t, *getattr(t, "__args__", ())):
                    if isinstance(u, type) and issubclass(u, BaseModel):
                        out |= keys(u)
        return out

    missing = sorted(k for k in keys(NotifyConfig) if f"{k}:" not in block)
    assert not missing, missing


def test_enqueue_creates_missing_tables_inside_the_run_transaction(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    with s.engine.begin() as c:  # a store whose notification tables are gone
        for name in [t for t in sa.inspect(c).get_table_names() if t.startswith("expwatch_") and t not in
                     {"expwatch_meta", "expwatch_runs", "expwatch_counts", "expwatch_count_series", "expwatch_watermarks",
                      "expwatch_findings", "expwatch_alerts", "expwatch_alert_events", "expwatch_locks",
                      "expwatch_metric_snapshots"}]:
            c.execute(sa.text(f'DROP TABLE "{name}"'))
    assert not sa.inspect(s.engine).has_table("expwatch_outbox")
    keys = enq(s, 0, run(s, 0, [F("e1", "alert")]), NotifyConfig(webhooks=[hook("a")]))
    assert len(keys) == 1 and len(messages(s)) == 1
    s.dispose()
