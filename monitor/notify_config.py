"""Configuration of notifications: chat webhooks, the daily digest e-mail, the
heartbeat.

The models follow :mod:`monitor.config`: frozen pydantic models that forbid
unknown keys, so a typo is a one-line :class:`~monitor.errors.ConfigError` when
the file is loaded. Secrets never live here: a webhook URL is normally written
as ``"${CHAT_WEBHOOK_URL}"`` and interpolated by the loader, and the HMAC secret
and SMTP credentials are *names* of environment variables read at send time.
"""

from __future__ import annotations

import fnmatch
import re
from typing import Annotated, Literal

from pydantic import Field, field_validator, model_validator

from monitor._model import ConfigModel, check_name

__all__ = ["EmailConfig", "NotifyConfig", "RouteConfig", "SEVERITY_LEVELS", "WebhookConfig"]

SEVERITY_LEVELS = {"warn": 1, "alert": 2, "critical": 3}
_ENV_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


_Model = ConfigModel


def _env_name(v: str | None) -> str | None:
    if v is not None and not _ENV_NAME_RE.match(v):
        raise ValueError("must be the name of an environment variable (letters, digits, '_'), not its value")
    return v


class RouteConfig(_Model):
    """Which experiments a destination hears about. Every given filter must match
    (owners AND tags AND experiments); a filter left out matches everything, so an
    empty route (the default) receives all experiments. ``experiments`` entries
    may be shell-style patterns (``checkout-*``)."""

    owners: list[str] | None = None
    tags: list[str] | None = None
    experiments: list[str] | None = None

    def matches(self, experiment: str, owner: str | None, tags: frozenset[str] | set[str] | tuple[str, ...] = ()) -> bool:
        if self.owners is not None and owner not in self.owners:
            return False
        if self.tags is not None and not (set(tags) & set(self.tags)):
            return False
        if self.experiments is not None and not any(fnmatch.fnmatchcase(experiment, p) for p in self.experiments):
            return False
        return True


class WebhookConfig(_Model):
    name: str
    """Destination name, shown in logs and in ``expwatch alerts``; unique."""
    url: str
    """The webhook URL (a secret: write it as ``${ENV_VAR}``; logs show only its host)."""
    route: RouteConfig = RouteConfig()
    template: str | None = None
    """Path to a Jinja2 template rendering the JSON body; default: ``{"text": ...}``."""
    hmac_secret_env: str | None = None
    """Environment variable holding a shared secret; the body is then signed."""
    timeout_seconds: Annotated[float, Field(gt=0, le=300)] = 10.0
    max_attempts: Annotated[int, Field(ge=1, le=10)] = 3
    """Attempts per delivery round; a message still failing waits for the next round."""

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        return check_name(v)

    @field_validator("url")
    @classmethod
    def _url(cls, v: str) -> str:
        if not re.match(r"^https?://[^/\s]+", v):
            raise ValueError("must be an http:// or https:// URL")
        return v

    @field_validator("hmac_secret_env")
    @classmethod
    def _secret(cls, v: str | None) -> str | None:
        return _env_name(v)


class EmailConfig(_Model):
    smtp_host: str
    smtp_port: Annotated[int, Field(ge=1, le=65535)] = 587
    security: Literal["starttls", "ssl", "none"] = "starttls"
    username_env: str | None = None
    password_env: str | None = None
    sender: str
    recipients: list[str] = Field(min_length=1)
    subject_prefix: str = "[expwatch]"
    timeout_seconds: Annotated[float, Field(gt=0, le=600)] = 30.0
    deadline_hours: Annotated[float, Field(gt=0, le=168)] = 12.0
    """An undelivered digest e-mail is retried (with the webhooks' back-off) for this
    long after it was queued; then it is given up and a monitor-health notice goes
    to the webhooks."""

    @field_validator("username_env", "password_env")
    @classmethod
    def _envs(cls, v: str | None) -> str | None:
        return _env_name(v)

    @field_validator("sender")
    @classmethod
    def _sender(cls, v: str) -> str:
        if "@" not in v:
            raise ValueError("must be an e-mail address")
        return v

    @field_validator("recipients")
    @classmethod
    def _recipients(cls, v: list[str]) -> list[str]:
        bad = [r for r in v if "@" not in r]
        if bad:
            raise ValueError(f"not an e-mail address: {bad[0]!r}")
        return v

    @model_validator(mode="after")
    def _creds(self) -> EmailConfig:
        if (self.username_env is None) != (self.password_env is None):
            raise ValueError("give both 'username_env' and 'password_env', or neither")
        return self


class NotifyConfig(_Model):
    webhooks: list[WebhookConfig] = []
    email: EmailConfig | None = None
    heartbeat_url: str | None = None
    """Pinged (HTTP GET) after every successful recorded run; a dead-man's switch."""
    notify_on: Literal["warn", "alert", "critical"] = "alert"
    """Minimum severity of an opened or escalated alert that is pushed to webhooks."""
    retry_base_seconds: Annotated[float, Field(gt=0)] = 300.0
    """First wait before a failed message is retried; doubles per failed round."""
    retry_max_seconds: Annotated[float, Field(gt=0)] = 6 * 3600.0

    @model_validator(mode="after")
    def _unique(self) -> NotifyConfig:
        names = [w.name for w in self.webhooks]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"webhook names must be unique; repeated: {', '.join(dupes)}")
        if self.retry_base_seconds > self.retry_max_seconds:
            raise ValueError("retry_base_seconds must not exceed retry_max_seconds")
        return self

    @property
    def min_severity(self) -> int:
        return SEVERITY_LEVELS[self.notify_on]
