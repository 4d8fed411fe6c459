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
  guardrail_alpha: 0.05         # guardrails: always-valid 95% confidence sequences
metrics:
  - name: render_ms_per_view    # total render time / page views, per unit
    role: guardrail
    kind: ratio
    bad_direction: increase
    table: page_renders
    columns: {timestamp: rendered_at, value: render_ms}
    aggregate: sum
    denominator:
      table: page_renders
      columns: {timestamp: rendered_at}
      aggregate: count
  - name: app_errors_per_unit   # errors per unit (most units have none)
    role: guardrail
    kind: mean
    bad_direction: increase
    table: app_errors
    columns: {timestamp: occurred_at}
    aggregate: count
  - name: loan_cancelled        # share of units that cancelled at least one loan
    role: guardrail
    kind: proportion
    bad_direction: increase
    table: loans
    columns: {timestamp: loaned_at}
    filter_column: cancelled
    filter_values: [true]
    aggregate: any
  - name: reading_minutes       # reading minutes per unit
    role: primary
    kind: mean
    bad_direction: decrease
    table: reading_sessions
    columns: {timestamp: started_at, value: minutes}
    aggregate: sum
    cuped: {pre_period_days: 14}
  - name: hold_wait_hours       # hours a hold waits for a licence, per hold (diagnostic: reported, never alerts)
    role: diagnostic
    kind: ratio
    table: holds
    columns: {timestamp: placed_at, value: wait_hours}
    aggregate: sum
    denominator:
      table: holds
      columns: {timestamp: placed_at}
      aggregate: count
"""


def write_demo_config(directory: Path) -> Path:
    path = directory / "expwatch.yaml"
    path.write_text(DEMO_CONFIG, encoding="utf-8")
    return path
