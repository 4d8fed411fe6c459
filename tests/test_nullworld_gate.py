"""False-alarm gate: the real monitor cycle on a realistic world with no problem in it.

``tests/nullworld.py`` builds, per seed, a month of product-like traffic (bursty heavy-tailed
users, exposure logged inside sessions, ramps, a three-arm test, overlapping experiments, bots,
a traffic drop, zero-inflated and rare-event metrics) in which no check has anything to find.
The gate runs :func:`monitor.cycle.run_cycle` on each seed and counts, per check, the
comparisons that are not ``ok`` (for guardrails: ``warn`` or ``alert``, both mean "harm
established"). Each check must stay within its stated false-alarm budget: the count must not be
significantly above ``budget x comparisons`` (one-sided exact binomial test at 1%, i.e. the
lower end of the one-sided 99% Clopper-Pearson interval is at most the budget). Comparisons of
one seed share users, so the binomial interval is approximate.

Two tests pin down defects the null world exposed: a pooled interaction between two experiments
ramping at different times (collision) and a control's own pre/post change read as
interference (spillover); each fails on the code before its fix.

CI runs ``EXPWATCH_NULLWORLD_SEEDS`` seeds (default 6, about 30 s). The study reported in the
README::

    EXPWATCH_NULLWORLD_SEEDS=60 .venv/bin/python -m pytest tests/test_nullworld_gate.py -q -s -m slow
"""

from __future__ import annotations

import os
from collections import Counter
from datetime import timedelta
from pathlib import Path

import duckdb
import pytest
from nullworld import AS_OF, BOT_SHARE, DROP_DAY, USERS, build
from scipy import stats

from monitor.config import CheckConfig, parse_config
from monitor.cycle import run_cycle

SEEDS = int(os.environ.get("EXPWATCH_NULLWORLD_SEEDS", "6"))
_D = CheckConfig()
#: the false-alarm budget each check states (per comparison)
#: SRM has two levels: an alert spends ``alpha``; a watch-level warn (the e-value past
#: 1/sqrt(alpha), ``checks.srm_warn_e_value``) spends at most sqrt(alpha) by Ville's inequality
#: (Ramdas, Grunwald, Vovk & Shafer, "Game-theoretic statistics and safe anytime-valid
#: inference", Statistical Science 2023, section 3), so it is gated against that.
BUDGET = {"srm": _D.alpha, "srm_watch": _D.alpha ** 0.5, "freshness": _D.alpha, "leakage": _D.alpha, "unknown_variant": _D.alpha,
          "guardrail": _D.guardrail_alpha, "novelty": _D.novelty_alpha, "spillover": _D.spillover_alpha,
          "collision": _D.collision_alpha}


def test_null_world_has_the_shape_of_product_traffic(tmp_path: Path) -> None:
    build(tmp_path, 3)
    con = duckdb.connect(str(tmp_path / "world.duckdb"), read_only=True)
    try:
        per_user = [r[0] for r in con.execute(
            "SELECT count(*) FROM sessions WHERE started_at >= ? GROUP BY unit_id",
            [AS_OF.replace(tzinfo=None) - timedelta(days=30)]).fetchall()]
        raw, kept = con.execute("SELECT (SELECT count(DISTINCT unit_id) FROM assignments), "
                                "(SELECT count(DISTINCT unit_id) FROM assignments_filtered)").fetchone()
        daily = [r[0] for r in con.execute(
            "SELECT count(*) FROM sessions GROUP BY CAST(started_at AS DATE) ORDER BY CAST(started_at AS DATE)"
        ).fetchall()]
        zero_rev = con.execute("SELECT count(*) FROM purchases").fetchone()[0] / sum(per_user)
        n_arms = dict(con.execute("SELECT experiment_id, count(DISTINCT variant) FROM experiments GROUP BY 1").fetchall())
        phases = dict(con.execute("SELECT experiment_id, max(phase) FROM experiments GROUP BY 1").fetchall())
    finally:
        con.close()
    # heavy tail: most users have 0-3 sessions in the last 30 days and a few have dozens
    humans = USERS * (1 - BOT_SHARE)
    assert (humans - len(per_user) + sum(k <= 3 for k in per_user)) / humans > 0.7
    assert max(per_user) >= 24
    # bots are in the raw exposure log and removed by the filter stage
    assert 0.3 * BOT_SHARE < (raw - kept) / raw < 3 * BOT_SHARE
    # the one-day drop: that day has less than 60% of its neighbours' mean
    assert daily[DROP_DAY] < 0.6 * (daily[DROP_DAY - 1] + daily[DROP_DAY + 1]) / 2
    assert zero_rev < 0.05  # purchases in about 2% of sessions
    assert 3 in n_arms.values() and max(phases.values()) == 3


def _counts(findings) -> tuple[Counter, Counter]:
    """Per check: comparisons made and comparisons not ok (collision pairs counted once)."""
    made, flagged = Counter(), Counter()
    for f in findings:
        if f.check == "collision":
            if f.scope == "pairs":  # each pair appears in the summaries of both experiments
                made["collision"] += (len(f.statistics["pairs"]) + f.statistics["interaction_tests"]) / 2
            elif f.status != "ok":  # a pair finding is reported once (monitor.collision)
                flagged["collision"] += 1
            continue
        if f.check == "srm":
            made["srm_watch"] += 1
            flagged["srm_watch"] += f.status != "ok"
            made["srm"] += 1
            flagged["srm"] += f.status not in ("ok", "warn")
            continue
        made[f.check] += 1
        flagged[f.check] += f.status != "ok"
    return made, flagged


@pytest.fixture(scope="module")
def null_study(tmp_path_factory) -> tuple[Counter, Counter]:
    made, flagged = Counter(), Counter()
    for seed in range(SEEDS):
        d = tmp_path_factory.mktemp(f"world{seed}")
        cfg = parse_config(build(d, 1000 + seed))
        res = run_cycle(cfg, as_of=AS_OF, dry_run=True, notify=False)
        m, f = _counts(res.findings)
        made.update(m)
        flagged.update(f)
    print(f"\nnull world, {SEEDS} seeds, one cycle each at the end of the month:")
    for check, budget in BUDGET.items():
        n, k = round(made[check]), round(flagged[check])
        ci = stats.binomtest(k, max(n, 1)).proportion_ci(0.95, method="exact")
        print(f"  {check:16s} {k:4d} / {n:5d} = {k / max(n, 1):.4f} (95% CI {ci.low:.4f}-{ci.high:.4f}); "
              f"budget {budget:g}")
    return made, flagged


@pytest.mark.slow
@pytest.mark.parametrize("check", [
    "srm", "srm_watch", "freshness", "leakage", "unknown_variant", "guardrail", "novelty", "collision", "spillover",
])
def test_false_alarm_rate_within_budget(null_study, check: str) -> None:
    made, flagged = null_study
    n, k = round(made[check]), round(flagged[check])
    assert n >= SEEDS, f"{check}: too few comparisons ({n}) to measure anything"
    # one-sided exact binomial test of "rate <= budget" at 1%
    p = stats.binomtest(k, n, BUDGET[check], alternative="greater").pvalue
    assert p > 0.01, f"{check}: {k} of {n} comparisons flagged, budget {BUDGET[check]:g} (p={p:.2g})"


@pytest.mark.slow
def test_two_ramps_at_different_times_do_not_read_as_an_interaction(tmp_path: Path) -> None:
    # issue 17, defect 3: 'wide-ramp' (5 -> 20 -> 50%) and 'two-step-ramp' (10 -> 50%) share
    # about 4,700 users and interact on nothing. Pooling the cells over their phases mixed calendar
    # cohorts observed for different lengths of time: on this seed a +29% "interaction" on
    # minutes with BH-adjusted p = 0.0002. Compared within pairs of phases, no alert remains.
    cfg = parse_config(build(tmp_path, 1002))
    res = run_cycle(cfg, as_of=AS_OF, dry_run=True, notify=False)
    alerts = [f.summary for f in res.findings if f.check == "collision" and f.status != "ok"
              and f.experiment in ("wide-ramp", "two-step-ramp")
              and f.scope.split(":")[0] in ("wide-ramp", "two-step-ramp")]
    assert not alerts, alerts
    summary = next(f for f in res.findings if f.check == "collision" and f.experiment == "wide-ramp"
                   and f.scope == "pairs")
    # the pair was tested, not skipped
    assert "two-step-ramp" in summary.statistics["pairs"] and summary.statistics["interaction_tests"] > 0


@pytest.mark.slow
def test_control_drift_after_activity_triggered_exposure_is_not_read_as_interference(tmp_path: Path) -> None:
    # issue 17, defect 2: exposure is logged inside a session, so every unit's metric rises after
    # its first exposure, in control too, and by different amounts in different ramp phases. On
    # this seed the control of 'two-step-ramp' "moved" +232% against its own pre-period at 10%
    # treatment and +1630% at 50%, which alerted. The drift is still reported, as context.
    res = run_cycle(parse_config(build(tmp_path, 2)), as_of=AS_OF, dry_run=True, notify=False)
    spill = [f for f in res.findings if f.check == "spillover"]
    assert spill and all(f.status == "ok" for f in spill), [f.summary for f in spill if f.status != "ok"]
    f = next(f for f in spill if f.experiment == "two-step-ramp" and f.scope == "minutes")
    drifts = [p["control_drift"] for p in f.statistics["phases"] if p["used"]]
    assert len(drifts) == 2 and min(drifts) > 1.0  # the confounder is there: the control more than doubles
    assert f.statistics["effect_trend"] is not None and "context only" in f.summary
