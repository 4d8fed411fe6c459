"""The digest: built from a real state store (runs, findings, alert ledger,
hourly counts), its alert windows across digests, mutes marked, markup escaped,
charts attached by Content-ID, delivered to a real SMTP server on loopback
(plain with AUTH, STARTTLS, implicit TLS), and rendered by headless Chromium."""

from __future__ import annotations

import email
import email.policy
import shutil
import socket
import ssl
import subprocess
from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest

from monitor import ledger
from monitor.charts import allocation_chart, cumulative_shares, guardrail_chart
from monitor.digest import DECISION_SUPPORT, build_digest, mark_digest_sent, open_alerts, send_digest, to_email
from monitor.errors import ConfigError, NotifyError
from monitor.findings import Finding
from monitor.notify_config import EmailConfig
from monitor.outbox import mute
from monitor.state import StateStore

T = datetime(2026, 11, 20, 9, tzinfo=timezone.utc)
START = T - timedelta(days=4)
MARKUP = "<b>shelf</b> & co"


def srm(exp, status, phases):
    return Finding(exp, "srm", "assigned", status, f"{exp}: shares {status}",
                   {"phases": [{"phase": i + 1, "start": s, "end": e, "expected_share": w} for i, (s, e, w) in enumerate(phases)]}, 1)


def guard(status, eff, lo, hi):
    return Finding("e-guard", "guardrail", "render_ms", status, f"render_ms {eff:+.1%}",
                   {"effect_relative": eff, "cs_relative_lower": lo, "cs_relative_upper": hi})


def write_counts(conn, exp, hours, per_variant):
    rows = [{"experiment": exp, "variant": v, "hour": h, "segment": "{}", "units": int(n), "leaked": 0}
            for v, ns in per_variant.items() for h, n in zip(hours, ns)]
    StateStore.replace_counts(conn, "assigned", START, T, [exp], pd.DataFrame(rows))


def record(store, i, found, live=(MARKUP, "ramped", "e-guard")):
    at = T + timedelta(hours=i)
    with store.transaction() as conn:
        ev = ledger.plan(store.open_alerts(conn), found, live)
        ledger.apply(conn, f"run-{i}", at, found, ev)
        StateStore.record_run(conn, f"run-{i}", at, at, "ok", {})


RAMP = [(START, START + timedelta(days=2), {"control": 0.9, "treatment": 0.1}),
        (START + timedelta(days=2), None, {"control": 0.5, "treatment": 0.5})]
EVEN = [(START, None, {"control": 0.5, "treatment": 0.5})]


def run_findings(i):
    a = "ok" if i >= 2 else "alert"
    b = "alert" if i >= 1 else "ok"
    g = guard("warn" if i >= 2 else "ok", 0.01 * (i + 1), -0.02 + 0.012 * i, 0.05)
    return [srm(MARKUP, a, EVEN), srm("ramped", "ok", RAMP),
            Finding("ramped", "leakage", "assigned", b, f"leakage {b}", {}), g]


@pytest.fixture()
def store(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    hours = pd.date_range(START, T - timedelta(hours=1), freq="h", tz="UTC")
    rng = np.random.default_rng(3)
    with s.transaction() as conn:
        write_counts(conn, MARKUP, hours, {"control": rng.poisson(60, len(hours)), "treatment": rng.poisson(52, len(hours))})
        first = hours < START + timedelta(days=2)
        write_counts(conn, "ramped", hours, {"control": np.where(first, rng.poisson(90, len(hours)), rng.poisson(50, len(hours))),
                                             "treatment": np.where(first, rng.poisson(10, len(hours)), rng.poisson(50, len(hours)))})
    record(s, 0, run_findings(0))
    yield s
    s.dispose()


def test_alert_windows_across_digests_and_mutes(store):
    d1 = build_digest(store.engine)
    assert [a.experiment for a in d1.new] == [MARKUP] and not d1.ongoing and not d1.resolved
    assert d1.since == T - timedelta(hours=24)
    mark_digest_sent(store.engine, d1)
    record(store, 1, run_findings(1))
    record(store, 2, run_findings(2))
    mute(store.engine, "ramped", "leakage", T + timedelta(days=3), "a known <double exposure>", clock=lambda: T)
    d2 = build_digest(store.engine)
    assert d2.since == T and d2.as_of == T + timedelta(hours=2)
    assert sorted((a.experiment, a.check) for a in d2.new) == [("e-guard", "guardrail"), ("ramped", "leakage")]
    assert [(a.experiment, a.check, a.peak) for a in d2.resolved] == [(MARKUP, "srm", "alert")]
    muted = [a for a in d2.new if a.muted]
    assert [(a.experiment, a.muted.reason) for a in muted] == [("ramped", "a known <double exposure>")]
    assert "muted until 2026-11-23 09:00 UTC" in d2.html and "a known &lt;double exposure&gt;" in d2.html
    assert "[muted until 2026-11-23 09:00 UTC: a known <double exposure>]" in d2.text
    mark_digest_sent(store.engine, d2)
    record(store, 3, run_findings(3))
    d3 = build_digest(store.engine)
    assert not d3.new and not d3.resolved
    assert sorted(a.experiment for a in d3.ongoing) == ["e-guard", "ramped"]
    # the status grid is the latest run's findings, worst first
    assert {x.experiment: x.status for x in d3.experiments} == {"ramped": "alert", "e-guard": "warn", MARKUP: "ok"}
    assert d3.experiments[0].experiment == "ramped"
    assert [a.experiment for a in open_alerts(store.engine, at=T)] == ["ramped", "e-guard"]


def test_html_escapes_markup_states_decision_support_and_references_every_image(store):
    d = build_digest(store.engine)
    assert "<b>shelf</b>" not in d.html and "&lt;b&gt;shelf&lt;/b&gt; &amp; co" in d.html
    assert MARKUP in d.text  # the plain part is plain
    assert "decision support" in d.text and "confirm" in d.text and DECISION_SUPPORT.split(".")[0] in d.html
    assert d.subject.startswith("[expwatch] digest 2026-11-20: 3 live experiments")
    # worst first: MARKUP (alert), then e-guard and ramped (ok); allocation charts for the two with SRM findings,
    # a guardrail chart for the one with guardrail findings
    assert [x.experiment for x in d.experiments] == [MARKUP, "e-guard", "ramped"]
    assert set(d.images) == {"alloc-1@expwatch", "guard-2@expwatch", "alloc-3@expwatch"}
    for cid, png in d.images.items():
        assert png[:8] == b"\x89PNG\r\n\x1a\n" and f'src="cid:{cid}"' in d.html
    standalone = d.standalone_html()
    assert "cid:" not in standalone and standalone.count("data:image/png;base64,") == len(d.images)


def test_no_run_recorded_says_so(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 'empty.sqlite'}")
    d = build_digest(s.engine)
    assert d.as_of is None and "no monitoring run is recorded yet" in d.subject and d.images == {}
    s.dispose()


def test_cumulative_design_share_follows_the_ramp():
    # design line = unit-weighted average of each hour's designed share (definition, checked by brute force)
    rng = np.random.default_rng(0)
    units = rng.integers(0, 50, size=(30, 2)).astype(float)
    units[:3] = 0  # no units yet: rows are 0, never NaN
    designed = np.where(np.arange(30)[:, None] < 12, [0.8, 0.2], [0.5, 0.5])
    obs, exp = cumulative_shares(units, designed)
    for h in range(3, 30):
        n = units[: h + 1].sum(axis=1)
        assert exp[h, 1] == pytest.approx((n * designed[: h + 1, 1]).sum() / n.sum())
        assert obs[h, 1] == pytest.approx(units[: h + 1, 1].sum() / n.sum())
    assert np.isfinite(obs).all() and np.isfinite(exp).all() and (obs[:3] == 0).all()
    assert allocation_chart([], np.zeros((0, 2)), np.zeros((0, 2)), ["c", "t"], "x") is None
    assert guardrail_chart([{"label": "m", "times": [T], "effect": [None], "lower": [None], "upper": [None]}], "x") is None


def _free_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


class _Inbox:
    def __init__(self):
        self.messages = []

    async def handle_DATA(self, server, session, envelope):  # noqa: N802
        self.messages.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.original_content or envelope.content))
        return "250 OK"


class _Server:
    """aiosmtpd in a thread on its own event loop, closed on stop."""

    def __init__(self, **kw):
        import asyncio

        from aiosmtpd.controller import Controller

        self.inbox = _Inbox()
        self.port = _free_port()
        self.loop = asyncio.new_event_loop()
        self.ctl = Controller(self.inbox, hostname="127.0.0.1", port=self.port, loop=self.loop, **kw)

    def start(self):
        self.ctl.start()

    def stop(self):
        self.ctl.stop()
        self.loop.close()


def _smtp(**kw):
    srv = _Server(**kw)
    return srv, srv.inbox, srv.port


def _parse_and_check(raw: bytes, digest) -> None:
    msg = email.message_from_bytes(raw, policy=email.policy.default)
    assert msg.get_content_type() == "multipart/alternative"
    plain, related = msg.get_payload()
    assert plain.get_content_type() == "text/plain" and "decision support" in plain.get_content()
    assert related.get_content_type() == "multipart/related"
    html_part, *images = related.get_payload()
    html = html_part.get_content()
    assert html_part.get_content_type() == "text/html"
    assert "&lt;b&gt;shelf&lt;/b&gt; &amp; co" in html and "<b>shelf</b>" not in html
    cids = {img["Content-ID"].strip("<>") for img in images}
    assert cids == set(digest.images) and len(images) >= 2
    for img in images:
        cid = img["Content-ID"].strip("<>")
        assert img.get_content_type() == "image/png" and img.get_content() == digest.images[cid]
        assert f'src="cid:{cid}"' in html
    assert msg["Subject"] == digest.subject


def test_smtp_plain_with_login(store, monkeypatch):
    from aiosmtpd.smtp import AuthResult, LoginPassword

    def auth(server, session, envelope, mechanism, data):
        seen.append((mechanism, bytes(data.login), bytes(data.password)))
        return AuthResult(success=isinstance(data, LoginPassword) and data.password == b"pa55")

    seen = []

    ctl, inbox, port = _smtp(authenticator=auth, auth_require_tls=False)
    monkeypatch.setenv("DIGEST_USER", "digest-bot")
    monkeypatch.setenv("DIGEST_PASSWORD", "pa55")
    cfg = EmailConfig(smtp_host="127.0.0.1", smtp_port=port, security="none", username_env="DIGEST_USER",
                      password_env="DIGEST_PASSWORD", sender="expwatch@library.example", recipients=["team@library.example"])
    d = build_digest(store.engine)
    ctl.start()
    try:
        send_digest(d, cfg)
    finally:
        ctl.stop()
    (mail_from, rcpts, raw), = inbox.messages
    assert mail_from == "expwatch@library.example" and rcpts == ["team@library.example"]
    assert seen == [("PLAIN", b"digest-bot", b"pa55")]  # credentials came from the named environment variables
    _parse_and_check(raw, d)
    monkeypatch.delenv("DIGEST_USER")
    with pytest.raises(ConfigError, match="DIGEST_USER"):
        send_digest(d, cfg)


def _cert(tmp_path):
    if shutil.which("openssl") is None:
        pytest.skip("openssl is not installed")
    key, crt = tmp_path / "key.pem", tmp_path / "cert.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key), "-out", str(crt),
                    "-days", "2", "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1"],
                   check=True, capture_output=True, timeout=60)
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ctx.load_cert_chain(crt, key)
    return ctx, crt


@pytest.mark.parametrize("security", ["starttls", "ssl"])
def test_smtp_tls(store, tmp_path, monkeypatch, security):
    ctx, crt = _cert(tmp_path)
    kw = {"tls_context": ctx, "require_starttls": True} if security == "starttls" else {"ssl_context": ctx}
    ctl, inbox, port = _smtp(**kw)
    monkeypatch.setenv("SSL_CERT_FILE", str(crt))  # the client verifies the server against this self-signed cert
    cfg = EmailConfig(smtp_host="127.0.0.1", smtp_port=port, security=security, sender="expwatch@library.example",
                      recipients=["a@library.example", "b@library.example"])
    d = build_digest(store.engine)
    ctl.start()
    try:
        send_digest(d, cfg)
    finally:
        ctl.stop()
    (_, rcpts, raw), = inbox.messages
    assert rcpts == ["a@library.example", "b@library.example"]
    _parse_and_check(raw, d)


def test_smtp_unreachable_is_one_line(store):
    cfg = EmailConfig(smtp_host="127.0.0.1", smtp_port=_free_port(), security="none", sender="x@library.example",
                      recipients=["y@library.example"], timeout_seconds=2)
    with pytest.raises(NotifyError, match=r"SMTP server 127\.0\.0\.1"):
        send_digest(build_digest(store.engine, charts=False), cfg)


def test_mime_structure_without_a_server(store):
    d = build_digest(store.engine)
    cfg = EmailConfig(smtp_host="h", sender="expwatch@library.example", recipients=["t@library.example"])
    _parse_and_check(to_email(d, cfg).as_bytes(), d)


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed")
def test_digest_renders_in_headless_chromium(store, tmp_path):
    from matplotlib.image import imread

    page = tmp_path / "digest.html"
    page.write_text(build_digest(store.engine).standalone_html(), encoding="utf-8")
    shot = tmp_path / "shot.png"
    subprocess.run(["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                    "--window-size=400,1800", f"--screenshot={shot}", page.as_uri()],
                   check=True, capture_output=True, timeout=120, cwd=tmp_path)
    img = imread(shot)
    assert img.shape[0] == 1800 and img.shape[1] == 400
    rgb = img[..., :3]
    dark = (rgb.mean(axis=2) < 0.5).mean()          # text and lines
    red = ((rgb[..., 0] > 0.6) & (rgb[..., 1] < 0.3) & (rgb[..., 2] < 0.3)).mean()  # the alert badges
    assert dark > 0.01 and red > 0.0005


def _cli_config(tmp_path, state_path):
    cfg = tmp_path / "expwatch.yaml"
    cfg.write_text(f"""
warehouse: {{url: "duckdb:///{tmp_path / 'w.duckdb'}"}}
state: {{url: "sqlite:///{state_path}"}}
registry:
  inline:
    - experiment: ramped
      control: control
      owner: reading-team
      title: "Ramped <reader> test"
      phases: [{{start: 2026-11-16T09:00:00Z, weights: {{control: 0.5, treatment: 0.5}}}}]
assignments: {{table: events.exposures}}
""")
    return cfg


def test_cli_digest_alerts_mute_unmute(store, tmp_path, capsys):
    import json

    from monitor.cli import main

    record(store, 1, run_findings(1))
    cfg = str(_cli_config(tmp_path, str(store.url).removeprefix("sqlite:///")))
    assert main(["mute", "ramped", "--config", cfg, "--check", "leakage", "--until", "2999-01-01", "--reason", "known"]) == 0
    assert main(["alerts", "--config", cfg, "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert [(a["experiment"], a["check"], a["muted_until"]) for a in doc["alerts"]] == [
        (MARKUP, "srm", None), ("ramped", "leakage", "2999-01-02T00:00:00Z")]
    assert main(["alerts", "--config", cfg]) == 0
    text = capsys.readouterr().out
    assert text.startswith("2 open alerts") and "[muted until 2999-01-02 00:00 UTC: known]" in text
    assert main(["digest", "--config", cfg]) == 0
    out = capsys.readouterr().out
    assert "decision support" in out and "Ramped" not in out.split("Every live experiment")[0]
    assert "owner reading-team" in out
    page = tmp_path / "d.html"
    assert main(["digest", "--config", cfg, "--out", str(page)]) == 0
    assert capsys.readouterr().err.strip() == f"digest: wrote {page} (3 charts)"
    html = page.read_text()
    assert "Ramped &lt;reader&gt; test" in html and "data:image/png;base64," in html and "cid:" not in html
    assert main(["digest", "--config", cfg, "--send"]) == 2  # no notify.email configured: a usage error
    err = capsys.readouterr().err
    assert "notify.email" in err and err.count("\n") == 1
    assert main(["mute", "ramped", "--config", cfg, "--check", "leakge", "--until", "2999-01-01", "--reason", "x"]) == 2
    assert main(["mute", "ramped", "--config", cfg, "--until", "2001-01-01", "--reason", "x"]) == 2
    assert main(["unmute", "ramped", "--config", cfg, "--check", "leakage"]) == 0
    assert main(["unmute", "ramped", "--config", cfg]) == 2


def _record_clearing(store, i, status):
    """Run ``i`` hours after T with the ledger's 24 h clear span; returns the event kinds."""
    at = T + timedelta(hours=i)
    with store.transaction() as conn:
        found = [srm(MARKUP, status, EVEN)]
        ev = ledger.plan(store.open_alerts(conn), found, [MARKUP], as_of=at, clear_for=timedelta(hours=24))
        ledger.apply(conn, f"run-{i}", at, found, ev)
        StateStore.record_run(conn, f"run-{i}", at, at, "ok", {})
    return [e.kind for e in ev]


def test_clearing_episode_is_listed_with_the_time_it_went_clear(store):
    """An episode whose check is ok again but not yet for the clear span (ledger state
    ``clearing``) is still in progress: the digest lists it, saying since when it is clear."""
    assert _record_clearing(store, 1, "ok") == ["cleared"]
    d = build_digest(store.engine, charts=False)
    (a,) = d.new
    assert (a.experiment, a.clear_since, a.peak) == (MARKUP, T + timedelta(hours=1), "alert") and not d.resolved
    assert "clearing: ok since 2026-11-20 10:00 UTC" in d.text and "clearing: ok since 2026-11-20 10:00 UTC" in d.html
    # failing again within the span continues the episode, which is no longer clearing
    assert _record_clearing(store, 2, "alert") == ["returned"]
    d = build_digest(store.engine, charts=False)
    assert [(a.experiment, a.clear_since) for a in d.new] == [(MARKUP, None)] and "clearing:" not in d.text
