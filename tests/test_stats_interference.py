"""Interference statistics against outside references and by simulation.

* WLS trend: statsmodels ``WLS`` (coefficients equal; with known variances the
  standard errors are WLS's divided by sqrt(scale)).
* Cochran's Q: statsmodels ``combine_effects`` (fixed-effect Q and I^2), and the
  textbook identity that Q splits into the model and residual parts
  (Borenstein et al., "Introduction to Meta-Analysis", Wiley 2009, ch. 20).
* Chi-square independence: ``scipy.stats.chi2_contingency(correction=False)``.
* Interaction Wald test: the interaction coefficient of a saturated OLS fit with
  HC2 standard errors (statsmodels), which in a saturated model equal the cell
  variances s^2 / n (MacKinnon and White, "Some heteroskedasticity-consistent
  covariance matrix estimators with improved finite sample properties", Journal
  of Econometrics 29, 1985 -- HC2 is unbiased under heteroskedasticity when the
  design is balanced within cells; recalled from memory).
* The delta-method relative change: coverage of the true change by seeded simulation.
* Simulations: a constant effect across ramp phases is flagged at about alpha; a
  share-dependent effect is found; two independently hashed, interaction-free
  experiments stay quiet at the nominal rate, also when both ramp at once (where
  a pooled chi-square would fire).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from monitor.stats import StatsError
from monitor.stats.interference import (
    effect_trend,
    independence_chi2,
    interaction_wald,
    ratio_change,
)


def test_trend_matches_statsmodels_wls():
    rng = np.random.default_rng(3)
    for _ in range(20):
        k = int(rng.integers(2, 7))
        x = rng.uniform(0.05, 0.6, k)
        se = rng.uniform(0.01, 0.08, k)
        y = 0.2 - 0.3 * x + rng.normal(0, se)
        r = effect_trend(y, se, x)
        fit = sm.WLS(y, sm.add_constant(x), weights=1 / se**2).fit()
        assert r.intercept == pytest.approx(fit.params[0], rel=1e-9, abs=1e-12)
        assert r.slope == pytest.approx(fit.params[1], rel=1e-9, abs=1e-12)
        if k > 2:
            scale = np.sqrt(fit.scale)
            assert r.slope_se == pytest.approx(fit.bse[1] / scale, rel=1e-9)
            assert r.intercept_se == pytest.approx(fit.bse[0] / scale, rel=1e-9)
            # residual Q is WLS's weighted residual sum of squares
            assert r.q_residual == pytest.approx(fit.ssr, rel=1e-8)
        fitted, fitted_se = r.predict(0.8)
        assert fitted == pytest.approx(fit.params[0] + 0.8 * fit.params[1], rel=1e-9, abs=1e-12)
        if k > 2:
            pred = fit.get_prediction(np.array([[1.0, 0.8]]))
            assert fitted_se == pytest.approx(pred.se_mean[0] / np.sqrt(fit.scale), rel=1e-8)


def test_cochran_q_matches_statsmodels_meta_analysis():
    y = np.array([-0.41, -0.33, -0.26, -0.30])
    se = np.array([0.03, 0.025, 0.02, 0.04])
    r = effect_trend(y, se, [0.1, 0.25, 0.5, 0.5])
    res = combine_effects(y, se**2, method_re="chi2")
    assert r.q == pytest.approx(res.q, rel=1e-10)
    assert r.q_df == 3
    assert r.pooled == pytest.approx(res.mean_effect_fe, rel=1e-10)
    assert r.pooled_se == pytest.approx(res.sd_eff_w_fe, rel=1e-10)
    assert r.i2 == pytest.approx(res.i2, rel=1e-10)
    assert r.q_p_value == pytest.approx(stats.chi2.sf(res.q, 3), rel=1e-10)
    # Q = model part + residual part (Borenstein et al. 2009, ch. 20)
    assert r.q == pytest.approx(r.z**2 + r.q_residual, rel=1e-10)


def test_trend_edge_cases_are_finite_and_undefined():
    r = effect_trend([[0.1, 0.2], [0.1, 0.2], [0.3, 0.0]], [[0.01, 0.0], [0.01, 0.02], [0.01, 0.01]],
                     [[0.1, 0.5], [0.3, 0.3], [0.2, 0.4]])
    assert list(r.defined) == [False, False, True]  # one usable estimate; one covariate value
    for f in ("slope", "slope_se", "p_value", "q", "i2"):
        assert np.all(np.isfinite(getattr(r, f)))
    assert r.p_value[0] == 1.0 and r.p_value[1] == 1.0
    with pytest.raises(StatsError):
        effect_trend(0.1, 0.1, 0.1)


def test_chi2_matches_scipy_chi2_contingency():
    rng = np.random.default_rng(5)
    for shape in ((2, 2), (2, 3), (3, 3), (4, 2)):
        for _ in range(10):
            t = rng.integers(0, 60, shape).astype(float)
            t[0, 0] += 5
            r = independence_chi2(t[None])
            nz = t[t.sum(axis=1) > 0][:, t.sum(axis=0) > 0]
            chi, p, dof, _ = stats.chi2_contingency(nz, correction=False)
            assert r.chi2 == pytest.approx(chi, rel=1e-10)
            assert r.df == dof
            assert r.p_value == pytest.approx(p, rel=1e-9)
    # strata add up; an empty row (a variant without units) drops out of the degrees of freedom
    a, b = np.array([[30, 10], [12, 28.0]]), np.array([[5, 7, 0], [9, 3, 0], [0, 0, 0]])
    pad = np.zeros((2, 3, 3))
    pad[0, :2, :2], pad[1] = a, b
    r = independence_chi2(pad)
    assert r.chi2 == pytest.approx(stats.chi2_contingency(a, correction=False)[0]
                                   + stats.chi2_contingency(b[:2, :2], correction=False)[0], rel=1e-10)
    assert r.df == 2
    assert independence_chi2(np.zeros((1, 2, 2))).p_value == 1.0
    with pytest.raises(StatsError):
        independence_chi2(np.array([[1.0, -1.0], [1.0, 1.0]])[None])


def test_interaction_matches_saturated_ols_with_hc2():
    rng = np.random.default_rng(11)
    for R, C in ((2, 2), (3, 2), (2, 3)):
        a = rng.integers(0, R, 3000)
        b = rng.integers(0, C, 3000)
        y = rng.gamma(1.0 + a + 0.5 * b, 2.0)  # heteroskedastic cells, no interaction by construction...
        y += 0.8 * (a == R - 1) * (b == C - 1)  # ...plus one planted interaction
        mean = np.array([[y[(a == i) & (b == j)].mean() for j in range(C)] for i in range(R)])
        var = np.array([[y[(a == i) & (b == j)].var(ddof=1) / ((a == i) & (b == j)).sum() for j in range(C)]
                        for i in range(R)])
        res = interaction_wald(mean, var)
        # saturated OLS on dummies: main effects and all interactions
        cols = [np.ones_like(y)] + [(a == i).astype(float) for i in range(1, R)] + [(b == j).astype(float) for j in range(1, C)]
        inter = [(a == i) * (b == j) * 1.0 for i in range(1, R) for j in range(1, C)]
        X = np.column_stack(cols + inter)
        fit = sm.OLS(y, X).fit(cov_type="HC2")
        k = len(cols)
        np.testing.assert_allclose(res.contrast.ravel(), fit.params[k:], rtol=1e-9)
        np.testing.assert_allclose(res.contrast_se.ravel(), fit.bse[k:], rtol=1e-9)
        wald = fit.wald_test(np.eye(X.shape[1])[k:], scalar=True, use_f=False)
        assert res.wald == pytest.approx(float(wald.statistic), rel=1e-8)
        assert res.df == (R - 1) * (C - 1)


def test_ratio_change_covers_the_true_change():
    """Seeded simulation: the 95% interval of the delta-method relative change of a
    paired ratio covers the true value in about 95% of 400 runs (binomial band)."""
    rng = np.random.default_rng(21)
    true = 1.12 / 1.0 - 1
    hits = 0
    runs = 400
    for _ in range(runs):
        n = 1500
        act = rng.gamma(0.9, 1 / 0.9, n)
        x = rng.poisson(2 * act)
        cx = rng.poisson(2 * act)
        y = rng.gamma(2.0, 15.0 * 1.12, (n, 1)).ravel() * x  # per-unit wait total with mean 30*1.12 per event
        cy = rng.gamma(2.0, 15.0, n) * cx
        V = np.stack([y, x, cy, cx], axis=-1).astype(float)
        r = ratio_change(n, V.sum(axis=0), V.T @ V)
        hits += abs(float(r.estimate) - true) <= 1.96 * float(r.se)
    lo, hi = stats.binom.ppf([0.0005, 0.9995], runs, 0.95)
    assert lo <= hits <= hi


@pytest.mark.slow
def test_constant_effect_across_phases_flags_at_about_alpha_and_a_share_trend_is_found():
    """Ramp 10% -> 25% -> 50% with a constant effect: the share-trend test rejects in
    about alpha of runs. With the effect shrinking with the share (shared resource) it
    rejects in most runs. Per-phase estimates are simulated from their sampling
    distribution (normal, known SE), as the check receives them."""
    rng = np.random.default_rng(2)
    shares = np.array([0.1, 0.25, 0.5])
    se = np.array([0.03, 0.022, 0.015])
    runs = 4000
    y0 = -0.3 + rng.normal(0, se, (runs, 3))
    r0 = effect_trend(y0, se, shares)
    alpha = 0.05
    rate = float(np.mean(r0.p_value < alpha))
    band = 3 * np.sqrt(alpha * (1 - alpha) / runs)
    assert abs(rate - alpha) < band, rate
    y1 = -0.6 / (1 + 0.6 * shares) * (1 - shares) + rng.normal(0, se, (runs, 3))  # shrinks with the share
    r1 = effect_trend(y1, se, shares)
    assert float(np.mean(r1.p_value < 0.001)) > 0.9


@pytest.mark.slow
def test_independent_interaction_free_pairs_stay_quiet_at_the_nominal_rate():
    """Two experiments hashed independently, ramping at the same time (both 10% -> 50% at
    the same moment, so each unit's two variants both depend on when it arrived): the
    stratified chi-square rejects at about alpha, the pooled one far more often; the
    interaction Wald test on an additive guardrail rejects at about alpha."""
    rng = np.random.default_rng(9)
    runs, n, alpha = 1000, 4000, 0.05
    p_strat, p_pool, p_int = [], [], []
    for _ in range(runs):
        late = rng.random(n) < 0.5  # arrived in phase 2
        share = np.where(late, 0.5, 0.1)
        va = (rng.random(n) < share).astype(int)
        vb = (rng.random(n) < share).astype(int)
        t = np.zeros((2, 2, 2))
        np.add.at(t, (late.astype(int), va, vb), 1)
        p_strat.append(float(independence_chi2(t).p_value))
        p_pool.append(float(independence_chi2(t.sum(axis=0)[None]).p_value))
        y = rng.exponential(2.0 + 0.3 * va + 0.2 * vb, n)  # main effects only, on the mean scale
        mean = np.array([[y[(va == i) & (vb == j)].mean() for j in (0, 1)] for i in (0, 1)])
        var = np.array([[y[(va == i) & (vb == j)].var(ddof=1) / ((va == i) & (vb == j)).sum() for j in (0, 1)]
                        for i in (0, 1)])
        p_int.append(float(interaction_wald(mean, var).p_value))
    band = 3 * np.sqrt(alpha * (1 - alpha) / runs)
    assert abs(np.mean(np.array(p_strat) < alpha) - alpha) < band
    assert abs(np.mean(np.array(p_int) < alpha) - alpha) < band
    assert np.mean(np.array(p_pool) < alpha) > 0.5  # why the test is stratified by phase


def test_stratified_interaction_pools_strata_like_a_fixed_effect_meta_analysis():
    # reference: statsmodels.stats.meta_analysis.combine_effects, fixed-effect (inverse-variance)
    # pooling (W. G. Cochran, Biometrics 10(1), 1954); for a 2 x 2 table each stratum gives one
    # contrast m11 - m10 - m01 + m00 with variance v11 + v10 + v01 + v00
    from statsmodels.stats.meta_analysis import combine_effects

    from monitor.stats.interference import interaction_wald, stratified_interaction_wald

    rng = np.random.default_rng(9)
    mean = rng.normal(1.0, 0.3, size=(4, 2, 2))
    var = rng.uniform(0.01, 0.05, size=(4, 2, 2))
    res = stratified_interaction_wald(mean, var)
    eff = mean[:, 1, 1] - mean[:, 1, 0] - mean[:, 0, 1] + mean[:, 0, 0]
    ref = combine_effects(eff, var.sum(axis=(1, 2)), use_t=False)
    assert res.contrast[0, 0] == pytest.approx(ref.mean_effect_fe, rel=1e-10)
    assert res.contrast_se[0, 0] ** 2 == pytest.approx(ref.var_eff_w_fe, rel=1e-10)
    assert res.wald == pytest.approx(ref.mean_effect_fe**2 / ref.var_eff_w_fe, rel=1e-10)
    # one stratum: the unstratified test; a stratum with a zero variance is left out
    one = stratified_interaction_wald(mean[:1], var[:1])
    plain = interaction_wald(mean[0], var[0])
    assert one.wald == pytest.approx(plain.wald) and one.p_value == pytest.approx(plain.p_value)
    var3 = var.copy()
    var3[1:, 0, 0] = 0.0
    assert stratified_interaction_wald(mean, var3).wald == pytest.approx(plain.wald)
    # a 3 x 3 table: two strata of the same cells equal one stratum with halved variances
    m3, v3 = rng.normal(size=(3, 3)), rng.uniform(0.1, 0.2, size=(3, 3))
    twice = stratified_interaction_wald(np.stack([m3, m3]), np.stack([v3, v3]))
    half = interaction_wald(m3, v3 / 2)
    np.testing.assert_allclose(twice.contrast, half.contrast)
    assert twice.wald == pytest.approx(half.wald) and int(twice.df) == 4
    assert not bool(stratified_interaction_wald(mean, np.zeros_like(var)).defined)
