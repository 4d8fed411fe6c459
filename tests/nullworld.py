"""A realistic world with no problem in it: the null hypothesis of every check, as DuckDB tables.

Unlike the demo warehouse (``monitor/demo.py``), whose units arrive by a Poisson process
independent of their activity and which plants problems to be found, this world is shaped like
product traffic and plants nothing:

* a user population with heavy-tailed, bursty activity (most users 0-3 sessions a month, a few
  dozens): per-user rates are lognormal, sessions come in bursts of geometric size;
* a daily and a weekly cycle, growth of about 40% over the month, and one day on which traffic
  drops to 40% for every user (and so for every variant) alike;
* bots (1% of users, hundreds of sessions each) that appear in the raw exposure log and that the
  filter stage removes;
* exposure logged *inside* sessions: a user is exposed at a session that touches the feature
  (a per-experiment trigger probability), so heavy users are exposed first;
* ramps (5 -> 20 -> 50% and 10 -> 50% treatment), a three-arm design, plain 50/50 tests, all
  overlapping on the same users with independent assignment;
* zero-inflated and heavy-tailed metrics (reading minutes per session lognormal with sigma 1.2,
  purchases in 2% of sessions, errors in 0.4% of sessions, render time per page view with a
  per-user device factor).

Treatment changes nothing: every metric event depends on the user and the session only.
:func:`build` writes the tables and returns the config (a dict for ``parse_config``).

For power studies, ``build(..., plant=(...))`` plants problems from :data:`PROBLEMS` into this
world (one experiment each, see :data:`TARGETS`). Planting draws from a random stream of its own
and only rescales or moves what the null world drew, so ``plant=()`` (the default) writes
exactly the null world of the same seed.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd

#: End of the data (exclusive), the time of the monitor's run.
AS_OF = datetime(2026, 10, 29, 9, tzinfo=UTC)
#: Days of data before AS_OF (the first 14 are before any experiment: a pre-period).
DAYS = 42
#: Calendar day (0: the date the data begin) on which traffic drops to 40% for everyone.
DROP_DAY = 30
USERS = 12_000
BOT_SHARE = 0.01

#: id -> ([(phase start day since the data begin, variant weights)], trigger probability per session)
EXPERIMENTS: dict[str, tuple[list[tuple[float, dict[str, float]]], float]] = {
    "wide-ramp": ([(14.4, {"control": 0.95, "treatment": 0.05}), (19.4, {"control": 0.8, "treatment": 0.2}),
                   (24.4, {"control": 0.5, "treatment": 0.5})], 0.6),
    "two-step-ramp": ([(16.6, {"control": 0.9, "treatment": 0.1}), (23.6, {"control": 0.5, "treatment": 0.5})], 0.8),
    "three-arms": ([(15.2, {"control": 1 / 3, "left": 1 / 3, "right": 1 / 3})], 0.5),
    "plain-half": ([(14.1, {"control": 0.5, "treatment": 0.5})], 1.0),
    "late-half": ([(27.3, {"control": 0.5, "treatment": 0.5})], 0.9),
    "narrow-trigger": ([(18.8, {"control": 0.5, "treatment": 0.5})], 0.15),
}


#: Problem -> what is planted (at strength 1; ``build(..., strength=k)`` multiplies each size,
#: the share shift, the leaked and copied shares and the effects, by k). Effects start at each unit's first exposure (age 0 is that day).
PROBLEMS: dict[str, str] = {
    "srm": "plain-half assigns 49% of units to treatment, not the registry's 50% (a 1-point share shift)",
    "leakage": "3% of plain-half's units are exposed again, hours later, to the other variant",
    "guardrail": "render time per page view +5% for plain-half's treatment units after first exposure",
    "fading": "reading minutes +30% for plain-half's treatment units at age 0, halving every 2 days",
    "growing": "reading minutes of plain-half's treatment units rise from +0% at age 0 to +20% at day 14, then stay",
    "interference": "wide-ramp's treatment units read 60% x (1 - treatment share at the time) more minutes",
    "correlated": "late-half copies plain-half's variant for 10% of the units the two share",
    "stop": "plain-half's exposure log has no rows for 8 hours from 2026-10-28 10:00 UTC (STOP_AT)",
}
#: Problem -> (experiment, check, scope prefix or None): the finding that detects it.
TARGETS: dict[str, tuple[str, str, str | None]] = {
    "srm": ("plain-half", "srm", None), "leakage": ("plain-half", "leakage", None),
    "guardrail": ("plain-half", "guardrail", "render_ms_per_view"), "fading": ("plain-half", "novelty", "minutes"),
    "growing": ("plain-half", "novelty", "minutes"), "interference": ("wide-ramp", "spillover", "minutes"),
    "correlated": ("late-half", "collision", "plain-half"), "stop": ("plain-half", "freshness", None),
}
#: Start of the planted 8-hour stop (a busy Wednesday daytime, the day before AS_OF).
STOP_AT = AS_OF - timedelta(hours=23)
STOP_HOURS = 8


def _hour_weights(start: datetime) -> np.ndarray:
    hours = np.arange(DAYS * 24)
    t = np.array([start + timedelta(hours=int(h)) for h in hours])
    hod = np.array([x.hour for x in t])
    dow = np.array([x.weekday() for x in t])
    daily = 0.35 + np.exp(-0.5 * ((hod - 20) / 3.0) ** 2) + 0.5 * np.exp(-0.5 * ((hod - 12) / 2.5) ** 2)
    weekly = np.where(dow >= 5, 1.3, 1.0)
    growth = 1.0 + 0.4 * np.clip((hours / 24 - 14) / 28, 0, 1)
    day = np.array([(x.date() - start.date()).days for x in t])
    drop = np.where(day == DROP_DAY, 0.4, 1.0)
    w = daily * weekly * growth * drop
    return w / w.sum()


def _sessions(rng: np.random.Generator, start: datetime) -> pd.DataFrame:
    p = _hour_weights(start)
    rate = rng.lognormal(np.log(0.6), 1.3, size=USERS)  # bursts per month: median 0.6, heavy tail
    bursts = rng.poisson(rate * DAYS / 30)
    bot = rng.random(USERS) < BOT_SHARE
    bursts = np.where(bot, rng.integers(150, 400, size=USERS), bursts)
    user = np.repeat(np.arange(USERS), bursts)
    hour = rng.choice(p.size, size=user.size, p=p)
    size = np.where(bot[user], 1, rng.geometric(0.5, size=user.size))  # sessions per burst
    user, hour = np.repeat(user, size), np.repeat(hour, size)
    offset = rng.random(user.size) * 3600 + np.concatenate(
        [np.cumsum(rng.exponential(1800, size=k)) - 1800 for k in size]) if size.size else np.zeros(0)
    t = hour * 3600.0 + offset
    keep = t < DAYS * 86400
    df = pd.DataFrame({"user": user[keep], "t": t[keep]}).sort_values(["user", "t"], ignore_index=True)
    df["bot"] = bot[df["user"].to_numpy()]
    return df


def _assignments(rng: np.random.Generator, s: pd.DataFrame, start: datetime, plant: frozenset[str],
                 prng: np.random.Generator, k: float) -> tuple[pd.DataFrame, pd.DataFrame, dict[str, pd.DataFrame]]:
    rows, reg, firsts = [], [], {}
    stop = (STOP_AT - start).total_seconds()
    for eid, (phases, trigger) in EXPERIMENTS.items():
        first_day = phases[0][0]
        hit = s[(s["t"] >= first_day * 86400) & (rng.random(len(s)) < trigger)]
        first = hit.groupby("user", sort=False)["t"].min()
        bounds = np.array([d * 86400 for d, _ in phases])
        ph = np.searchsorted(bounds, first.to_numpy(), side="right") - 1
        variants = list(phases[0][1])
        var = np.empty(first.size, dtype=object)
        for j, (_, w) in enumerate(phases):
            sel = ph == j
            if "srm" in plant and eid == "plain-half":
                w = {"control": 0.5 + 0.01 * k, "treatment": 0.5 - 0.01 * k}
            var[sel] = rng.choice(variants, size=int(sel.sum()), p=[w[v] for v in variants])
        if "correlated" in plant and eid == "late-half":
            other = firsts["plain-half"]["variant"].reindex(first.index).to_numpy()
            copy = pd.notna(other) & (prng.random(first.size) < 0.10 * k)
            var[copy] = other[copy]
        of_user = pd.Series(var, index=first.index)
        firsts[eid] = pd.DataFrame({"t0": first, "variant": of_user})
        hit = hit.assign(variant=hit["user"].map(of_user))
        if "leakage" in plant and eid == "plain-half":
            hit = pd.concat([hit, _leaks(prng, hit, first, of_user, 0.03 * k)], ignore_index=True)
        if "stop" in plant and eid == "plain-half":
            hit = hit[(hit["t"] < stop) | (hit["t"] >= stop + STOP_HOURS * 3600)]
        rows.append(pd.DataFrame({"unit_id": "u" + hit["user"].astype(str), "experiment_id": eid,
                                  "variant": hit["variant"], "t": hit["t"], "bot": hit["bot"]}))
        for j, (d, w) in enumerate(phases):
            end = start + timedelta(days=phases[j + 1][0]) if j + 1 < len(phases) else None
            for v in variants:
                reg.append({"experiment_id": eid, "title": eid, "owner": "null-world", "status": "running",
                            "phase": j + 1, "phase_start": start + timedelta(days=d), "phase_end": end,
                            "variant": v, "weight": w[v], "is_control": v == "control"})
    a = pd.concat(rows, ignore_index=True)
    a["assigned_at"] = _ts(start, a.pop("t"))
    registry = pd.DataFrame(reg)
    for c in ("phase_start", "phase_end"):
        registry[c] = pd.to_datetime(registry[c], utc=True).dt.tz_localize(None)
    return a, registry, firsts


def _leaks(prng: np.random.Generator, hit: pd.DataFrame, first: pd.Series, of_user: pd.Series,
           share: float) -> pd.DataFrame:
    """One more exposure row, to the other variant, for ``share`` of the units, 6 hours (mean) after the first."""
    users = first.index.to_numpy()[prng.random(first.size) < share]
    t = first[users].to_numpy() + prng.exponential(6 * 3600, size=users.size)
    keep = t < DAYS * 86400
    users, t = users[keep], t[keep]
    other = np.where(of_user[users].to_numpy() == "control", "treatment", "control")
    bot = hit.groupby("user")["bot"].first()[users].to_numpy()
    return pd.DataFrame({"user": users, "t": t, "bot": bot, "variant": other})


def _ts(start: datetime, seconds: pd.Series) -> pd.Series:
    return pd.Timestamp(start.replace(tzinfo=None)) + pd.to_timedelta(np.asarray(seconds), unit="s")


def _lifts(s: pd.DataFrame, plant: frozenset[str], firsts: dict[str, pd.DataFrame],
           k: float) -> tuple[np.ndarray, np.ndarray]:
    """Per session: the planted factor on reading minutes and on render time (1 where nothing is planted)."""
    minutes, render = np.ones(len(s)), np.ones(len(s))
    t = s["t"].to_numpy()
    for problem in plant & {"guardrail", "fading", "growing", "interference"}:
        eid = TARGETS[problem][0]
        f = firsts[eid].reindex(s["user"].to_numpy())
        age = (t - f["t0"].to_numpy()) / 86400  # NaN for units never exposed
        treated = (f["variant"].to_numpy() == "treatment") & (age >= 0)
        if problem == "guardrail":
            render[treated] *= 1 + 0.05 * k
        elif problem == "fading":
            minutes[treated] *= 1 + 0.30 * k * 0.5 ** (age[treated] / 2)
        elif problem == "growing":
            minutes[treated] *= 1 + 0.20 * k * np.clip(age[treated] / 14, 0, 1)
        else:  # the treatment share of the phase running at the session's time
            phases = EXPERIMENTS[eid][0]
            j = np.searchsorted([d * 86400 for d, _ in phases], t[treated], side="right") - 1
            share = np.array([w["treatment"] for _, w in phases])[j]
            minutes[treated] *= 1 + 0.60 * k * (1 - share)
    return minutes, render


def _events(rng: np.random.Generator, s: pd.DataFrame, start: datetime,
            lifts: tuple[np.ndarray, np.ndarray]) -> dict[str, pd.DataFrame]:
    unit = "u" + s["user"].astype(str)
    at = _ts(start, s["t"])
    n = len(s)
    out = {"sessions": pd.DataFrame({"unit_id": unit, "started_at": at,
                                     "minutes": rng.lognormal(1.5, 1.2, size=n) * lifts[0]})}
    buy = rng.random(n) < 0.02
    out["purchases"] = pd.DataFrame({"unit_id": unit[buy], "purchased_at": at[buy],
                                     "amount": rng.lognormal(2.5, 1.0, size=int(buy.sum()))})
    err = rng.random(n) < 0.004
    out["errors"] = pd.DataFrame({"unit_id": unit[err], "occurred_at": at[err]})
    device = rng.lognormal(0.0, 0.5, size=USERS)[s["user"].to_numpy()]
    views = rng.poisson(2.0, size=n) + 1
    idx = np.repeat(np.arange(n), views)
    out["renders"] = pd.DataFrame({"unit_id": unit.to_numpy()[idx], "rendered_at": at.to_numpy()[idx],
                                   "render_ms": device[idx] * rng.lognormal(5.0, 0.6, size=idx.size) * lifts[1][idx]})
    return out


def config(db: Path, state: Path) -> dict[str, Any]:
    """The monitor configuration for a world written to ``db`` (every check at its defaults)."""
    return {
        "warehouse": {"url": f"duckdb:///{db}"},
        "state": {"url": f"sqlite:///{state}"},
        "registry": {"table": "experiments"},
        "assignments": {"name": "assigned", "table": "assignments"},
        "stages": [{"name": "filtered", "table": "assignments_filtered"}],
        "metrics": [
            {"name": "minutes", "role": "guardrail", "kind": "mean", "bad_direction": "decrease",
             "table": "sessions", "columns": {"timestamp": "started_at", "value": "minutes"}, "aggregate": "sum"},
            {"name": "revenue", "role": "guardrail", "kind": "mean", "bad_direction": "decrease",
             "table": "purchases", "columns": {"timestamp": "purchased_at", "value": "amount"}, "aggregate": "sum"},
            {"name": "had_error", "role": "guardrail", "kind": "proportion", "bad_direction": "increase",
             "table": "errors", "columns": {"timestamp": "occurred_at"}, "aggregate": "any"},
            {"name": "render_ms_per_view", "role": "guardrail", "kind": "ratio", "bad_direction": "increase",
             "table": "renders", "columns": {"timestamp": "rendered_at", "value": "render_ms"}, "aggregate": "sum",
             "denominator": {"table": "renders", "columns": {"timestamp": "rendered_at"}, "aggregate": "count"}},
        ],
    }


def build(directory: Path, seed: int, plant: tuple[str, ...] = (), strength: float = 1.0) -> dict[str, Any]:
    """Write the world for ``seed`` to ``directory/world.duckdb``; return its monitor config.

    ``plant``: names from :data:`PROBLEMS` to plant (none by default: the null world), each at
    ``strength`` times the size :data:`PROBLEMS` states."""
    unknown = sorted(set(plant) - set(PROBLEMS))
    if unknown:
        raise ValueError(f"unknown problem(s) to plant: {', '.join(unknown)} (known: {', '.join(PROBLEMS)})")
    if not 0 < strength <= 10:
        raise ValueError(f"strength must be in (0, 10], got {strength:g}")
    rng, prng = np.random.default_rng(seed), np.random.default_rng([seed, 17])
    start = AS_OF - timedelta(days=DAYS)
    s = _sessions(rng, start)
    s = s[_ts(start, s["t"]) < pd.Timestamp(AS_OF.replace(tzinfo=None))]
    a, registry, firsts = _assignments(rng, s, start, frozenset(plant), prng, strength)
    humans = s[~s["bot"]]
    tables = {"experiments": registry, "assignments": a.drop(columns="bot"),
              "assignments_filtered": a[~a["bot"]].drop(columns="bot"),
              **_events(rng, humans, start, _lifts(humans, frozenset(plant), firsts, strength))}
    db = directory / "world.duckdb"
    con = duckdb.connect(str(db))
    try:
        for name, df in tables.items():
            con.register("frame", df)
            con.execute(f'CREATE OR REPLACE TABLE "{name}" AS SELECT * FROM frame')
            con.unregister("frame")
    finally:
        con.close()
    return config(db, directory / "state.sqlite")
