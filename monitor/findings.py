"""A finding: the result of one check on one experiment in one run.

``status`` is what the owner reads: ``ok``, ``warn`` (worth a look, not yet
evidence of a problem) or ``alert`` (the check failed). ``severity`` orders
them for the alert ledger: 0 ok, 1 warn, 2 alert, 3 alert that is far past its
threshold (``critical``). An alert escalates when its severity rises.

The ``key`` (experiment, check, scope) is stable across runs, so re-running the
same hour updates the same alert instead of opening a new one. ``scope`` is the
pipeline stage for allocation checks, ``registry`` for design problems and the
metric name (``metric:variant`` with several treatments) for ``guardrail`` and
``metric`` findings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

__all__ = ["CHECKS", "Finding", "SEVERITY_NAMES", "Status", "clean_json"]

Status = Literal["ok", "warn", "alert"]

CHECKS = ("srm", "leakage", "unknown_variant", "unattributed", "freshness", "design", "guardrail", "metric", "novelty", "spillover", "collision")
SEVERITY_NAMES = {0: "ok", 1: "warn", 2: "alert", 3: "critical"}


@dataclass(frozen=True)
class Finding:
    experiment: str
    check: str
    scope: str
    status: Status
    summary: str
    statistics: dict[str, Any] = field(default_factory=dict)
    phase: int | None = None
    critical: bool = False

    @property
    def key(self) -> str:
        return f"{self.experiment}\x1f{self.check}\x1f{self.scope}"

    @property
    def severity(self) -> int:
        base = {"ok": 0, "warn": 1, "alert": 2}[self.status]
        return 3 if (base == 2 and self.critical) else base

    def to_json(self) -> dict[str, Any]:
        return {
            "experiment": self.experiment,
            "check": self.check,
            "scope": self.scope,
            "phase": self.phase,
            "status": self.status,
            "severity": SEVERITY_NAMES[self.severity],
            "summary": self.summary,
            "statistics": clean_json(self.statistics),
        }


def clean_json(value: Any) -> Any:
    """Recursively turn numpy scalars into Python numbers and non-finite floats
    into ``None`` so that no NaN or inf reaches JSON output."""
    if isinstance(value, dict):
        return {str(k): clean_json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean_json(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        try:
            value = value.item()
        except (ValueError, AttributeError):
            pass
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if hasattr(value, "isoformat"):
        return value.isoformat().replace("+00:00", "Z")
    return value
