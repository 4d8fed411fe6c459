"""monitor.stats.novelty: WLS age trend, Cochran's Q / I^2 / tau^2, the exponential
approach and the look-spending rule, against statsmodels and by simulation."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.meta_analysis import combine_effects

from monitor.config import CheckConfig
from monitor.stats import StatsError
from monitor.stats import novelty as nv

AGES = np.arange(14)


def _data(seed=0, k=14):
    rng = np.random.default_rng(seed)
    se = rng.uniform(0.01, 0.05, size=k)
    eff = 0.05 + 0.02 * np.exp(-np.arange(k) / 3) + rng.normal(0, 1, k) * se
    return eff, se


@pytest.mark.parametrize("log_age", [True, False])
def test_wls_trend_matches_statsmodels_wls(log_age):
    # Reference: statsmodels WLS (statsmodels.regression.linear_model.WLS), weights 1 / se^2.
    # statsmodels scales the covariance by the residual mean square; with known variances
    # (fixed-effect meta-regression) the standard error is bse / sqrt(scale).
    eff, se = _data(1)
    x = np.log1p(AGES) if log_age else AGES.astype(float)
    fit = sm.WLS(eff, sm.add_constant(x), weights=1 / se**2).fit()
    tr = nv.age_trend(eff, se, AGES, log_age=log_age)
    assert tr.slope[0] == pytest.approx(fit.params[1], rel=1e-10)
    assert tr.intercept[0] == pytest.approx(fit.params[0], rel=1e-10)
    assert tr.slope_se[0] == pytest.approx(fit.bse[1] / np.sqrt(fit.scale), rel=1e-10)
    # the residual Q after the trend is the weighted residual sum of squares
    assert tr.q_residual[0] == pytest.approx(fit.ssr, rel=1e-9)


def test_cochran_q_i2_tau2_match_statsmodels_combine_effects():
    # Reference: statsmodels.stats.meta_analysis.combine_effects (method_re="dl",
    # DerSimonian and Laird 1986); statsmodels leaves I^2 and tau^2 untruncated, we clip at 0.
    # Heterogeneous data (tau^2 > 0), so that statsmodels' random-effects weights are defined.
    for seed in range(5):
        eff, se = _data(seed)
        eff = eff + np.random.default_rng(seed + 10).normal(0, 0.05 + 0.01 * seed, eff.size)
        ref = combine_effects(eff, se**2, method_re="dl")
        assert ref.tau2 > 0
        tr = nv.age_trend(eff, se, AGES)
        assert tr.q[0] == pytest.approx(ref.q, rel=1e-10)
        assert tr.q_df[0] == ref.k - 1
        assert tr.pooled[0] == pytest.approx(ref.mean_effect_fe, rel=1e-10)
        assert tr.pooled_se[0] == pytest.approx(ref.sd_eff_w_fe, rel=1e-10)
        assert tr.tau2[0] == pytest.approx(max(ref.tau2, 0.0), abs=1e-14)
        assert tr.i2[0] == pytest.approx(max(ref.i2, 0.0), abs=1e-12)


def test_rows_are_independent_and_masked_ages_are_left_out():
    eff, se = _data(2)
    both = nv.age_trend(np.stack([eff, eff[::-1]]), np.stack([se, se[::-1]]), AGES)
    one = nv.age_trend(eff, se, AGES)
    assert both.slope[0] == pytest.approx(one.slope[0])
    mask = AGES < 10
    masked = nv.age_trend(eff, se, AGES, mask=mask)
    short = nv.age_trend(eff[:10], se[:10], AGES[:10])
    assert masked.slope[0] == pytest.approx(short.slope[0]) and masked.k[0] == 10
    assert masked.q[0] == pytest.approx(short.q[0])


def test_degenerate_rows_never_give_nan():
    tr = nv.age_trend([[0.1, 0.2, np.nan], [0.1, 0.1, 0.1]], [[0.01, 0.0, 0.01], [0.01, 0.01, 0.01]], [0, 1, 2])
    assert not tr.defined[0] and tr.p_value[0] == 1.0 and tr.k[0] == 1
    assert tr.defined[1] and tr.slope[1] == 0.0 and tr.q[1] == 0.0
    for f in ("slope", "slope_se", "z", "p_value", "q", "i2", "tau2", "pooled", "pooled_se"):
        assert np.all(np.isfinite(getattr(tr, f)))
    cv = nv.converged_effect([0.1, 0.2], [0.01, 0.01], [0, 1])
    assert not cv.defined[0] and cv.long_run[0] == pytest.approx(0.15) and cv.lower[0] < 0.15 < cv.upper[0]
    with pytest.raises(StatsError):
        nv.age_trend([0.1, 0.2], [0.1], [0, 1])
    with pytest.raises(StatsError):
        nv.converged_effect([0.1, 0.2, 0.3], [0.1] * 3, [0, 1, 2], alpha=1.5)


def test_covariance_diag_is_the_independent_case_and_sandwich_matches_simulation():
    # by construction: cov = diag(se^2) gives the independent standard errors; with an
    # exchangeable-plus-nested correlation the sandwich standard error of the slope matches
    # the Monte-Carlo spread of the WLS slope.
    eff, se = _data(3)
    plain = nv.age_trend(eff, se, AGES)
    diag = nv.age_trend(eff, se, AGES, cov=np.diag(se**2))
    assert diag.slope_se[0] == pytest.approx(plain.slope_se[0])
    # older ages share units: corr(a, b) = 0.3 * sqrt(n_b / n_a) for a < b (nested at-risk sets)
    n = np.linspace(20_000, 4_000, AGES.size)
    corr = 0.3 * np.sqrt(np.minimum.outer(n, n) / np.maximum.outer(n, n))
    np.fill_diagonal(corr, 1.0)
    cov = corr * np.outer(se, se)
    rng = np.random.default_rng(4)
    draws = rng.multivariate_normal(np.zeros(AGES.size), cov, size=20_000) + 0.05
    sims = nv.age_trend(draws, np.broadcast_to(se, draws.shape), AGES)
    sandwich = nv.age_trend(eff, se, AGES, cov=cov)
    # positive correlation that shrinks with age distance: the slope varies more than under independence...
    assert np.std(sims.slope) == pytest.approx(sandwich.slope_se[0], rel=0.03)
    assert sandwich.slope_se[0] > plain.slope_se[0]


def test_look_alpha_sums_to_alpha():
    k = np.arange(1, 200_001)
    assert nv.look_alpha(0.05, k).sum() == pytest.approx(0.05, rel=1e-4)
    assert nv.look_alpha(0.05, 1) == pytest.approx(0.05 * 6 / np.pi**2)


def test_no_budget_is_spent_on_looks_that_cannot_be_judged():
    # With the defaults (a look every 7 days, 7 usable ages needed) the day-7 look has at most
    # 6 complete ages (age a needs a + 1 whole days), so it is never judged: it must get no
    # budget, and the whole budget (still <= novelty_alpha in total) goes to judgeable looks.
    checks = CheckConfig()
    first = nv.first_judgeable_look(checks.novelty_look_days, checks.novelty_min_days)
    assert first == 2
    assert 7 * first - 1 >= checks.novelty_min_days > 7 * (first - 1) - 1
    k = np.arange(1, 200_001)
    spent = nv.look_alpha(checks.novelty_alpha, k, first=first)
    assert spent[0] == 0.0
    assert spent.sum() <= checks.novelty_alpha
    assert spent.sum() == pytest.approx(checks.novelty_alpha, rel=1e-4)
    # the first judged look now gets the largest share, 6 / pi^2 (about 61%) of the budget
    assert spent[1] == pytest.approx(checks.novelty_alpha * 6 / np.pi**2)
    # other settings: a daily look needs min_days + 1 days; a 28-day look is judged at once
    assert nv.first_judgeable_look(1, 7) == 8
    assert nv.first_judgeable_look(28, 7) == 1
    assert nv.first_judgeable_look(7, 13) == 2 and nv.first_judgeable_look(7, 14) == 3
    with pytest.raises(StatsError):
        nv.first_judgeable_look(0, 7)


@pytest.mark.slow
def test_constant_effect_trend_test_keeps_its_level():
    # Simulation (the guarantee by construction): a constant effect with independent normal
    # per-age errors is flagged at about the nominal rate of a two-sided z-test.
    rng = np.random.default_rng(5)
    se = np.broadcast_to(np.linspace(0.02, 0.06, 21), (20_000, 21))
    eff = 0.04 + rng.normal(0, 1, se.shape) * se
    tr = nv.age_trend(eff, se, np.arange(21))
    for alpha in (0.05, 0.01):
        rate = np.mean(tr.p_value < alpha)
        assert rate == pytest.approx(alpha, abs=4 * np.sqrt(alpha / 20_000) + 0.002)
    # Q is chi-square on k - 1 df under homogeneity (Cochran 1954)
    assert np.mean(tr.q_p_value < 0.05) == pytest.approx(0.05, abs=0.006)


@pytest.mark.slow
def test_planted_exponential_fade_is_detected_and_long_run_is_covered():
    # Simulation: effect(a) = 0.01 + 0.14 exp(-a / 3) (a fading novelty effect), per-age
    # standard errors 2-4 points, 21 ages. The trend is detected and the 95% interval of the
    # long-run value covers the true 0.01 in at least 93% of runs (the profile union is
    # conservative; measured about 99%).
    rng = np.random.default_rng(6)
    ages = np.arange(21)
    truth = 0.01 + 0.14 * np.exp(-ages / 3)
    se = np.broadcast_to(np.linspace(0.02, 0.04, 21), (2_000, 21))
    eff = truth + rng.normal(0, 1, se.shape) * se
    tr = nv.age_trend(eff, se, ages)
    assert np.mean(tr.p_value < 1e-4) > 0.95
    assert np.all(tr.slope[tr.p_value < 1e-4] < 0)
    cv = nv.converged_effect(eff, se, ages)
    cover = np.mean((cv.lower <= 0.01) & (0.01 <= cv.upper))
    assert cover >= 0.93
    assert np.median(cv.long_run) == pytest.approx(0.01, abs=0.01)
    assert np.median(cv.early) == pytest.approx(0.15, abs=0.02)
    assert 2.0 <= np.median(cv.tau) <= 4.5
    # stabilised within 1 point: 0.14 exp(-a / 3) <= 0.01 from a = 3 ln 14 = 7.9, so about day 8
    assert 5 <= np.median(cv.stabilised_after) <= 11 and np.mean(cv.stabilised) > 0.9
