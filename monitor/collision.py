"""Colliding experiments: the ``collision`` check.

Two live experiments that share units contaminate each other when their
assignments are not independent (a bucketing bug: both hash the unit id with
the same seed, so treatment in one means treatment in the other) or when their
effects interact on a guardrail (together they do harm neither does alone).

Assignment independence
    One warehouse query (``sql/collision.sql.j2``) cross-tabulates, for every
    pair of live experiments, the shared units by each experiment's ramp phase
    and variant. Pairs sharing at least ``collision_min_overlap`` units are
    tested with Pearson's chi-square test of independence, per stratum of the
    two ramp phases and summed over strata
    (:func:`monitor.stats.interference.independence_chi2`), so two experiments
    ramping at the same time are not mistaken for a correlated hash. The
    p-values of all tested pairs are adjusted with Benjamini-Hochberg at
    ``collision_alpha``: with hundreds of live experiments the number of pairs
    grows quadratically and a family-wise (Bonferroni) correction would lose
    the power to see a real bug, while BH keeps the expected share of false
    pair alerts at the level (valid for independent or positively dependent
    p-values).
Guardrail interaction
    The same query returns, per cell, the sufficient statistics of every
    guardrail metric of the shared units (events from the later of a unit's
    two first assignments). For pairs with enough overlap the
    interaction contrasts ``m[i, j] - m[i, 0] - m[0, j] + m[0, 0]`` and their
    joint Wald test (:func:`monitor.stats.interference.interaction_wald`) are
    computed for each pair and BH-adjusted over all pairs x guardrails. The
    contrasts are formed within each pair of ramp phases of the two experiments
    and pooled by inverse variance
    (:func:`monitor.stats.interference.stratified_interaction_wald`): when the
    two ramp at different times, the variant combinations otherwise mix calendar
    cohorts observed for different lengths of time in different proportions,
    which reads as an interaction that is not there.

Cost: the pairs come from a self-join of the per-unit assignment rows on the
unit id, aggregated in the warehouse, so the work grows with the number of
(unit, experiment, experiment) triples -- sum over units of m(m - 1)/2 for a
unit in m live experiments -- not with the number of experiment pairs: pairs
that share no unit never appear, and the result is a small table (pairs x
phases x variants). With hundreds of live experiments and units in a handful of
them each, that is a few times the assignment rows; the guardrails add one
scan of each event table and one join on the unit id.

Findings: one ``alert`` per pair with dependent assignments (scope: the other
experiment's id) or an interaction on a guardrail (scope: ``<other
experiment>:<metric>``), reported once, under the experiment of the pair whose
id sorts first: a pair problem is one problem, so it is one alert episode, not
two that open and close together. Notifications route it to both experiments'
owners (:func:`monitor.outbox.enqueue`), and the other experiment's
``pairs`` finding names it. One ``ok`` finding per tested experiment (scope
``pairs``) summarises the pairs tested. The tests are fixed-horizon
and re-run every cycle, so the level is kept strict. Decision support: confirm
with the owners before acting.

References
----------
.. [1] D. Tang, A. Agarwal, D. O'Brien and M. Meyer, "Overlapping Experiment Infrastructure:
   More, Better, Faster Experimentation", KDD 2010 (layers and independent hashing).
.. [2] Y. Benjamini and Y. Hochberg, Journal of the Royal Statistical Society B, 57(1), 289-300,
   1995.
.. [3] A. Agresti, "Categorical Data Analysis", 3rd ed., Wiley, 2013.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from monitor.config import CheckConfig, Config, MetricConfig, MetricSourceConfig
from monitor.findings import Finding
from monitor.firsts import relation as first_relation
from monitor.registry import Experiment
from monitor.stats import effects as fx
from monitor.stats.interference import independence_chi2, stratified_interaction_wald
from monitor.templates import Quoter, render
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse
from monitor.wording import fmt_p

__all__ = ["CollisionPull", "collision_findings", "collision_params", "pull_collisions"]


@dataclass(frozen=True)
class CollisionPull:
    """The warehouse frames of the collision check.

    Attributes
    ----------
    crosstab : pandas.DataFrame
        experiment_a, experiment_b, phase_a, phase_b, variant_a, variant_b, units.
    metrics : tuple of (MetricConfig, pandas.DataFrame)
        Per guardrail: experiment_a, experiment_b, variant_a, variant_b, n, sum_y, sum_y2 (and
        sum_x, sum_x2, sum_xy for a ratio).
    """

    crosstab: pd.DataFrame
    metrics: tuple[tuple[MetricConfig, pd.DataFrame], ...]


def collision_params(experiments: Sequence[Experiment], as_of: datetime) -> tuple[dict[str, Any], int]:
    """Bind parameters of the phase rows (experiment, phase number, start, end) and their count."""
    params: dict[str, Any] = {}
    i = 0
    for e in experiments:
        for p in e.phases:
            if p.start >= as_of:
                continue
            params[f"ph_exp_{i}"] = e.id
            params[f"ph_no_{i}"] = p.number
            params[f"ph_start_{i}"] = _naive(p.start)
            params[f"ph_end_{i}"] = _naive(min(p.end, as_of) if p.end is not None else as_of)
            i += 1
    return params, i


def pull_collisions(cfg: Config, wh: Warehouse, experiments: Sequence[Experiment], as_of: datetime, *,
                    on_query: Callable[[str], None] | None = None) -> CollisionPull:
    """One query: the cross-tab of shared units and every guardrail's cell statistics. Reads only."""
    empty = pd.DataFrame(columns=["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b", "units"])
    if len(experiments) < 2:
        return CollisionPull(empty, ())
    q = Quoter(wh.dialect)
    phase_params, n_phases = collision_params(experiments, as_of)
    if n_phases == 0:
        return CollisionPull(empty, ())
    window_start = min(e.start for e in experiments).replace(minute=0, second=0, microsecond=0)
    base = {"window_start": _naive(window_start), "as_of": _naive(as_of),
            "experiment_ids": [e.id for e in experiments], **phase_params}
    guards = [m for m in cfg.metrics if m.role == "guardrail"]
    if on_query:
        on_query("shared-units")
    ctx, params, expanding = _guardrail_context(guards, cfg, q)
    params.update(base, event_start=_naive(window_start))
    ctx["firsts"] = first_relation(wh, cfg.sources[0], base["experiment_ids"], window_start, as_of)
    sql = render("collision.sql.j2", wh.dialect, **ctx, n_phases=n_phases)
    raw = wh.query("collision", sql, params, expanding=("experiment_ids", *expanding))
    keys = ["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b"]
    cross = raw[keys + ["units"]] if len(raw) else empty
    out: list[tuple[MetricConfig, pd.DataFrame]] = []
    for k, m in enumerate(guards):
        part = raw[keys].copy() if len(raw) else pd.DataFrame(columns=keys)
        part["n"] = raw["units"] if len(raw) else []
        for c in ("sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy"):
            if f"{c}_{k}" in raw:
                part[c] = raw[f"{c}_{k}"]
        out.append((m, part))
    return CollisionPull(cross, tuple(out))


def _source_part(key: str, spec: MetricSourceConfig, q: Quoter, alias: str) -> dict[str, Any]:
    cols = spec.columns
    return {"key": key, "source": q.from_clause(spec.table, spec.sql, alias), "unit": q.ident(cols.unit),
            "timestamp": q.ident(cols.timestamp), "value": q.ident(cols.value) if cols.value is not None else None,
            "filter_column": q.ident(spec.filter_column) if spec.filter_column is not None else None,
            "aggregate": spec.aggregate}


def _guardrail_context(guards: Sequence[MetricConfig], cfg: Config, q: Quoter
                       ) -> tuple[dict[str, Any], dict[str, Any], list[str]]:
    """Template context, filter binds and expanding bind names of the one guardrail query."""
    ctx = _assignment_context(cfg, q)
    parts, gs, params, expanding = [], [], {}, []
    for k, m in enumerate(guards):
        gs.append({"k": k, "ratio": m.kind == "ratio"})
        for key, spec in ((f"y{k}", m), (f"x{k}", m.denominator)):
            if spec is None:
                continue
            parts.append(_source_part(key, spec, q, f"user_{key}"))
            if spec.filter_values is not None:
                params[f"{key}_filter_values"] = list(spec.filter_values)
                expanding.append(f"{key}_filter_values")
    ctx.update(parts=parts, guards=gs)
    return ctx, params, expanding


def _assignment_context(cfg: Config, q: Quoter) -> dict[str, Any]:
    a = cfg.sources[0].columns
    assert a is not None
    return {"assignment_source": q.from_clause(cfg.sources[0].table, cfg.sources[0].sql, "user_source"),
            "a": {"unit": q.ident(a.unit), "experiment": q.ident(a.experiment), "variant": q.ident(a.variant),
                  "timestamp": q.ident(a.timestamp)},
            "parts": [], "ratio": False, "cuped": False, "firsts": None}


def _oriented(frame: pd.DataFrame) -> pd.DataFrame:
    """Rows with (experiment_a, experiment_b) in Python string order (the warehouse's
    collation may order ids differently)."""
    if frame.empty:
        return frame
    f = frame.copy()
    for c in ("experiment_a", "experiment_b", "variant_a", "variant_b"):
        f[c] = f[c].astype(str)
    swap = f["experiment_a"] > f["experiment_b"]
    if swap.any():
        for a, b in (("experiment_a", "experiment_b"), ("variant_a", "variant_b"), ("phase_a", "phase_b")):
            if a in f:
                f.loc[swap, [a, b]] = f.loc[swap, [b, a]].to_numpy()
    return f


def collision_findings(experiments: Sequence[Experiment], pull: CollisionPull, checks: CheckConfig) -> list[Finding]:
    """``collision`` findings for every pair of live experiments sharing enough units.

    Parameters
    ----------
    experiments : sequence of Experiment
        Live experiments.
    pull : CollisionPull
        From :func:`pull_collisions`.
    checks : CheckConfig
        ``collision_alpha`` and ``collision_min_overlap``.

    Returns
    -------
    list of Finding
        Alerts for dependent assignments and guardrail interactions (one per experiment of the
        pair), and one ``ok`` summary per tested experiment.
    """
    by_id = {e.id: e for e in experiments}
    cross = _oriented(pull.crosstab)
    tests: list[dict[str, Any]] = []
    if len(cross):
        cross = cross[cross["experiment_a"].isin(by_id) & cross["experiment_b"].isin(by_id)]
        cross = cross.assign(units=pd.to_numeric(cross["units"]).astype(float),
                             phase_a=pd.to_numeric(cross["phase_a"]).astype(int),
                             phase_b=pd.to_numeric(cross["phase_b"]).astype(int))
        # only pairs with enough overlap are tested: filter before the per-pair loop
        shared = cross.groupby(["experiment_a", "experiment_b"], sort=False)["units"].transform("sum")
        cross = cross[shared >= checks.collision_min_overlap]
        va_all, vb_all = cross["variant_a"].to_numpy(), cross["variant_b"].to_numpy()
        pa_all, pb_all = cross["phase_a"].to_numpy(), cross["phase_b"].to_numpy()
        u_all = cross["units"].to_numpy(dtype=float)
        for (ea, eb), idx in cross.groupby(["experiment_a", "experiment_b"], sort=True).indices.items():
            A, B = by_id[str(ea)], by_id[str(eb)]
            ia = {v: k for k, v in enumerate(A.variants)}
            ib = {v: k for k, v in enumerate(B.variants)}
            ka = np.array([ia.get(v, -1) for v in va_all[idx]], dtype=np.int64)
            kb = np.array([ib.get(v, -1) for v in vb_all[idx]], dtype=np.int64)
            keep = (ka >= 0) & (kb >= 0)
            idx, ka, kb = idx[keep], ka[keep], kb[keep]
            n = float(u_all[idx].sum())
            if n < checks.collision_min_overlap:
                continue
            strata, ks = np.unique(np.stack([pa_all[idx], pb_all[idx]], axis=1), axis=0, return_inverse=True)
            t = np.zeros((len(strata), len(A.variants), len(B.variants)))
            np.add.at(t, (ks.ravel(), ka, kb), u_all[idx])
            res = independence_chi2(t)
            pooled = t.sum(axis=0)
            tests.append({"kind": "assignment", "a": A, "b": B, "p": float(res.p_value), "n": n,
                          "stats": {"test": "chi-square independence per (phase, phase) stratum, summed",
                                    "units_shared": int(n), "chi2": float(res.chi2), "df": int(res.df),
                                    "p_value": float(res.p_value), "cramers_v": float(res.cramers_v),
                                    "strata": [{"phase_a": int(a), "phase_b": int(b), "chi2": float(res.stratum_chi2[k]),
                                                "df": int(res.stratum_df[k])} for k, (a, b) in enumerate(strata)],
                                    "units": {va: {vb: int(pooled[ia[va], ib[vb]]) for vb in B.variants}
                                              for va in A.variants}}})
    for m, frame in pull.metrics:
        tests.extend(_interaction_tests(m, _oriented(frame), by_id, checks))
    # BH over the pairs, separately for each kind of test (assignment; guardrail interactions)
    for kind in ("assignment", "interaction"):
        idx = [k for k, t in enumerate(tests) if t["kind"] == kind]
        if not idx:
            continue
        res = fx.bh(np.array([tests[k]["p"] for k in idx]), alpha=checks.collision_alpha)
        for j, k in enumerate(idx):
            tests[k]["rejected"] = bool(res.rejected[j])
            tests[k]["p_adjusted"] = float(res.adjusted[j])
            tests[k]["family_size"] = len(idx)
    return _findings(tests, checks)


def _cell_estimates(m: MetricConfig, cell: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per cell (last axis: n, sum_y, sum_y2, sum_x, sum_x2, sum_xy): estimate, its variance, defined."""
    n = cell[..., 0]
    if m.kind == "ratio":
        rm = fx.ratio_moments(n, cell[..., 1], cell[..., 2], cell[..., 3], cell[..., 4], cell[..., 5])
        return rm.ratio, rm.var_ratio, rm.defined
    mo = fx.moments(n, cell[..., 1], cell[..., 2])
    return mo.mean, np.where(n > 0, mo.var / np.where(n > 0, n, 1.0), 0.0), mo.defined


def _interaction_tests(m: MetricConfig, frame: pd.DataFrame, by_id: dict[str, Experiment],
                       checks: CheckConfig) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = []
    if frame.empty:
        return out
    cols = ["n", "sum_y", "sum_y2", "sum_x", "sum_x2", "sum_xy"]
    f = frame.copy()
    for c in cols:
        f[c] = pd.to_numeric(f[c]).astype(float) if c in f else 0.0
    shared = f.groupby(["experiment_a", "experiment_b"], sort=False)["n"].transform("sum")
    f = f[shared >= checks.collision_min_overlap]
    values = f[cols].to_numpy(dtype=float)
    for (ea, eb), idx in f.groupby(["experiment_a", "experiment_b"], sort=True).indices.items():
        if str(ea) not in by_id or str(eb) not in by_id:
            continue
        A, B = by_id[str(ea)], by_id[str(eb)]
        R, C = len(A.variants), len(B.variants)
        cell = np.zeros((R, C, 6))
        ia = {v: k for k, v in enumerate(A.variants)}
        ib = {v: k for k, v in enumerate(B.variants)}
        ka = np.array([ia.get(v, -1) for v in f["variant_a"].to_numpy()[idx]], dtype=np.int64)
        kb = np.array([ib.get(v, -1) for v in f["variant_b"].to_numpy()[idx]], dtype=np.int64)
        keep = (ka >= 0) & (kb >= 0)
        np.add.at(cell, (ka[keep], kb[keep]), values[idx][keep])
        n = cell[..., 0]
        if n.sum() < checks.collision_min_overlap:
            continue
        mean, _, ok = _cell_estimates(m, cell)
        if not np.all(ok):
            continue
        # compare cells within each pair of ramp phases, then pool (see stratified_interaction_wald)
        strata = pd.factorize(pd.MultiIndex.from_arrays([f["phase_a"].to_numpy()[idx], f["phase_b"].to_numpy()[idx]]))[0]
        per = np.zeros((int(strata.max()) + 1, R, C, 6))
        np.add.at(per, (strata[keep], ka[keep], kb[keep]), values[idx][keep])
        s_mean, s_var, s_ok = _cell_estimates(m, per)
        res = stratified_interaction_wald(s_mean, np.where(s_ok, s_var, 0.0))
        if not bool(res.defined):
            continue
        base = float(mean[0, 0])
        contrasts = [{"variant_a": A.variants[i + 1], "variant_b": B.variants[j + 1],
                      "interaction": float(res.contrast[i, j]), "se": float(res.contrast_se[i, j]),
                      "interaction_relative": float(res.contrast[i, j]) / base if base else None}
                     for i in range(R - 1) for j in range(C - 1)]
        out.append({"kind": "interaction", "a": A, "b": B, "metric": m, "p": float(res.p_value),
                    "n": float(n.sum()),
                    "stats": {"test": "Wald test of the interaction contrasts of cell means, within pairs of "
                                      "ramp phases and pooled by inverse variance", "metric": m.name,
                              "kind": m.kind, "units_shared": int(n.sum()), "wald": float(res.wald),
                              "df": int(res.df), "p_value": float(res.p_value), "contrasts": contrasts,
                              "cell_mean": {va: {vb: float(mean[ia[va], ib[vb]]) for vb in B.variants} for va in A.variants},
                              "cell_n": {va: {vb: int(n[ia[va], ib[vb]]) for vb in B.variants} for va in A.variants}}})
    return out


def _findings(tests: list[dict[str, Any]], checks: CheckConfig) -> list[Finding]:
    out: list[Finding] = []
    summary: dict[str, dict[str, Any]] = {}
    for t in tests:
        A, B = t["a"], t["b"]
        stats = {**t["stats"], "experiment_a": A.id, "experiment_b": B.id, "alpha": checks.collision_alpha,
                 "multiplicity": "bh", "family_size": t.get("family_size", 1), "p_adjusted": t.get("p_adjusted", 1.0),
                 "min_overlap": checks.collision_min_overlap}
        # one pair problem, one finding: on the side whose id sorts first, naming the other
        # (its owner is notified too: monitor.outbox routes a collision event to both experiments)
        me, other = (A, B) if A.id <= B.id else (B, A)
        for x, y in ((A, B), (B, A)):
            s = summary.setdefault(x.id, {"pairs": set(), "assignment_min_p_adjusted": 1.0,
                                          "interaction_min_p_adjusted": 1.0, "interaction_tests": 0,
                                          "flagged": set(), "reported_under": set()})
            s["pairs"].add(y.id)
            key = f"{t['kind']}_min_p_adjusted"
            s[key] = min(s[key], t.get("p_adjusted", 1.0))
            if t["kind"] == "interaction":
                s["interaction_tests"] += 1
            if t.get("rejected"):
                if t["kind"] == "assignment":
                    s["flagged"].add(y.id)
                if x is other:
                    scope = f"{other.id}:{t['metric'].name}" if t["kind"] == "interaction" else other.id
                    s["reported_under"].add(f"{me.id} · collision · {scope}")
        if not t.get("rejected"):
            continue
        if t["kind"] == "assignment":
            summary_text = (
                f"assignments depend on those of {other.id!r}: among the {int(t['n']):,} units both experiments "
                f"share, the variant in one predicts the variant in the other (chi-square={t['stats']['chi2']:,.0f}, "
                f"df={t['stats']['df']}, Cramer's V={t['stats']['cramers_v']:.2f}, BH-adjusted "
                f"p={fmt_p(t['p_adjusted'])}); likely a shared hash seed or bucketing bug. Each experiment's "
                f"effect estimate now carries part of the other's: re-randomise one of them with an independent seed")
            out.append(Finding(me.id, "collision", other.id, "alert", summary_text, stats))
        else:
            m = t["metric"]
            worst = max(t["stats"]["contrasts"], key=lambda c: abs(c["interaction"] / c["se"]) if c["se"] else 0)
            rel = worst["interaction_relative"]
            rel_txt = f" ({100 * rel:+.1f}% of the control x control mean)" if rel is not None else ""
            summary_text = (
                f"{m.name}: the effect of this experiment depends on the variant of {other.id!r} "
                f"(interaction {worst['interaction']:+.4g}{rel_txt}, SE {worst['se']:.2g}, Wald "
                f"chi-square={t['stats']['wald']:.1f} on {t['stats']['df']} df, BH-adjusted "
                f"p={fmt_p(t['p_adjusted'])}, {int(t['n']):,} shared units); the two together do what neither "
                f"does alone: check the combination before shipping both")
            out.append(Finding(me.id, "collision", f"{other.id}:{m.name}", "alert", summary_text, stats))
    for exp_id, s in summary.items():
        n_pairs = len(s["pairs"])
        flagged = sorted(s["flagged"])
        text = (f"assignments tested against {n_pairs} overlapping experiment(s) sharing "
                f"{checks.collision_min_overlap:,}+ units: "
                + (f"dependent on {', '.join(map(repr, flagged))} (see those findings)" if flagged else
                   f"independent of all (smallest BH-adjusted p={fmt_p(s['assignment_min_p_adjusted'])})"))
        if s["interaction_tests"]:
            text += (f"; {s['interaction_tests']} guardrail interaction test(s), smallest BH-adjusted "
                     f"p={fmt_p(s['interaction_min_p_adjusted'])}")
        if s["reported_under"]:
            text += ("; a pair finding is reported once, under the experiment whose id sorts first, and both "
                     "owners are notified: see " + ", ".join(sorted(s["reported_under"])))
        out.append(Finding(exp_id, "collision", "pairs", "ok", text,
                           {"pairs": sorted(s["pairs"]), "dependent_pairs": flagged,
                            "assignment_min_p_adjusted": s["assignment_min_p_adjusted"],
                            "interaction_min_p_adjusted": s["interaction_min_p_adjusted"],
                            "interaction_tests": s["interaction_tests"], "alpha": checks.collision_alpha,
                            "reported_under": sorted(s["reported_under"]),
                            "min_overlap": checks.collision_min_overlap}))
    return out
