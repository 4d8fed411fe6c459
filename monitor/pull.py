"""Incremental pulls of hourly assignment counts.

For each assignment source (the first stage and every extra pipeline stage) one
query covers every live experiment. The state store keeps the hourly counts
already pulled and, per source and experiment, the time they were pulled to (the
watermark). A run asks the warehouse only for first assignments at or after

    since = min over experiments of (watermark - lookback)     (start of the
                                                                experiment if new)

and replaces those hours in the store, so late rows inside the lookback window
(default 48 h) are picked up. Every query still reads the rows of the whole
experiment window, because a unit's first assignment and whether it ever leaked
depend on all its rows; what shrinks is what comes back.

Known bound: a unit whose second variant shows up more than ``lookback`` after its
first assignment stays counted as clean in the stored hour; ``--full-refresh``
re-pulls everything.

``as_of`` earlier than a stored watermark (a backtest) pulls the whole window
bounded at ``as_of`` and stores nothing.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

import pandas as pd

from monitor.config import Config, SourceConfig
from monitor.firsts import relation as first_relation
from monitor.registry import Experiment
from monitor.state import COUNT_COLUMNS, StateStore
from monitor.templates import Quoter, render, source_context
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse
from monitor.wording import floor_hour

__all__ = ["PulledSource", "pull_sources", "render_source_sql"]

log = logging.getLogger("monitor")

_NULL = "\x00null"


@dataclass(frozen=True)
class PulledSource:
    name: str
    since: datetime
    fresh: pd.DataFrame
    """Counts for hours >= since, as returned by the warehouse (segment as JSON text)."""
    counts: pd.DataFrame
    """Stored hours before ``since`` plus ``fresh``: the whole history of each experiment."""
    experiments: tuple[str, ...]
    persist: bool
    """False for a backtest (``as_of`` before a stored watermark): nothing may be stored."""


def render_source_sql(src: SourceConfig, wh: Warehouse, *, incremental: bool = False, leak_hours: bool = False,
                      firsts: str | None = None) -> str:
    """The assignment query of one source.

    ``incremental`` (``since`` after the window start) reads the older rows only
    to drop units already assigned before ``since``; ``leak_hours`` adds the
    ``leak_hour`` column (see the template's header); ``firsts`` names the run's
    first-assignment relation (:mod:`monitor.firsts`) to group from instead.
    """
    return render("assignments.sql.j2", wh.dialect, incremental=incremental, leak_hours=leak_hours,
                  firsts=None if incremental else firsts, **source_context(src, Quoter(wh.dialect)))


def _tidy(raw: pd.DataFrame, segments: Sequence[str]) -> pd.DataFrame:
    if raw.empty:
        return pd.DataFrame({c: pd.Series(dtype="object") for c in COUNT_COLUMNS}).astype({"units": "int64", "leaked": "int64"})
    seg_cols = [f"seg_{i}" for i in range(len(segments))]
    if seg_cols:
        # encode each distinct combination of segment values once
        values = raw[seg_cols].astype(object).where(raw[seg_cols].notna(), _NULL).astype(str)
        codes, uniques = pd.MultiIndex.from_frame(values).factorize()
        texts = [
            json.dumps({k: (None if v == _NULL else v) for k, v in zip(segments, combo)}, ensure_ascii=False, separators=(",", ":"))
            for combo in uniques
        ]
        segment = pd.Series(texts, dtype=object).take(codes).to_numpy()
    else:
        segment = ["{}"] * len(raw)
    hours = pd.to_datetime(raw["hour"])
    hours = hours.dt.tz_localize("UTC") if hours.dt.tz is None else hours.dt.tz_convert("UTC")
    out = pd.DataFrame({
        "experiment": raw["experiment"].astype(str),
        "variant": raw["variant"].astype(object).where(raw["variant"].notna(), None),
        "hour": hours,
        "segment": segment,
        "units": pd.to_numeric(raw["units"]).fillna(0).astype("int64"),
        "leaked": pd.to_numeric(raw["leaked"]).fillna(0).astype("int64"),
    })
    if "leak_hour" in raw.columns:  # a replay pull (render flag leak_hours)
        leak = pd.to_datetime(raw["leak_hour"])
        out["leak_hour"] = leak.dt.tz_localize("UTC") if leak.dt.tz is None else leak.dt.tz_convert("UTC")
    return out


def pull_sources(
    cfg: Config,
    wh: Warehouse,
    state: StateStore,
    experiments: Sequence[Experiment],
    as_of: datetime,
    *,
    full_refresh: bool = False,
    on_query: Callable[[str], None] | None = None,
) -> list[PulledSource]:
    """Pull every source for ``experiments``. Reads the state store, writes nothing."""
    out: list[PulledSource] = []
    if not experiments:
        for src in cfg.sources:
            empty = _tidy(pd.DataFrame(), src.segments or [])
            out.append(PulledSource(src.name, as_of, empty, empty, (), True))
        return out
    ids = [e.id for e in experiments]
    window_start = floor_hour(min(e.start for e in experiments))
    lookback = timedelta(hours=cfg.pull.lookback_hours)
    for position, src in enumerate(cfg.sources):
        marks = {} if full_refresh else state.watermarks(src.name)
        backtest = any(m > as_of for m in marks.values())
        incremental = bool(marks) and not backtest
        if incremental:
            per_exp = [max(marks[e.id] - lookback, e.start) if e.id in marks else e.start for e in experiments]
            since = max(window_start, floor_hour(min(per_exp)))
        else:
            since = window_start
        if on_query:
            on_query(src.name)
        # The first source groups the run's first-assignment relation where the session can hold
        # one (monitor/firsts.py): on a full pull it is built here and the later queries reuse it;
        # on an incremental pull only if the metric queries or the collision check (two or more
        # experiments) will build it anyway, since then the counts of the new hours cost one
        # small GROUP BY instead of the incremental query.
        later = bool(cfg.metrics) or len(experiments) >= 2
        firsts = (first_relation(wh, src, ids, window_start, as_of)
                  if position == 0 and (since == window_start or later) else None)
        sql = render_source_sql(src, wh, incremental=since > window_start and firsts is None, firsts=firsts)
        raw = wh.query(
            f"assignments[{src.name}]",
            sql,
            {"window_start": _naive(window_start), "as_of": _naive(as_of), "since": _naive(since), "experiment_ids": ids},
            expanding=("experiment_ids",),
        )
        fresh = _tidy(raw, src.segments or [])
        if incremental:
            stored = state.read_counts(src.name, ids, before=since)
            if len(stored):
                stored["hour"] = pd.to_datetime(stored["hour"], utc=True)
            counts = pd.concat([stored, fresh], ignore_index=True) if len(stored) else fresh
        else:
            counts = fresh
        log.info("source %s: %d count rows since %s (%s)", src.name, len(fresh), since.isoformat(),
                 "incremental" if incremental else ("backtest" if backtest else "full"))
        out.append(PulledSource(src.name, since, fresh, counts, tuple(ids), not backtest))
    return out
