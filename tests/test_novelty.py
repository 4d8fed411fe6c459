"""monitor.novelty: per-age frames -> findings, on simulated unit-level data.

The frames are built here the way ``sql/novelty.sql.j2`` builds them (that the
query does so is tested in tests/test_sql_novelty.py), from units whose daily
counts depend on a persistent per-unit activity level, so that the same units
recur at several ages and the per-age estimates are correlated as in real data.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from monitor.config import CheckConfig, MetricConfig
from monitor.novelty import NoveltyPull, novelty_findings, window
from monitor.registry import Experiment, Phase

SINCE = datetime(2026, 3, 2, tzinfo=UTC)  # a Monday; the phase starts the evening before
EXP = Experiment("badge", "control", ("control", "treatment"),
                 (Phase(1, SINCE - timedelta(hours=5), None, {"control": 0.5, "treatment": 0.5}),))
METRIC = MetricConfig.model_validate({"name": "sessions", "role": "primary", "kind": "mean", "table": "events",
                                      "aggregate": "count", "bad_direction": "decrease"})


def _simulate(rng, lift, days=28, per_day=300, rate=0.3):
    """Units (cohort day, variant) and their daily counts at ages 0..days-1 (NaN-free)."""
    n = days * per_day
    cohort = np.repeat(np.arange(days), per_day)
    treated = rng.random(n) < 0.5
    activity = rng.gamma(0.9, 1 / 0.9, size=n)
    mult = np.where(treated[:, None], 1.0 + lift(np.arange(days))[None, :], 1.0)
    y = rng.poisson(rate * activity[:, None] * mult).astype(float)
    return cohort, treated, y


def _frame(cohort, treated, y, end_day, max_age=28):
    """The frame the per-age query returns for data ending ``end_day`` days after SINCE."""
    observed = end_day - cohort - 1  # arrivals during the day: whole days until the end
    keep = (cohort < end_day) & (observed >= 1)
    days, ages = int(cohort.max()) + 1, min(y.shape[1], max_age)
    cols: dict[str, list] = {k: [] for k in ("variant", "cohort", "age", "age2", "observed", "units",
                                              "sum_y", "sum_y2", "cross_yy")}

    def add(variant, cohort_, age, age2, observed_, units=0.0, sum_y=0.0, sum_y2=0.0, cross=0.0):
        n = len(age)
        for k, v in (("cohort", cohort_), ("age", age), ("age2", age2), ("observed", observed_), ("units", units),
                     ("sum_y", sum_y), ("sum_y2", sum_y2), ("cross_yy", cross)):
            cols[k].append(np.broadcast_to(np.asarray(v), (n,)))
        cols["variant"].append(np.full(n, variant, dtype=object))

    for variant, arm in (("control", ~treated), ("treatment", treated)):
        sel = keep & arm
        obs, coh = np.minimum(observed[sel], max_age), cohort[sel]
        ys = np.where(np.arange(y.shape[1])[None, :] < obs[:, None], y[sel], 0.0)[:, :ages]
        units = np.bincount(coh, minlength=days).astype(float)
        obs_of = np.zeros(days, dtype=np.int64)
        obs_of[coh] = obs
        d = np.flatnonzero(units)
        add(variant, d, np.full(d.size, -1), -1, obs_of[d], units=units[d])
        sy, sy2 = np.zeros((days, ages)), np.zeros((days, ages))
        np.add.at(sy, coh, ys)
        np.add.at(sy2, coh, ys * ys)
        dd, aa = np.nonzero(sy)
        add(variant, dd, aa, -1, -1, sum_y=sy[dd, aa], sum_y2=sy2[dd, aa])
        cross = ys.T @ ys
        a, b = np.triu_indices(ages, 1)
        nz = cross[a, b] > 0
        add(variant, -1, a[nz], b[nz], -1, cross=cross[a, b][nz])
    df = pd.DataFrame({k: np.concatenate(v) for k, v in cols.items()})
    df["experiment"] = EXP.id
    df["cohort"] = pd.Timestamp(SINCE) + pd.to_timedelta(df["cohort"].where(df["cohort"] >= 0), unit="D")
    for c in ("sum_x", "sum_x2", "sum_xy", "cross_xx", "cross_xy", "cross_yx"):
        df[c] = 0.0
    for c in ("units", "sum_y", "sum_y2", "cross_yy"):
        df[c] = df[c].astype(float)
    for c in ("age", "age2", "observed"):
        df[c] = df[c].astype(np.int64)
    return df


def _run(cohort, treated, y, end_day, checks):
    as_of = SINCE + timedelta(days=end_day, hours=9)
    pull = NoveltyPull(METRIC, _frame(cohort, treated, y, end_day, checks.novelty_max_age_days),
                       {EXP.id: window(EXP, as_of, checks.novelty_look_days)})
    (f,) = novelty_findings([EXP], [pull], as_of, checks)
    return f


def test_window_is_whole_looks_since_the_phase_start():
    assert window(EXP, SINCE + timedelta(days=20, hours=3), 7) == (SINCE, SINCE + timedelta(days=14))
    assert window(EXP, SINCE + timedelta(days=6, hours=23), 7) == (SINCE, SINCE)  # no look yet
    assert window(EXP, SINCE + timedelta(days=9), 1) == (SINCE, SINCE + timedelta(days=9))


def test_finding_carries_the_statistics_and_says_why_it_is_not_judged_yet():
    rng = np.random.default_rng(1)
    cohort, treated, y = _simulate(rng, lambda a: 0.05 + 0 * a)
    checks = CheckConfig()
    early = _run(cohort, treated, y, 6, checks)
    assert early.status == "ok" and early.statistics["classification"] == "not judged"
    assert "needed to judge" in early.summary
    # the first weekly look has 6 complete ages, fewer than the 7 needed: not judged, no budget
    week = _run(cohort, treated, y, 7, checks)
    assert week.statistics["classification"] == "not judged" and week.statistics["look"] == 1
    assert len(week.statistics["ages"]) == 6 and week.statistics["threshold"] == 0.0
    f = _run(cohort, treated, y, 14, checks)
    st = f.statistics
    assert f.check == "novelty" and f.scope == "sessions" and f.status == "ok"
    assert st["classification"] == "stable" and st["days"] == 14 and st["look"] == 2
    # look 2 is the first that can be judged with the defaults, so it gets the first share
    assert st["threshold"] == pytest.approx(0.05 * 6 / np.pi**2)
    # the units at risk shrink with age: cohort d is observed for 13 - d whole days
    assert [a["age"] for a in st["ages"]] == list(range(13))
    n0 = st["ages"][0]["units"]
    assert n0["control"] + n0["treatment"] == 13 * 300
    assert sum(st["ages"][12]["units"].values()) == 300
    assert st["converged"]["lower"] < 0.05 < st["converged"]["upper"]


@pytest.mark.slow
def test_constant_effect_is_rarely_ever_flagged_over_four_weekly_looks():
    # Simulation of the stated guarantee (module docstring): the chance that a constant
    # effect is *ever* flagged over all looks is at most novelty_alpha. alpha = 0.2 here so
    # that the rate is measurable in 100 runs; units recur at several ages with a persistent
    # activity level (gamma, shape 0.9), so the per-age estimates are correlated.
    checks = CheckConfig(novelty_alpha=0.2)
    rng = np.random.default_rng(2)
    flagged = 0
    runs = 100
    for _ in range(runs):
        cohort, treated, y = _simulate(rng, lambda a: 0.08 + 0 * a)
        flagged += any(_run(cohort, treated, y, d, checks).status != "ok" for d in (7, 14, 21, 28))
    assert flagged / runs <= 0.2 + 2 * np.sqrt(0.2 * 0.8 / runs)


@pytest.mark.slow
def test_planted_fade_is_detected_classified_and_its_long_run_value_covered():
    # Simulation: lift(a) = 0.02 + 0.30 exp(-a / 3). At the third weekly look (21 days) the
    # check warns "fading" in at least 90% of runs and its 95% interval of the long-run
    # effect covers the true +2% in at least 90% of those (measured: see the report).
    checks = CheckConfig()
    rng = np.random.default_rng(3)
    found = covered = 0
    runs = 40
    for _ in range(runs):
        cohort, treated, y = _simulate(rng, lambda a: 0.02 + 0.30 * np.exp(-a / 3))
        f = _run(cohort, treated, y, 21, checks)
        if f.status == "warn" and f.statistics["classification"] == "fading":
            found += 1
            c = f.statistics["converged"]
            covered += c["lower"] <= 0.02 <= c["upper"]
    assert found >= 0.9 * runs
    assert covered >= 0.9 * found


def test_growing_effect_is_classified_growing():
    # Learning effect crossing 0: -10% at first, +20% later.
    rng = np.random.default_rng(4)
    cohort, treated, y = _simulate(rng, lambda a: 0.20 - 0.30 * np.exp(-a / 3), per_day=500)
    f = _run(cohort, treated, y, 21, CheckConfig())
    assert f.status == "warn" and f.statistics["classification"] == "growing", f.summary
    assert "primacy or learning" in f.summary
    assert f.statistics["converged"]["lower"] < 0.20 < f.statistics["converged"]["upper"]


def test_readme_documents_every_novelty_statistic():
    import re
    from pathlib import Path

    readme = (Path(__file__).parents[1] / "README.md").read_text(encoding="utf-8")
    line = next(ln for ln in readme.splitlines() if "`findings[].statistics` for `novelty`" in ln)
    documented = set(re.findall(r"`([a-z_0-9]+)`", line.split(":", 1)[1]))
    rng = np.random.default_rng(7)
    cohort, treated, y = _simulate(rng, lambda a: 0.02 + 0.30 * np.exp(-a / 3))
    for f in (_run(cohort, treated, y, 21, CheckConfig()), _run(cohort, treated, y, 14, CheckConfig())):
        st = f.statistics
        keys = set(st) | set(st["trend"]) | set(st["heterogeneity"]) | set(st["pooled"]) | set(st["converged"])
        keys |= set(st["ages"][0]) | set(st["calendar"] or {})
        assert keys <= documented, keys - documented
    assert f.status == "warn"
