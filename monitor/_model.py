"""What every configuration model shares: frozen, unknown keys refused, and the
rule for names that appear in findings and logs (stages, metrics, webhooks)."""

from __future__ import annotations

import re

from pydantic import BaseModel, ConfigDict

__all__ = ["ConfigModel", "check_name"]

_NAME_RE = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.-]*$")


class ConfigModel(BaseModel):
    """Base of every config section: frozen, and a misspelt key is an error."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def check_name(value: str) -> str:
    """A name of letters, digits, '_', '-' or '.' (not starting with '-' or '.')."""
    if not _NAME_RE.match(value):
        raise ValueError("must be letters, digits, '_', '-' or '.'")
    return value
