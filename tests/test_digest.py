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
from monitor.charts import (CSS_PX_PER_INCH, PIXEL_RATIO, SMALLEST_FONT_PT, allocation_chart, cumulative_shares,
                             guardrail_chart)
from monitor.digest import DECISION_SUPPORT, build_digest, mark_digest_sent, open_alerts, send_digest, to_email
from monitor.errors import ConfigError, NotifyError
from monitor.findings import Finding
from monitor.notify_config import EmailConfig
from monitor.outbox import mute
from monitor.state import StateStore

T = datetime(2026, 11, 20, 9, tzinfo=timezone.utc)
START = T - timedelta(days=4)
MARKUP = "<b>shelf</b> & co"


def assert_escaped(html: str) -> None:
    """MARKUP reaches the page as text (and in attribute values), never as an element: the
    inliner re-serialises the page, which leaves '<' unescaped inside quoted attributes."""
    from html.parser import HTMLParser

    class Tags(HTMLParser):
        def __init__(self):
            super().__init__()
            self.tags, self.text = set(), []

        def handle_starttag(self, tag, attrs):
            self.tags.add(tag)

        def handle_data(self, data):
            self.text.append(data)

    p = Tags()
    p.feed(html)
    assert "b" not in p.tags and any(MARKUP in t for t in p.text)
    assert "&lt;b&gt;shelf&lt;/b&gt; &amp; co" in html


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
    assert_escaped(d.html)
    assert MARKUP in d.text  # the plain part is plain
    assert "decision support" in d.text and "confirm" in d.text and DECISION_SUPPORT.split(".")[0] in d.html
    assert d.subject.startswith("[expwatch] digest 2026-11-20: 3 live experiments")
    # worst first: MARKUP (alert), then e-guard and ramped (ok); a chart only for what needs a look: the failing SRM
    assert [x.experiment for x in d.experiments] == [MARKUP, "e-guard", "ramped"]
    assert set(d.images) == {"alloc-1@expwatch"} and [c.cid for c in d.experiments[0].charts] == ["alloc-1@expwatch"]
    # the clear ones are rows of one table, with the checks they passed
    assert "<td" in d.html and "ramped" in d.html and "srm, leakage" in d.html
    # every style is inline; only the @media rule stays in the head
    head_css = d.html.split("<style>", 1)[1].split("</style>", 1)[0]
    assert head_css.strip().startswith("@media") and head_css.count("{") == 3 and 'style="' in d.html
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


def _axes_facts(chart_png):
    from io import BytesIO

    from PIL import Image

    with Image.open(BytesIO(chart_png)) as im:
        return im.size


def test_guardrail_chart_scales_time_to_the_runs_and_draws_every_band():
    from matplotlib.dates import num2date

    import monitor.charts as charts

    seen = {}

    def keep(fig, ax, alt):  # the figure as drawn, before it becomes PNG bytes
        seen["ax"], seen["fig"] = ax, fig
        return real(fig, ax, alt)

    real = charts._finish
    charts._finish = keep
    try:
        # a guardrail seen over three runs and one seen at the last run only, with the same effect there
        times = [T, T + timedelta(hours=1), T + timedelta(hours=2)]
        c = guardrail_chart([{"label": "render_ms", "status": "ok", "times": times, "effect": [0.02, 0.03, 0.04],
                              "lower": [-0.01, 0.0, 0.01], "upper": [0.05, 0.06, 0.07]},
                             {"label": "loan_cancelled", "status": "alert", "times": [times[-1]], "effect": [0.04],
                              "lower": [0.02], "upper": [0.06]}], "e-guard")
    finally:
        charts._finish = real
    ax = seen["ax"]
    lo, hi = (num2date(v) for v in ax.get_xlim())
    assert T - timedelta(hours=1) <= lo < T and times[-1] < hi <= times[-1] + timedelta(hours=1)  # not years
    # the three-run band is shaded; the lone point has its bar from +2% to +6%, in the alert colour, on top
    band = [p for p in ax.collections if type(p).__name__ in ("PolyCollection", "FillBetweenPolyCollection")]
    assert len(band) == 1 and band[0].get_paths()[0].vertices[:, 1].min() == pytest.approx(-1.0)
    bars = [lc for lc in ax.collections if type(lc).__name__ == "LineCollection"]
    segs = [np.asarray(seg) for lc in bars for seg in lc.get_segments()]
    assert any(sorted(seg[:, 1]) == pytest.approx([2.0, 6.0]) for seg in segs)
    alert_zorder = max(lc.get_zorder() for lc in bars)
    assert alert_zorder > max(line.get_zorder() for line in ax.get_lines() if line.get_label() == "render_ms")
    # the lone point is nudged off the other line's last point, so neither hides the other
    xs = {line.get_label(): line.get_xdata() for line in ax.get_lines()}
    assert xs["render_ms"][-1] != ax.containers[0].lines[0].get_xdata()[0]
    assert "loan_cancelled +4.0% (band +2.0% to +6.0%, alert)" in c.alt and "over 3 runs" in c.alt
    # 2x pixels for the intended width, and text no smaller than SMALLEST_FONT_PT at that width
    assert _axes_facts(c.png)[0] == PIXEL_RATIO * c.width
    sizes = [t.get_fontsize() for t in seen["fig"].findobj(lambda a: hasattr(a, "get_fontsize") and a.get_text())]
    assert min(sizes) >= SMALLEST_FONT_PT


def test_charts_past_the_image_budget_are_left_out_and_said_so(tmp_path):
    s = _needs_a_look_store(tmp_path, n_clear=1)
    full = build_digest(s.engine)
    small = build_digest(s.engine, image_budget=min(len(p) for p in full.images.values()))
    s.dispose()
    assert len(full.images) == 2 and full.charts_left_out == 0
    assert len(small.images) == 1 and small.charts_left_out == 1
    assert "1 chart was left out to keep this e-mail small" in small.html


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
    assert_escaped(html)
    cids = {img["Content-ID"].strip("<>") for img in images}
    assert cids == set(digest.images) and len(images) >= 1
    for img in images:
        cid = img["Content-ID"].strip("<>")
        assert img.get_content_type() == "image/png" and img.get_content() == digest.images[cid]
        assert f'src="cid:{cid}"' in html
    assert msg["Subject"] == digest.subject
    assert msg["Auto-Submitted"] == "auto-generated"  # RFC 3834 section 5: responders must not answer it
    assert len(raw) < 300_000


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


# Runs in the digest page once it has loaded (images decoded) and reports layout facts to the page around it.
_MEASURE = """<script>
window.addEventListener('load', function () {
  var d = document.documentElement, min = 1e9, smallest = '';
  var w = document.createTreeWalker(document.body, NodeFilter.SHOW_TEXT);
  while (w.nextNode()) {
    var n = w.currentNode, el = n.parentElement;
    if (!n.textContent.trim() || !el || el.tagName === 'SCRIPT') continue;
    var px = parseFloat(getComputedStyle(el).fontSize);
    if (px < min) { min = px; smallest = n.textContent.trim().slice(0, 40); }
  }
  var widest = 0;
  document.querySelectorAll('body *').forEach(function (el) { widest = Math.max(widest, el.getBoundingClientRect().right); });
  var imgs = Array.prototype.map.call(document.images, function (i) {
    return {natural: i.naturalWidth, shown: i.clientWidth, alt: i.alt};
  });
  var badge = document.querySelector('.b-alert');
  var out = parent.document.createElement('pre'); out.id = 'measure';
  out.textContent = JSON.stringify({inner: window.innerWidth, scroll: d.scrollWidth, widest: widest,
    height: d.scrollHeight, min_font: min, smallest: smallest, images: imgs,
    badge: badge ? getComputedStyle(badge).backgroundColor : null});
  parent.document.body.appendChild(out);
});
</script>"""


def _measure(html: str, width: int, tmp_path, *, head_css: bool = True) -> dict:
    """Layout facts of ``html`` as headless Chromium lays it out ``width`` CSS pixels wide.

    The page runs in a ``srcdoc`` frame of that width (the headless window itself is never
    narrower than 500 px) and writes its measurements into the outer page, which
    ``--dump-dom`` prints. With ``head_css=False`` every ``<style>`` block is removed first,
    as mail clients that drop the head's CSS do."""
    import html as htmllib
    import json
    import re

    if not head_css:
        html, n = re.subn(r"<style\b.*?</style>", "", html, flags=re.S)
        assert n == 1
    inner = html.replace("</body>", _MEASURE + "</body>")
    page = tmp_path / f"frame-{width}-{int(head_css)}.html"
    page.write_text(f'<!DOCTYPE html><html><body style="margin:0"><iframe style="border:0;width:{width}px;height:900px" '
                    f'srcdoc="{htmllib.escape(inner, quote=True)}"></iframe></body></html>', encoding="utf-8")
    out = subprocess.run(["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                          f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1200,900",
                          "--virtual-time-budget=10000", "--dump-dom", page.as_uri()],
                         check=True, capture_output=True, text=True, timeout=120).stdout
    m = re.search(r'<pre id="measure">(.*?)</pre>', out, re.S)
    assert m, "the measuring script did not run"
    return json.loads(htmllib.unescape(m.group(1)))


def _needs_a_look_store(tmp_path, n_clear=12):
    """A store whose latest run has two experiments that need a look (an SRM alert, a
    guardrail alert beside an ok guardrail) and ``n_clear`` clear ones with long names."""
    s = StateStore(f"sqlite:///{tmp_path / 'many.sqlite'}")
    hours = pd.date_range(START, T - timedelta(hours=1), freq="h", tz="UTC")
    rng = np.random.default_rng(5)
    clear = [f"clear-experiment-with-a-rather-long-name-{i:02d}" for i in range(n_clear)]
    with s.transaction() as conn:
        write_counts(conn, MARKUP, hours, {"control": rng.poisson(60, len(hours)), "treatment": rng.poisson(52, len(hours))})
        for e in clear:
            write_counts(conn, e, hours, {"control": rng.poisson(30, len(hours)), "treatment": rng.poisson(30, len(hours))})
    found = [srm(MARKUP, "alert", EVEN), guard("alert", 0.08, 0.05, 0.11),
             Finding("e-guard", "guardrail", "app_errors", "ok", "app_errors +0.5%",
                     {"effect_relative": 0.005, "cs_relative_lower": -0.04, "cs_relative_upper": 0.05})]
    for e in clear:
        found += [srm(e, "ok", EVEN), Finding(e, "leakage", "assigned", "ok", "no leakage", {}),
                  Finding(e, "freshness", "assigned", "ok", "fresh", {})]
    record(s, 0, found, live=(MARKUP, "e-guard", *clear))
    return s


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed")
@pytest.mark.parametrize("width", [390, 1000])
@pytest.mark.parametrize("head_css", [True, False], ids=["with-head-css", "head-css-removed"])
def test_digest_layout_in_headless_chromium(tmp_path, width, head_css):
    s = _needs_a_look_store(tmp_path)
    d = build_digest(s.engine)
    s.dispose()
    facts = _measure(d.standalone_html(), width, tmp_path, head_css=head_css)
    assert facts["inner"] == width
    # nothing wider than the screen: no sideways scrolling, no element reaching past the right edge
    assert facts["scroll"] <= width and facts["widest"] <= width + 0.5, facts
    # charts only for the two that need a look (an SRM chart, a guardrail chart); the 12 clear ones share a table
    assert len(facts["images"]) == 2 == len(d.images)
    for img in facts["images"]:
        # drawn at twice the shown size, so it stays sharp on a 2x screen, and never shown wider than drawn for
        assert img["natural"] >= 2 * img["shown"] > 0 and img["shown"] <= img["natural"] / 2
        assert len(img["alt"]) > 60 and "%" in img["alt"]  # says what the chart shows, in numbers
        # the chart's smallest text, as shown: points at the drawn width, scaled by the shown width
        assert SMALLEST_FONT_PT / 72 * CSS_PX_PER_INCH * img["shown"] / (img["natural"] / PIXEL_RATIO) >= 10
    assert facts["min_font"] >= 12, facts["smallest"]  # no page text under 12 CSS px
    assert facts["badge"] == "rgb(198, 40, 40)"  # the styles hold with or without the head's CSS
    if width == 390:
        assert facts["height"] < 4000, facts["height"]  # a phone scrolls through 14 experiments in a few screens


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed")
def test_digest_renders_in_headless_chromium(store, tmp_path):
    from matplotlib.image import imread

    page = tmp_path / "digest.html"
    page.write_text(build_digest(store.engine).standalone_html(), encoding="utf-8")
    shot = tmp_path / "shot.png"
    subprocess.run(["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                    "--window-size=1000,1800", f"--screenshot={shot}", page.as_uri()],
                   check=True, capture_output=True, timeout=120, cwd=tmp_path)
    img = imread(shot)
    assert img.shape[0] == 1800 and img.shape[1] == 1000
    rgb = img[..., :3]
    dark = (rgb.mean(axis=2) < 0.5).mean()          # text and lines
    red = ((rgb[..., 0] > 0.6) & (rgb[..., 1] < 0.3) & (rgb[..., 2] < 0.3)).mean()  # the alert badges
    assert dark > 0.005 and red > 0.0002


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
    assert capsys.readouterr().err.strip() == f"digest: wrote {page} (1 chart)"  # only the failing SRM is drawn
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
