"""spillover and collision findings from synthetic warehouse frames whose answer is
known by construction: which experiments are judged, when they alert, what the
finding says and carries, and the degenerate cases (too few units, no overlap,
no data), which never raise."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from monitor.collision import CollisionPull, collision_findings
from monitor.config import CheckConfig, MetricConfig
from monitor.registry import Experiment, Phase
from monitor.spillover import SUM_COLUMNS, SpilloverPull, ramped, spillover_findings

T0 = datetime(2026, 5, 1, 10, tzinfo=UTC)
AS_OF = T0 + timedelta(days=30)
METRIC = MetricConfig(name="wait_per_hold", kind="ratio", role="diagnostic", table="holds",
                      columns={"timestamp": "placed_at", "value": "wait"}, aggregate="sum",
                      denominator={"table": "holds", "columns": {"timestamp": "placed_at"}, "aggregate": "count"})
CHECKS = CheckConfig()


def _ramp(eid="ramp", shares=(0.1, 0.25, 0.5)):
    phases = []
    for i, s in enumerate(shares):
        end = T0 + timedelta(days=5 * (i + 1)) if i + 1 < len(shares) else None
        phases.append(Phase(i + 1, T0 + timedelta(days=5 * i), end, {"control": 1 - s, "treatment": s}))
    return Experiment(eid, "control", ("control", "treatment"), tuple(phases))


def _flat(eid="flat"):
    return Experiment(eid, "control", ("control", "treatment"), (Phase(1, T0, None, {"control": 0.5, "treatment": 0.5}),))


def _frame(e: Experiment, effect_at, drift_at, n_per_phase=20000, seed=0) -> pd.DataFrame:
    """Per-unit (y, x, cy, cx) simulated and summed per variant and phase (one hour per phase)."""
    rng = np.random.default_rng(seed)
    rows = []
    for p in e.phases:
        s = p.weights["treatment"]
        for v, share in (("control", 1 - s), ("treatment", s)):
            n = int(n_per_phase * share)
            x = rng.poisson(1.0, n).astype(float)
            cx = rng.poisson(1.0, n).astype(float)
            base = 30.0 * (1 + drift_at(s))  # the level after assignment moves with the share (drift)
            mult = 1 + effect_at(s) if v == "treatment" else 1.0
            y = rng.gamma(4.0, base * mult / 4.0, n) * x
            cy = rng.gamma(4.0, 30.0 / 4.0, n) * cx
            V = {"y": y, "x": x, "cy": cy, "cx": cx}
            rec = {"experiment": e.id, "variant": v, "hour": pd.Timestamp(p.start + timedelta(hours=2)), "n": float(n)}
            names = ("y", "x", "cy", "cx")
            for a in names:
                rec[f"s_{a}"] = float(V[a].sum())
            for i, a in enumerate(names):
                for b in names[i:]:
                    rec[f"s_{a}_{b}"] = float((V[a] * V[b]).sum())
            rows.append(rec)
    df = pd.DataFrame(rows)
    assert set(SUM_COLUMNS) <= set(df)
    return df


def test_only_ramps_with_a_changing_share_are_judged():
    same = Experiment("same", "control", ("control", "treatment"), (
        Phase(1, T0, T0 + timedelta(days=2), {"control": 0.5, "treatment": 0.5}),
        Phase(2, T0 + timedelta(days=2), None, {"control": 0.5, "treatment": 0.5})))
    assert [e.id for e in ramped([_ramp(), _flat(), same])] == ["ramp"]
    assert spillover_findings([_flat()], [SpilloverPull(METRIC, _frame(_flat(), lambda s: 0, lambda s: 0))],
                              AS_OF, CHECKS) == []


def test_constant_effect_is_ok_and_shrinking_effect_alerts_with_the_bias_direction():
    e = _ramp()
    ok = spillover_findings([e], [SpilloverPull(METRIC, _frame(e, lambda s: -0.3, lambda s: 0.0, seed=1))], AS_OF, CHECKS)
    (f,) = ok
    assert f.status == "ok" and f.check == "spillover" and f.scope == "wait_per_hold"
    assert "no change with the treatment share" in f.summary
    assert f.statistics["effect_trend"]["phases_used"] == 3
    bad = spillover_findings([e], [SpilloverPull(METRIC, _frame(
        e, lambda s: -0.5 * (1 - s), lambda s: 0.4 * s, seed=2))], AS_OF, CHECKS)
    (g,) = bad
    assert g.status == "alert"
    st = g.statistics
    assert st["likely_bias"] == "overstated"
    assert st["effect_trend"]["slope_per_share"] > 0 and st["effect_trend"]["p_adjusted"] < CHECKS.spillover_alpha
    assert st["control_drift_trend"]["slope_per_share"] == pytest.approx(0.4, abs=0.1)  # planted control drift
    assert st["effect_trend"]["fitted_at_full_rollout"] == pytest.approx(0.0, abs=0.06)  # -0.5 (1 - s) at s = 1
    assert "switchback" in g.summary and "overstates" in g.summary


def test_spillover_without_enough_units_or_data_is_not_judged():
    e = _ramp()
    few = spillover_findings([e], [SpilloverPull(METRIC, _frame(e, lambda s: -0.5 * (1 - s), lambda s: 0, n_per_phase=300))],
                             AS_OF, CHECKS)
    (f,) = few
    assert f.status == "ok" and "not judged yet" in f.summary  # 30, 75 and 150 treatment units: all below 200
    empty = pd.DataFrame(columns=["experiment", "variant", "hour", *SUM_COLUMNS])
    (g,) = spillover_findings([e], [SpilloverPull(METRIC, empty)], AS_OF, CHECKS)
    assert g.status == "ok" and g.statistics["effect_trend"] is None


def _crosstab(a, b, n, rho, seed):
    """Shared units of experiments a and b; with probability rho b copies a's variant."""
    rng = np.random.default_rng(seed)
    va = rng.integers(0, 2, n)
    vb = np.where(rng.random(n) < rho, va, rng.integers(0, 2, n))
    names = np.array(["control", "treatment"])
    df = pd.DataFrame({"experiment_a": a, "experiment_b": b, "phase_a": 1, "phase_b": 1,
                       "variant_a": names[va], "variant_b": names[vb]})
    return df.groupby(list(df.columns)).size().rename("units").reset_index()


def test_collision_flags_a_correlated_pair_once_and_nothing_else():
    exps = [_flat("a"), _flat("b"), _flat("c")]
    cross = pd.concat([_crosstab("a", "b", 5000, 0.2, 1), _crosstab("a", "c", 5000, 0.0, 2),
                       _crosstab("c", "b", 5000, 0.0, 3), _crosstab("a", "zz-not-live", 5000, 1.0, 4)])
    fs = collision_findings(exps, CollisionPull(cross, ()), CHECKS)
    alerts = {(f.experiment, f.scope) for f in fs if f.status == "alert"}
    assert alerts == {("a", "b")}  # one pair problem, one finding: under the id that sorts first
    f = next(f for f in fs if f.key == "a\x1fcollision\x1fb")
    assert f.statistics["cramers_v"] == pytest.approx(0.2, abs=0.05) and f.statistics["family_size"] == 3
    assert "independent seed" in f.summary
    summaries = {f.experiment: f for f in fs if f.scope == "pairs"}
    assert set(summaries) == {"a", "b", "c"} and summaries["a"].statistics["dependent_pairs"] == ["b"]
    assert summaries["c"].status == "ok" and summaries["c"].statistics["pairs"] == ["a", "b"]
    # the other side's summary says where the pair finding is
    assert summaries["b"].statistics["dependent_pairs"] == ["a"]
    assert summaries["b"].statistics["reported_under"] == ["a · collision · b"] and "a · collision · b" in summaries["b"].summary


def test_collision_needs_enough_overlap_and_survives_empty_input():
    exps = [_flat("a"), _flat("b")]
    small = _crosstab("a", "b", 500, 1.0, 5)  # perfectly dependent, but below collision_min_overlap
    assert collision_findings(exps, CollisionPull(small, ()), CHECKS) == []
    empty = pd.DataFrame(columns=["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b", "units"])
    assert collision_findings(exps, CollisionPull(empty, ()), CHECKS) == []


def test_collision_guardrail_interaction():
    exps = [_flat("a"), _flat("b")]
    rng = np.random.default_rng(8)
    rows = []
    for va in ("control", "treatment"):
        for vb in ("control", "treatment"):
            n = 3000
            lift = 0.3 if (va, vb) == ("treatment", "treatment") else 0.0  # harm only together
            y = rng.poisson(1.0 + lift, n).astype(float)
            rows.append({"experiment_a": "a", "experiment_b": "b", "phase_a": 1, "phase_b": 1, "variant_a": va,
                         "variant_b": vb, "n": float(n), "sum_y": y.sum(), "sum_y2": (y * y).sum()})
    frame = pd.DataFrame(rows)
    cross = frame[["experiment_a", "experiment_b", "phase_a", "phase_b", "variant_a", "variant_b"]].assign(units=frame["n"])
    guard = MetricConfig(name="errors", kind="mean", bad_direction="increase", table="e", aggregate="count")
    fs = collision_findings(exps, CollisionPull(cross, ((guard, frame),)), CHECKS)
    alerts = {(f.experiment, f.scope) for f in fs if f.status == "alert"}
    assert alerts == {("a", "b:errors")}
    f = next(f for f in fs if f.key == "a\x1fcollision\x1fb:errors")
    (c,) = f.statistics["contrasts"]
    assert c["interaction"] == pytest.approx(0.3, abs=0.12) and f.statistics["df"] == 1


def test_run_table_names_a_pair_finding_on_both_experiments_lines():
    """The pair finding lives under one experiment; the run table's line of the other says
    where it is, so its owner does not read 'all clear'."""
    import io

    from rich.console import Console

    from monitor.cycle import CycleResult
    from monitor.report import print_text

    exps = [_flat("a"), _flat("b"), _flat("c")]
    fs = collision_findings(exps, CollisionPull(_crosstab("a", "b", 5000, 0.2, 1), ()), CHECKS)
    buf = io.StringIO()
    print_text(CycleResult("r", T0 + timedelta(days=3), exps, fs, [], []), Console(file=buf, width=200))
    rows = {ln.split()[0]: ln for ln in buf.getvalue().splitlines() if ln.strip()}
    assert "ALERT collision·b" in rows["a"] and "(under" not in rows["a"]
    assert "ALERT collision·a (under a)" in rows["b"] and "all clear" in rows["c"]
