"""What expwatch tells the places it runs in: JSON log lines, the metrics file, the
terminal table, and the health check of ``expwatch status --max-age``."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import sqlalchemy as sa

from monitor.cli import main
from monitor.state import runs

# the small synthetic warehouse of the serve tests, and its fixtures (one SRM experiment, one healthy)
from test_serve import START, _reset_logging, cfg, wdir  # noqa: F401

UTC = timezone.utc


def test_status_max_age_is_a_health_check(cfg, capsys):
    args = ["status", "--config", str(cfg.path), "--max-age", "3h"]
    assert main(args) == 1  # no run yet: unhealthy
    assert capsys.readouterr().err == "expwatch: unhealthy: no run has succeeded yet\n"
    assert main(["run", "--config", str(cfg.path), "--as-of", (START + timedelta(hours=100)).isoformat(),
                 "--format", "json"]) == 0
    capsys.readouterr()
    assert main(args) == 0  # the run finished just now
    # the same run, finished four hours ago
    eng = sa.create_engine(cfg.state.url)
    with eng.begin() as c:
        c.execute(sa.update(runs).values(finished_at=datetime.now(UTC) - timedelta(hours=4)))
    eng.dispose()
    assert main(args) == 1
    err = capsys.readouterr().err
    assert err.startswith("expwatch: unhealthy: the latest successful run finished ") and "--max-age 3h" in err
    assert main([*args[:-1], "3 hours"]) == 2  # a usage error, one line
    assert "--max-age" in capsys.readouterr().err
