"""Guardrail and metric findings from sufficient statistics: cases known by
construction (a harmful effect alerts, an improvement never does, harm within the
margin warns), degenerate metrics give clean findings, ramp phases are not
mixed, the multiplicity policy, config errors, and the README documents every
statistics key."""

from __future__ import annotations

import json
import math
import re
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from monitor.config import CheckConfig, MetricConfig, parse_config
from monitor.errors import ConfigError
from monitor.findings import clean_json
from monitor.guardrails import STAT_COLUMNS, MetricPull, guardrail_findings
from monitor.registry import Experiment, Phase

README = (Path(__file__).resolve().parent.parent / "README.md").read_text()
START = datetime(2026, 11, 1, 10, tzinfo=UTC)
AS_OF = datetime(2026, 11, 20, 9, tzinfo=UTC)


def _exp(eid="exp", variants=("control", "treatment"), phases=None):
    phases = phases or (Phase(1, START, None, {v: 1 / len(variants) for v in variants}),)
    return Experiment(eid, variants[0], tuple(variants), tuple(phases), status="running")


def _row(exp, variant, n, mean, sd, hour=START, **extra):
    """Exact sufficient statistics of n values with the given mean and sample sd."""
    sum_y = n * mean
    sum_y2 = (n - 1) * sd**2 + n * mean**2
    rec = {"experiment": exp, "variant": variant, "hour": hour, "n": float(n), "sum_y": sum_y, "sum_y2": sum_y2}
    rec.update(extra)
    return rec


def _pull(metric, rows):
    df = pd.DataFrame(rows)
    for c in STAT_COLUMNS:
        if c not in df:
            df[c] = 0.0
    df["hour"] = pd.to_datetime(df["hour"], utc=True)
    return MetricPull(metric, df[["experiment", "variant", "hour", *STAT_COLUMNS]])


def _metric(**kw):
    base = {"name": "load_ms", "table": "t", "columns": {"timestamp": "ts", "value": "v"}, "aggregate": "sum",
            "kind": "mean", "role": "guardrail", "bad_direction": "increase"}
    base.update(kw)
    return MetricConfig(**base)


CHECKS = CheckConfig()


def _one(metric, rows, exps=None, checks=CHECKS):
    res = guardrail_findings(exps or [_exp()], [_pull(metric, rows)], AS_OF, checks)
    return res


def _no_nan(finding):
    text = json.dumps(finding.to_json())
    assert "NaN" not in text and "Infinity" not in text


def test_harmful_ten_percent_effect_alerts():
    # by construction: treatment mean 110 vs control 100 (+10%), sd 30, 20,000 units per variant
    res = _one(_metric(), [_row("exp", "control", 20000, 100.0, 30.0), _row("exp", "treatment", 20000, 110.0, 30.0)])
    (f,) = res.findings
    assert (f.check, f.scope, f.status) == ("guardrail", "load_ms", "alert")
    s = f.statistics
    assert s["effect_relative"] == pytest.approx(0.10)
    assert s["cs_relative_lower"] > 0.02 and s["cs_relative_lower"] < 0.10 < s["cs_relative_upper"]
    # the fixed-horizon p-value is Welch's: scipy.stats.ttest_ind_from_stats(equal_var=False) (scipy reference)
    ref = sps.ttest_ind_from_stats(110.0, 30.0, 20000, 100.0, 30.0, 20000, equal_var=False)
    assert s["p_value"] == pytest.approx(ref.pvalue, rel=1e-6, abs=1e-300)
    # the always-valid sequence is wider than the fixed 95% interval (Waudby-Smith et al., Ann. Statist.
    # 52(6), 2024, Theorem 2.2: the boundary exceeds z_{1-alpha/2} * SE at every n)
    se = math.sqrt(30.0**2 / 20000 * 2)
    assert (s["cs_upper"] - s["cs_lower"]) / 2 > sps.norm.ppf(0.975) * se
    assert s["n"] == {"control": 20000, "treatment": 20000} and s["e_value"] > 1 / 0.05
    assert "+10.0%" in f.summary and "margin" in f.summary
    _no_nan(f)
    assert {sn.variant for sn in res.snapshots} == {"control", "treatment"}


def test_significant_improvement_never_alerts():
    for direction, t_mean in (("increase", 90.0), ("decrease", 110.0)):
        m = _metric(bad_direction=direction)
        (f,) = _one(m, [_row("exp", "control", 20000, 100.0, 30.0), _row("exp", "treatment", 20000, t_mean, 30.0)]).findings
        assert f.status == "ok" and "improvement is established" in f.summary
        assert (f.statistics["cs_relative_upper"] < 0) == (direction == "increase")


def test_harm_within_margin_warns():
    # +1% with a 2% margin and a tight interval: harm is established but not beyond the margin
    (f,) = _one(_metric(), [_row("exp", "control", 400000, 100.0, 10.0), _row("exp", "treatment", 400000, 101.0, 10.0)]).findings
    assert f.status == "warn"
    assert 0 < f.statistics["cs_relative_lower"] <= 0.02
    # a bigger margin leaves it a warning; a zero margin makes it an alert
    (g,) = _one(_metric(margin=0.0), [_row("exp", "control", 400000, 100.0, 10.0),
                                      _row("exp", "treatment", 400000, 101.0, 10.0)]).findings
    assert g.status == "alert"


def test_relative_alarm_needs_the_difference_to_exclude_zero():
    # 1,000 readers per variant, 65 control and 35 treatment readers spend 10 each: the
    # difference's always-valid sequence contains 0 (e-value 11.8 < 20), so a guardrail on
    # "spend, decrease is bad" must not alert or warn; before the relative sequence was
    # derived from the contrast sequences it reported -83% to -9% here and alerted.
    m = _metric(name="spend", bad_direction="decrease")
    sd = lambda k: math.sqrt((100 * k - 1000 * (k / 100) ** 2) / 999)
    for c, t in ((65, 35), (35, 65)):
        rows = [_row("exp", "control", 1000, c / 100, sd(c)), _row("exp", "treatment", 1000, t / 100, sd(t))]
        (f,) = _one(m, rows).findings
        st = f.statistics
        assert f.status == "ok", f.summary
        assert st["e_value"] == pytest.approx(11.8, abs=0.05)
        assert st["cs_relative_lower"] < 0 < st["cs_relative_upper"]


def test_rare_control_gives_no_relative_bound_but_judges_harm_on_the_difference():
    m = _metric(name="failed_loans", kind="proportion", aggregate="any")
    # 3 of 4,000 control units: the control rate is not bounded away from 0, so no relative
    # sequence exists yet; the finding says so and is ok (the difference's sequence contains 0)
    few = [{"experiment": "exp", "variant": "control", "hour": START, "n": 4000.0, "sum_y": 3.0, "sum_y2": 3.0},
           {"experiment": "exp", "variant": "treatment", "hour": START, "n": 4000.0, "sum_y": 6.0, "sum_y2": 6.0}]
    (f,) = _one(m, few).findings
    assert f.status == "ok" and "no relative 95% CS yet" in f.summary
    assert f.statistics["cs_relative_lower"] is None and f.statistics["effect_relative"] == pytest.approx(1.0)
    _no_nan(f)
    # 3 vs 60: harm is established by the difference's sequence, but no relative margin can be
    # cleared while the control rate is unbounded: a warning, never an alert
    many = [dict(few[0]), dict(few[1], sum_y=60.0, sum_y2=60.0)]
    (g,) = _one(m, many).findings
    assert g.status == "warn" and "harm established" in g.summary
    _no_nan(g)


def test_no_effect_is_ok():
    (f,) = _one(_metric(), [_row("exp", "control", 5000, 100.0, 30.0), _row("exp", "treatment", 5000, 100.2, 30.0)]).findings
    assert f.status == "ok" and "no harm established" in f.summary


def test_zero_variance_and_all_zero_metrics_give_clean_findings():
    (f,) = _one(_metric(), [_row("exp", "control", 500, 5.0, 0.0), _row("exp", "treatment", 500, 5.0, 0.0)]).findings
    assert f.status == "warn" and "no variation" in f.summary
    assert f.statistics["cs_relative_lower"] is None and f.statistics["e_value"] is None
    _no_nan(f)
    (z,) = _one(_metric(), [_row("exp", "control", 500, 0.0, 0.0), _row("exp", "treatment", 500, 0.0, 0.0)]).findings
    # no events yet in either arm: a rare event early on, not evidence of anything (issue 'Quiet when
    # healthy': this opened a warn on every experiment's rare-event guardrails in the demo's replay)
    assert z.status == "ok" and "0 for every unit" in z.summary
    _no_nan(z)
    # few units: nothing to judge yet, and no warning either
    (small,) = _one(_metric(), [_row("exp", "control", 20, 0.0, 0.0), _row("exp", "treatment", 20, 0.0, 0.0)]).findings
    assert small.status == "ok" and "cannot be judged" in small.summary


def test_zero_denominator_ratio_gives_clean_finding():
    m = _metric(kind="ratio", denominator={"table": "t", "columns": {"timestamp": "ts"}, "aggregate": "count"})
    rows = [_row("exp", v, 300, 2.0, 1.0, sum_x=0.0, sum_x2=0.0, sum_xy=0.0) for v in ("control", "treatment")]
    (f,) = _one(m, rows).findings
    assert f.status == "warn" and "denominator is zero" in f.summary
    _no_nan(f)
    assert json.dumps(clean_json(f.statistics))


def test_ratio_metric_known_by_construction():
    # per unit x = 10 page views, y = 10 * render time; ratio = render time per view: 200 vs 220 ms (+10%)
    m = _metric(kind="ratio", denominator={"table": "t", "columns": {"timestamp": "ts"}, "aggregate": "count"})
    rows = []
    for v, r in (("control", 200.0), ("treatment", 220.0)):
        n, sd_y = 10000, 300.0
        x = 10.0
        rows.append(_row("exp", v, n, r * x, sd_y, sum_x=n * x, sum_x2=n * x * x, sum_xy=x * n * r * x))
    (f,) = _one(m, rows).findings
    assert f.status == "alert" and f.statistics["effect_relative"] == pytest.approx(0.10)
    assert f.statistics["mean"] == {"control": pytest.approx(200.0), "treatment": pytest.approx(220.0)}


def test_missing_metric_for_an_experiment_is_ok():
    exps = [_exp("a"), _exp("b")]
    rows = [_row("a", "control", 5000, 100.0, 30.0), _row("a", "treatment", 5000, 100.0, 30.0)]
    res = guardrail_findings(exps, [_pull(_metric(), rows)], AS_OF, CHECKS)
    b = next(f for f in res.findings if f.experiment == "b")
    assert b.status == "ok" and "no data yet" in b.summary
    _no_nan(b)


def test_primary_metric_never_alerts_and_several_treatments_get_their_own_scope():
    exp = _exp(variants=("control", "email", "push"))
    m = _metric(name="minutes", role="primary", bad_direction="decrease")
    rows = [_row("exp", "control", 20000, 10.0, 5.0), _row("exp", "email", 20000, 8.0, 5.0),
            _row("exp", "push", 20000, 12.0, 5.0)]
    res = _one(m, rows, [exp])
    by_scope = {f.scope: f for f in res.findings}
    assert set(by_scope) == {"minutes:email", "minutes:push"}
    assert all(f.check == "metric" and f.status == "ok" for f in res.findings)
    assert "harm is established" in by_scope["minutes:email"].summary
    assert "improvement is established" in by_scope["minutes:push"].summary
    assert len(res.snapshots) == 3  # the control once


def test_only_units_of_the_current_ramp_phase_are_compared():
    ph2 = START + timedelta(days=5, minutes=30)  # mid-hour: its first hour straddles and is left out
    exp = _exp(phases=(Phase(1, START, ph2, {"control": 0.9, "treatment": 0.1}),
                       Phase(2, ph2, None, {"control": 0.5, "treatment": 0.5})))
    rows = [
        # phase 1: control units have more exposure, so a pooled comparison would look like harm reversed
        _row("exp", "control", 9000, 200.0, 30.0, hour=START), _row("exp", "treatment", 1000, 100.0, 30.0, hour=START),
        _row("exp", "control", 50, 150.0, 30.0, hour=ph2.replace(minute=0)),
        _row("exp", "control", 4000, 100.0, 30.0, hour=ph2 + timedelta(hours=2)),
        _row("exp", "treatment", 4000, 100.5, 30.0, hour=ph2 + timedelta(hours=2)),
    ]
    (f,) = _one(_metric(), rows, [exp]).findings
    assert f.statistics["n"] == {"control": 4000, "treatment": 4000}
    assert f.statistics["units_since"] == ph2.replace(minute=0) + timedelta(hours=1)
    assert f.status == "ok"


def _moderate_family(policy):
    """An experiment with ten treatments: nine without effect, one with a moderate harm."""
    variants = ("control",) + tuple(f"t{i}" for i in range(10))
    exp = _exp(variants=variants)
    found = None
    for lift in np.linspace(0.5, 3.0, 26):  # find a harm whose e-value is between 1/alpha and m/alpha
        rows = [_row("exp", "control", 5000, 100.0, 30.0)]
        rows += [_row("exp", v, 5000, 100.0 + (lift if v == "t0" else 0.0), 30.0) for v in variants[1:]]
        alone = _one(_metric(margin=0.0), rows, [exp], CheckConfig(guardrail_multiplicity="none"))
        f0 = next(f for f in alone.findings if f.scope == "load_ms:t0")
        if f0.status == "alert" and f0.statistics["e_value"] < 10 / 0.05:
            found = rows
            break
    assert found is not None
    return _one(_metric(margin=0.0), found, [exp], CheckConfig(guardrail_multiplicity=policy)).findings


def test_ebh_across_an_experiments_guardrails_demotes_an_isolated_weak_alert():
    # e-BH (Wang and Ramdas, JRSS-B 84(3), 2022): with m = 10 hypotheses the largest e-value must reach
    # m / alpha = 200 to be rejected; an e-value between 20 and 200 is not.
    fs = _moderate_family("ebh")
    t0 = next(f for f in fs if f.scope == "load_ms:t0")
    assert t0.status == "ok" and "e-BH" in t0.summary and t0.statistics["adjusted_level"] > 0.05
    assert all(f.status == "ok" for f in fs)


def test_ebh_keeps_a_strong_alert():
    variants = ("control",) + tuple(f"t{i}" for i in range(10))
    rows = [_row("exp", "control", 20000, 100.0, 30.0)]
    rows += [_row("exp", v, 20000, 110.0 if v == "t0" else 100.0, 30.0) for v in variants[1:]]
    fs = _one(_metric(), rows, [_exp(variants=variants)], CheckConfig(guardrail_multiplicity="ebh")).findings
    t0 = next(f for f in fs if f.scope == "load_ms:t0")
    assert t0.status == "alert" and t0.statistics["adjusted_level"] <= 0.05


def test_cuped_reduces_variance_by_construction():
    # y = c + noise, with corr(y, c)^2 = 0.8: CUPED removes about 80% of the variance
    # (Deng, Xu, Kohavi and Walker, WSDM 2013, section 3: the variance falls by the factor 1 - rho^2)
    rng = np.random.default_rng(3)
    rows = []
    for v, shift in (("control", 0.0), ("treatment", 0.3)):
        n = 20000
        c = rng.normal(10.0, 2.0, n)
        y = c + rng.normal(0.0, 1.0, n) + shift
        rows.append({"experiment": "exp", "variant": v, "hour": START, "n": float(n), "sum_y": y.sum(),
                     "sum_y2": (y * y).sum(), "sum_c": c.sum(), "sum_c2": (c * c).sum(), "sum_yc": (y * c).sum()})
    m = _metric(role="primary", cuped={"pre_period_days": 14})
    (f,) = _one(m, rows).findings
    vr = f.statistics["variance_reduction"]
    assert vr["control"] == pytest.approx(0.8, abs=0.02) and vr["treatment"] == pytest.approx(0.8, abs=0.02)
    assert "CUPED variance reduction" in f.summary


BASE = {"warehouse": {"url": "duckdb:///x.duckdb"}, "registry": {"table": "e"}, "assignments": {"table": "a"}}
GOOD = {"name": "g", "table": "t", "columns": {"timestamp": "ts", "value": "v"}, "bad_direction": "increase"}


@pytest.mark.parametrize("metric, key, words", [
    ({**GOOD, "kind": "ratio"}, "metrics[0]", "needs a 'denominator'"),
    ({**GOOD, "kind": "proportion"}, "metrics[0]", "aggregate 'any'"),
    ({k: v for k, v in GOOD.items() if k != "bad_direction"}, "metrics[0]", "bad_direction"),
    ({**GOOD, "filter_column": "kind"}, "metrics[0]", "filter_values"),
    ({**GOOD, "columns": {"timestamp": "ts"}}, "metrics[0]", "needs columns.value"),
    ({**GOOD, "kind": "ratio", "cuped": {"pre_period_days": 7},
      "denominator": {"table": "t", "columns": {"timestamp": "ts"}, "aggregate": "count"}}, "metrics[0]", "cuped"),
    ({**GOOD, "margn": 0.1}, "metrics[0].margn", "unknown key"),
    ({**GOOD, "name": "a:b"}, "metrics[0].name", "letters"),
    ({**GOOD, "role": "vanity"}, "metrics[0].role", "guardrail"),
])
def test_metric_config_errors_are_one_line(metric, key, words):
    with pytest.raises(ConfigError) as exc:
        parse_config({**BASE, "metrics": [metric]}, where="c.yaml")
    msg = str(exc.value)
    assert msg.startswith(f"c.yaml: {key}:") and words in msg and "\n" not in msg


def test_duplicate_metric_names_and_check_options():
    with pytest.raises(ConfigError, match=r"c.yaml: metrics\[1\].name: .*twice"):
        parse_config({**BASE, "metrics": [GOOD, GOOD]}, where="c.yaml")
    with pytest.raises(ConfigError, match=r"checks.guardrail_multiplicity"):
        parse_config({**BASE, "checks": {"guardrail_multiplicity": "bonferroni"}}, where="c.yaml")
    with pytest.raises(ConfigError, match=r"checks.guardrail_n_star"):
        parse_config({**BASE, "checks": {"guardrail_n_star": 1}}, where="c.yaml")
    cfg = parse_config({**BASE, "metrics": [GOOD]}, where="c.yaml")
    assert cfg.metrics[0].margin == 0.02 and cfg.checks.guardrail_multiplicity == "none"


def test_readme_documents_every_guardrail_statistic():
    (f,) = _one(_metric(), [_row("exp", "control", 2000, 100.0, 30.0), _row("exp", "treatment", 2000, 101.0, 30.0)]).findings
    section = README[README.index("## JSON output"):]
    section = section[: section.index("\n## ", 5)]
    line = next(ln for ln in section.splitlines() if "for `guardrail` and `metric`:" in ln)
    part = line.split("for `guardrail` and `metric`:", 1)[1].split("; for `", 1)[0]  # up to the next check
    documented = set(re.findall(r"`([a-z_]+)`", part))
    assert set(f.statistics) == documented


def test_a_rare_event_absent_from_one_arm_is_not_a_warning_without_evidence_of_harm():
    """Issue 'Quiet when healthy': early in an experiment a rare event has often not occurred yet in
    one arm, so the relative effect is undefined. That alone is no evidence: on the demo's hourly
    replay it opened a one-to-three-day warn on every experiment's rare-event guardrails. The case
    here is the demo's review-after-return on 2026-11-19 (2 of 681 control units, 0 of 705)."""
    m = _metric(name="loan_cancelled", kind="proportion", aggregate="any")
    rows = [{"experiment": "exp", "variant": "control", "hour": START, "n": 681.0, "sum_y": 2.0, "sum_y2": 2.0},
            {"experiment": "exp", "variant": "treatment", "hour": START, "n": 705.0, "sum_y": 0.0, "sum_y2": 0.0}]
    (f,) = _one(m, rows).findings
    assert f.status == "ok" and "cannot be judged on the relative scale" in f.summary
    assert "0 for every unit of treatment" in f.summary
    _no_nan(f)
    # the other way round, with many events: harm is established by the difference's sequence
    rows = [dict(rows[0], sum_y=0.0, sum_y2=0.0, n=5000.0), dict(rows[1], sum_y=80.0, sum_y2=80.0, n=5000.0)]
    (g,) = _one(m, rows).findings
    assert g.status == "warn" and "harm established on the difference" in g.summary
