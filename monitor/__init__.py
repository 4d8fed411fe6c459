"""expwatch: trust checks for live online controlled experiments.

The command line (``expwatch``) is the main interface; :mod:`monitor.api` gives
notebooks and orchestrators the same cycle, explain and replay as pandas frames
plus the command line's JSON documents::

    from monitor import api
    run = api.cycle("expwatch.yaml", dry_run=True)
    run.findings[run.findings.severity >= "alert"]
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from monitor.errors import ConfigError, MonitorError, NotifyError, StateError, WarehouseError

if TYPE_CHECKING:
    from monitor.config import Config, load_config
    from monitor.cycle import CycleResult, run_cycle
    from monitor.findings import Finding

__version__ = "0.1.0"

#: names imported on first use (PEP 562), so that ``expwatch --version`` does not load
#: pandas, SciPy and SQLAlchemy
_LAZY = {"Config": "monitor.config", "load_config": "monitor.config", "CycleResult": "monitor.cycle",
         "run_cycle": "monitor.cycle", "Finding": "monitor.findings"}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'monitor' has no attribute {name!r}")

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
