"""The ``schedule`` section of the configuration: when ``expwatch serve`` runs.

Read it as ``getattr(cfg, "schedule", ScheduleConfig())`` so a configuration
model without the section still works (the defaults apply).
"""

from __future__ import annotations

from typing import Annotated

from pydantic import Field, field_validator

from monitor._model import ConfigModel

from monitor.errors import ConfigError

__all__ = ["ScheduleConfig", "parse_cron", "schedule_of"]


def parse_cron(expr: str, *, key: str = "schedule", timezone: str = "UTC"):  # noqa: ANN201 (apscheduler type)
    """Parse a five-field crontab expression into an APScheduler ``CronTrigger``.

    Parameters
    ----------
    expr : str
        ``minute hour day-of-month month day-of-week``, e.g. ``"5 * * * *"``.
    key : str
        The configuration key, for the error message.
    timezone : str
        IANA zone the expression is read in.

    Returns
    -------
    apscheduler.triggers.cron.CronTrigger

    Raises
    ------
    ConfigError
        One line naming the key and the expression.

    Notes
    -----
    Only the standard five fields are accepted (no seconds field, no ``@hourly``
    nicknames), so the same string works in a crontab.
    """
    from apscheduler.triggers.cron import CronTrigger

    if not isinstance(expr, str) or len(expr.split()) != 5:
        raise ConfigError(f"{key}: {expr!r} is not a five-field cron expression (minute hour day month weekday)")
    try:
        return CronTrigger.from_crontab(expr, timezone=timezone)
    except (ValueError, TypeError) as exc:
        raise ConfigError(f"{key}: {expr!r} is not a valid cron expression ({exc})") from None


class ScheduleConfig(ConfigModel):
    """When ``expwatch serve`` runs the checks and the digest.

    Attributes
    ----------
    checks : str
        Cron expression (five fields, in the config's ``timezone``) for monitoring cycles.
    digest : str or None
        Cron expression for the digest job; ``None`` disables it.
    misfire_grace_seconds : int
        A run that could not start on time (the process was suspended, the
        previous cycle ran long) still starts if it is at most this late.
    coalesce : bool
        When several runs were missed, run once instead of once per missed time.
    interval_seconds : int or None
        When set, cycles run every this many seconds instead of on ``checks``
        (for trial runs and tests; the digest keeps its cron).
    """


    checks: str = "5 * * * *"
    digest: str | None = "0 8 * * *"
    misfire_grace_seconds: Annotated[int, Field(ge=1, le=86400)] = 600
    coalesce: bool = True
    interval_seconds: Annotated[int, Field(ge=1, le=7 * 86400)] | None = None

    @field_validator("checks", "digest")
    @classmethod
    def _cron(cls, v: str | None, info) -> str | None:  # noqa: ANN001
        if v is not None:
            try:
                parse_cron(v, key=f"schedule.{info.field_name}")
            except ConfigError as exc:
                raise ValueError(str(exc).split(": ", 1)[1]) from None
        return v


def schedule_of(cfg: object) -> ScheduleConfig:
    """The configuration's schedule section, or the defaults when it has none."""
    got = getattr(cfg, "schedule", None)
    return got if isinstance(got, ScheduleConfig) else ScheduleConfig()
