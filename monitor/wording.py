"""How numbers and times are written in findings, reports and notices: one way everywhere."""

from __future__ import annotations

from datetime import datetime, timedelta

HOUR = timedelta(hours=1)


def floor_hour(t: datetime) -> datetime:
    """The start of the hour ``t`` falls in."""
    return t.replace(minute=0, second=0, microsecond=0)


def ceil_hour(t: datetime) -> datetime:
    """``t`` itself when it is on the hour, else the start of the next hour."""
    f = floor_hour(t)
    return f if f == t else f + HOUR


def fmt_p(p: float | None) -> str:
    """A p-value with two significant digits; ``<1e-300`` below double precision; ``n/a`` for none."""
    if p is None:
        return "n/a"
    return f"{p:.2g}" if p >= 1e-300 else "<1e-300"


def fmt_change(x: float | None, digits: int = 1) -> str:
    """A relative change as a signed percentage (``+2.5%``); ``n/a`` for none."""
    return "n/a" if x is None else f"{100 * x:+.{digits}f}%"
