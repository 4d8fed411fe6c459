"""The configuration the demo writes beside its warehouse."""

from __future__ import annotations

from pathlib import Path

__all__ = ["DEMO_CONFIG", "write_demo_config"]

DEMO_CONFIG = """\
# expwatch configuration for the demo warehouse (a fictional e-book lending app).
# Paths are relative to this file. See config/example.yaml for every key.
warehouse:
  url: "duckdb:///warehouse.duckdb"
state:
  url: "sqlite:///expwatch-state.sqlite"
registry:
  table: experiments            # one row per experiment x phase x variant
  live_status: [running]
assignments:                    # the raw exposure log: the first pipeline stage
  name: assigned
  table: assignments
  segments: [platform, region, patron_type]
stages:                         # the same units counted after bot filtering
  - name: filtered
    table: assignments_filtered
checks:
  alpha: 0.001
"""


def write_demo_config(directory: Path) -> Path:
    path = directory / "expwatch.yaml"
    path.write_text(DEMO_CONFIG, encoding="utf-8")
    return path
