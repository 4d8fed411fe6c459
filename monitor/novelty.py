"""The ``novelty`` check: does the treatment effect change with time since first exposure?

A novelty effect (patrons try the new thing, then stop) makes the early estimate
overstate the lasting one; a primacy or learning effect (patrons resist a change,
or need time to learn it) makes it understate it. For every primary and
guardrail metric, one query per metric (``sql/novelty.sql.j2``) returns, per live
experiment x variant x exposure-date cohort x age (whole days since the unit's
first assignment), the sums of the per-unit metric at that age, and the number of
units whose age is complete. A unit with no events on a day counts as 0, so the
denominator at age ``a`` is every unit first assigned at least ``a + 1`` whole days
before the end of the data. This module compares treatment with control at every
age (relative effect, delta method, :mod:`monitor.stats.effects`) and tests for a
trend with :mod:`monitor.stats.novelty`.

Which metrics: ``role`` primary or guardrail of kind mean, proportion or ratio.
Metrics aggregated with ``mean`` are skipped (the mean of a day without events is
not 0, so "inactive counts as 0" does not apply), and CUPED is not used here.

Which units and days: units first assigned on the whole UTC days of the
experiment's current ramp phase (as for guardrails, the other phases ran with
other weights), and data up to the last whole multiple of
``novelty_look_days`` (default 7) days since the first of those days. So
every run within one such period sees the same data and gives the same
verdict, whatever the schedule, and with the default every look covers whole
weeks (each weekday equally often).

Why the verdict stays valid under repeated looks: the budget is spent only on
looks that can be judged. A look ``k`` covers ``k * novelty_look_days`` days, so
at most ``k * novelty_look_days - 1`` ages are complete; the first look with
``novelty_min_days`` of them is ``k0`` (2 with the defaults), and the k-th look
tests at ``look_alpha(novelty_alpha, k) = novelty_alpha * 6 / (pi^2 j^2)`` with
``j = k - k0 + 1`` (0 before ``k0``), which sums to ``novelty_alpha`` over all
looks, and the level is split
(Bonferroni) over the experiment's metrics x treatment variants. So the chance
that a constant effect is *ever* flagged in an experiment's phase is at most
``novelty_alpha`` (union bound, no assumption on how the looks are correlated;
asymptotically, as the normal approximation of every per-age estimate).

Calendar time: a trend by age can also be a change over calendar time (a
holiday, a marketing push) that hits young and old units alike. The check
compares the early half of the exposure-date cohorts with the late half at equal
ages; when they differ, the finding says the trend may be calendar time.

Findings: check ``novelty``, scope the metric name (``metric:variant`` with
several treatments); ``warn`` for a fading or growing effect (the experiment is
not broken, but its early result is a poor guide to the lasting one), ``ok``
otherwise.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd
from scipy.stats import norm

from monitor.config import CheckConfig, Config, MetricConfig, SourceConfig
from monitor.findings import Finding
from monitor.firsts import relation as first_relation
from monitor.guardrails import metric_context
from monitor.registry import Experiment
from monitor.stats import effects as fx
from monitor.stats import novelty as nv
from monitor.templates import Quoter, render
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse
from monitor.wording import floor_hour, fmt_change, fmt_p

__all__ = ["NoveltyPull", "novelty_findings", "novelty_metrics", "pull_novelty", "render_novelty_sql"]

log = logging.getLogger("monitor")

_DAY = timedelta(days=1)
_STATS = ("sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy")
_CROSS = ("cross_yy", "cross_xx", "cross_xy", "cross_yx")


def novelty_metrics(cfg: Config) -> list[MetricConfig]:
    """The configured metrics the novelty check evaluates (primary and guardrail, not ``mean`` aggregates)."""
    return [m for m in cfg.metrics if m.role in ("primary", "guardrail") and m.aggregate != "mean"]


def render_novelty_sql(metric: MetricConfig, assignments: SourceConfig, wh: Warehouse, experiments: int, *,
                       firsts: str | None = None) -> str:
    """The per-age query for one metric and ``experiments`` live experiments, rendered for the
    warehouse's dialect; ``firsts`` names the run's first-assignment relation (:mod:`monitor.firsts`)."""
    ctx = metric_context(metric, assignments, Quoter(wh.dialect))
    ctx["firsts"] = firsts
    return render("novelty.sql.j2", wh.dialect, phase_count=experiments, **ctx)


def window(e: Experiment, as_of: datetime, every: int) -> tuple[datetime, datetime]:
    """The data the novelty check uses for one experiment at ``as_of``.

    From the first UTC midnight of the current ramp phase to the last whole
    multiple of ``every`` days after it that is not after ``as_of`` (equal
    start and end: no look yet).
    """
    ph = e.phase_at(as_of) or e.phases[-1]
    since = _ceil_day(ph.start)
    days = max((_floor_day(as_of) - since) // _DAY, 0)
    return since, since + _DAY * ((days // every) * every)


def _floor_day(t: datetime) -> datetime:
    return t.astimezone(UTC).replace(hour=0, minute=0, second=0, microsecond=0)


def _ceil_day(t: datetime) -> datetime:
    f = _floor_day(t)
    return f if f == t else f + _DAY


@dataclass(frozen=True)
class NoveltyPull:
    """One metric's per-age statistics as returned by the warehouse.

    Attributes
    ----------
    metric : MetricConfig
        The metric.
    frame : pandas.DataFrame
        Columns ``experiment``, ``variant``, ``cohort`` (aware UTC day),
        ``age``, ``age2`` and ``observed`` (int, -1 where the row is of another
        kind), ``units``, the sums and the cross products (floats, 0 where the
        query has none); see ``sql/novelty.sql.j2``.
    windows : dict of str to (datetime, datetime)
        Per experiment id, the aware start and end of the data used (see :func:`window`).
    """

    metric: MetricConfig
    frame: pd.DataFrame
    windows: dict[str, tuple[datetime, datetime]]


def _tidy(raw: pd.DataFrame) -> pd.DataFrame:
    n = len(raw)
    out = pd.DataFrame({
        "experiment": raw["experiment"].astype(str) if n else pd.Series(dtype=object),
        "variant": raw["variant"].astype(str) if n else pd.Series(dtype=object),
    })
    days = pd.to_datetime(raw["cohort"]) if n else pd.Series(pd.to_datetime([]))
    out["cohort"] = days.dt.tz_localize("UTC") if days.dt.tz is None else days.dt.tz_convert("UTC")
    for c in ("age", "age2", "observed"):
        out[c] = pd.to_numeric(raw[c]).fillna(-1).astype(np.int64) if n else pd.Series(dtype=np.int64)
    out["units"] = pd.to_numeric(raw["units"]).fillna(0).astype(float) if n else pd.Series(dtype=float)
    for c in _STATS + _CROSS:
        out[c] = pd.to_numeric(raw[c]).fillna(0.0).astype(float) if c in raw and n else 0.0
    return out


def pull_novelty(cfg: Config, wh: Warehouse, experiments: Sequence[Experiment], as_of: datetime, *,
                 on_query: Callable[[str], None] | None = None) -> list[NoveltyPull]:
    """Run one per-age query per eligible metric for all ``experiments``. Reads only.

    Parameters
    ----------
    cfg : Config
        ``metrics``, the first assignment source and ``checks.novelty_max_age_days``.
    wh : Warehouse
        Read-only warehouse.
    experiments : sequence of Experiment
        Live experiments.
    as_of : datetime
        Aware time of the run; each experiment's data are those of :func:`window`.
    on_query : callable, optional
        Called with the query name before each query (progress display).

    Returns
    -------
    list of NoveltyPull
        One per eligible metric, in config order; empty frames (and no query)
        when no experiment has a whole look of data yet.
    """
    metrics = novelty_metrics(cfg)
    # the same window start as every other query of the run (all live experiments), so
    # they can share the run's first-assignment relation (monitor.firsts)
    window_start = floor_hour(min(e.start for e in experiments)) if experiments else None
    windows = {e.id: window(e, as_of, cfg.checks.novelty_look_days) for e in experiments}
    experiments = [e for e in experiments if windows[e.id][0] < windows[e.id][1]]
    if not experiments:
        return [NoveltyPull(m, _tidy(pd.DataFrame()), windows) for m in metrics]
    end = max(u for _, u in windows.values())
    src = cfg.sources[0]
    ids = [e.id for e in experiments]
    assert window_start is not None
    firsts = first_relation(wh, src, ids, window_start, as_of) if metrics else None
    out = []
    for m in metrics:
        name = f"novelty[{m.name}]"
        if on_query:
            on_query(name)
        params: dict[str, Any] = {"window_start": _naive(window_start), "as_of": _naive(end),
                                  "experiment_ids": ids, "max_age": int(cfg.checks.novelty_max_age_days)}
        for i, e in enumerate(experiments):
            params[f"experiment_{i}"] = e.id
            params[f"since_{i}"] = _naive(windows[e.id][0])
            params[f"until_{i}"] = _naive(windows[e.id][1])
        expanding = ["experiment_ids"]
        for key, spec in (("y", m), ("x", m.denominator)):
            if spec is not None and spec.filter_values is not None:
                params[f"{key}_filter_values"] = list(spec.filter_values)
                expanding.append(f"{key}_filter_values")
        raw = wh.query(name, render_novelty_sql(m, src, wh, len(experiments), firsts=firsts), params,
                       expanding=tuple(expanding))
        out.append(NoveltyPull(m, _tidy(raw), windows))
    return out


# ----------------------------------------------------------------------------- per-age arrays


def _key_index(frame: pd.DataFrame, keys: list[tuple[str, str]]) -> tuple[np.ndarray, np.ndarray]:
    """Per frame row, the position of its (experiment, variant) among the distinct ``keys`` (-1 if none),
    and per key its position among the distinct keys."""
    distinct = list(dict.fromkeys(keys))
    index = pd.MultiIndex.from_tuples(distinct, names=["experiment", "variant"])
    rows = index.get_indexer(pd.MultiIndex.from_arrays([frame["experiment"], frame["variant"]]))
    return rows, np.array([distinct.index(k) for k in keys], dtype=np.int64)


def _arrays(frame: pd.DataFrame, keys: list[tuple[str, str]], ages: int) -> dict[str, np.ndarray]:
    """Units at risk and sums per (experiment, variant) key x age, shape (len(keys), ages)."""
    distinct = len(dict.fromkeys(keys))
    out = {c: np.zeros((distinct, ages)) for c in _STATS}
    obs = np.zeros((distinct, ages))
    if len(frame) and keys:
        row, back = _key_index(frame, keys)
        age, age2, observed = (frame[c].to_numpy() for c in ("age", "age2", "observed"))
        cell = (row >= 0) & (age >= 0) & (age2 < 0) & (age < ages)
        for c in _STATS:
            np.add.at(out[c], (row[cell], age[cell]), frame[c].to_numpy()[cell])
        risk = (row >= 0) & (observed >= 1)
        np.add.at(obs, (row[risk], np.minimum(observed[risk], ages) - 1), frame["units"].to_numpy()[risk])
    else:
        back = np.zeros(len(keys), dtype=np.int64)
    out = {c: v[back] for c, v in out.items()}
    out["n"] = np.cumsum(obs[:, ::-1], axis=1)[:, ::-1][back]  # units observed for more than a whole days
    return out


def _level(m: MetricConfig, a: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-age estimate, per-unit variance (delta method for ratios) and definedness of one arm."""
    n = a["n"]
    if m.kind == "ratio":
        rm = fx.ratio_moments(n, a["sum_y"], a["sum_y2"], a["sum_x"], a["sum_x2"], a["sum_xy"])
        return rm.ratio, rm.var_ratio * n, rm.defined
    if m.kind == "proportion":
        mo = fx.proportion_moments(n, np.minimum(a["sum_y"], n))
    else:
        mo = fx.moments(n, a["sum_y"], a["sum_y2"])
    return mo.mean, mo.var, mo.defined


def _log_lift(m: MetricConfig, c: dict[str, np.ndarray], t: dict[str, np.ndarray]
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-age log lift ``log(treatment / control)``, its standard error, and where it is defined.

    The variance is ``CV^2 (1 / n_t + 1 / n_c)`` with the squared coefficient of
    variation of the two arms pooled (their sums added), the delta-method
    variance of a log ratio of two independent means under equal relative
    spread. Pooling keeps the weight of an age independent of which arm happened
    to be high: with each arm's own variance, an age where the control is low by
    chance gets a large estimate *and* a large variance, which biases weighted
    averages (and the age trend, as counts shrink with age) towards negative
    effects when events are rare.
    """
    m_c, _, d_c = _level(m, c)
    m_t, _, d_t = _level(m, t)
    pooled = {k: c[k] + t[k] for k in c}
    m_p, v_p, d_p = _level(m, pooled)
    ok = d_c & d_t & d_p & (m_c > 0) & (m_t > 0) & (m_p > 0) & (v_p > 0)
    cv2 = np.where(ok, v_p / np.where(ok, m_p, 1.0) ** 2, 0.0)
    inv_n = 1.0 / np.where(ok, t["n"], 1.0) + 1.0 / np.where(ok, c["n"], 1.0)
    lift = np.where(ok, np.log(np.where(ok, m_t, 1.0) / np.where(ok, m_c, 1.0)), 0.0)
    se = np.where(ok, np.sqrt(cv2 * inv_n), 0.0)
    return lift, se, ok


def _cross(frame: pd.DataFrame, ages: int) -> dict[str, np.ndarray]:
    """One arm's (``frame`` holds its rows only) sums behind the covariance of its per-age means (``ages x ages``, upper triangle).

    ``yy[a, b]`` is the sum over units of ``y_a * y_b`` (``a < b``); ``y_at[a, b]`` the
    sum of ``y_a`` over the units at risk at age ``b`` (the cohorts observed for more
    than ``b`` days); likewise for ``x`` and the mixed products of a ratio metric.
    """
    out = {k: np.zeros((ages, ages)) for k in ("yy", "xx", "xy", "yx", "y_at", "x_at")}
    if not len(frame):
        return out
    age, age2, observed = (frame[c].to_numpy() for c in ("age", "age2", "observed"))
    pair = (age2 >= 0) & (age2 < ages) & (age >= 0)
    for name, col in (("yy", "cross_yy"), ("xx", "cross_xx"), ("xy", "cross_xy"), ("yx", "cross_yx")):
        np.add.at(out[name], (age[pair], age2[pair]), frame[col].to_numpy()[pair])
    # cohort -> whole days observed (one value per cohort: the data end at a midnight)
    codes, uniques = pd.factorize(frame["cohort"])
    risk = (observed >= 1) & (codes >= 0)
    obs = np.zeros(len(uniques), dtype=np.int64)
    np.maximum.at(obs, codes[risk], observed[risk])
    cell = (age >= 0) & (age2 < 0) & (age < ages) & (codes >= 0)
    cy, cx = np.zeros((len(uniques), ages)), np.zeros((len(uniques), ages))
    np.add.at(cy, (codes[cell], age[cell]), frame["sum_y"].to_numpy()[cell])
    np.add.at(cx, (codes[cell], age[cell]), frame["sum_x"].to_numpy()[cell])
    at_risk = (obs[:, None] > np.arange(ages)[None, :]).astype(float)  # cohort x b
    out["y_at"], out["x_at"] = cy.T @ at_risk, cx.T @ at_risk
    return out


def _covariance(m: MetricConfig, frame: pd.DataFrame, c_keys: list[tuple[str, str]], t_keys: list[tuple[str, str]],
                c: dict[str, np.ndarray], t: dict[str, np.ndarray], se: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Covariance matrix (pairs x ages x ages) of the per-age log lifts.

    The same units recur at several ages, so per-age estimates are correlated.
    With at-risk sets nested (every unit at risk at age b > a is at risk at a),
    ``Cov(mean_a, mean_b) = C_ab / n_a`` in each arm, where ``C_ab`` is the
    per-unit covariance of the values at ages a and b among the units at risk at
    b; through the delta method (linearising ``log mean``, or ``log(sum y / sum
    x)`` for a ratio, as ``y / ybar - x / xbar``) the log lifts have
    ``Cov(l_a, l_b) = C^z_ab (1 / n_a^t + 1 / n_a^c)``. ``C^z`` is pooled within
    arms, like the variances on the diagonal (which are ``se^2``).
    """
    k, ages = se.shape
    cov = np.zeros((k, ages, ages))
    ratio = m.kind == "ratio"
    groups = dict(tuple(frame.groupby(["experiment", "variant"], sort=False))) if len(frame) else {}
    empty = frame.iloc[:0]
    for i in range(k):
        arms = [_cross(groups.get(key, empty), ages) for key in (c_keys[i], t_keys[i])]
        n_c, n_t = c["n"][i], t["n"][i]
        nb = n_c + n_t
        ybar = (c["sum_y"][i] + t["sum_y"][i]) / np.where(nb > 0, nb, 1.0)
        xbar = (c["sum_x"][i] + t["sum_x"][i]) / np.where(nb > 0, nb, 1.0)

        def centred(name: str, left: str, right: str, arms: list = arms, i: int = i,
                    nb: np.ndarray = nb) -> np.ndarray:
            # within-arm sum over units at risk at b of (left_a - mean)(right_b - mean), pooled over arms
            tot = np.zeros((ages, ages))
            for arm, sums in zip(arms, (c, t)):
                n_b = np.where(sums["n"][i] > 0, sums["n"][i], 1.0)
                tot += arm[name] - arm[f"{left}_at"] * sums[f"sum_{right}"][i][None, :] / n_b[None, :]
            return tot / np.maximum(nb - 2.0, 1.0)[None, :]

        sy = np.where(ybar > 0, ybar, 1.0)
        cz = centred("yy", "y", "y") / (sy[:, None] * sy[None, :])
        if ratio:
            sx = np.where(xbar > 0, xbar, 1.0)
            cz = (cz - centred("yx", "y", "x") / (sy[:, None] * sx[None, :])
                  - centred("xy", "x", "y") / (sx[:, None] * sy[None, :])
                  + centred("xx", "x", "x") / (sx[:, None] * sx[None, :]))
        inv = 1.0 / np.where(n_t > 0, n_t, 1.0) + 1.0 / np.where(n_c > 0, n_c, 1.0)
        upper = np.triu(cz * inv[:, None], 1)
        both = ok[i][:, None] & ok[i][None, :]
        cov[i] = np.where(both, upper + upper.T, 0.0) + np.diag(np.where(ok[i], se[i] ** 2, 0.0))
    return cov


@dataclass
class _Rows:
    """Per-age effects (log lift) of every (experiment, treatment) pair of one metric."""

    experiments: list[Experiment]
    treatments: list[str]
    since: list[datetime]
    looks: np.ndarray
    n_c: np.ndarray
    n_t: np.ndarray
    lift: np.ndarray
    se: np.ndarray
    usable: np.ndarray
    cov: np.ndarray | None


def _rows(m: MetricConfig, frame: pd.DataFrame, exps: list[Experiment], treatments: list[str],
          since: list[datetime], looks: np.ndarray, ages: int, min_units: int, *, covariance: bool = True) -> _Rows:
    c_keys = [(e.id, e.control) for e in exps]
    t_keys = [(e.id, v) for e, v in zip(exps, treatments)]
    both = _arrays(frame, c_keys + t_keys, ages)
    k = len(c_keys)
    c = {key: v[:k] for key, v in both.items()}
    t = {key: v[k:] for key, v in both.items()}
    lift, se, ok = _log_lift(m, c, t)
    age_ok = np.arange(ages)[None, :] < looks[:, None]
    usable = ok & age_ok & (c["n"] >= min_units) & (t["n"] >= min_units)
    cov = _covariance(m, frame, c_keys, t_keys, c, t, se, usable) if covariance else None
    return _Rows(exps, treatments, since, looks, c["n"], t["n"], lift, se, usable, cov)


def _calendar(m: MetricConfig, frame: pd.DataFrame, exps: list[Experiment], treatments: list[str],
              since: list[datetime], looks: np.ndarray, ages: int, min_units: int) -> list[dict[str, Any] | None]:
    """Early vs late exposure-date cohorts at equal ages: inverse-variance weighted mean difference.

    The cohorts of the window are split in two halves by day; at every age both
    halves can show, the difference of their log lifts is weighted by
    ``1 / (se_early^2 + se_late^2)``. The two halves share no unit, but the ages
    within a half do; that correlation is ignored here, so the p-value is a
    little optimistic (the finding only uses it for a caveat).
    """
    halves = []
    mid = {e.id: s + _DAY * int(max(lk // 2, 1)) for e, s, lk in zip(exps, since, looks)}
    cut = frame["experiment"].map(mid)
    for early in (True, False):
        part = frame[(frame["cohort"] < cut) if early else (frame["cohort"] >= cut)]
        halves.append(_rows(m, part, exps, treatments, since, looks, ages, min_units, covariance=False))
    e, late = halves
    common = e.usable & late.usable
    w = np.where(common, 1.0 / np.where(common, e.se**2 + late.se**2, 1.0), 0.0)
    sw = w.sum(axis=1)
    out: list[dict[str, Any] | None] = []
    for i in range(len(exps)):
        if common[i].sum() < 2 or sw[i] <= 0:
            out.append(None)
            continue
        d = float((w[i] * (e.lift[i] - late.lift[i])).sum() / sw[i])
        se = float(1.0 / np.sqrt(sw[i]))
        z = d / se
        out.append({
            "early_cohorts": [since[i], mid[exps[i].id] - _DAY],
            "late_cohorts": [mid[exps[i].id], since[i] + _DAY * int(looks[i] - 1)],
            "ages_compared": int(common[i].sum()),
            "difference": d, "se": se, "z": z, "p_value": float(2.0 * norm.sf(abs(z))),
        })
    return out


# ----------------------------------------------------------------------------- findings


def novelty_findings(experiments: Sequence[Experiment], pulls: Sequence[NoveltyPull], as_of: datetime,
                     checks: CheckConfig) -> list[Finding]:
    """Findings for every eligible metric x live experiment x treatment variant.

    Parameters
    ----------
    experiments : sequence of Experiment
        Live experiments.
    pulls : sequence of NoveltyPull
        From :func:`pull_novelty`.
    as_of : datetime
        Aware time the run describes (selects the current ramp phase).
    checks : CheckConfig
        ``novelty_alpha``, ``novelty_max_age_days``, ``novelty_min_days``,
        ``novelty_tolerance`` and ``srm_min_units`` (fewest units per variant for
        an age to count) are used.

    Returns
    -------
    list of Finding
        Check ``novelty``: ``warn`` for a fading or growing effect, ``ok`` for a
        stable one or when there are too few days to judge.

    Notes
    -----
    Per pair, the per-age log lifts ``log(treatment / control)`` with their
    covariance across ages (:func:`_log_lift`, :func:`_covariance`) enter
    :func:`monitor.stats.novelty.age_trend` (WLS on ``log(1 + age)``, Cochran's
    Q, I^2, tau^2) and :func:`monitor.stats.novelty.converged_effect`
    (exponential approach); reported effects are ``exp(log lift) - 1``. The
    trend is significant when its p-value is below ``look_alpha(novelty_alpha,
    k) / m`` (k: the look, whole ``novelty_look_days`` periods of the current
    phase; m: the experiment's judged metrics x treatments). Then the effect is
    *fading* when the fitted line ends nearer to 0 than it starts and the
    long-run interval does not lie wholly on the other side of 0, else
    *growing* (which includes an effect that starts negative and turns
    positive). Rows with fewer than ``novelty_min_days`` usable ages are ``ok``
    and "not judged".
    """
    ages = int(checks.novelty_max_age_days)
    staged: list[dict[str, Any]] = []
    for pull in pulls:
        m = pull.metric
        exps, trts, since, looks = [], [], [], []
        for e in experiments:
            s, until = pull.windows.get(e.id) or window(e, as_of, checks.novelty_look_days)
            for v in e.variants:
                if v != e.control:
                    exps.append(e)
                    trts.append(v)
                    since.append(s)
                    looks.append(max((until - s) // _DAY, 0))
        if not exps:
            continue
        lk = np.array(looks, dtype=np.int64)
        frame = pull.frame  # only cohorts of the current phase (the query keeps no others)
        rows = _rows(m, frame, exps, trts, since, lk, ages, checks.srm_min_units)
        trend = nv.age_trend(rows.lift, rows.se, np.arange(ages), mask=rows.usable, cov=rows.cov)
        conv = nv.converged_effect(rows.lift, rows.se, np.arange(ages), mask=rows.usable, cov=rows.cov,
                                   alpha=checks.novelty_alpha, tolerance=checks.novelty_tolerance)
        cal = _calendar(m, frame, exps, trts, since, lk, ages, checks.srm_min_units)
        multi = {e.id: len(e.variants) > 2 for e in exps}
        for i, e in enumerate(exps):
            staged.append({"m": m, "i": i, "rows": rows, "trend": trend, "conv": conv, "cal": cal[i],
                           "data_end": pull.windows.get(e.id, (None, None))[1],
                           "scope": f"{m.name}:{trts[i]}" if multi[e.id] else m.name,
                           "judged": bool(trend.defined[i]) and int(trend.k[i]) >= checks.novelty_min_days})
    family: dict[str, int] = {}
    for s in staged:
        if s["judged"]:
            eid = s["rows"].experiments[s["i"]].id
            family[eid] = family.get(eid, 0) + 1
    return [_finding(s, family, checks) for s in staged]


def _rel(x: float) -> float:
    """Log lift -> relative effect ``treatment / control - 1``."""
    return float(np.expm1(x))


def _finding(s: dict[str, Any], family: dict[str, int], checks: CheckConfig) -> Finding:
    m: MetricConfig = s["m"]
    rows: _Rows = s["rows"]
    i: int = s["i"]
    tr: nv.AgeTrend = s["trend"]
    cv: nv.ConvergedEffect = s["conv"]
    e, v = rows.experiments[i], rows.treatments[i]
    days = int(rows.looks[i])
    look = max(days // checks.novelty_look_days, 1)
    fam = max(family.get(e.id, 1), 1)
    first = nv.first_judgeable_look(checks.novelty_look_days, checks.novelty_min_days)
    threshold = float(nv.look_alpha(checks.novelty_alpha, look, first=first)) / fam
    per_age = [{"age": a, "units": {e.control: int(rows.n_c[i, a]), v: int(rows.n_t[i, a])},
                "log_lift": float(rows.lift[i, a]), "se": float(rows.se[i, a]),
                "effect_relative": _rel(rows.lift[i, a])}
               for a in range(rows.lift.shape[1]) if rows.usable[i, a]]
    z = _z(checks.novelty_alpha)
    level = f"{100 * (1 - checks.novelty_alpha):g}%"
    cal = s["cal"]
    stats: dict[str, Any] = {
        "metric": m.name, "kind": m.kind, "role": m.role, "control": e.control, "variant": v,
        "units_since": rows.since[i], "data_end": s["data_end"], "days": days, "look": look,
        "scale": "log lift, log(treatment / control)", "regressor": "log(1 + age)", "ages": per_age,
        "trend": {"slope": float(tr.slope[i]), "slope_se": float(tr.slope_se[i]), "z": float(tr.z[i]),
                  "p_value": float(tr.p_value[i]), "intercept": float(tr.intercept[i])},
        "heterogeneity": {"q": float(tr.q[i]), "df": int(tr.q_df[i]), "p_value": float(tr.q_p_value[i]),
                          "q_residual": float(tr.q_residual[i]),
                          "q_residual_p_value": float(tr.q_residual_p_value[i]),
                          "i2": float(tr.i2[i]), "tau2": float(tr.tau2[i])},
        "pooled": {"log_lift": float(tr.pooled[i]), "se": float(tr.pooled_se[i]),
                   "effect_relative": _rel(tr.pooled[i])},
        "alpha": checks.novelty_alpha, "family_size": fam, "threshold": threshold,
        "classification": None, "converged": None, "calendar": cal,
    }
    head = f"{m.name}: {v} vs {e.control}"
    if not s["judged"]:
        stats["classification"] = "not judged"
        return Finding(e.id, "novelty", s["scope"], "ok",
                       f"{head}: {int(tr.k[i])} usable day(s) since first exposure, {checks.novelty_min_days} "
                       "needed to judge whether the effect changes with time", stats)
    last = max(a["age"] for a in per_age)
    trend_txt = f"trend z={tr.z[i]:.1f}, p={fmt_p(float(tr.p_value[i]))} vs threshold {threshold:.2g}"
    het = f"Q={tr.q[i]:.1f} on {int(tr.q_df[i])} df, I2={100 * tr.i2[i]:.0f}%"
    if float(tr.p_value[i]) >= threshold:
        stats["classification"] = "stable"
        stats["converged"] = {"method": "pooled over ages", "effect_relative": _rel(tr.pooled[i]),
                              "lower": _rel(tr.pooled[i] - z * tr.pooled_se[i]),
                              "upper": _rel(tr.pooled[i] + z * tr.pooled_se[i]), "stabilised_after_days": 0}
        return Finding(e.id, "novelty", s["scope"], "ok",
                       f"{head}: no change with days since first exposure over ages 0-{last} "
                       f"({fmt_change(_rel(tr.pooled[i]))} pooled; {trend_txt}; {het})", stats)
    start, end = float(tr.intercept[i]), float(tr.intercept[i] + tr.slope[i] * np.log1p(last))
    # fading: moves towards 0; growing: moves away from 0, or crosses it (the long-run interval
    # lies wholly on the other side of 0 from the early effect)
    crosses = (cv.lower[i] > 0 and start < 0) or (cv.upper[i] < 0 and start > 0)
    fading = abs(end) < abs(start) and not crosses
    stats["classification"] = "fading" if fading else "growing"
    stab = int(cv.stabilised_after[i]) if bool(cv.stabilised[i]) else None
    stats["converged"] = {"method": "exponential approach, profiled over tau",
                          "effect_relative": _rel(cv.long_run[i]), "lower": _rel(cv.lower[i]),
                          "upper": _rel(cv.upper[i]), "log_lift": float(cv.long_run[i]),
                          "early_effect_relative": _rel(cv.early[i]), "tau_days": float(cv.tau[i]),
                          "tau_range_days": [float(cv.tau_lower[i]), float(cv.tau_upper[i])],
                          "stabilised_after_days": stab, "tolerance": checks.novelty_tolerance}
    what = ("fades with days since first exposure (novelty effect)" if fading
            else "grows with days since first exposure (primacy or learning effect)")
    pts = f"{100 * checks.novelty_tolerance:g}"
    when = (f"within {pts} point{'' if pts == '1' else 's'} of it after about {stab} days" if stab is not None
            else f"not yet stable after {last + 1} days")
    advice = ("judge it by the long-run value, not the early average" if fading
              else "the early average understates it; keep the experiment running until it settles")
    caveat = ""
    if cal is not None and cal["p_value"] < threshold:
        caveat = (f"; early and late exposure cohorts differ at equal ages ({fmt_change(_rel(cal['difference']))}, "
                  f"p={fmt_p(cal['p_value'])}), so part of this may be calendar time rather than age")
    summary = (f"{head} effect {what}: {fmt_change(_rel(cv.early[i]))} at day 0, converging to "
               f"{fmt_change(_rel(cv.long_run[i]))} ({level} interval {fmt_change(_rel(cv.lower[i]))} to "
               f"{fmt_change(_rel(cv.upper[i]))}), {when}; {advice} ({trend_txt}; {het}){caveat}")
    return Finding(e.id, "novelty", s["scope"], "warn", summary, stats)


def _z(alpha: float) -> float:
    return float(norm.ppf(1.0 - alpha / 2.0))
