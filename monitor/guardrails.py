"""Guardrail and metric checks: per-variant sufficient statistics -> findings.

For every configured metric one query (``sql/metrics.sql.j2``) returns, per live
experiment x variant x hour of first assignment, the cumulative sufficient
statistics of the per-unit metric over the units assigned so far (``n``,
``sum_y``, ``sum_y2``; for ratios ``sum_x``, ``sum_x2``, ``sum_xy``; for CUPED
``sum_c``, ``sum_c2``, ``sum_yc``). This module compares each treatment variant
with the control using :mod:`monitor.stats.effects` and turns the result into
findings:

``guardrail``
    A metric with ``role: guardrail``. The status comes from the always-valid
    confidence sequence of the relative effect ``treatment / control - 1``
    (:func:`monitor.stats.effects.guardrail_status`): ``alert`` when the whole
    sequence lies beyond the margin on the bad side, ``warn`` when it excludes 0
    on the bad side but not the margin, ``ok`` otherwise. An established
    improvement is ``ok``. While the control mean is not yet bounded away from 0
    the relative sequence is unbounded: no harm beyond the margin can be
    established, and the status is ``warn`` if the difference's sequence excludes
    0 on the bad side, else ``ok``.
``metric``
    Primary and diagnostic metrics get the same numbers with status ``ok``
    always: they inform, they never alert.

Which units are compared: those first assigned in the experiment's current ramp
phase (from the first whole hour after the phase start). Units of earlier phases
were assigned with other weights and have been in the experiment longer, so
pooling them would confound the comparison with time in the experiment.

Scope of a finding: the metric name, or ``metric:variant`` when the experiment
has several treatment variants.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from monitor.config import (
    CheckConfig,
    Config,
    MetricConfig,
    MetricSourceConfig,
    SourceConfig,
)
from monitor.findings import Finding
from monitor.firsts import relation as first_relation
from monitor.registry import Experiment
from monitor.stats import effects as fx
from monitor.templates import Quoter, render
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse
from monitor.wording import ceil_hour, floor_hour, fmt_change, fmt_p

__all__ = [
    "STAT_COLUMNS",
    "GuardrailResult",
    "MetricPull",
    "MetricSnapshot",
    "guardrail_findings",
    "metric_context",
    "pull_metrics",
    "render_metric_sql",
]

log = logging.getLogger("monitor")

#: Sufficient-statistics columns of a metric frame (absent ones are 0).
STAT_COLUMNS = ("n", "sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy", "sum_c", "sum_c2", "sum_yc")
_HOUR = timedelta(hours=1)


# ----------------------------------------------------------------------------- SQL


def _part(key: str, spec: MetricSourceConfig, q: Quoter, alias: str) -> dict[str, Any]:
    cols = spec.columns
    return {
        "key": key,
        "source": q.from_clause(spec.table, spec.sql, alias),
        "unit": q.ident(cols.unit),
        "timestamp": q.ident(cols.timestamp),
        "value": q.ident(cols.value) if cols.value is not None else None,
        "filter_column": q.ident(spec.filter_column) if spec.filter_column is not None else None,
        "aggregate": spec.aggregate,
    }


def metric_context(metric: MetricConfig, assignments: SourceConfig, q: Quoter) -> dict[str, Any]:
    """Template variables of ``metrics.sql.j2`` for one metric.

    Parameters
    ----------
    metric : MetricConfig
        The metric (its event source, and a denominator for a ratio).
    assignments : SourceConfig
        The first assignment source, with its column mapping filled in.
    q : Quoter
        Identifier quoting of the warehouse dialect.

    Returns
    -------
    dict
        Pre-quoted identifiers and flags; values are never part of it.
    """
    assert assignments.columns is not None
    a = assignments.columns
    parts = [_part("y", metric, q, "user_metric")]
    if metric.denominator is not None:
        parts.append(_part("x", metric.denominator, q, "user_denominator"))
    return {
        "assignment_source": q.from_clause(assignments.table, assignments.sql, "user_source"),
        "a": {"unit": q.ident(a.unit), "experiment": q.ident(a.experiment), "variant": q.ident(a.variant),
              "timestamp": q.ident(a.timestamp)},
        "parts": parts,
        "ratio": metric.kind == "ratio",
        "cuped": metric.cuped is not None,
        "firsts": None,
    }


def render_metric_sql(metric: MetricConfig, assignments: SourceConfig, wh: Warehouse, *,
                      firsts: str | None = None) -> str:
    """The query for one metric, rendered for the warehouse's dialect; ``firsts`` names
    the run's first-assignment relation (:mod:`monitor.firsts`) to read units from."""
    ctx = metric_context(metric, assignments, Quoter(wh.dialect))
    ctx["firsts"] = firsts
    return render("metrics.sql.j2", wh.dialect, **ctx)


def metric_params(metric: MetricConfig, window_start: datetime, as_of: datetime,
                  experiment_ids: Sequence[str]) -> tuple[dict[str, Any], tuple[str, ...]]:
    """Bind parameters (and the names of the expanding ones) of one metric query."""
    pre = timedelta(days=metric.cuped.pre_period_days) if metric.cuped is not None else timedelta(0)
    params: dict[str, Any] = {
        "window_start": _naive(window_start), "as_of": _naive(as_of), "experiment_ids": list(experiment_ids),
        "event_start": _naive(window_start - pre),
    }
    expanding = ["experiment_ids"]
    if metric.cuped is not None:
        params["pre_period"] = pre
    for key, spec in (("y", metric), ("x", metric.denominator)):
        if spec is not None and spec.filter_values is not None:
            params[f"{key}_filter_values"] = list(spec.filter_values)
            expanding.append(f"{key}_filter_values")
    return params, tuple(expanding)


@dataclass(frozen=True)
class MetricPull:
    """One metric's statistics as returned by the warehouse.

    Attributes
    ----------
    metric : MetricConfig
        The metric.
    frame : pandas.DataFrame
        Columns ``experiment``, ``variant``, ``hour`` (aware UTC hour of first
        assignment) and :data:`STAT_COLUMNS` (floats; 0 where the query has none).
    """

    metric: MetricConfig
    frame: pd.DataFrame


def tidy_stat_frame(raw: pd.DataFrame, columns: Sequence[str] | None = None) -> pd.DataFrame:
    """A metric query's result as experiment (str), variant (str), hour (aware UTC) and float
    ``columns`` (default: the guardrail statistics); missing or NULL sums are 0."""
    out = pd.DataFrame({
        "experiment": raw["experiment"].astype(str) if len(raw) else pd.Series(dtype=object),
        "variant": raw["variant"].astype(str) if len(raw) else pd.Series(dtype=object),
    })
    hours = pd.to_datetime(raw["hour"]) if len(raw) else pd.Series(pd.to_datetime([]))
    out["hour"] = hours.dt.tz_localize("UTC") if hours.dt.tz is None else hours.dt.tz_convert("UTC")
    for c in (STAT_COLUMNS if columns is None else columns):
        out[c] = pd.to_numeric(raw[c]).fillna(0.0).astype(float) if c in raw else 0.0
    return out


def pull_metrics(cfg: Config, wh: Warehouse, experiments: Sequence[Experiment], as_of: datetime, *,
                 on_query: Callable[[str], None] | None = None) -> list[MetricPull]:
    """Run one query per configured metric for all ``experiments``. Reads only.

    Parameters
    ----------
    cfg : Config
        The configuration (``metrics`` and the first assignment source).
    wh : Warehouse
        Read-only warehouse.
    experiments : sequence of Experiment
        Live experiments.
    as_of : datetime
        Aware end of the data (exclusive).
    on_query : callable, optional
        Called with the metric name before each query (progress display).

    Returns
    -------
    list of MetricPull
        One per metric, in config order; empty frames when there are no experiments.
    """
    out: list[MetricPull] = []
    if not cfg.metrics:
        return out
    if not experiments:
        return [MetricPull(m, tidy_stat_frame(pd.DataFrame())) for m in cfg.metrics]
    ids = [e.id for e in experiments]
    window_start = floor_hour(min(e.start for e in experiments))
    src = cfg.sources[0]
    firsts = first_relation(wh, src, ids, window_start, as_of)  # shared by every metric's query
    for m in cfg.metrics:
        if on_query:
            on_query(m.name)
        params, expanding = metric_params(m, window_start, as_of, ids)
        raw = wh.query(f"metric[{m.name}]", render_metric_sql(m, src, wh, firsts=firsts), params, expanding=expanding)
        out.append(MetricPull(m, tidy_stat_frame(raw)))
    return out


# ----------------------------------------------------------------------------- findings


@dataclass(frozen=True)
class MetricSnapshot:
    """The summed statistics one comparison used (stored in ``expwatch_metric_snapshots``)."""

    experiment: str
    metric: str
    variant: str
    since: datetime
    n: float
    sum_y: float
    sum_y2: float
    sum_x: float
    sum_x2: float
    sum_xy: float
    sum_c: float
    sum_c2: float
    sum_yc: float


@dataclass(frozen=True)
class GuardrailResult:
    """Findings of every metric, and the statistics behind them."""

    findings: tuple[Finding, ...]
    snapshots: tuple[MetricSnapshot, ...]


def _since(e: Experiment, as_of: datetime) -> datetime:
    ph = e.phase_at(as_of)
    if ph is None:
        started = [p for p in e.phases if p.start <= as_of]
        ph = started[-1] if started else e.phases[0]
    return ceil_hour(ph.start)


def _num(x: float) -> str:
    if x == 0:
        return "0"
    return f"{x:,.4g}" if 1e-3 <= abs(x) < 1e6 else f"{x:.3g}"


def _fmt_e(e: float | None) -> str:
    if e is None:
        return "n/a"
    if e < 1000:
        return f"{e:.2g}"
    return f"{e:,.0f}" if e < 1e6 else f"{e:.2g}"


@dataclass(frozen=True)
class _Pairs:
    """Control and treatment statistics of every (experiment, treatment) pair of one metric."""

    experiments: list[Experiment]
    treatments: list[str]
    since: list[datetime]
    ctrl: dict[str, np.ndarray]
    trt: dict[str, np.ndarray]


def _pairs(experiments: Sequence[Experiment], frame: pd.DataFrame, as_of: datetime) -> _Pairs:
    since = {e.id: _since(e, as_of) for e in experiments}
    if len(frame):
        keep = frame["hour"] >= frame["experiment"].map(since)
        totals = frame.loc[keep].groupby(["experiment", "variant"])[list(STAT_COLUMNS)].sum()
    else:
        totals = pd.DataFrame(columns=list(STAT_COLUMNS), index=pd.MultiIndex.from_tuples([], names=["experiment", "variant"]))
    exps, trts, c_keys, t_keys = [], [], [], []
    for e in experiments:
        for v in e.variants:
            if v != e.control:
                exps.append(e)
                trts.append(v)
                c_keys.append((e.id, e.control))
                t_keys.append((e.id, v))
    full = totals.reindex(pd.MultiIndex.from_tuples(c_keys + t_keys, names=["experiment", "variant"]) if c_keys else totals.index[:0])
    full = full.fillna(0.0).astype(float)
    k = len(c_keys)
    ctrl = {c: full[c].to_numpy()[:k] for c in STAT_COLUMNS}
    trt = {c: full[c].to_numpy()[k:] for c in STAT_COLUMNS}
    return _Pairs(exps, trts, [since[e.id] for e in exps], ctrl, trt)


def _compare(m: MetricConfig, p: _Pairs, checks: CheckConfig) -> tuple[fx.EffectEstimate, np.ndarray | None]:
    """The effect estimate per pair; CUPED variance reduction (pairs x 2) if used."""
    kw = {"alpha": checks.guardrail_alpha, "n_star": checks.guardrail_n_star}
    c, t = p.ctrl, p.trt
    if m.kind == "ratio":
        rc = fx.ratio_moments(c["n"], c["sum_y"], c["sum_y2"], c["sum_x"], c["sum_x2"], c["sum_xy"])
        rt = fx.ratio_moments(t["n"], t["sum_y"], t["sum_y2"], t["sum_x"], t["sum_x2"], t["sum_xy"])
        return fx.compare_ratios(rc, rt, **kw), None
    if m.cuped is not None:
        stack = {k: np.stack([c[k], t[k]], axis=-1) for k in STAT_COLUMNS}
        cu = fx.cuped(stack["n"], stack["sum_y"], stack["sum_y2"], stack["sum_c"], stack["sum_c2"], stack["sum_yc"])
        return fx.compare_means(cu.adjusted[..., 0], cu.adjusted[..., 1], **kw), cu.variance_reduction
    if m.kind == "proportion":
        return fx.compare_proportions(fx.proportion_moments(c["n"], c["sum_y"]),
                                      fx.proportion_moments(t["n"], t["sum_y"]), **kw), None
    return fx.compare_means(fx.moments(c["n"], c["sum_y"], c["sum_y2"]),
                            fx.moments(t["n"], t["sum_y"], t["sum_y2"]), **kw), None


def _why_undefined(m: MetricConfig, i: int, p: _Pairs, est: fx.EffectEstimate) -> str:
    e, v = p.experiments[i], p.treatments[i]
    nc, nt = p.ctrl["n"][i], p.trt["n"][i]
    if nc == 0 and nt == 0:
        return f"no data yet: no units first assigned since {p.since[i]:%Y-%m-%d %H:%M} UTC"
    if nc < 2 or nt < 2:
        return f"too few units to compare ({int(nc):,} {e.control}, {int(nt):,} {v})"
    if m.kind == "ratio":
        zero = [name for name, s in ((e.control, p.ctrl), (v, p.trt)) if s["sum_x"][i] == 0]
        if zero:
            return f"the denominator is zero for every unit of {', '.join(zero)}, so the ratio is undefined"
    if p.ctrl["sum_y"][i] == 0 and p.trt["sum_y"][i] == 0:
        return "the metric is 0 for every unit in both variants so far (if the event is not rare, check that it arrives)"
    if not bool(est.defined[i]):
        return "the metric has no variation within either variant, so no interval can be formed"
    zero = [name for name, arm in ((e.control, p.ctrl), (v, p.trt)) if arm["sum_y"][i] == 0]
    if zero:
        return f"the metric is 0 for every unit of {zero[0]} so far, so the relative effect is undefined"
    return "the relative effect has no usable interval yet"


def guardrail_findings(experiments: Sequence[Experiment], pulls: Sequence[MetricPull], as_of: datetime,
                       checks: CheckConfig) -> GuardrailResult:
    """Findings for every metric x live experiment x treatment variant.

    Parameters
    ----------
    experiments : sequence of Experiment
        Live experiments (control first in ``variants``).
    pulls : sequence of MetricPull
        From :func:`pull_metrics`.
    as_of : datetime
        Aware time the run describes (selects the current ramp phase).
    checks : CheckConfig
        ``guardrail_alpha``, ``guardrail_n_star``, ``guardrail_multiplicity``,
        ``srm_min_units`` and ``critical_factor`` are used.

    Returns
    -------
    GuardrailResult
        Findings (check ``guardrail`` or ``metric``) and the summed statistics used.

    Notes
    -----
    Degenerate comparisons never raise: no units yet, fewer than two units in a
    variant, a metric that is 0 for every unit, no variation, a zero denominator
    or a control mean of 0 give a finding whose summary says so. For a guardrail
    it is ``warn`` when both variants have at least ``srm_min_units`` units (the
    metric should be measurable by then, so the data are suspect), else ``ok``.
    No NaN or infinity reaches the statistics (``EffectEstimate.row`` gives None).

    The multiplicity policy applies per experiment: the family is all of the
    experiment's judged guardrails (metrics x treatment variants). With ``bh``
    (fixed-horizon p-values; valid for one planned look only) or ``ebh``
    (e-values; valid at any look and under any dependence [1]_), a guardrail the
    procedure does not reject at ``guardrail_alpha`` is reported ``ok`` with a
    note, even if its own sequence excludes 0.

    References
    ----------
    .. [1] R. Wang and A. Ramdas, "False discovery rate control with e-values",
       Journal of the Royal Statistical Society B, 84(3), 822-852, 2022.
    """
    staged: list[dict[str, Any]] = []
    snapshots: list[MetricSnapshot] = []
    for pull in pulls:
        m = pull.metric
        p = _pairs(experiments, pull.frame, as_of)
        if not p.experiments:
            continue
        est, vr = _compare(m, p, checks)
        direction = m.bad_direction or "increase"
        gs = fx.guardrail_status(est.rel_cs_lower, est.rel_cs_upper, direction, margin=m.margin,
                                 defined=est.rel_defined & est.rel_bounded)
        # no relative bound yet (the control mean is not bounded away from 0): a harm beyond the
        # margin cannot be established, a harm at all can, from the difference's sequence
        harm = (est.cs_lower > 0) if direction == "increase" else (est.cs_upper < 0)
        status = np.where(est.rel_defined & ~est.rel_bounded, np.where(harm, "warn", "ok"), gs.status)
        multi = {e.id: sum(1 for v in e.variants if v != e.control) > 1 for e in p.experiments}
        stored: set[tuple[str, str]] = set()
        for i, e in enumerate(p.experiments):
            v = p.treatments[i]
            for var, arms in ((e.control, p.ctrl), (v, p.trt)):
                if (e.id, var) not in stored:
                    stored.add((e.id, var))
                    snapshots.append(MetricSnapshot(e.id, m.name, var, p.since[i],
                                                    *(float(arms[c][i]) for c in STAT_COLUMNS)))
            staged.append({"metric": m, "i": i, "est": est, "status": str(status[i]), "vr": vr,
                           "pairs": p, "scope": f"{m.name}:{v}" if multi[e.id] else m.name})
    # multiplicity, per experiment, over its judged guardrails
    adjust: dict[int, tuple[bool, float]] = {}
    if checks.guardrail_multiplicity != "none":
        fam: dict[str, list[int]] = {}
        for k, s in enumerate(staged):
            if s["metric"].role == "guardrail" and s["status"] != "undefined":
                fam.setdefault(s["pairs"].experiments[s["i"]].id, []).append(k)
        for rows in fam.values():
            # the rows of one family come from different metrics: gather their p- and e-values
            pv = np.array([float(staged[k]["est"].p_value[staged[k]["i"]]) for k in rows])
            ev = np.array([float(staged[k]["est"].e_value[staged[k]["i"]]) for k in rows])
            if checks.guardrail_multiplicity == "bh":
                res = fx.bh(pv, alpha=checks.guardrail_alpha)
            else:
                res = fx.ebh(ev, alpha=checks.guardrail_alpha)
            for j, k in enumerate(rows):
                adjust[k] = (bool(res.rejected[j]), float(res.adjusted[j]))
    findings = [_finding(s, adjust.get(k), checks) for k, s in enumerate(staged)]
    return GuardrailResult(tuple(findings), tuple(snapshots))


def _finding(s: dict[str, Any], adj: tuple[bool, float] | None, checks: CheckConfig) -> Finding:
    m: MetricConfig = s["metric"]
    p: _Pairs = s["pairs"]
    i: int = s["i"]
    est: fx.EffectEstimate = s["est"]
    e, v = p.experiments[i], p.treatments[i]
    row = est.row(i)
    vr = s["vr"]
    alpha = checks.guardrail_alpha
    stats: dict[str, Any] = {
        "metric": m.name, "kind": m.kind, "role": m.role, "bad_direction": m.bad_direction, "margin": m.margin,
        "control": e.control, "variant": v, "units_since": p.since[i],
        "n": {e.control: int(p.ctrl["n"][i]), v: int(p.trt["n"][i])},
        "mean": {e.control: row["mean_control"], v: row["mean_treatment"]},
        "effect": row["diff"] if row["cs_lower"] is not None else None,
        "effect_relative": row["rel"],
        "cs_lower": row["cs_lower"], "cs_upper": row["cs_upper"],
        "cs_relative_lower": row["rel_cs_lower"], "cs_relative_upper": row["rel_cs_upper"],
        "e_value": row["e_value"], "p_value": row["p_value"],
        "alpha": alpha, "n_star": checks.guardrail_n_star,
        "variance_reduction": ({e.control: float(vr[i, 0]), v: float(vr[i, 1])} if vr is not None else None),
        "multiplicity": checks.guardrail_multiplicity,
        "adjusted_level": adj[1] if adj is not None else None,
    }
    check = "guardrail" if m.role == "guardrail" else "metric"
    label = f"{m.name} ({m.kind}{', ' + m.bad_direction + ' is bad' if m.bad_direction else ''})"
    status = s["status"]
    if status == "undefined":
        why = _why_undefined(m, i, p, est)
        # A data fault (no variation, a zero denominator) with enough units is
        # worth a look. Otherwise (a rare event with no occurrence yet in one arm) a warn needs
        # valid evidence of harm, from the difference's confidence sequence, as when the control
        # mean is not yet bounded away from 0: "cannot be judged" alone is not evidence.
        lo, up = row["cs_lower"], row["cs_upper"]
        harm = lo is not None and ((lo > 0) if (m.bad_direction or "increase") == "increase" else (up < 0))
        measurable = min(p.ctrl["n"][i], p.trt["n"][i]) >= checks.srm_min_units
        # (no events at all in either arm is not one: a rare event early in an experiment, the usual case;
        # events that stop arriving are the freshness check's and the readout's to show)
        fault = measurable and not why.startswith(("the metric is 0 for every unit", "the relative effect has"))
        st = "warn" if (check == "guardrail" and (harm or fault)) else "ok"
        shown = f"; harm established on the difference ({lo:+.4g} to {up:+.4g})" if harm and not fault else ""
        return Finding(e.id, check, s["scope"], st,
                       f"{label}: {v} vs {e.control} cannot be judged on the relative scale: {why}{shown}", stats)
    level = f"{100 * (1 - alpha):g}%"
    if row["rel_cs_lower"] is not None:
        cs = f"always-valid {level} CS {fmt_change(row['rel_cs_lower'])} to {fmt_change(row['rel_cs_upper'])}"
        lo, up = row["rel_cs_lower"], row["rel_cs_upper"]
    else:  # judged on the difference, whose sign is the direction of the change
        cs = (f"no relative {level} CS yet: the {e.control} mean is not bounded away from 0; "
              f"always-valid CS of the difference {_num(row['cs_lower'])} to {_num(row['cs_upper'])}")
        lo, up = row["cs_lower"], row["cs_upper"]
    tail = f"e-value {_fmt_e(row['e_value'])}; fixed-horizon p={fmt_p(row['p_value'])}"
    means = f"{_num(row['mean_treatment'])} vs {_num(row['mean_control'])}"
    head = f"{label}: {v} vs {e.control} {fmt_change(row['rel'])} ({means}; {cs})"
    if vr is not None:
        tail += f"; CUPED variance reduction {100 * float(np.mean(vr[i])):.0f}%"
    if check == "metric":
        excl = lo > 0 or up < 0
        if not excl:
            verdict = "no change established yet"
        elif m.bad_direction is None:
            verdict = "a change is established"
        else:
            bad = (lo > 0) == (m.bad_direction == "increase")
            verdict = "a harm is established" if bad else "an improvement is established"
        return Finding(e.id, check, s["scope"], "ok", f"{head}: {verdict}; {tail}", stats)
    critical = False
    if status == "alert":
        bound = row["rel_cs_lower"] if m.bad_direction == "increase" else -row["rel_cs_upper"]
        critical = m.margin > 0 and bound > checks.critical_factor * m.margin
        verdict = f"harm beyond the {100 * m.margin:g}% margin"
    elif status == "warn":
        verdict = f"harm established, possibly within the {100 * m.margin:g}% margin"
    else:
        good = (up < 0) if m.bad_direction == "increase" else (lo > 0)
        verdict = "an improvement is established" if good else "no harm established"
    if adj is not None and not adj[0] and status in ("alert", "warn"):
        verdict += (f", but not significant after {checks.guardrail_multiplicity.upper().replace('EBH', 'e-BH')} "
                    f"across the experiment's guardrails (adjusted level {adj[1]:.2g} > {alpha:g})")
        status, critical = "ok", False
    return Finding(e.id, check, s["scope"], status, f"{head}: {verdict}; {tail}", stats, critical=critical)
