"""Delivery under injected faults, against loopback servers only: an SMTP sink
(aiosmtpd) and a webhook receiver (http.server) that misbehave in seeded ways.

What is proven here:

* the digest: one e-mail per (day, recipient) in the outbox; a refused recipient
  is retried, not skipped; a second send of a delivered day is a no-op unless
  ``--force``; ``serve`` retries a failed digest; a digest undelivered at its
  deadline raises one monitor-health notice per webhook; over many simulated days
  with every fault kind each recipient gets exactly one copy a day, except that a
  lost reply (server stored the message, the connection dropped before its 250)
  gives at most one extra copy carrying the same Message-ID;
* monitor health: two processes on one store through one outage send one
  "failing" and one "recovered" notice per webhook, keyed by the outage;
* leases: two deliverers on one outbox never send the same row;
* ``Retry-After`` (seconds and HTTP date) is honoured up to the cap, as one failed round;
* a state store that cannot be written during delivery: one line, exit 1, metrics gauge 0.

The trial size is ``EXPWATCH_DELIVERY_TRIAL_DAYS`` simulated days (default 34).
"""

from __future__ import annotations

import asyncio
import email
import email.policy
import json
import os
import random
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import datetime, timedelta, timezone
from email.utils import format_datetime
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from conftest import registry_frame, write_duckdb_warehouse
from test_digest import _free_port
from test_serve import _reset_logging  # noqa: F401  (autouse: `main` attaches a handler to captured stderr)

from monitor import outbox as ob
from monitor.cli import main
from monitor.config import load_config
from monitor.digest import retry_digest, run_digest
from monitor.errors import NotifyError
from monitor.notify import parse_retry_after
from monitor.notify_config import NotifyConfig, WebhookConfig
from monitor.state import SCHEMA_VERSION, StateStore, meta

UTC = timezone.utc
ROOT = Path(__file__).resolve().parent.parent
TRIAL_DAYS = int(os.environ.get("EXPWATCH_DELIVERY_TRIAL_DAYS", "34"))


# -- the SMTP sink ---------------------------------------------------------------------

class FaultySink:
    """aiosmtpd handler; ``faults[recipient]`` is consumed one fault per transaction.

    Fault kinds: ``busy`` (451 at RCPT), ``refuse`` (550 at RCPT), ``drop`` (the
    connection closes during DATA before the message is stored), ``stall`` (no
    answer to DATA until the client's timeout; nothing stored), ``reply_lost`` (the
    message is stored, then the connection drops before the 250 reply). A server
    that is down is a closed port (see :func:`_cfg_with_port`)."""

    def __init__(self) -> None:
        self.faults: dict[str, list[str]] = {}
        self.stored: list[tuple[str, str, str]] = []  # (recipient, Message-ID, Subject)
        self.lock = threading.Lock()

    def _next(self, rcpt: str, kinds: tuple[str, ...]) -> str | None:
        with self.lock:
            q = self.faults.get(rcpt) or []
            if q and q[0] in kinds:
                return q.pop(0)
        return None

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):
        f = self._next(address, ("busy", "refuse"))
        if f == "busy":
            return "451 4.3.0 try again later"
        if f == "refuse":
            return "550 5.1.1 mailbox unavailable"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):
        rcpt = envelope.rcpt_tos[0]
        f = self._next(rcpt, ("drop", "stall", "reply_lost"))
        if f == "drop":
            server.transport.abort()
            return "451 4.3.0 never seen"
        if f == "stall":
            await asyncio.sleep(1.0)  # the client gave up after 0.3 s
            server.transport.abort()
            return "451 4.3.0 never seen"
        msg = email.message_from_bytes(envelope.original_content or envelope.content, policy=email.policy.default)
        with self.lock:  # one copy per envelope recipient
            self.stored.extend((r, str(msg["Message-ID"]), str(msg["Subject"])) for r in envelope.rcpt_tos)
        if f == "reply_lost":
            server.transport.abort()
        return "250 OK"


class SmtpServer:
    def __init__(self, port: int | None = None) -> None:
        from aiosmtpd.controller import Controller

        self.sink = FaultySink()
        self.port = port or _free_port()
        self.loop = asyncio.new_event_loop()
        self.ctl = Controller(self.sink, hostname="127.0.0.1", port=self.port, loop=self.loop)

    def __enter__(self) -> SmtpServer:
        self.ctl.start()
        return self

    def __exit__(self, *exc) -> None:
        self.ctl.stop()
        self.loop.close()


# -- the webhook receiver --------------------------------------------------------------

class Receiver:
    """A loopback HTTP server recording every POST; ``script`` holds answers
    (status, headers, delay seconds) used one per request, then 200."""

    def __init__(self) -> None:
        self.posts: list[dict] = []
        self.script: list[tuple[int, dict, float]] = []
        self.delay = 0.0
        self.lock = threading.Lock()
        recv = self

        class H(BaseHTTPRequestHandler):
            def do_POST(self):
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                with recv.lock:
                    recv.posts.append({"path": self.path, "key": self.headers.get("X-Expwatch-Idempotency-Key"),
                                       "body": json.loads(body), "at": time.monotonic()})
                    status, headers, delay = recv.script.pop(0) if recv.script else (200, {}, recv.delay)
                time.sleep(delay)
                self.send_response(status)
                for k, v in headers.items():
                    self.send_header(k, v)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *a):
                pass

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), H)
        self.port = self.httpd.server_address[1]
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)

    def url(self, name: str) -> str:
        return f"http://127.0.0.1:{self.port}/{name}/TOKEN"

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()

    def kinds(self, path_prefix: str) -> list[tuple[str, str]]:
        return [(p["key"], p["body"]["text"]) for p in self.posts if p["path"].startswith(path_prefix)]


def _config(tmp_path: Path, *, smtp_port: int, recipients=("ana@library.example", "ben@library.example"),
            hooks: dict[str, str] | None = None, extra: str = "", warehouse: bool = False) -> Path:
    hook_yaml = "".join(f'\n    - {{name: {n}, url: "{u}", max_attempts: 2, timeout_seconds: 2}}'
                        for n, u in (hooks or {}).items())
    reg = ("registry: {table: experiments}\nassignments: {table: assignments}\n" if warehouse else """registry:
  inline:
    - experiment: shelf-sort
      control: control
      phases: [{start: 2026-11-16T09:00:00Z, weights: {control: 0.5, treatment: 0.5}}]
assignments: {table: events.exposures}
""")
    text = f"""
warehouse: {{url: "duckdb:///{tmp_path / 'w.duckdb'}"}}
state: {{url: "sqlite:///{tmp_path / 'state.sqlite'}"}}
{reg}notify:
  retry_base_seconds: 60
  retry_max_seconds: 600
  webhooks:{hook_yaml or " []"}
  email:
    smtp_host: 127.0.0.1
    smtp_port: {smtp_port}
    security: none
    sender: expwatch@library.example
    recipients: [{", ".join(recipients)}]
    timeout_seconds: 0.3
{extra}"""
    path = tmp_path / "expwatch.yaml"
    path.write_text(text)
    # an existing, empty store: 'digest' refuses one that does not exist (a mistyped state.url)
    StateStore(f"sqlite:///{tmp_path / 'state.sqlite'}").dispose()
    return path


def _cfg_with_port(cfg, port: int):
    email_cfg = cfg.notify.email.model_copy(update={"smtp_port": port})
    return cfg.model_copy(update={"notify": cfg.notify.model_copy(update={"email": email_cfg})})


# -- the digest: CLI-level reproductions ------------------------------------------------

def test_second_send_on_the_same_day_is_a_noop_unless_forced(tmp_path, capsys):
    with SmtpServer() as srv:
        cfg = str(_config(tmp_path, smtp_port=srv.port))
        assert main(["digest", "--config", cfg, "--send"]) == 0
        first = capsys.readouterr().err.strip()
        assert main(["digest", "--config", cfg, "--send"]) == 0
        second = capsys.readouterr().err.strip()
        assert len(srv.sink.stored) == 2  # one per recipient, not two
        subject = srv.sink.stored[0][2]
        assert first.endswith(f"sent to 2 recipient(s): {subject}")  # the subject as sent
        assert "already delivered to 2 recipient(s), nothing sent" in second and second.endswith(subject)
        assert main(["digest", "--config", cfg, "--send", "--force"]) == 0
        assert len(srv.sink.stored) == 4
        ids = [m for _, m, _ in srv.sink.stored]
        assert ids[0] == ids[1] != ids[2] == ids[3]  # a forced resend is a new message, the same for both


def test_a_refused_recipient_fails_the_send_and_is_retried_not_skipped(tmp_path, capsys):
    with SmtpServer() as srv:
        cfg = str(_config(tmp_path, smtp_port=srv.port))
        srv.sink.faults["ben@library.example"] = ["refuse"]
        assert main(["digest", "--config", cfg, "--send"]) == 1
        err = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("expwatch:")]
        assert len(err) == 1 and "ben@library.example" in err[0] and "550" in err[0] and "1 of 2" in err[0]
        assert [r for r, _, _ in srv.sink.stored] == ["ana@library.example"]
        assert main(["digest", "--config", cfg, "--send"]) == 0  # retries Ben only, at once
        assert sorted(r for r, _, _ in srv.sink.stored) == ["ana@library.example", "ben@library.example"]
        assert len({m for _, m, _ in srv.sink.stored}) == 1


def test_a_lost_reply_gives_at_most_one_extra_copy_with_the_same_message_id(tmp_path, capsys):
    with SmtpServer() as srv:
        cfg = str(_config(tmp_path, smtp_port=srv.port, recipients=("ana@library.example",)))
        srv.sink.faults["ana@library.example"] = ["reply_lost"]
        assert main(["digest", "--config", cfg, "--send"]) == 1
        assert "connection closed before the server confirmed" in capsys.readouterr().err
        assert main(["digest", "--config", cfg, "--send"]) == 0
        assert main(["digest", "--config", cfg, "--send"]) == 0
        assert len(srv.sink.stored) == 2 and srv.sink.stored[0][1] == srv.sink.stored[1][1]


# -- the digest: trials over simulated days ---------------------------------------------

KINDS = ("busy", "refuse", "drop", "stall", "reply_lost")


@pytest.mark.slow
def test_digest_trials_every_recipient_gets_one_copy_a_day(tmp_path):
    """Seeded faults on every day; each day runs as ``serve`` would: the daily job,
    then retries when due (simulated clock), until every recipient has it."""
    rng = random.Random(20261205)
    recipients = ("ana@library.example", "ben@library.example")
    dead = _free_port()
    with SmtpServer() as srv:
        cfg = load_config(_config(tmp_path, smtp_port=srv.port, recipients=recipients))
        down = _cfg_with_port(cfg, dead)
        now = [datetime(2026, 11, 1, 7, 0, tzinfo=UTC)]
        lost: dict[tuple[str, str], int] = {}
        expected_ids: dict[str, str] = {}
        seen_kinds: set[str] = set()
        for day in range(TRIAL_DAYS):
            now[0] = datetime(2026, 11, 1, 7, 0, tzinfo=UTC) + timedelta(days=day)
            d = now[0].date().isoformat()
            for r in recipients:  # 0-3 faults per recipient, at most one lost reply
                faults = [rng.choice(KINDS) for _ in range(rng.choice((0, 1, 1, 2, 3)))]
                while faults.count("reply_lost") > 1:
                    faults.remove("reply_lost")
                srv.sink.faults[r] = faults
                lost[(d, r)] = faults.count("reply_lost")
                seen_kinds |= set(faults)
            server_down = rng.random() < 0.3
            seen_kinds |= {"down"} if server_down else set()
            try:
                sent = run_digest(down if server_down else cfg, clock=lambda: now[0])
                assert not sent.pending
            except NotifyError as exc:
                assert f"digest {d}:" in str(exc)
            for _ in range(40):  # the scheduler's retries
                nxt = retry_digest(cfg, clock=lambda: now[0])
                if nxt is None:
                    break
                assert nxt < now[0] + timedelta(hours=12)
                now[0] = max(now[0], nxt)
            else:
                pytest.fail(f"day {d}: still undelivered after 40 retries")
            if rng.random() < 0.3:  # somebody runs `digest --send` again that day: nothing is sent
                again = run_digest(cfg, clock=lambda: now[0])
                assert again.already and sorted(again.delivered) == sorted(recipients)
        assert seen_kinds == set(KINDS) | {"down"}
        copies: dict[tuple[str, str], list[str]] = {}
        for r, mid, _ in srv.sink.stored:
            day = mid.split("expwatch-digest.", 1)[1].split(".", 1)[0]
            copies.setdefault((day, r), []).append(mid)
            expected_ids.setdefault(day, mid)
        assert len({day for day, _ in copies}) == TRIAL_DAYS
        for (d, r), n_lost in lost.items():
            got = copies.get((d, r), [])
            assert len(got) == 1 + n_lost, (d, r, got)  # exactly one, plus one per lost reply
            assert set(got) == {expected_ids[d]}          # every copy of a day is the same message
        extra = sum(len(v) - 1 for v in copies.values())
        assert extra == sum(lost.values()) and max(len(v) for v in copies.values()) <= 2
    # the figures quoted in the README come from this print (pytest -s)
    print(f"\ndigest trials: {TRIAL_DAYS} days x {len(recipients)} recipients, {len(srv.sink.stored)} copies stored, "
          f"{extra} extra copies, all after a lost reply and all with the day's Message-ID")


def test_serve_retries_a_failed_digest_once_the_server_is_back(tmp_path):
    from monitor.serve import Server

    port = _free_port()  # nothing listens yet: the SMTP server is down
    cfg = load_config(_config(tmp_path, smtp_port=port, extra="schedule: {interval_seconds: 3600}\n"))
    ncfg = cfg.notify.model_copy(update={"retry_base_seconds": 0.4, "retry_max_seconds": 0.8})
    cfg = cfg.model_copy(update={"notify": ncfg})
    server = Server(cfg)
    server.start()
    try:
        server._run_digest()  # the daily job fires while the server is down
        assert server.outcomes[-1].outcome == "failed"
        assert any(j.id == "digest-retry" for j in server.scheduler.get_jobs())
        time.sleep(1.0)
        with SmtpServer(port) as srv:  # back a second later
            deadline = time.monotonic() + 20
            while len(srv.sink.stored) < 2 and time.monotonic() < deadline:
                time.sleep(0.1)
            assert sorted(r for r, _, _ in srv.sink.stored) == ["ana@library.example", "ben@library.example"]
            time.sleep(0.5)
            assert len(srv.sink.stored) == 2
    finally:
        server.stop(wait=True)


def test_a_digest_undelivered_at_its_deadline_raises_one_notice_per_webhook(tmp_path):
    with SmtpServer() as srv, Receiver() as rx:
        cfg = load_config(_config(tmp_path, smtp_port=srv.port,
                                  hooks={"desk": rx.url("desk"), "pager": rx.url("pager")}))
        srv.sink.faults["ben@library.example"] = ["refuse"] * 100
        now = [datetime(2026, 11, 3, 7, tzinfo=UTC)]
        with pytest.raises(NotifyError, match="ben@library.example"):
            run_digest(cfg, clock=lambda: now[0])
        while (nxt := retry_digest(cfg, clock=lambda: now[0])) is not None:
            now[0] = max(now[0], nxt)
        assert now[0] == datetime(2026, 11, 3, 19, tzinfo=UTC)  # the 12-hour deadline
        for _ in range(3):  # later rounds add nothing
            now[0] += timedelta(hours=1)
            assert retry_digest(cfg, clock=lambda: now[0]) is None
        assert [r for r, _, _ in srv.sink.stored] == ["ana@library.example"]
        for name in ("desk", "pager"):
            got = rx.kinds(f"/{name}/")
            assert len(got) == 1 and "digest of 2026-11-03" in got[0][1] and "ben@library.example" in got[0][1]
        with pytest.raises(NotifyError, match="given up at the deadline"):
            run_digest(cfg, clock=lambda: now[0])


# -- monitor health: two processes, one outage ------------------------------------------

def _small_warehouse(path: Path) -> None:
    rng = np.random.default_rng(5)
    start = datetime(2026, 10, 1, tzinfo=UTC)
    n = 800
    df = pd.DataFrame({"unit_id": [f"u{i}" for i in range(n)], "experiment_id": "shelf-sort",
                       "variant": rng.choice(["control", "treatment"], n),
                       "assigned_at": pd.Timestamp("2026-10-01") + pd.to_timedelta(rng.integers(0, 48 * 3600, n), unit="s")})
    write_duckdb_warehouse(path, registry_frame(("shelf-sort",), start), df)


_PROCESS_A = """
import sys, time
from pathlib import Path
from monitor.config import load_config
from monitor.cycle import run_cycle
d = Path(sys.argv[1])
def step(name):
    if name == "checks":
        (d / "a_started").write_text("")
        while not (d / "a_resume").exists():
            time.sleep(0.05)
r = run_cycle(load_config(d / "expwatch.yaml"), on_step=step)
print("recorded" if r.recorded else "not recorded")
"""


@pytest.mark.slow
def test_two_processes_one_outage_send_one_failing_and_one_recovered_notice(tmp_path):
    from monitor.cycle import run_cycle
    from monitor.errors import WarehouseError

    _small_warehouse(tmp_path / "w.duckdb")
    with Receiver() as rx:
        cfg_path = _config(tmp_path, smtp_port=9, hooks={"desk": rx.url("desk"), "pager": rx.url("pager")}, warehouse=True)
        cfg = load_config(cfg_path)
        run_cycle(cfg)  # a healthy store to start from
        # -P: the second process imports the installed package, as this one does, not the checkout
        a = subprocess.Popen([sys.executable, "-P", "-c", _PROCESS_A, str(tmp_path)],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            t0 = time.monotonic()
            while not (tmp_path / "a_started").exists():  # A has read the warehouse and holds the lock
                assert a.poll() is None and time.monotonic() - t0 < 60, a.communicate()
                time.sleep(0.05)
            (tmp_path / "w.duckdb").rename(tmp_path / "w.away")  # the outage: the warehouse file is gone
            with pytest.raises(WarehouseError):
                run_cycle(cfg)  # process B fails: "monitor failing"
            (tmp_path / "a_resume").write_text("")
            out, err = a.communicate(timeout=60)
            assert a.returncode == 0 and out.strip() == "recorded", err  # A started before the failure
            with pytest.raises(WarehouseError):
                run_cycle(cfg)  # still down: nothing new
        finally:
            if a.poll() is None:
                a.kill()
        (tmp_path / "w.away").rename(tmp_path / "w.duckdb")
        run_cycle(cfg)  # recovered
        run_cycle(cfg)
        for name in ("desk", "pager"):
            health = [p for p in rx.posts if p["path"].startswith(f"/{name}/")
                      and ("failing since" in p["body"]["text"] or "recovered at" in p["body"]["text"])]
            texts = [p["body"]["text"] for p in health]
            assert len(health) == 2 and "failing since" in texts[0] and "recovered at" in texts[1], texts
            assert health[0]["key"] != health[1]["key"]
        store = StateStore(cfg.state.url)
        with store.engine.connect() as conn:
            notes = [json.loads(r[0]) for r in conn.execute(sa.select(ob.outbox.c.payload).where(
                ob.outbox.c.payload.like('%"kind": "monitor_%')))]
        store.dispose()
        assert len({n["outage"] for n in notes}) == 1 and len(notes) == 4  # one outage, named in every notice


def test_a_cycle_that_started_before_the_failure_cannot_declare_recovery(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    cfg = NotifyConfig(webhooks=[WebhookConfig(name="desk", url="http://127.0.0.1:9/desk")])
    a = ob.begin_cycle(store.engine)
    b = ob.begin_cycle(store.engine)
    assert ob.record_failure(store.engine, "warehouse gone", cfg, cycle=b)
    assert not ob.record_success(store.engine, cfg, cycle=a)        # started before the failure
    assert not ob.record_failure(store.engine, "still gone", cfg, cycle=ob.begin_cycle(store.engine))
    assert ob.record_success(store.engine, cfg, cycle=ob.begin_cycle(store.engine))
    c = ob.begin_cycle(store.engine)
    assert ob.record_success(store.engine, cfg, cycle=ob.begin_cycle(store.engine)) is False
    assert not ob.record_failure(store.engine, "stale", cfg, cycle=c)  # older than the latest success
    assert len(ob.pending_messages(store.engine)) == 2
    store.dispose()


# -- leases ------------------------------------------------------------------------------

def _queue(store: StateStore, cfg: NotifyConfig, n: int, at: datetime | None = None) -> None:
    t = (at or datetime.now(UTC)) - timedelta(minutes=1)
    with store.transaction() as conn:
        for i in range(n):
            for h in cfg.webhooks:
                ob._insert(conn, ob._key("test", h.name, i), h.name, {"format": "expwatch.notice/1", "kind": "alerts",
                                                                      "run_id": f"r{i}", "as_of": "x", "header": f"m{i}",
                                                                      "lines": [], "events": []}, t)


def test_two_deliverers_never_send_the_same_row_at_once(tmp_path):
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    with Receiver() as rx:
        rx.delay = 0.15
        cfg = NotifyConfig(webhooks=[WebhookConfig(name="desk", url=rx.url("desk"), max_attempts=1)])
        first = StateStore(url)
        _queue(first, cfg, 6)
        second = StateStore(url)
        reports = []
        go = threading.Barrier(2)

        def deliver(store):
            go.wait()
            reports.append(ob.deliver_pending(store.engine, cfg))

        ts = [threading.Thread(target=deliver, args=(s,)) for s in (first, second)]
        for t in ts:
            t.start()
        for t in ts:
            t.join(60)
        keys = [p["key"] for p in rx.posts]
        assert len(keys) == 6 and len(set(keys)) == 6
        assert sum(r.delivered for r in reports) == 6 and sum(r.leased for r in reports) >= 1
        first.dispose()
        second.dispose()


def test_an_expired_lease_is_taken_over(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    now = datetime(2026, 11, 3, 7, tzinfo=UTC)
    with Receiver() as rx:
        cfg = NotifyConfig(webhooks=[WebhookConfig(name="desk", url=rx.url("desk"), max_attempts=1)])
        _queue(store, cfg, 1, now)
        with store.engine.begin() as conn:  # a deliverer that died holding the lease
            conn.execute(sa.update(ob.outbox).values(lease_owner="gone", lease_expires_at=now + timedelta(seconds=30)))
        assert ob.deliver_pending(store.engine, cfg, clock=lambda: now).leased == 1 and not rx.posts
        rep = ob.deliver_pending(store.engine, cfg, clock=lambda: now + timedelta(seconds=31))
        assert rep.delivered == 1 and len(rx.posts) == 1
    store.dispose()


# -- Retry-After ---------------------------------------------------------------------------

@pytest.mark.parametrize("form", ["seconds", "http-date", "beyond-cap"])
def test_retry_after_is_honoured_as_one_failed_round(tmp_path, form):
    now = datetime(2026, 11, 3, 7, tzinfo=UTC)
    header = {"seconds": "5", "http-date": format_datetime(datetime.now(UTC) + timedelta(seconds=120), usegmt=True),
              "beyond-cap": "86400"}[form]
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    with Receiver() as rx:
        rx.script = [(429, {"Retry-After": header}, 0.0)]
        cfg = NotifyConfig(webhooks=[WebhookConfig(name="desk", url=rx.url("desk"), max_attempts=3)],
                           retry_base_seconds=300, retry_max_seconds=3600)
        _queue(store, cfg, 1, now)
        sleeps = []
        rep = ob.deliver_pending(store.engine, cfg, clock=lambda: now, sleep=sleeps.append, rng=random.Random(1))
        assert rep.failed == 1 and rep.requests == 1 and len(rx.posts) == 1 and not sleeps  # no retry in the round
        with store.engine.connect() as conn:
            row = conn.execute(sa.select(ob.outbox)).mappings().one()
        assert row["failed_rounds"] == 1
        wait = (row["next_attempt_at"] - now).total_seconds()
        expect = {"seconds": 5, "http-date": 120, "beyond-cap": 3600}[form]
        assert wait == pytest.approx(expect, abs=3 if form == "http-date" else 1e-6)
        assert ob.deliver_pending(store.engine, cfg, clock=lambda: now + timedelta(seconds=wait - 1)).attempted == 0
        assert ob.deliver_pending(store.engine, cfg, clock=lambda: now + timedelta(seconds=wait)).delivered == 1
    store.dispose()


def test_parse_retry_after_forms():
    now = datetime(2026, 11, 3, 7, tzinfo=UTC)
    assert parse_retry_after("120", now=now) == 120.0
    assert parse_retry_after("Tue, 03 Nov 2026 07:02:00 GMT", now=now) == 120.0  # RFC 9110 section 10.2.3 form
    assert parse_retry_after("Tue, 03 Nov 2026 06:00:00 GMT", now=now) == 0.0
    assert parse_retry_after("soon", now=now) is None and parse_retry_after(None) is None


# -- state store faults during delivery ---------------------------------------------------

def test_a_store_that_cannot_be_written_during_delivery_exits_1_in_one_line(tmp_path, capsys):
    _small_warehouse(tmp_path / "w.duckdb")
    metrics = tmp_path / "expwatch.prom"
    with Receiver() as rx:
        cfg = str(_config(tmp_path, smtp_port=9, hooks={"desk": rx.url("desk")}, warehouse=True))

        def disk_full(conn, cursor, statement, params, context, executemany):
            if statement.lstrip().upper().startswith("UPDATE EXPWATCH_OUTBOX"):
                raise sqlite3.OperationalError("database or disk is full")

        sa.event.listen(sa.engine.Engine, "before_cursor_execute", disk_full)
        try:
            code = main(["run", "--config", cfg, "--metrics-file", str(metrics)])
        finally:
            sa.event.remove(sa.engine.Engine, "before_cursor_execute", disk_full)
        err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    assert len(err) == 1 and "database or disk is full" in err[0] and "the run was recorded" in err[0], err
    assert "UPDATE" not in err[0]
    assert "expwatch_last_attempt_success 0" in metrics.read_text()
    store = StateStore(f"sqlite:///{tmp_path / 'state.sqlite'}")
    assert len(store.recent_runs()) == 1 and len(ob.pending_messages(store.engine)) >= 1  # nothing lost
    store.dispose()


# -- schema ------------------------------------------------------------------------------------

def test_an_outbox_from_schema_4_gets_its_lease_columns(tmp_path):
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    eng = sa.create_engine(url)
    old = sa.MetaData()
    cols = [sa.Column(c.name, c.type, primary_key=c.primary_key, nullable=c.nullable)
            for c in ob.outbox.columns if c.name not in ob._LEASE_COLUMNS]
    sa.Table(ob.outbox.name, old, *cols)
    with eng.begin() as conn:
        old.create_all(conn)
        meta.create(conn)
        conn.execute(sa.insert(meta).values(key="schema_version", value="4"))
    eng.dispose()
    store = StateStore(url)
    assert store.schema_version() == SCHEMA_VERSION
    have = {c["name"] for c in sa.inspect(store.engine).get_columns(ob.outbox.name)}
    assert set(ob._LEASE_COLUMNS) <= have
    store.dispose()
