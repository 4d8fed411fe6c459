"""The statistics core stands alone: importable and usable without the warehouse, the
templates, pandas or the rest of the monitor."""

from __future__ import annotations

import subprocess
import sys

_PROBE = """
import sys
import monitor.stats.allocation, monitor.stats.effects, monitor.stats.diagnosis
import monitor.stats.interference, monitor.stats.novelty, monitor.stats.trend
heavy = sorted(m for m in ("sqlalchemy", "jinja2", "pandas", "duckdb", "yaml", "pydantic", "requests")
               if m in sys.modules)
ours = sorted(m for m in sys.modules if m.startswith("monitor") and not m.startswith("monitor.stats")
              and m not in ("monitor", "monitor.errors"))
print(heavy, ours)
"""


def test_stats_import_without_the_rest_of_the_monitor():
    out = subprocess.run([sys.executable, "-P", "-c", _PROBE], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[] []"


def test_stats_errors_are_value_errors_of_their_own():
    import numpy as np
    import pytest

    from monitor.errors import MonitorError
    from monitor.stats import StatsError
    from monitor.stats.allocation import chisquare_gof

    assert issubclass(StatsError, ValueError) and not issubclass(StatsError, MonitorError)
    with pytest.raises(StatsError, match="negative"):
        chisquare_gof(np.array([5, -1]), np.array([0.5, 0.5]))
