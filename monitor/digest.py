"""The daily digest: every live experiment's status, the alerts since the last
digest, and small charts, as an HTML e-mail with a plain-text alternative.

Everything comes from the state store: the latest recorded run's findings
(``expwatch_findings``), the alert ledger (``expwatch_alerts``), the hourly
counts (``expwatch_counts``) for the allocation charts, earlier runs'
``guardrail`` findings for the effect charts, and the mutes. The window of "new"
and "resolved" alerts runs from the previous digest (recorded by
:func:`mark_digest_sent`) to the latest run; without a previous digest it is the
24 hours before the latest run.

The e-mail (:func:`send_digest`) is ``multipart/alternative``: a plain-text part
and a ``multipart/related`` part holding the HTML and its charts as inline PNG
images referenced by Content-ID [1]_ [2]_, marked ``Auto-Submitted:
auto-generated`` so that responders do not answer it [3]_. The stylesheet is
inlined into ``style`` attributes (clients that drop the head's CSS show it
styled); only an experiment that needs a look gets charts, the clear ones share
one table.

References
----------
.. [1] N. Freed and N. Borenstein, "Multipurpose Internet Mail Extensions (MIME)
   Part Two: Media Types", RFC 2046, 1996 (multipart/alternative).
.. [2] E. Levinson, "The MIME Multipart/Related Content-type", RFC 2387, 1998;
   and "Content-ID and Message-ID Uniform Resource Locators", RFC 2392, 1998.
.. [3] K. Moore, "Recommendations for Automatic Responses to Electronic Mail",
   RFC 3834, 2004, section 5 (the Auto-Submitted header field).
"""

from __future__ import annotations

import base64
import json
import logging
import os
import smtplib
import ssl
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from email.message import EmailMessage
from email.utils import formatdate, make_msgid
from importlib import resources
from typing import TYPE_CHECKING, Any

import jinja2
import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Engine
from sqlalchemy.exc import SQLAlchemyError

from monitor.errors import ConfigError, NotifyError, StateError
from monitor.findings import SEVERITY_NAMES
from monitor.notify_config import EmailConfig
from monitor.outbox import (
    Mute,
    _iso,
    _key,
    _locked_state,
    _metas,
    active_mutes,
    deliver_pending,
    ensure_notify_tables,
    get_state,
    insert_email,
    next_email_attempt,
    outbox,
    set_state,
)
from monitor.state import StateStore, alerts, findings, runs

if TYPE_CHECKING:
    from monitor.charts import Chart

__all__ = ["Digest", "DigestAlert", "DigestChart", "DigestSend", "ExperimentStatus", "build_digest", "digest_day", "mark_digest_sent",
           "message_id_for", "open_alerts", "queue_digest", "retry_digest", "run_digest", "send_digest", "send_prepared"]

log = logging.getLogger("monitor")

DECISION_SUPPORT = ("This digest is decision support, not a verdict. Before stopping or restarting an experiment "
                    "because of a serious alert, confirm it in the data: each finding carries its numbers, and "
                    "'expwatch explain' and 'expwatch sql' show where they come from.")
_STATUS_RANK = {"ok": 0, "warn": 1, "alert": 2}
_GUARDRAIL_RUNS = 30
_GUARDRAILS_PER_CHART = 4
IMAGE_BUDGET = 150_000
"""PNG bytes the digest's charts may take together: with base64 (4/3) and the
HTML, the e-mail stays under 300 KB. Charts past it are left out and counted."""


@dataclass(frozen=True)
class DigestAlert:
    experiment: str
    check: str
    scope: str
    severity: str
    """Current severity (``ok`` once resolved); ``peak`` is the highest it reached."""
    peak: str
    summary: str
    opened_at: datetime
    resolved_at: datetime | None
    muted: Mute | None = None
    clear_since: datetime | None = None
    """When the check went ok again, for an episode that is ``clearing``: it closes once
    clear for ``checks.episode_clear_hours`` and continues if the check fails before."""


@dataclass(frozen=True)
class DigestChart:
    cid: str
    """Content-ID (without angle brackets) of its PNG in :attr:`Digest.images`."""
    caption: str
    alt: str
    """What the chart shows, in words and numbers (the ``alt`` text)."""
    width: int
    """Display width in CSS pixels (the PNG has twice as many)."""


@dataclass(frozen=True)
class ExperimentStatus:
    experiment: str
    title: str | None
    owner: str | None
    status: str
    """Worst status of its findings in the latest run."""
    checks: dict[str, str]
    """Check -> worst status across scopes."""
    findings: tuple[dict[str, Any], ...]
    """The non-ok findings: check, scope, status, severity, summary, muted."""
    charts: tuple[DigestChart, ...] = ()
    """Its charts (only an experiment that needs a look has any)."""


@dataclass(frozen=True)
class Digest:
    subject: str
    text: str
    html: str
    """HTML referencing the charts as ``cid:`` URLs (for e-mail)."""
    images: dict[str, bytes]
    """Content-ID (without angle brackets) -> PNG bytes."""
    as_of: datetime | None
    """The latest run the digest describes (None when no run is recorded)."""
    since: datetime | None
    experiments: tuple[ExperimentStatus, ...] = ()
    new: tuple[DigestAlert, ...] = ()
    ongoing: tuple[DigestAlert, ...] = ()
    resolved: tuple[DigestAlert, ...] = ()
    run_id: str | None = None
    charts_left_out: int = 0
    """Charts not attached because :data:`IMAGE_BUDGET` was spent."""

    def standalone_html(self) -> str:
        """The HTML with every ``cid:`` image replaced by a data URI, for a file or a browser."""
        html = self.html
        for cid, png in self.images.items():
            html = html.replace(f'src="cid:{cid}"', 'src="data:image/png;base64,' + base64.b64encode(png).decode("ascii") + '"')
        return html


def _template(name: str, autoescape: bool) -> jinja2.Template:
    env = jinja2.Environment(autoescape=autoescape, undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters["t"] = lambda d: "" if d is None else f"{d:%Y-%m-%d %H:%M} UTC"
    text = (resources.files("monitor") / "notify_templates" / name).read_text(encoding="utf-8")
    return env.from_string(text)


def _latest_run(conn: sa.Connection) -> dict[str, Any] | None:
    row = conn.execute(sa.select(runs.c.run_id, runs.c.as_of).where(runs.c.outcome == "ok")
                       .order_by(runs.c.as_of.desc(), runs.c.started_at.desc()).limit(1)).mappings().first()
    return dict(row) if row else None


def _alert(r: Any, muted: list[Mute]) -> DigestAlert:
    m = next((m for m in muted if m.covers(r["experiment"], r["check_name"])), None)
    return DigestAlert(r["experiment"], r["check_name"], r["scope"], SEVERITY_NAMES[int(r["severity"])],
                       SEVERITY_NAMES[int(r["max_severity"])], r["summary"], r["opened_at"], r["resolved_at"], m,
                       r["updated_at"] if r["state"] == "clearing" else None)


def open_alerts(state_engine: Engine, *, at: datetime | None = None) -> list[DigestAlert]:
    """The open alerts, most severe first, each with its active mute (if any) at ``at``."""
    ensure_notify_tables(state_engine)
    at = at or datetime.now(timezone.utc)
    with state_engine.connect() as conn:
        muted = active_mutes(conn, at)
        rows = conn.execute(sa.select(alerts).where(alerts.c.state == "open")
                            .order_by(alerts.c.severity.desc(), alerts.c.experiment, alerts.c.check_name, alerts.c.scope)).mappings().all()
    return [_alert(r, muted) for r in rows]


def _allocation_image(conn: sa.Connection, exp: str, srm: Any) -> Chart | None:
    """Cumulative allocation chart from the stored hourly counts of the SRM finding's stage."""
    from monitor.charts import allocation_chart

    if srm is None:
        return None
    stats = json.loads(srm["statistics"])
    phases = stats.get("phases") or []
    if not phases:
        return None
    frame = StateStore.allocation_counts(conn, srm["scope"], exp)
    if frame.empty:
        return None
    variants = list(phases[-1].get("expected_share", {}).keys())
    frame = frame[frame["variant"].isin(variants)]
    if frame.empty:
        return None
    table = frame.pivot_table(index="hour", columns="variant", values="units", aggfunc="sum", fill_value=0)
    table = table.reindex(columns=variants, fill_value=0).sort_index()
    hours = table.index
    units = table.to_numpy(dtype=float, copy=True)
    designed = np.zeros_like(units)
    for p in phases:  # a handful of phases; each assigns its hours at once
        in_phase = hours >= _ts(p["start"])
        if p.get("end"):
            in_phase &= hours < _ts(p["end"])
        designed[np.asarray(in_phase)] = [float(p["expected_share"].get(v, 0.0)) for v in variants]
    units[designed.sum(axis=1) == 0] = 0.0  # hours outside every phase are not part of the test either
    return allocation_chart(list(hours.to_pydatetime()), units, designed, variants,
                            f"{exp} at stage {srm['scope']}")


def _ts(value: Any) -> pd.Timestamp:
    t = pd.Timestamp(value)
    return t.tz_convert("UTC") if t.tzinfo is not None else t.tz_localize("UTC")


def _guardrail_image(conn: sa.Connection, exp: str, latest: dict[str, str]) -> Chart | None:
    """The effects over recent runs of the guardrails in ``latest`` (scope -> status at the latest run)."""
    from monitor.charts import guardrail_chart

    recent = [r[0] for r in conn.execute(sa.select(runs.c.run_id).where(runs.c.outcome == "ok")
                                         .order_by(runs.c.as_of.desc()).limit(_GUARDRAIL_RUNS)).all()]
    if not recent:
        return None
    rows = conn.execute(sa.select(findings.c.as_of, findings.c.scope, findings.c.statistics)
                        .where(findings.c.experiment == exp, findings.c.check_name == "guardrail",
                               findings.c.scope.in_(list(latest)), findings.c.run_id.in_(recent))
                        .order_by(findings.c.as_of)).all()
    if not rows:
        return None
    series: dict[str, dict[str, Any]] = {}
    for as_of, scope, text in rows:
        st = json.loads(text)
        s = series.setdefault(scope, {"label": scope, "status": latest[scope], "times": [], "effect": [], "lower": [],
                                      "upper": []})
        s["times"].append(as_of)
        s["effect"].append(st.get("effect_relative"))
        s["lower"].append(st.get("cs_relative_lower"))
        s["upper"].append(st.get("cs_relative_upper"))
    return guardrail_chart(list(series.values()), exp)


def _charts_for(conn: sa.Connection, exp: str, n: int, fs: list[Any], budget: list[int]) -> list[tuple[DigestChart, bytes]]:
    """The charts of one experiment that needs a look: the allocation at its worst
    failing SRM stage, and the failing guardrails (at most :data:`_GUARDRAILS_PER_CHART`,
    worst first). ``budget`` is [PNG bytes left, charts left out]; a chart that
    does not fit in the bytes left is counted as left out instead."""
    bad = [f for f in fs if f["status"] != "ok"]
    out: list[tuple[DigestChart, bytes]] = []
    srm = max((f for f in bad if f["check_name"] == "srm"), key=lambda f: (_STATUS_RANK[f["status"]], int(f["severity"])),
              default=None)
    guards = sorted((f for f in bad if f["check_name"] == "guardrail"),
                    key=lambda f: (-_STATUS_RANK[f["status"]], -int(f["severity"]), f["scope"]))
    wanted = []
    if srm is not None:
        wanted.append((f"alloc-{n}@expwatch", f"Allocation at stage {srm['scope']}",
                       lambda: _allocation_image(conn, exp, srm)))
    if guards:
        shown = {f["scope"]: f["status"] for f in guards[:_GUARDRAILS_PER_CHART]}
        more = len(guards) - len(shown)
        wanted.append((f"guard-{n}@expwatch", "Guardrails that need a look" + (f" ({more} more not drawn)" if more else ""),
                       lambda: _guardrail_image(conn, exp, shown)))
    for cid, caption, draw in wanted:
        chart = draw()
        if chart is None:
            continue
        if len(chart.png) > budget[0]:
            budget[1] += 1
            continue
        budget[0] -= len(chart.png)
        out.append((DigestChart(cid, caption, chart.alt, chart.width), chart.png))
    return out


def build_digest(state_engine: Engine, *, since: datetime | None = None, experiments_meta: Any = None,
                 subject_prefix: str = "[expwatch]", charts: bool = True, now: datetime | None = None,
                 image_budget: int | None = IMAGE_BUDGET) -> Digest:
    """Build the digest from the state store.

    Parameters
    ----------
    state_engine
        The state store.
    since
        Start of the alert window; default the previous digest's run time (see
        :func:`mark_digest_sent`), or 24 hours before the latest run.
    experiments_meta
        Registry experiments (or a mapping id -> owner/title) to show titles and
        owners; without it only ids are shown.
    subject_prefix
        Prepended to the subject line.
    charts
        Draw the PNG charts (set False for a quick text-only digest).
    now
        Time at which mutes are evaluated (default the latest run's time).
    image_budget
        PNG bytes the charts may take together (default :data:`IMAGE_BUDGET`,
        sized for an e-mail); charts past it are left out and counted in
        :attr:`Digest.charts_left_out`. None: no limit.

    Returns
    -------
    Digest

    Notes
    -----
    With no recorded run, the digest says so and lists nothing. New alerts are
    the open alerts opened after ``since``; resolved ones are those resolved
    after it (whenever they opened); ongoing ones are open since before it. Open
    includes ``clearing`` episodes (ok again, not yet for ``checks.episode_clear_hours``),
    listed with ``clear_since``. A
    muted alert is listed and marked, never hidden. Experiments are ordered worst
    first, then by id; their chart Content-IDs are ``alloc-<n>@expwatch`` and
    ``guard-<n>@expwatch``.
    """
    ensure_notify_tables(state_engine)
    metas = _metas(experiments_meta)
    with state_engine.connect() as conn:
        last = _latest_run(conn)
        as_of = last["as_of"] if last else None
        if since is None:
            prev = get_state(conn, "digest")
            since = (datetime.fromisoformat(prev["last_as_of"].replace("Z", "+00:00")) if prev
                     else (as_of - timedelta(hours=24) if as_of else None))
        at = now or as_of or datetime.now(timezone.utc)
        muted = active_mutes(conn, at)
        new: list[DigestAlert] = []
        ongoing: list[DigestAlert] = []
        resolved: list[DigestAlert] = []
        exps: list[ExperimentStatus] = []
        images: dict[str, bytes] = {}
        budget = [image_budget if image_budget is not None else 1 << 62, 0]  # PNG bytes left, charts left out
        if last is not None:
            arows = conn.execute(sa.select(alerts).where(sa.or_(alerts.c.state.in_(("open", "clearing")),
                                                                alerts.c.resolved_at > since))
                                 .order_by(alerts.c.severity.desc(), alerts.c.max_severity.desc(), alerts.c.experiment,
                                           alerts.c.check_name, alerts.c.scope)).mappings().all()
            for r in arows:
                a = _alert(r, muted)
                if r["state"] in ("open", "clearing"):
                    (new if r["opened_at"] > since else ongoing).append(a)
                elif r["resolved_at"] is not None and r["resolved_at"] > since:
                    resolved.append(a)
            frows = conn.execute(sa.select(findings).where(findings.c.run_id == last["run_id"])
                                 .order_by(findings.c.id)).mappings().all()
            by_exp: dict[str, list[Any]] = {}
            for f in frows:
                by_exp.setdefault(f["experiment"], []).append(f)
            order = sorted(by_exp, key=lambda e: (-max(_STATUS_RANK[f["status"]] for f in by_exp[e]), e))
            for n, e in enumerate(order, start=1):
                fs = by_exp[e]
                checks: dict[str, str] = {}
                for f in fs:
                    if _STATUS_RANK[f["status"]] >= _STATUS_RANK.get(checks.get(f["check_name"], "ok"), 0):
                        checks[f["check_name"]] = f["status"]
                bad = tuple({"check": f["check_name"], "scope": f["scope"], "status": f["status"],
                             "severity": SEVERITY_NAMES[int(f["severity"])], "summary": f["summary"],
                             "muted": next((m for m in muted if m.covers(e, f["check_name"])), None)}
                            for f in fs if f["status"] != "ok")
                drawn = _charts_for(conn, e, n, fs, budget) if charts and bad else []
                images.update((c.cid, png) for c, png in drawn)
                meta = metas.get(e)
                worst = max((f["status"] for f in fs), key=lambda s: _STATUS_RANK[s])
                exps.append(ExperimentStatus(e, meta.title if meta else None, meta.owner if meta else None, worst,
                                             checks, bad, tuple(c for c, _ in drawn)))
    check_names = sorted({c for x in exps for c in x.checks}, key=lambda c: (_check_order(c), c))
    n_bad = sum(1 for x in exps if x.status != "ok")
    if as_of is None:
        headline = "no monitoring run is recorded yet"
    else:
        headline = (f"{len(exps)} live experiment{'s' if len(exps) != 1 else ''}, {n_bad} need{'s' if n_bad == 1 else ''} a look; "
                    f"alerts: {len(new)} new, {len(ongoing)} ongoing, {len(resolved)} resolved")
    subject = f"{subject_prefix} digest {as_of:%Y-%m-%d}: {headline}" if as_of else f"{subject_prefix} digest: {headline}"
    subject = subject.strip()
    ctx = {"cost": _run_cost(state_engine, last["run_id"]) if last else None,
           "as_of": as_of, "since": since, "experiments": exps, "checks": check_names, "new": new, "ongoing": ongoing,
           "resolved": resolved, "headline": headline, "decision_support": DECISION_SUPPORT,
           "run_id": last["run_id"] if last else None, "charts_left_out": budget[1],
           "needs_look": [x for x in exps if x.status != "ok"], "clear": [x for x in exps if x.status == "ok"]}
    html = _inline_css(_template("digest.html.j2", True).render(**ctx))
    text = _template("digest.txt.j2", False).render(**ctx)
    return Digest(subject, text, html, images, as_of, since, tuple(exps), tuple(new), tuple(ongoing), tuple(resolved),
                  last["run_id"] if last else None, budget[1])


def _inline_css(html: str) -> str:
    """The template's stylesheet copied into ``style`` attributes, so mail clients
    that drop ``<style>`` in the head still show the digest styled; only the
    ``@media`` rules (which cannot be inline) stay in the head."""
    import css_inline

    return css_inline.CSSInliner(keep_at_rules=True, load_remote_stylesheets=False).inline(html)


def _run_cost(state_engine: Engine, run_id: str) -> str | None:
    """One line on the warehouse work of the run: queries, rows returned and, where
    the engine reported them, rows and bytes scanned (``expwatch_query_costs``)."""
    from monitor.observe import format_count
    from monitor.state import query_costs

    if not sa.inspect(state_engine).has_table(query_costs.name):
        return None
    with state_engine.connect() as conn:
        rows = conn.execute(sa.select(query_costs.c.rows_returned, query_costs.c.rows_scanned, query_costs.c.bytes_scanned)
                            .where(query_costs.c.run_id == run_id)).all()
    if not rows:
        return None
    parts = [f"{len(rows)} warehouse quer{'y' if len(rows) == 1 else 'ies'}",
             f"{format_count(sum(int(r[0]) for r in rows))} rows returned"]
    if all(r[1] is not None for r in rows):
        parts.append(f"{format_count(sum(int(r[1]) for r in rows))} rows scanned")
    if all(r[2] is not None for r in rows):
        parts.append(f"{format_count(sum(int(r[2]) for r in rows))}B read")
    return "Warehouse cost of this run: " + ", ".join(parts) + " (as the engine reports it)."


def _check_order(c: str) -> int:
    order = ("design", "srm", "leakage", "unknown_variant", "freshness", "guardrail", "metric")
    return order.index(c) if c in order else len(order)


def mark_digest_sent(state_engine: Engine, digest: Digest, *, at: datetime | None = None) -> None:
    """Record that ``digest`` went out, so the next digest's window starts at its run."""
    if digest.as_of is None:
        return
    ensure_notify_tables(state_engine)
    at = at or datetime.now(timezone.utc)
    with state_engine.begin() as conn:
        set_state(conn, "digest", {"last_as_of": digest.as_of.isoformat().replace("+00:00", "Z"),
                                   "run_id": digest.run_id, "sent_at": at.isoformat().replace("+00:00", "Z")}, at)


def to_email(digest: Digest, email_cfg: EmailConfig, *, message_id: str | None = None) -> EmailMessage:
    """The MIME message: plain text, then HTML with its images as related parts."""
    msg = EmailMessage()
    msg["Subject"] = digest.subject
    msg["From"] = email_cfg.sender
    msg["To"] = ", ".join(email_cfg.recipients)
    msg["Date"] = formatdate(localtime=False, usegmt=True)
    msg["Message-ID"] = message_id or make_msgid(domain=email_cfg.sender.split("@", 1)[1] or None)
    msg["Auto-Submitted"] = "auto-generated"  # [3]: no out-of-office replies to it
    msg.set_content(digest.text, subtype="plain", charset="utf-8")
    msg.add_alternative(digest.html, subtype="html", charset="utf-8")
    html_part = msg.get_payload()[1]
    for cid, png in digest.images.items():
        html_part.add_related(png, maintype="image", subtype="png", cid=f"<{cid}>",
                              filename=cid.split("@", 1)[0] + ".png", disposition="inline")
    return msg


@contextmanager
def _smtp(email_cfg: EmailConfig) -> Iterator[smtplib.SMTP]:
    """A logged-in SMTP session (STARTTLS, implicit TLS or plain, per ``security``);
    every failure becomes one :class:`NotifyError` line naming the server, never the password."""
    user = password = None
    if email_cfg.username_env:
        user = os.environ.get(email_cfg.username_env)
        password = os.environ.get(email_cfg.password_env or "")
        if not user or password is None:
            missing = email_cfg.username_env if not user else email_cfg.password_env
            raise ConfigError(f"email: environment variable {missing} is not set")
    where = f"SMTP server {email_cfg.smtp_host}:{email_cfg.smtp_port}"
    ctx = ssl.create_default_context()
    try:
        if email_cfg.security == "ssl":
            smtp: smtplib.SMTP = smtplib.SMTP_SSL(email_cfg.smtp_host, email_cfg.smtp_port,
                                                  timeout=email_cfg.timeout_seconds, context=ctx)
        else:
            smtp = smtplib.SMTP(email_cfg.smtp_host, email_cfg.smtp_port, timeout=email_cfg.timeout_seconds)
        with smtp:
            smtp.ehlo()
            if email_cfg.security == "starttls":
                smtp.starttls(context=ctx)
                smtp.ehlo()
            if user is not None:
                smtp.login(user, password or "")
            yield smtp
    except smtplib.SMTPAuthenticationError:
        raise NotifyError(f"{where}: login refused for user from {email_cfg.username_env}") from None
    except smtplib.SMTPNotSupportedError as exc:
        raise NotifyError(f"{where}: {exc}") from None
    except smtplib.SMTPRecipientsRefused as exc:
        why = "; ".join(f"{r}: {c} {m.decode('utf-8', 'replace') if isinstance(m, bytes) else m}"
                        for r, (c, m) in sorted(exc.recipients.items()))
        raise NotifyError(f"{where}: refused the recipient ({why})") from None
    except smtplib.SMTPServerDisconnected as exc:
        raise NotifyError(f"{where}: connection closed before the server confirmed the message "
                          f"({str(exc).splitlines()[0] if str(exc) else 'no reply'})") from None
    except smtplib.SMTPResponseException as exc:
        text = exc.smtp_error.decode("utf-8", "replace") if isinstance(exc.smtp_error, bytes) else str(exc.smtp_error)
        raise NotifyError(f"{where}: {type(exc).__name__}: {exc.smtp_code} {text.splitlines()[0] if text else ''}".rstrip()) from None
    except smtplib.SMTPException as exc:
        raise NotifyError(f"{where}: {type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}".rstrip(": ")) from None
    except (OSError, ssl.SSLError) as exc:
        raise NotifyError(f"{where}: {exc.strerror or type(exc).__name__}") from None


def send_digest(digest: Digest, email_cfg: EmailConfig) -> None:
    """Send the digest by SMTP to every recipient in one transaction, as it is built
    (no outbox, no retries: :func:`run_digest` is the reliable path).

    Raises
    ------
    ConfigError
        A credentials environment variable named in the config is not set.
    NotifyError
        The server could not be reached, refused the login or the message; one
        line naming the server, never the password.
    """
    msg = to_email(digest, email_cfg)
    with _smtp(email_cfg) as smtp:
        refused = smtp.send_message(msg)
    if refused:
        log.warning("SMTP server %s:%s refused %d recipient(s): %s", email_cfg.smtp_host, email_cfg.smtp_port,
                    len(refused), ", ".join(sorted(refused)))


def send_prepared(message: dict[str, Any], email_cfg: EmailConfig) -> None:
    """Send one queued digest e-mail (an outbox row's payload, see :func:`queue_digest`)
    to its one recipient, byte for byte as it was queued (same Message-ID on every try).

    Raises
    ------
    ConfigError, NotifyError
        As :func:`send_digest`; a refused recipient is an error here.
    """
    raw = base64.b64decode(message["mime"])
    with _smtp(email_cfg) as smtp:
        smtp.sendmail(email_cfg.sender, [message["recipient"]], raw)


@dataclass(frozen=True)
class DigestSend:
    """What :func:`run_digest` did for one digest day."""

    day: str
    """The digest day (ISO date in the config's ``timezone``)."""
    subject: str
    """The subject as queued and sent."""
    message_id: str
    delivered: tuple[str, ...]
    """Recipients whose server accepted the e-mail (now or earlier)."""
    pending: tuple[str, ...] = ()
    """Recipients still to be retried (until ``deadline_at``)."""
    expired: tuple[str, ...] = ()
    """Recipients given up on at the deadline (a monitor-health notice was queued)."""
    already: bool = False
    """Nothing was sent: the day's digest had already been delivered to everyone."""
    queued: bool = False
    """The day's digest was built and queued by this call."""
    deadline_at: datetime | None = None
    next_attempt_at: datetime | None = None
    errors: tuple[str, ...] = ()


def digest_day(cfg: Any, at: datetime) -> str:
    """The digest day of ``at``: its date in the config's ``timezone``."""
    from zoneinfo import ZoneInfo

    return at.astimezone(ZoneInfo(getattr(cfg, "timezone", None) or "UTC")).date().isoformat()


def _day_key(day: str) -> str:
    return f"digest_day:{day}"


def _row_key(day: str, seq: int, recipient: str, message_id: str) -> str:
    return _key("digest", day, seq, recipient, message_id)


def message_id_for(day: str, seq: int, email_cfg: EmailConfig, store_url: str) -> str:
    """The Message-ID of a day's digest: the same on every retry of it, so a copy
    sent twice is recognisably one message; ``seq`` counts forced resends. The tag
    tells installations sharing a sender apart without revealing their store."""
    tag = _key("digest-tag", store_url, email_cfg.sender)[:10]
    domain = email_cfg.sender.split("@", 1)[1] or "expwatch.invalid"
    return f"<expwatch-digest.{day}.{seq}.{tag}@{domain}>"


def queue_digest(state_engine: Engine, digest: Digest, email_cfg: EmailConfig, day: str, *, at: datetime,
                 store_url: str, force: bool = False) -> tuple[dict[str, Any], bool]:
    """Queue the day's digest in the outbox: one e-mail per recipient, all with the
    day's Message-ID and a deadline ``email.deadline_hours`` ahead, and start the
    next digest window, in one transaction.

    Returns the day's record and whether this call queued it (False: it was
    queued already and ``force`` is off). With ``force`` the digest is queued
    again under the next Message-ID and the day's older undelivered e-mails are
    closed, so nobody receives both.
    """
    with state_engine.begin() as conn:
        st = _locked_state(conn, _day_key(day), at)
        if st and not force:
            return st, False
        seq = int(st.get("seq", 0)) + 1
        if st:
            old = [_row_key(day, int(st["seq"]), r, st["message_id"]) for r in st["recipients"]]
            conn.execute(sa.update(outbox).where(outbox.c.idempotency_key.in_(old), outbox.c.delivered_at.is_(None),
                                                 outbox.c.expired_at.is_(None))
                         .values(expired_at=at, last_error="superseded by a forced resend"))
        mid = message_id_for(day, seq, email_cfg, store_url)
        msg = to_email(digest, email_cfg, message_id=mid)
        raw = msg.as_bytes(policy=msg.policy.clone(linesep="\r\n"))  # SMTP line endings, as send_message writes
        deadline = at + timedelta(hours=email_cfg.deadline_hours)
        recipients = list(dict.fromkeys(email_cfg.recipients))
        mime = base64.b64encode(raw).decode("ascii")
        for r in recipients:
            insert_email(conn, _row_key(day, seq, r, mid), r, {"kind": "digest", "day": day, "seq": seq,
                                                              "recipient": r, "message_id": mid,
                                                              "subject": digest.subject, "mime": mime}, at, deadline)
        st = {"seq": seq, "message_id": mid, "subject": digest.subject, "recipients": recipients,
              "queued_at": _iso(at), "deadline_at": _iso(deadline)}
        set_state(conn, _day_key(day), st, at)
        if digest.as_of is not None:  # the content is in the outbox now: the next digest starts after it
            set_state(conn, "digest", {"last_as_of": _iso(digest.as_of), "run_id": digest.run_id,
                                       "sent_at": _iso(at)}, at)
    return st, True


def _day_rows(conn: sa.Connection, day: str, st: dict[str, Any]) -> list[dict[str, Any]]:
    keys = {_row_key(day, int(st["seq"]), r, st["message_id"]): r for r in st["recipients"]}
    rows = conn.execute(sa.select(outbox.c.id, outbox.c.idempotency_key, outbox.c.delivered_at, outbox.c.expired_at,
                                  outbox.c.next_attempt_at, outbox.c.deadline_at, outbox.c.last_error)
                        .where(outbox.c.idempotency_key.in_(list(keys)))).mappings().all()
    return [{**r, "recipient": keys[r["idempotency_key"]]} for r in rows]


def run_digest(cfg: Any, *, force: bool = False, clock: Callable[[], datetime] | None = None,
               session: Any = None) -> DigestSend:
    """Send today's digest reliably: the scheduler's daily job (``expwatch serve``)
    and ``expwatch digest --send``.

    The first call of a digest day builds the digest and queues it in the outbox
    (one e-mail per recipient, :func:`queue_digest`), which also starts the next
    digest window; every call then sends what is due (the day's undelivered
    e-mails at once, other queued messages when their retry has come). A call for
    a day whose digest was delivered to everyone sends nothing unless ``force``.

    Raises
    ------
    ConfigError
        When the configuration has no ``notify.email``.
    NotifyError
        When a recipient has not got the day's digest yet (one line naming them,
        the error and until when it is retried) or was given up on.
    StateError
        The state store could not be written.
    """
    from monitor.registry import experiments_from_inline
    from monitor.state import StateStore

    email = cfg.notify.email
    if email is None:
        raise ConfigError(f"{cfg.where}: notify.email: sending the digest needs an e-mail configuration "
                          "(smtp_host, sender, recipients)")
    clock = clock or (lambda: datetime.now(timezone.utc))
    now = clock()
    day = digest_day(cfg, now)
    state = StateStore(cfg.state.url)
    try:
        eng = state.engine
        ensure_notify_tables(eng)
        with eng.connect() as conn:
            st = get_state(conn, _day_key(day))
        queued = False
        if not st or force:
            meta = experiments_from_inline(cfg.registry)[0] if cfg.registry.inline is not None else None
            digest = build_digest(eng, experiments_meta=meta, subject_prefix=email.subject_prefix)
            st, queued = queue_digest(eng, digest, email, day, at=now, store_url=cfg.state.url or "", force=force)
        with eng.connect() as conn:
            rows = _day_rows(conn, day, st)
        open_ids = [r["id"] for r in rows if r["delivered_at"] is None and r["expired_at"] is None]
        report = None
        if open_ids:
            report = deliver_pending(eng, cfg.notify, clock=clock, now_ids=open_ids, session=session)
            with eng.connect() as conn:
                rows = _day_rows(conn, day, st)
    except SQLAlchemyError as exc:
        from monitor.state import _first

        raise StateError(f"state store: write failed while sending the digest: {_first(exc)}") from exc
    finally:
        state.dispose()
    pend = [r for r in rows if r["delivered_at"] is None and r["expired_at"] is None]
    out = DigestSend(day, st["subject"], st["message_id"],
                     tuple(sorted(r["recipient"] for r in rows if r["delivered_at"] is not None)),
                     tuple(sorted(r["recipient"] for r in pend)),
                     tuple(sorted(r["recipient"] for r in rows if r["expired_at"] is not None and r["delivered_at"] is None)),
                     already=report is None and not queued, queued=queued,
                     deadline_at=datetime.fromisoformat(st["deadline_at"].replace("Z", "+00:00")),
                     next_attempt_at=min((r["next_attempt_at"] for r in pend), default=None),
                     errors=tuple(r["last_error"] for r in pend if r["last_error"]))
    if out.pending or out.expired:
        missing = ", ".join(f"{r['recipient']} ({r['last_error'] or 'not tried'})"
                            for r in rows if r["delivered_at"] is None)
        how = (f"retried with back-off until {out.deadline_at:%Y-%m-%d %H:%M} UTC" if out.pending
               else "given up at the deadline; a monitor-health notice is queued (--force sends it again)")
        raise NotifyError(f"digest {day}: delivered to {len(out.delivered)} of {len(rows)} recipient(s); "
                          f"not to {missing}; {how}")
    return out


def retry_digest(cfg: Any, *, clock: Callable[[], datetime] | None = None, session: Any = None) -> datetime | None:
    """Send the queued digest e-mails (and other messages) whose retry has come,
    close those past their deadline; returns when the next undelivered digest
    e-mail is due (None: none is left). Used by ``expwatch serve``."""
    from monitor.state import StateStore

    state = StateStore(cfg.state.url)
    try:
        deliver_pending(state.engine, cfg.notify, clock=clock, session=session)
        return next_email_attempt(state.engine)
    finally:
        state.dispose()
