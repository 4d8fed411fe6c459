"""The confidence sequence of the relative difference keeps its time-uniform promise.

The relative sequence (:mod:`monitor.stats.effects`, Fieller inversion of the contrast
sequences) is checked here on the metrics where a delta-method interval at the estimated means
fails: heavy-tailed, zero-inflated and rare-event metrics.

The A/A studies are seeded and bounded for CI (``EXPWATCH_AA_RUNS`` runs per metric, default
300, about 2 s in all). The full study of 2,000 runs per metric::

    EXPWATCH_AA_RUNS=2000 .venv/bin/python -m pytest tests/test_stats_relative_cs.py -q -s

prints the measured rates with their Clopper-Pearson intervals.
"""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
from scipy import stats

from monitor.stats.effects import (
    compare_means,
    compare_proportions,
    compare_ratios,
    guardrail_status,
    moments,
    proportion_moments,
    ratio_moments,
)

RUNS = int(os.environ.get("EXPWATCH_AA_RUNS", "300"))
LOOKS, PER_LOOK, ALPHA = 100, 100, 0.05


def _rate_ci(hits: int, runs: int) -> tuple[float, float]:
    """Clopper-Pearson 95% interval of a measured rate (C. J. Clopper and E. S. Pearson, "The use
    of confidence or fiducial limits illustrated in the case of the binomial", Biometrika 26(4),
    1934), via scipy.stats.binomtest."""
    ci = stats.binomtest(hits, runs).proportion_ci(0.95, method="exact")
    return ci.low, ci.high


def test_minimal_case_no_relative_alarm_where_the_difference_has_none() -> None:
    # 1,000 readers per variant; 65 control vs 35 treatment readers each spend 10 (all others 0).
    # The difference's sequence contains 0 and its e-value (11.8) is below 1 / alpha = 20, so no
    # guardrail may alert in either direction; a delta-method interval at the estimated means
    # gave [-83%, -9%] (an alert on "decrease is bad"), and nothing with the arms swapped.
    for (yc, yt) in ((650.0, 350.0), (350.0, 650.0)):
        est = compare_means(moments(1000, yc, 10 * yc), moments(1000, yt, 10 * yt))
        assert est.cs_lower < 0 < est.cs_upper
        assert est.e_value.item() == pytest.approx(11.8, abs=0.05)
        assert est.rel_bounded
        assert est.rel_cs_lower < 0 < est.rel_cs_upper
        for bad in ("decrease", "increase"):
            g = guardrail_status(est.rel_cs_lower, est.rel_cs_upper, bad, margin=0.02,
                                 defined=est.rel_defined & est.rel_bounded)
            assert g.status.item() == "ok"


def test_relative_sequence_is_the_set_of_ratios_no_contrast_sequence_rejects() -> None:
    # Fieller's construction (E. C. Fieller, "Some problems in interval estimation", JRSS B
    # 16(2), 1954): the interval is exactly the set of theta with
    # |m_t - theta m_c| <= k sqrt(v_t + theta^2 v_c); checked here by brute force over a grid,
    # and the duality with the difference's sequence at theta = 1.
    rng = np.random.default_rng(5)
    n = rng.integers(50, 5000, size=(200, 2)).astype(float)
    mean = rng.uniform(0.5, 3.0, size=(200, 2))
    sd = rng.uniform(0.5, 6.0, size=(200, 2))
    est = compare_means(
        moments(n[:, 0], n[:, 0] * mean[:, 0], (n[:, 0] - 1) * sd[:, 0] ** 2 + n[:, 0] * mean[:, 0] ** 2),
        moments(n[:, 1], n[:, 1] * mean[:, 1], (n[:, 1] - 1) * sd[:, 1] ** 2 + n[:, 1] * mean[:, 1] ** 2),
    )
    vc, vt = sd[:, 0] ** 2 / n[:, 0], sd[:, 1] ** 2 / n[:, 1]
    k = (est.cs_upper - est.cs_lower) / 2 / np.sqrt(vc + vt)
    for i in np.flatnonzero(est.rel_bounded)[:60]:
        theta = 1.0 + np.linspace(est.rel_cs_lower[i] - 0.5, est.rel_cs_upper[i] + 0.5, 4001)
        inside = np.abs(mean[i, 1] - theta * mean[i, 0]) <= k[i] * np.sqrt(vt[i] + theta**2 * vc[i])
        got = theta[inside] - 1.0
        step = theta[1] - theta[0]
        assert got.min() == pytest.approx(est.rel_cs_lower[i], abs=step)
        assert got.max() == pytest.approx(est.rel_cs_upper[i], abs=step)
    excludes_rel = (est.rel_cs_lower > 0) | (est.rel_cs_upper < 0)
    excludes_diff = (est.cs_lower > 0) | (est.cs_upper < 0)
    b = est.rel_bounded
    np.testing.assert_array_equal(excludes_rel[b], excludes_diff[b])
    assert excludes_rel[b].any() and (~excludes_rel[b]).any()


def test_control_not_bounded_away_from_zero_gives_no_relative_bound() -> None:
    # 3 events in 1,000 control units: the control's own sequence contains 0, so no ratio can be
    # bounded; the fields are placeholders and row() reports None
    est = compare_proportions(proportion_moments(1000, 3), proportion_moments(1000, 9))
    assert est.rel_defined and not est.rel_bounded
    row = est.row(())
    assert row["rel_cs_lower"] is None and row["rel_cs_upper"] is None
    assert row["rel"] == pytest.approx(2.0)


def _cumulative(rng: np.random.Generator, kind: str, runs: int) -> tuple[np.ndarray, ...]:
    """Per arm, cumulative (n, sum_y, sum_y2) at LOOKS looks of PER_LOOK new units per arm."""
    out = []
    for _arm in range(2):
        n = np.broadcast_to(np.arange(1, LOOKS + 1) * float(PER_LOOK), (runs, LOOKS))
        if kind.startswith("p="):
            s = rng.binomial(PER_LOOK, float(kind[2:]), size=(runs, LOOKS)).cumsum(1).astype(float)
            out.append((n, s, s))
            continue
        y = rng.lognormal(0.0, 2.0, size=(runs, LOOKS, PER_LOOK))
        if kind == "revenue":  # 95% of readers spend nothing; the others a lognormal amount
            y = np.where(rng.random(y.shape) < 0.05, rng.lognormal(2.0, 1.0, size=y.shape), 0.0)
        out.append((n, y.sum(-1).cumsum(1), (y * y).sum(-1).cumsum(1)))
    return tuple(out)


@pytest.mark.parametrize("kind", ["lognormal", "revenue", "p=0.01", "p=0.002"])
def test_relative_sequence_time_uniform_coverage_aa(kind: str) -> None:
    # reference: the time-uniform guarantee of the asymptotic confidence sequence, I.
    # Waudby-Smith, D. Arbour, R. Sinha, E. H. Kennedy and A. Ramdas, "Time-uniform central limit
    # theory and asymptotic confidence sequences", Annals of Statistics 52(6), 2024, Theorem 2.2:
    # in A/A runs the chance that the sequence *ever* excludes 0 over 100 looks is at most alpha.
    # Metrics: lognormal sigma = 2; revenue with 95% zeros; proportions 0.01 and 0.002.
    rng = np.random.default_rng(1700 + len(kind))
    (nc, yc, y2c), (nt, yt, y2t) = _cumulative(rng, kind, RUNS)
    if kind.startswith("p="):
        est = compare_proportions(proportion_moments(nc, yc), proportion_moments(nt, yt))
    else:
        est = compare_means(moments(nc, yc, y2c), moments(nt, yt, y2t))
    judged = est.rel_defined & est.rel_bounded
    rel_miss = judged & ((est.rel_cs_lower > 0) | (est.rel_cs_upper < 0))
    hits = int(rel_miss.any(axis=1).sum())
    diff_hits = int(((est.cs_lower > 0) | (est.cs_upper < 0)).any(axis=1).sum())
    low, high = _rate_ci(hits, RUNS)
    print(f"\n{kind}: relative CS ever excludes 0 in {hits}/{RUNS} = {hits / RUNS:.3f} "
          f"(95% CI {low:.3f}-{high:.3f}); difference CS {diff_hits / RUNS:.3f}")
    # within budget: the whole 95% interval of the measured rate lies below alpha
    assert high <= ALPHA
    # and never more often than the difference's own sequence (they agree at 0 where bounded)
    assert hits <= diff_hits
    # the sequence is informative: it is bounded at the last look in most runs
    assert judged[:, -1].mean() > 0.9


def test_relative_sequence_covers_a_true_lift_time_uniformly() -> None:
    # reference: as above (Waudby-Smith et al. 2024, Theorem 2.2), now at a true relative lift
    # of +10% in a ratio metric (pages per session) and a skewed mean; the sequence must
    # contain the true lift at every look in at least 1 - alpha of runs (3 SD allowance).
    rng = np.random.default_rng(17)
    runs, looks, per = 400, 30, 200
    lift = 0.10
    n = np.broadcast_to(np.arange(1, looks + 1) * float(per), (runs, looks))
    arms = []
    for scale in (1.0, 1.0 + lift):
        x = rng.poisson(2.0, size=(runs, looks, per)) + 1.0  # sessions per reader
        y = rng.gamma(0.5, 4.0 * scale, size=x.shape) * x  # pages per reader
        cum = [a.sum(-1).cumsum(1) for a in (y, y * y, x, x * x, x * y)]
        arms.append(ratio_moments(n, *cum))
    est = compare_ratios(*arms)
    miss = est.rel_bounded & ((est.rel_cs_lower > lift) | (est.rel_cs_upper < lift))
    rate = miss.any(axis=1).mean()
    assert rate <= ALPHA + 3 * math.sqrt(ALPHA * (1 - ALPHA) / runs)
