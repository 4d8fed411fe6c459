"""Interference between groups during a ramp: the ``spillover`` check.

The comparison of treatment with control assumes that a unit's outcome does not
depend on which variant other units got (SUTVA). When treatment and control
compete for a shared resource (a limited number of e-book licences, courier
slots, ad budget) or influence each other, that fails, and the estimate is
biased in a direction that depends on the mechanism. A ramp, where the treatment
share changes from phase to phase, makes the failure visible:

(a) Effect by phase. Units first assigned in each ramp phase form disjoint
    groups; for each metric the relative effect ``treatment / control - 1`` is
    estimated per phase over the same window after each unit's first assignment
    (``spillover_window_days``), so every phase's units are observed for the
    same length of time. A weighted least-squares trend of the effect on the
    phase's treatment share (:func:`monitor.stats.interference.effect_trend`),
    with Cochran's Q for the heterogeneity, tests whether the effect changes
    with the share. Without interference the effect does not depend on it.
(b) Control drift. For the control units of each phase, the metric over the
    window after their first assignment against the same window before it
    (their own pre-period), by the delta method
    (:func:`monitor.stats.interference.ratio_change`). A control group that
    gets worse as the treatment share rises is the footprint of spillover: the
    treatment takes something the control would otherwise have had. The trend
    of this drift on the share is computed as in (a) and reported as context,
    but it is never evidence on its own: when exposure is logged during a session,
    every unit's metric rises after exposure, in control too, by an amount that
    depends on when the unit arrived (calendar trends, how much of its pre-period
    lies before the data begin), so cohorts of different phases drift
    differently without any interference. Only (a), which compares treatment with
    control within the same phase (the same calendar window) over the same
    post-exposure window, decides.

Only live experiments with at least two ramp phases of different treatment
share are checked; a phase counts when each compared variant has at least
``spillover_min_units`` units with a complete window. The effect-trend p-value of
each metric x treatment is Bonferroni-adjusted over all the experiment's metrics x
treatments and compared with ``spillover_alpha``: the tests are
fixed-horizon, re-run every cycle, so the level is kept strict rather than
claiming an always-valid guarantee. Assumptions: phases differ only in the
share (no other change shipped at a ramp step); the effect does not change with
calendar time for another reason (a novelty effect that fades over calendar
time can mimic a share trend in (a), so check the ``novelty`` finding too); the
pre-period has no trend of its own in (b). Decision support: confirm with the
owner before acting.

References
----------
.. [1] R. Kohavi, D. Tang and Y. Xu, "Trustworthy Online Controlled Experiments: A Practical
   Guide to A/B Testing", Cambridge University Press, 2020, chapter 22 (leakage and
   interference between variants).
.. [2] D. R. Cox, "Planning of Experiments", Wiley, 1958 (no interference between units).
.. [3] I. Bojinov, D. Simchi-Levi and J. Zhao, "Design and Analysis of Switchback Experiments",
   Management Science, 69(7), 3759-3777, 2023.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from monitor.config import CheckConfig, Config, MetricConfig
from monitor.findings import Finding
from monitor.firsts import relation as first_relation
from monitor.guardrails import metric_context, tidy_stat_frame
from monitor.registry import Experiment, Phase
from monitor.stats import effects as fx
from monitor.stats.interference import effect_trend, ratio_change
from monitor.templates import Quoter, render
from monitor.templates import naive_utc as _naive
from monitor.warehouse import Warehouse
from monitor.wording import ceil_hour, fmt_change, fmt_p

__all__ = ["SUM_COLUMNS", "SpilloverPull", "pull_spillover", "ramped", "spillover_findings"]

_HOUR = timedelta(hours=1)
_VARS = ("y", "x", "cy", "cx")
#: The sums the spillover query returns per experiment x variant x hour.
SUM_COLUMNS = ("n", "s_y", "s_x", "s_cy", "s_cx",
               *(f"s_{a}_{b}" for i, a in enumerate(_VARS) for b in _VARS[i:]))


@dataclass(frozen=True)
class SpilloverPull:
    """One metric's windowed statistics (columns experiment, variant, hour, :data:`SUM_COLUMNS`)."""

    metric: MetricConfig
    frame: pd.DataFrame


def _share(e: Experiment, ph: Phase) -> float:
    """Share of the phase's traffic in any treatment variant."""
    return 1.0 - float(ph.weights.get(e.control, 0.0))


def ramped(experiments: Sequence[Experiment]) -> list[Experiment]:
    """The experiments with two or more phases of different treatment share."""
    out = []
    for e in experiments:
        shares = {round(_share(e, p), 9) for p in e.phases}
        if len(e.phases) >= 2 and len(shares) >= 2:
            out.append(e)
    return out


def pull_spillover(cfg: Config, wh: Warehouse, experiments: Sequence[Experiment], as_of: datetime, *,
                   on_query: Callable[[str], None] | None = None) -> list[SpilloverPull]:
    """One read-only query per metric for the ramped live experiments (none if there are none)."""
    exps = ramped(experiments)
    if not exps or not cfg.metrics:
        return []
    window = timedelta(days=cfg.checks.spillover_window_days)
    # the window start of every other query of the run (all live experiments given), so
    # they can share the run's first-assignment relation (monitor.firsts)
    window_start = min(e.start for e in experiments).replace(minute=0, second=0, microsecond=0)
    src = cfg.sources[0]
    q = Quoter(wh.dialect)
    firsts = first_relation(wh, src, [e.id for e in exps], window_start, as_of)
    out = []
    for m in cfg.metrics:
        if on_query:
            on_query(m.name)
        params: dict[str, Any] = {
            "window_start": _naive(window_start), "as_of": _naive(as_of),
            "last_first_ts": _naive(as_of - window), "event_start": _naive(window_start - window),
            "window": window, "experiment_ids": [e.id for e in exps],
        }
        expanding = ["experiment_ids"]
        for key, spec in (("y", m), ("x", m.denominator)):
            if spec is not None and spec.filter_values is not None:
                params[f"{key}_filter_values"] = list(spec.filter_values)
                expanding.append(f"{key}_filter_values")
        sql = render("spillover.sql.j2", wh.dialect, **{**metric_context(m, src, q), "firsts": firsts})
        raw = wh.query(f"spillover[{m.name}]", sql, params, expanding=tuple(expanding))
        out.append(SpilloverPull(m, _tidy(raw)))
    return out


def _tidy(raw: pd.DataFrame) -> pd.DataFrame:
    return tidy_stat_frame(raw, SUM_COLUMNS)


def _phase_of_hours(e: Experiment, hours: pd.Series) -> np.ndarray:
    """Phase number per first-assignment hour; 0 for an hour not wholly inside one phase."""
    out = np.zeros(len(hours), dtype=np.int64)
    h = hours.dt.tz_convert("UTC").dt.tz_localize(None).to_numpy().astype("datetime64[us]")
    for p in e.phases:
        sel = h >= np.datetime64(_naive(ceil_hour(p.start)), "us")
        if p.end is not None:
            sel &= h + np.timedelta64(1, "h") <= np.datetime64(_naive(p.end), "us")
        out[sel] = p.number
    return out


def _stack(sums: pd.Series) -> tuple[float, np.ndarray, np.ndarray]:
    n = float(sums["n"])
    s = np.array([sums[f"s_{v}"] for v in _VARS], dtype=float)
    pr = np.zeros((4, 4))
    for i, a in enumerate(_VARS):
        for j in range(i, 4):
            pr[i, j] = pr[j, i] = float(sums[f"s_{a}_{_VARS[j]}"])
    return n, s, pr


def spillover_findings(experiments: Sequence[Experiment], pulls: Sequence[SpilloverPull], as_of: datetime,
                       checks: CheckConfig) -> list[Finding]:
    """``spillover`` findings for every ramped live experiment x metric x treatment variant.

    Parameters
    ----------
    experiments : sequence of Experiment
        Live experiments (only the ramped ones are judged).
    pulls : sequence of SpilloverPull
        From :func:`pull_spillover`.
    as_of : datetime
        Aware time of the run.
    checks : CheckConfig
        ``spillover_alpha``, ``spillover_min_units`` and ``spillover_window_days``.

    Returns
    -------
    list of Finding
        Status ``alert`` when the effect or the control drift changes with the treatment share
        (Bonferroni-adjusted p below ``spillover_alpha``), else ``ok`` (also when fewer than two
        phases can be compared yet; the summary says why).
    """
    exps = ramped(experiments)
    staged: list[dict[str, Any]] = []
    for pull in pulls:
        m = pull.metric
        frame = pull.frame
        for e in exps:
            rows = frame[frame["experiment"] == e.id]
            phase_no = _phase_of_hours(e, rows["hour"]) if len(rows) else np.zeros(0, dtype=np.int64)
            rows = rows.assign(phase=phase_no)
            totals = rows[rows["phase"] > 0].groupby(["phase", "variant"])[list(SUM_COLUMNS)].sum()
            multi = sum(1 for v in e.variants if v != e.control) > 1
            for v in e.variants:
                if v == e.control:
                    continue
                staged.append(_judge_one(e, v, m, totals, checks, multi))
    # Bonferroni within each experiment over its metrics x treatments (one judged test each)
    fam: dict[str, int] = {}
    for s in staged:
        if s["tested"]:
            fam[s["e"].id] = fam.get(s["e"].id, 0) + 1
    out = []
    for s in staged:
        out.append(_finding(s, fam.get(s["e"].id, 0), checks))
    return out


def _judge_one(e: Experiment, v: str, m: MetricConfig, totals: pd.DataFrame, checks: CheckConfig,
               multi: bool) -> dict[str, Any]:
    phases: list[dict[str, Any]] = []
    for p in e.phases:
        share = _share(e, p)
        entry: dict[str, Any] = {"phase": p.number, "start": p.start, "end": p.end, "treatment_share": share,
                                 "n": {e.control: 0, v: 0}, "effect_relative": None, "effect_relative_se": None,
                                 "control_drift": None, "control_drift_se": None, "used": False}
        key_c, key_t = (p.number, e.control), (p.number, v)
        if key_c in totals.index and key_t in totals.index:
            nc, sc, pc = _stack(totals.loc[key_c])
            nt, st, pt = _stack(totals.loc[key_t])
            entry["n"] = {e.control: int(nc), v: int(nt)}
            rc = fx.ratio_moments(nc, sc[0], pc[0, 0], sc[1], pc[1, 1], pc[0, 1])
            rt = fx.ratio_moments(nt, st[0], pt[0, 0], st[1], pt[1, 1], pt[0, 1])
            est = fx.compare_ratios(rc, rt)
            entry["mean"] = {e.control: float(rc.ratio), v: float(rt.ratio)}
            if bool(est.rel_defined):
                entry["effect_relative"] = float(est.rel)
                entry["effect_relative_se"] = float(est.rel_se)
            drift = ratio_change(nc, sc, pc)
            entry["control_pre"] = float(drift.pre)
            entry["control_post"] = float(drift.post)
            if bool(drift.defined):
                entry["control_drift"] = float(drift.estimate)
                entry["control_drift_se"] = float(drift.se)
            entry["used"] = min(nc, nt) >= checks.spillover_min_units
        phases.append(entry)
    used = [ph for ph in phases if ph["used"]]

    def trend(est_key: str, se_key: str) -> dict[str, Any] | None:
        pts = [ph for ph in used if ph[est_key] is not None and ph[se_key]]
        if len({round(ph["treatment_share"], 9) for ph in pts}) < 2:
            return None
        r = effect_trend([ph[est_key] for ph in pts], [ph[se_key] for ph in pts],
                         [ph["treatment_share"] for ph in pts])
        if not bool(r.defined):
            return None
        lo, hi = min(ph["treatment_share"] for ph in pts), max(ph["treatment_share"] for ph in pts)
        at_lo, _ = r.predict(lo)
        at_hi, _ = r.predict(hi)
        at_full, at_full_se = r.predict(1.0)
        return {"slope_per_share": float(r.slope), "slope_se": float(r.slope_se), "z": float(r.z),
                "p_value": float(r.p_value), "phases_used": int(r.k),
                "cochran_q": float(r.q), "q_df": int(r.q_df), "q_p_value": float(r.q_p_value), "i2": float(r.i2),
                "pooled": float(r.pooled), "pooled_se": float(r.pooled_se),
                "share_low": lo, "share_high": hi, "fitted_at_low": float(at_lo), "fitted_at_high": float(at_hi),
                "fitted_at_full_rollout": float(at_full), "fitted_at_full_rollout_se": float(at_full_se)}

    eff = trend("effect_relative", "effect_relative_se")
    drift = trend("control_drift", "control_drift_se")
    return {"e": e, "v": v, "m": m, "phases": phases, "effect_trend": eff, "drift_trend": drift,
            "tested": eff is not None,
            "scope": f"{m.name}:{v}" if multi else m.name}


def _bias_text(m: MetricConfig, eff: dict[str, Any] | None, drift: dict[str, Any] | None,
               eff_sig: bool, drift_sig: bool) -> tuple[str, str]:
    """(direction of the likely bias, plain-words explanation)."""
    parts = []
    direction = "unclear"
    if eff_sig and eff is not None:
        lo, hi = eff["fitted_at_low"], eff["fitted_at_high"]
        shrinks = abs(hi) < abs(lo)
        parts.append(
            f"the effect moves from {fmt_change(lo)} at {100 * eff['share_low']:.0f}% treatment to {fmt_change(hi)} at "
            f"{100 * eff['share_high']:.0f}% ({'shrinking' if shrinks else 'growing'} as more units are treated)")
        direction = "overstated" if shrinks else "understated"
    if drift_sig and drift is not None:
        lo, hi = drift["fitted_at_low"], drift["fitted_at_high"]
        parts.append(f"the control moved {fmt_change(lo)} against its own pre-period at {100 * drift['share_low']:.0f}% "
                     f"treatment and {fmt_change(hi)} at {100 * drift['share_high']:.0f}%")
        if direction == "unclear" and eff is not None:
            # control moving away from the treatment's side inflates the contrast; towards it deflates it
            toward = (hi - lo) * eff["pooled"] > 0
            direction = "understated" if toward else "overstated"
    if not drift_sig and drift is not None and abs(drift["pooled"]) > 3 * drift["pooled_se"] > 0:
        # not a trend with the share, but a level shift worth stating (it may also be selection at assignment)
        parts.append(f"the control's own metric is {fmt_change(drift['pooled'])} against its pre-period (fitted "
                     f"{fmt_change(drift['fitted_at_low'])} at {100 * drift['share_low']:.0f}% treatment, "
                     f"{fmt_change(drift['fitted_at_high'])} at {100 * drift['share_high']:.0f}%)")
    return direction, "; ".join(parts)


def _finding(s: dict[str, Any], family: int, checks: CheckConfig) -> Finding:
    e, v, m = s["e"], s["v"], s["m"]
    eff, drift = s["effect_trend"], s["drift_trend"]
    alpha = checks.spillover_alpha
    for t in (eff, drift):
        if t is not None:  # the drift's is for reference: it is not part of the decision
            t["p_adjusted"] = min(1.0, t["p_value"] * max(family, 1))
    eff_sig = eff is not None and eff["p_adjusted"] < alpha
    # the control's change against its own pre-period is context only, never evidence: when exposure
    # is logged during activity every arm rises after exposure, by amounts that differ between phases
    drift_sig = False
    direction, why = _bias_text(m, eff, drift, eff_sig, drift_sig)
    stats: dict[str, Any] = {
        "metric": m.name, "kind": m.kind, "control": e.control, "variant": v,
        "window_days": checks.spillover_window_days, "min_units": checks.spillover_min_units,
        "alpha": alpha, "multiplicity": "bonferroni", "family_size": family,
        "phases": s["phases"], "effect_trend": eff, "control_drift_trend": drift,
        "likely_bias": direction if (eff_sig or drift_sig) else None,
    }
    label = f"{m.name}: {v} vs {e.control}"
    if not s["tested"]:
        n_used = sum(1 for ph in s["phases"] if ph["used"])
        return Finding(e.id, "spillover", s["scope"], "ok",
                       f"{label}: not judged yet: {n_used} ramp phase(s) with {checks.spillover_min_units:,}+ units per "
                       f"variant observed for a full {checks.spillover_window_days:g}-day window (two of different "
                       f"treatment share are needed)", stats)
    if eff_sig or drift_sig:
        p_min = eff["p_adjusted"]
        bias = {"overstated": "the estimate at low treatment shares likely overstates the effect of a full rollout",
                "understated": "the estimate likely understates the effect of a full rollout",
                "unclear": "the direction of the bias is unclear"}[direction]
        summary = (f"{label}: possible interference between the groups: {why} (Bonferroni-adjusted p={fmt_p(p_min)}); "
                   f"{bias}. Treatment and control may share a limited resource or influence each other: "
                   f"consider randomising by cluster or region, or a switchback design, so the groups do not compete")
        return Finding(e.id, "spillover", s["scope"], "alert", summary, stats)
    bits = []
    if eff is not None:
        bits.append(f"effect trend {fmt_change(eff['slope_per_share'])} per 100% share, p={fmt_p(eff['p_value'])}")
    if drift is not None:
        bits.append(f"control drift trend {fmt_change(drift['slope_per_share'])} per 100% share, "
                    f"p={fmt_p(drift['p_value'])}, context only")
    return Finding(e.id, "spillover", s["scope"], "ok",
                   f"{label}: no change with the treatment share ({'; '.join(bits)})", stats)
