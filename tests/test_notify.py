"""Webhooks against a real HTTP server on loopback: the body, the headers, HMAC
verification, masking of the URL, and at-least-once delivery through faults
(500s, answers slower than the timeout, a refused connection) over many seeded
fault sequences."""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import random
import socket
import threading
import time
from collections import Counter
from datetime import datetime, timedelta, timezone
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest
import requests
import sqlalchemy as sa

from monitor import ledger
from monitor.errors import ConfigError, NotifyError
from monitor.findings import Finding
from monitor.notify import mask_url, ping_heartbeat, post_webhook, render_body, sign, verify_signature
from monitor.notify_config import NotifyConfig, WebhookConfig
from monitor.outbox import deliver_pending, enqueue, ensure_notify_tables, outbox
from monitor.state import StateStore

T0 = datetime(2026, 11, 20, 9, tzinfo=timezone.utc)


class Receiver:
    """A webhook receiver that plays back a script of faults, one per request:
    ``500`` (answer HTTP 500), ``slow`` (answer 200 only after ``slow_seconds``,
    beyond the client's timeout) or ``ok``; when the script is empty it answers ok."""

    def __init__(self, slow_seconds: float = 0.25) -> None:
        self.slow_seconds = slow_seconds
        self.script: list[str] = []
        self.log: list[dict] = []
        self.lock = threading.Lock()
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                with outer.lock:
                    action = outer.script.pop(0) if outer.script else "ok"
                    outer.log.append({"path": self.path, "key": self.headers.get("X-Expwatch-Idempotency-Key"),
                                      "signature": self.headers.get("X-Expwatch-Signature"), "body": body,
                                      "action": action, "content_type": self.headers.get("Content-Type")})
                if action == "slow":
                    time.sleep(outer.slow_seconds)
                code = 500 if action == "500" else 200
                try:
                    self.send_response(code)
                    self.send_header("Content-Length", "0")
                    self.end_headers()
                except OSError:
                    pass

            def do_GET(self) -> None:  # noqa: N802
                with outer.lock:
                    outer.log.append({"path": self.path, "action": "get"})
                self.send_response(204)
                self.end_headers()

            def log_message(self, *args: object) -> None:
                pass

        class Server(ThreadingHTTPServer):
            daemon_threads = True

            def handle_error(self, request: object, client_address: object) -> None:
                pass

        self.server = Server(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.thread = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)

    def url(self, path: str = "/hook/T0KEN?sig=abc") -> str:
        return f"http://127.0.0.1:{self.port}{path}"

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(5)


@pytest.fixture()
def receiver():
    with Receiver() as r:
        yield r


@pytest.fixture()
def session():
    s = requests.Session()
    yield s
    s.close()


def closed_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def memory_store() -> StateStore:
    engine = sa.create_engine("sqlite://", poolclass=sa.pool.StaticPool)
    store = StateStore("sqlite://", engine=engine)
    ensure_notify_tables(store.engine)
    return store


def _events(store: StateStore, run: int, findings: list[Finding], live=("e1", "e2", "e3")):
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), findings, live)
        return ledger.apply(conn, f"run-{run}", T0 + timedelta(hours=run), findings, ev)


def test_signature_matches_an_independent_hmac():
    # RFC 2104 / RFC 4231 test case 2 (key "Jefe", data "what do ya want for nothing?")
    body = b"what do ya want for nothing?"
    assert sign(body, "Jefe") == "sha256=5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert verify_signature(body, sign(body, "Jefe"), "Jefe")
    assert not verify_signature(body + b" ", sign(body, "Jefe"), "Jefe")
    assert not verify_signature(body, None, "Jefe")


def test_mask_url_hides_path_query_and_credentials():
    assert mask_url("https://user:pw@chat.example.org:8443/services/T0/B1/SECRET?x=1") == "https://chat.example.org:8443/***"
    assert mask_url("not a url") == "<webhook url>"


def test_default_body_is_a_text_field_with_one_line_per_event(tmp_path, receiver, session, monkeypatch):
    monkeypatch.setenv("HOOK_SECRET", "s3cret")
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    ensure_notify_tables(store.engine)
    hook = WebhookConfig(name="chat", url=receiver.url(), hmac_secret_env="HOOK_SECRET")
    cfg = NotifyConfig(webhooks=[hook])
    found = [Finding("e1", "srm", "assigned", "alert", "SRM at stage assigned: shares 51.4/48.6% <b>x</b>", {}, 1),
             Finding("e2", "leakage", "assigned", "warn", "0.2% of units leaked", {}, 1)]
    evs = _events(store, 0, found)
    with store.transaction() as conn:
        keys = enqueue(conn, "run-0", T0, evs, cfg)
    assert len(keys) == 1
    rep = deliver_pending(store.engine, cfg, session=session, clock=lambda: T0)
    assert (rep.delivered, rep.failed, rep.pending) == (1, 0, 0)
    got = receiver.log[0]
    assert got["path"] == "/hook/T0KEN?sig=abc" and got["key"] == keys[0]
    assert got["content_type"].startswith("application/json")
    # the signature is an HMAC-SHA256 of the exact body bytes, checked with the standard library
    assert got["signature"] == "sha256=" + hmac.new(b"s3cret", got["body"], hashlib.sha256).hexdigest()
    text = json.loads(got["body"])["text"]
    lines = text.splitlines()
    assert lines[0].startswith("expwatch · 1 opened") and "2026-11-20 09:00 UTC" in lines[0]
    # warn is below the default notify_on=alert: only the SRM alert is pushed
    assert lines[1:] == ["ALERT e1 · srm · assigned: SRM at stage assigned: shares 51.4/48.6% <b>x</b>"]


def test_custom_template_and_bad_templates(tmp_path):
    good = tmp_path / "card.json.j2"
    good.write_text('{"title": {{ message.header | tojson }}, "items": {{ message.events | map(attribute="experiment") | list | tojson }}}')
    msg = {"header": 'a "quoted" header', "lines": [], "events": [{"experiment": "kids-corner-'lesefüchse'"}]}
    body = json.loads(render_body(msg, WebhookConfig(name="x", url="http://h/", template=str(good))))
    assert body == {"title": 'a "quoted" header', "items": ["kids-corner-'lesefüchse'"]}
    bad = tmp_path / "bad.json.j2"
    bad.write_text("{{ message.header }}")
    with pytest.raises(ConfigError, match="valid JSON"):
        render_body(msg, WebhookConfig(name="x", url="http://h/", template=str(bad)))
    with pytest.raises(ConfigError, match="cannot be read"):
        render_body(msg, WebhookConfig(name="y", url="http://h/", template=str(tmp_path / "missing.j2")))


def test_errors_never_show_the_secret_part_of_the_url(receiver, session, caplog):
    hook = WebhookConfig(name="chat", url=f"http://127.0.0.1:{closed_port()}/hook/VERYSECRET", timeout_seconds=1)
    with pytest.raises(NotifyError) as exc:
        post_webhook(hook, b"{}", "k", session=session)
    assert "VERYSECRET" not in str(exc.value) and "connection failed" in str(exc.value)
    receiver.script = ["500"]
    hook = WebhookConfig(name="chat", url=receiver.url("/hook/VERYSECRET"))
    with pytest.raises(NotifyError, match="HTTP 500") as exc:
        post_webhook(hook, b"{}", "k", session=session)
    assert "VERYSECRET" not in str(exc.value)


def test_missing_hmac_secret_is_a_config_error(receiver, session, monkeypatch):
    monkeypatch.delenv("NOT_SET_ANYWHERE", raising=False)
    hook = WebhookConfig(name="chat", url=receiver.url(), hmac_secret_env="NOT_SET_ANYWHERE")
    with pytest.raises(ConfigError, match="NOT_SET_ANYWHERE"):
        post_webhook(hook, b"{}", "k", session=session)
    assert receiver.log == []


def test_heartbeat_pings_and_never_raises(receiver, session, caplog):
    assert ping_heartbeat(receiver.url("/beat/abc"), session=session) is True
    assert receiver.log[-1] == {"path": "/beat/abc", "action": "get"}
    with caplog.at_level(logging.WARNING, logger="monitor"):
        assert ping_heartbeat(f"http://127.0.0.1:{closed_port()}/beat/SECRET", session=session, timeout=1) is False
    assert "SECRET" not in caplog.text and "heartbeat" in caplog.text


def test_at_least_once_through_seeded_fault_sequences(tmp_path, receiver, session, monkeypatch, caplog):
    """50 seeded fault sequences x several delivery rounds: every message arrives,
    no key is answered 2xx twice, duplicates happen only after a timed-out
    attempt (the receiver had the body but the answer came too late), and every
    body's HMAC verifies."""
    monkeypatch.setenv("SECRET_A", "alpha-secret")
    monkeypatch.setenv("SECRET_B", "beta-secret")
    refused = closed_port()
    caplog.set_level(logging.CRITICAL, logger="monitor")
    totals = Counter()
    for seed in range(50):
        rng = random.Random(seed)
        receiver.log.clear()
        store = memory_store()
        live = [WebhookConfig(name="a", url=receiver.url("/a/TOKEN"), hmac_secret_env="SECRET_A",
                              timeout_seconds=0.1, max_attempts=2),
                WebhookConfig(name="b", url=receiver.url("/b/TOKEN"), hmac_secret_env="SECRET_B",
                              timeout_seconds=0.1, max_attempts=1, route={"experiments": ["e1", "e3"]})]
        cfg = NotifyConfig(webhooks=live, retry_base_seconds=60, retry_max_seconds=3600)
        keys: set[str] = set()
        runs = [[Finding("e1", "srm", "assigned", "alert", "e1 broke", {}, 1)],
                [Finding("e1", "srm", "assigned", "ok", "e1 fine", {}, 1),
                 Finding("e2", "freshness", "assigned", "alert", "e2 stale", {}, 1)],
                [Finding("e3", "leakage", "assigned", "alert", "e3 leaks", {}, 1)]]
        for i, found in enumerate(runs):
            evs = _events(store, i, found)
            with store.transaction() as conn:
                keys |= set(enqueue(conn, f"run-{i}", T0 + timedelta(hours=i), evs, cfg))
        assert len(keys) == 6  # one message per destination per run (b: e1 and e3 only, each run has one)
        t = T0 + timedelta(hours=3)
        for rnd in range(12):
            # this round's faults: a random script, and sometimes every hook points at a closed port
            receiver.script = rng.choices(["500", "slow", "ok"], weights=[3, 1, 3], k=rng.randint(0, 6))
            down = rng.random() < 0.25 and rnd < 8
            hooks = [h.model_copy(update={"url": f"http://127.0.0.1:{refused}/x/TOKEN"}) if down else h for h in live]
            rep = deliver_pending(store.engine, cfg.model_copy(update={"webhooks": hooks}), session=session,
                                  clock=lambda: t, rng=rng, sleep=lambda s: None)
            totals["failed_rounds"] += rep.failed
            totals["down_rounds"] += int(down)
            if rep.pending == 0 and not down:
                break
            t += timedelta(seconds=cfg.retry_max_seconds + 1)
        receiver.script = []
        with store.engine.connect() as conn:
            rows = conn.execute(outbox.select()).mappings().all()
        assert all(r["delivered_at"] is not None for r in rows), f"seed {seed}: undelivered after the rounds"
        ok = Counter(r["key"] for r in receiver.log if r["action"] == "ok")
        assert set(ok) == keys and max(ok.values()) == 1, f"seed {seed}: a key was answered 2xx twice"
        seen = Counter(r["key"] for r in receiver.log if r["action"] in ("ok", "slow"))
        slow = Counter(r["key"] for r in receiver.log if r["action"] == "slow")
        for k, n in seen.items():
            assert n - 1 <= slow[k], f"seed {seed}: duplicate without a timed-out attempt"
        totals["duplicates"] += sum(n - 1 for n in seen.values())
        for r in receiver.log:
            secret = b"alpha-secret" if r["path"].startswith("/a/") else b"beta-secret"
            assert r["signature"] == "sha256=" + hmac.new(secret, r["body"], hashlib.sha256).hexdigest()
        totals["requests"] += len(receiver.log)
        store.dispose()
    # the sequences did exercise the faults
    assert totals["failed_rounds"] > 20 and totals["down_rounds"] > 10 and totals["duplicates"] >= 1


@pytest.mark.slow
def test_demo_run_reaches_a_webhook(demo, tmp_path, receiver, session):
    """The demo's recorded alerts, enqueued and delivered: one line per opened alert,
    as the ledger recorded them, and nothing else."""
    from monitor.config import StateConfig, load_config
    from monitor.cycle import run_cycle
    from monitor.demo import DEMO_AS_OF

    cfg = load_config(demo["config"])
    cfg = cfg.model_copy(update={"state": StateConfig(url=f"sqlite:///{tmp_path / 'state.sqlite'}")})
    result = run_cycle(cfg, as_of=DEMO_AS_OF)
    assert result.recorded
    ncfg = NotifyConfig(webhooks=[WebhookConfig(name="all", url=receiver.url("/all/T"))])
    store = StateStore(cfg.state.url or "")
    ensure_notify_tables(store.engine)
    with store.transaction() as conn:
        keys = enqueue(conn, result.run_id, result.as_of, result.events, ncfg, result.experiments)
    rep = deliver_pending(store.engine, ncfg, session=session, clock=lambda: DEMO_AS_OF)
    assert len(keys) == 1 and rep.delivered == 1
    lines = json.loads(receiver.log[0]["body"])["text"].splitlines()
    opened = [e for e in result.events if e.kind == "opened" and e.severity >= 2]
    assert len(lines) == 1 + len(opened) and len(opened) >= 5
    assert {ln.split(": ", 1)[0].split(" ", 1)[1] for ln in lines[1:]} == {f"{e.experiment} · {e.check} · {e.scope}" for e in opened}
    store.dispose()


@pytest.mark.slow
def test_cycle_queues_and_delivers_in_the_run(demo, tmp_path, receiver):
    """run_cycle itself queues the run's alerts in its transaction and delivers them:
    one chat message for the demo, nothing more when the same hour runs again, and
    one 'monitor failing' notice when the warehouse is gone (not one per failed run)."""
    import shutil

    from monitor.config import StateConfig, WarehouseConfig, load_config
    from monitor.cycle import run_cycle
    from monitor.demo import DEMO_AS_OF
    from monitor.errors import WarehouseError

    cfg = load_config(demo["config"])
    cfg = cfg.model_copy(update={
        "state": StateConfig(url=f"sqlite:///{tmp_path / 'state.sqlite'}"),
        "notify": NotifyConfig(webhooks=[WebhookConfig(name="all", url=receiver.url("/all/T"))]),
    })
    first = run_cycle(cfg, as_of=DEMO_AS_OF)
    assert first.recorded and len(receiver.log) == 1
    opened = [e for e in first.events if e.kind == "opened" and e.severity >= 2]
    assert len(json.loads(receiver.log[0]["body"])["text"].splitlines()) == 1 + len(opened)
    run_cycle(cfg, as_of=DEMO_AS_OF)
    assert len(receiver.log) == 1  # the same hour again: nothing new to say
    wh_copy = tmp_path / "gone.duckdb"
    shutil.copy(demo["dir"] / "warehouse.duckdb", wh_copy)
    broken = cfg.model_copy(update={"warehouse": WarehouseConfig(url=f"duckdb:///{wh_copy}")})
    wh_copy.unlink()
    for _ in range(3):
        with pytest.raises(WarehouseError):
            run_cycle(broken, as_of=DEMO_AS_OF)
    assert len(receiver.log) == 2
    assert "fail" in json.loads(receiver.log[1]["body"])["text"].lower()


def test_a_collision_pair_finding_reaches_the_owners_of_both_experiments():
    """A collision pair problem is one finding, under the experiment whose id sorts first
    (monitor.collision); a destination routed by owner hears of it from either side."""
    store = memory_store()
    cfg = NotifyConfig(webhooks=[
        WebhookConfig(name="team-a", url="http://127.0.0.1:9/a", route={"owners": ["team-a"]}),
        WebhookConfig(name="team-b", url="http://127.0.0.1:9/b", route={"owners": ["team-b"]}),
        WebhookConfig(name="team-c", url="http://127.0.0.1:9/c", route={"owners": ["team-c"]})])
    metas = {"e1": {"owner": "team-a"}, "e2": {"owner": "team-b"}, "e3": {"owner": "team-c"}}
    found = [Finding("e1", "collision", "e2:errors", "alert", "errors: the effect depends on 'e2'", {})]
    evs = _events(store, 0, found)
    with store.transaction() as conn:
        keys = enqueue(conn, "run-0", T0, evs, cfg, metas)
    with store.engine.connect() as conn:
        rows = {r["destination"]: json.loads(r["payload"]) for r in conn.execute(outbox.select()).mappings()}
    assert len(keys) == 2 and set(rows) == {"team-a", "team-b"}
    (ev,) = rows["team-b"]["events"]
    assert ev["experiment"] == "e1" and ev["experiments"] == ["e1", "e2"]
