"""The exceptions expwatch raises.

Every error a user can cause or fix is a :class:`MonitorError`; its message is a
single line that names what is wrong and where (file, key, experiment, query)::

    MonitorError
    ├── ConfigError      bad configuration or command-line usage   (exit code 2)
    ├── WarehouseError   the warehouse could not be reached/queried (exit code 1)
    ├── StateError       the state store is unusable                (exit code 1)
    └── NotifyError      a notification could not be delivered     (exit code 1)

Errors from SQLAlchemy, drivers and the network are translated at the boundary
with ``raise ... from exc`` so the cause stays available to ``--verbose``.
"""

from __future__ import annotations

__all__ = ["MonitorError", "ConfigError", "WarehouseError", "StateError", "NotifyError"]


class MonitorError(Exception):
    """Base class for every error expwatch reports to a user."""

    exit_code = 1


class ConfigError(MonitorError, ValueError):
    """The configuration file or the command line is wrong; the user must fix it."""

    exit_code = 2


class WarehouseError(MonitorError):
    """The warehouse could not be reached, or a query against it failed."""


class StateError(MonitorError):
    """The state store is locked, corrupt, or from a newer expwatch."""


class NotifyError(MonitorError):
    """A webhook or e-mail could not be delivered."""
