"""Webhook delivery: render a JSON body, sign it, POST it, never leak the URL.

A message (a plain JSON-able dict built by :mod:`monitor.outbox`) is rendered
through a Jinja2 template into a JSON body. The default template produces
``{"text": "..."}`` with one short line per alert event (experiment, check,
scope, severity and the finding's one-sentence summary: aggregates only, never
unit ids). A custom template (``webhooks[].template``) receives the same
variables and must render valid JSON.

Every request carries ``X-Expwatch-Idempotency-Key`` (the outbox key, the same
on every retry) so a receiver can drop duplicates, and, when
``hmac_secret_env`` is set, ``X-Expwatch-Signature: sha256=<hex>``: the
HMAC-SHA256 [1]_ of the exact body bytes under the shared secret. A receiver
verifies with :func:`verify_signature` (constant-time comparison).

Webhook URLs are secrets (the path usually holds a token): logs and error
messages show only the scheme and host (:func:`mask_url`).

References
----------
.. [1] H. Krawczyk, M. Bellare and R. Canetti, "HMAC: Keyed-Hashing for Message
   Authentication", RFC 2104, 1997.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import os
from datetime import datetime, timezone
from email.utils import parsedate_to_datetime
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import jinja2
import requests

from monitor.errors import ConfigError, NotifyError
from monitor.notify_config import WebhookConfig

__all__ = ["IDEMPOTENCY_HEADER", "SIGNATURE_HEADER", "RetryLater", "mask_url", "parse_retry_after", "ping_heartbeat",
           "post_webhook", "render_body", "sign", "verify_signature"]

log = logging.getLogger("monitor")

IDEMPOTENCY_HEADER = "X-Expwatch-Idempotency-Key"
SIGNATURE_HEADER = "X-Expwatch-Signature"
USER_AGENT = "expwatch-notify/1"


class RetryLater(NotifyError):
    """The receiver refused the request and said when to try again (``Retry-After``)."""

    def __init__(self, message: str, retry_after: float) -> None:
        super().__init__(message)
        self.retry_after = retry_after
        """Seconds to wait, as the server asked (>= 0, not yet capped)."""


def parse_retry_after(value: str | None, *, now: datetime | None = None) -> float | None:
    """Seconds to wait from a ``Retry-After`` header: delay-seconds or an HTTP-date
    (RFC 9110, section 10.2.3); None when absent or unreadable. A date in the past
    gives 0."""
    if value is None or not value.strip():
        return None
    v = value.strip()
    if v.isdigit():
        return float(int(v))
    try:
        when = parsedate_to_datetime(v)
    except (TypeError, ValueError, IndexError):
        return None
    if when.tzinfo is None:  # RFC 9110 dates are GMT
        when = when.replace(tzinfo=timezone.utc)
    return max(0.0, (when - (now or datetime.now(timezone.utc))).total_seconds())


def mask_url(url: str) -> str:
    """``https://chat.example.org/***``: scheme and host kept, credentials, path and
    query hidden. Anything unparsable becomes ``<webhook url>``."""
    try:
        parts = urlsplit(url)
        host = parts.hostname or ""
        port = f":{parts.port}" if parts.port else ""
    except ValueError:
        return "<webhook url>"
    if not parts.scheme or not host:
        return "<webhook url>"
    return f"{parts.scheme}://{host}{port}/***"


def sign(body: bytes, secret: str) -> str:
    """The signature header value: ``sha256=`` + hex HMAC-SHA256 of ``body``."""
    return "sha256=" + hmac.new(secret.encode("utf-8"), body, hashlib.sha256).hexdigest()


def verify_signature(body: bytes, header: str | None, secret: str) -> bool:
    """True when ``header`` is the signature of ``body`` under ``secret``
    (constant-time comparison; a missing header is False)."""
    if not header:
        return False
    return hmac.compare_digest(sign(body, secret), header.strip())


def _env() -> jinja2.Environment:
    env = jinja2.Environment(undefined=jinja2.StrictUndefined, autoescape=False, keep_trailing_newline=False)
    env.policies["json.dumps_kwargs"] = {"ensure_ascii": False, "sort_keys": True}
    return env


@lru_cache(maxsize=32)
def _template(path: str | None) -> jinja2.Template:
    if path is None:
        text = (resources.files("monitor") / "notify_templates" / "webhook.json.j2").read_text(encoding="utf-8")
    else:
        try:
            text = Path(path).read_text(encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"webhook template {path}: cannot be read ({exc.strerror})") from None
    try:
        return _env().from_string(text)
    except jinja2.TemplateSyntaxError as exc:
        raise ConfigError(f"webhook template {path or 'default'}: line {exc.lineno}: {exc.message}") from None


def render_body(message: dict[str, Any], hook: WebhookConfig) -> bytes:
    """Render ``message`` through the hook's template into UTF-8 JSON bytes.

    Raises
    ------
    ConfigError
        The template cannot be read, fails to render or does not produce JSON.
    """
    try:
        text = _template(hook.template).render(message=message, destination=hook.name)
    except jinja2.TemplateError as exc:
        raise ConfigError(f"webhook {hook.name}: template failed to render: {exc}") from None
    try:
        json.loads(text)
    except ValueError as exc:
        raise ConfigError(f"webhook {hook.name}: template did not render valid JSON ({exc})") from None
    return text.encode("utf-8")


def post_webhook(hook: WebhookConfig, body: bytes, key: str, *, session: requests.Session | None = None) -> int:
    """POST ``body`` to the hook; returns the HTTP status (2xx).

    Raises
    ------
    RetryLater
        A non-2xx answer with a ``Retry-After`` header (429, 503...).
    NotifyError
        Connection failure, timeout or a non-2xx answer; the message names the
        destination and the masked URL only.
    ConfigError
        ``hmac_secret_env`` names an environment variable that is not set.
    """
    headers = {"Content-Type": "application/json; charset=utf-8", IDEMPOTENCY_HEADER: key, "User-Agent": USER_AGENT}
    if hook.hmac_secret_env:
        secret = os.environ.get(hook.hmac_secret_env)
        if not secret:
            raise ConfigError(f"webhook {hook.name}: environment variable {hook.hmac_secret_env} (hmac_secret_env) is not set")
        headers[SIGNATURE_HEADER] = sign(body, secret)
    where = f"webhook {hook.name} ({mask_url(hook.url)})"
    http = session or requests.Session()
    try:
        resp = http.post(hook.url, data=body, headers=headers, timeout=hook.timeout_seconds, allow_redirects=False)
    except requests.Timeout:
        raise NotifyError(f"{where}: no answer within {hook.timeout_seconds:g}s") from None
    except requests.ConnectionError:
        raise NotifyError(f"{where}: connection failed") from None
    except requests.RequestException as exc:
        raise NotifyError(f"{where}: request failed ({type(exc).__name__})") from None
    finally:
        if session is None:
            http.close()
    try:
        if not 200 <= resp.status_code < 300:
            wait = parse_retry_after(resp.headers.get("Retry-After"))
            if wait is not None:
                raise RetryLater(f"{where}: answered HTTP {resp.status_code} (Retry-After {wait:.0f}s)", wait)
            raise NotifyError(f"{where}: answered HTTP {resp.status_code}")
        return resp.status_code
    finally:
        resp.close()


def ping_heartbeat(url: str, *, session: requests.Session | None = None, timeout: float = 10.0) -> bool:
    """GET the heartbeat URL; True on a 2xx answer. Failures are logged (masked
    URL) and never raised: a heartbeat must not fail a run."""
    http = session or requests.Session()
    try:
        resp = http.get(url, timeout=timeout, headers={"User-Agent": USER_AGENT})
        ok = 200 <= resp.status_code < 300
        resp.close()
        if not ok:
            log.warning("heartbeat %s answered HTTP %d", mask_url(url), resp.status_code)
        return ok
    except requests.RequestException as exc:
        log.warning("heartbeat %s failed: %s", mask_url(url), type(exc).__name__)
        return False
    finally:
        if session is None:
            http.close()
