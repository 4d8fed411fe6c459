"""The run's first-assignment relation: each unit's first assignment, derived once.

The assignment counts and every query that reads metric events (guardrails,
novelty, spillover, collision) start from the same thing: for each experiment
and unit, its first variant, the time of its first assignment and whether (and
when) it was later seen in another variant. Without sharing, each query groups
the raw assignment rows by unit again, and on a warehouse of millions of units
that grouping is a large share of each query.

Where the session can hold a temporary table without writing to the warehouse
(a pinned DuckDB session: :meth:`monitor.warehouse.Warehouse.pin`), the first
query that needs it materialises ``sql/first_assignments.sql.j2`` as a temp
table and the later ones read it. The relation is keyed by the assignment
source, the window start and the time it was built to; it serves any query with
the same source and window start, an ``as_of`` no later than its own and
experiments among its own (the templates read it as of their ``:as_of`` through
``leak_ts``). Everywhere else :func:`relation` returns None and each template
keeps its own CTE with the same rules; the brute-force DuckDB tests
(``tests/test_sql_*.py``, parameter ``first-assignment-relation``) run both ways.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime

from monitor.config import SourceConfig
from monitor.templates import Quoter, render, source_context
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse

__all__ = ["relation"]


@dataclass(frozen=True)
class _Built:
    name: str
    source: str
    window_start: datetime
    as_of: datetime
    experiments: frozenset[str]


def relation(wh: Warehouse, src: SourceConfig, experiment_ids: Sequence[str], window_start: datetime,
             as_of: datetime) -> str | None:
    """The name of a first-assignment relation that serves this query, built if
    need be, or None when the session cannot hold one (then use the CTE).

    A new relation replaces the previous one of the same source (a replay moves
    ``as_of`` forward step by step), so at most one per source is held.
    """
    if not wh.pinned:
        return None
    ids = frozenset(experiment_ids)
    ws, end = _naive(window_start), _naive(as_of)
    held: list[_Built] = wh.first_relations
    for b in held:
        if b.source == src.name and b.window_start == ws and end <= b.as_of and ids <= b.experiments:
            return b.name
    for b in [b for b in held if b.source == src.name]:
        wh.drop_temp(b.name)
        held.remove(b)
    sql = render("first_assignments.sql.j2", wh.dialect, **source_context(src, Quoter(wh.dialect)))
    name = wh.create_temp(f"first-assignments[{src.name}]", sql,
                          {"window_start": ws, "as_of": end, "experiment_ids": sorted(ids)},
                          expanding=("experiment_ids",))
    held.append(_Built(name, src.name, ws, end, ids))
    return name
