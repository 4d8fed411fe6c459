"""expwatch: trust checks for live online controlled experiments.

The command line (``expwatch``) is the main interface; :mod:`monitor.api` gives
notebooks and orchestrators the same cycle, explain and replay as pandas frames
plus the command line's JSON documents::

    from monitor import api
    run = api.cycle("expwatch.yaml", dry_run=True)
    run.findings[run.findings.severity >= 2]
"""

from __future__ import annotations

from monitor.config import Config, load_config
from monitor.cycle import CycleResult, run_cycle
from monitor.errors import ConfigError, MonitorError, NotifyError, StateError, WarehouseError
from monitor.findings import Finding

__version__ = "0.1.0"

__all__ = [
    "Config",
    "ConfigError",
    "CycleResult",
    "Finding",
    "MonitorError",
    "NotifyError",
    "StateError",
    "WarehouseError",
    "__version__",
    "load_config",
    "run_cycle",
]
