"""expwatch: trust checks for live online controlled experiments.

The command line (``expwatch``) is the main interface; this module exposes the
same cycle for notebooks and orchestrators::

    from monitor import load_config, run_cycle
    result = run_cycle(load_config("expwatch.yaml"), dry_run=True)
    [f.to_json() for f in result.findings]
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
