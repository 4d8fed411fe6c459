"""Tests for monitor.stats.diagnosis (SRM diagnosis statistics).

External references used below:
* scipy.stats.chisquare / chi2_contingency / multinomial / contingency.association;
* statsmodels.stats.multitest.multipletests(method="holm"),
  statsmodels.stats.contingency_tables.Table.standardized_resids,
  statsmodels.stats.proportion.proportions_ztest;
* stated guarantees checked by seeded simulation on scenarios whose answer is known
  by construction (fictional e-book lending app data).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.stats.contingency import association
from statsmodels.stats.contingency_tables import Table
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportions_ztest

from monitor.stats import StatsError
from monitor.stats.diagnosis import (
    SMD_THRESHOLD,
    categorical_balance,
    diagnose_slices,
    diagnose_stages,
    fold_small_slices,
    holm_adjust,
    locate_onset,
    numeric_balance,
)

HALF = np.array([0.5, 0.5])


def assert_all_finite(result) -> None:
    """Every numeric attribute of a result dataclass is finite (no NaN/inf escapes)."""
    for field in dataclasses.fields(result):
        value = getattr(result, field.name)
        if value is None or isinstance(value, str):
            continue
        arr = np.asarray(value, dtype=float) if not isinstance(value, tuple) or value else np.zeros(0)
        assert np.all(np.isfinite(arr)), field.name


def simulate_hours(rng, *, hours=168, onset=100, per_hour=400, share_after=0.46):
    """Hourly (control, treatment) counts; the treatment share drops at ``onset``."""
    n = rng.poisson(per_hour, hours)
    p = np.where(np.arange(hours) < onset, 0.5, share_after)
    t = rng.binomial(n, p)
    return np.column_stack([n - t, t])


# ---------------------------------------------------------------------------
# Holm
# ---------------------------------------------------------------------------


def test_holm_matches_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="holm"); Holm (1979).
    rng = np.random.default_rng(1)
    p = np.concatenate([rng.uniform(size=40), rng.uniform(0, 1e-4, 5), [0.0, 1.0, 0.03, 0.03]])
    rng.shuffle(p)
    expected = multipletests(p, method="holm")[1]
    np.testing.assert_allclose(holm_adjust(p), expected, rtol=0, atol=1e-12)


@settings(max_examples=20, deadline=None)
@given(st.lists(st.floats(0.0, 1.0), min_size=1, max_size=30))
def test_holm_matches_statsmodels_property(p):
    # Reference: statsmodels.stats.multitest.multipletests(method="holm").
    np.testing.assert_allclose(holm_adjust(p), multipletests(p, method="holm")[1], atol=1e-12)


def test_holm_edge_and_errors():
    assert holm_adjust([]).shape == (0,)
    with pytest.raises(StatsError):
        holm_adjust([0.2, 1.5])
    with pytest.raises(StatsError):
        holm_adjust([np.nan])


# ---------------------------------------------------------------------------
# 1. onset in time
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("model", ["onset", "two_segment"])
def test_profile_matches_bruteforce_multinomial_likelihood(model):
    # Reference: scipy.stats.multinomial.logpmf summed per period; the change-point
    # profile likelihood of Hinkley, Biometrika 1970, evaluated by brute force.
    rng = np.random.default_rng(7)
    w = np.array([0.25, 0.25, 0.5])
    n = rng.poisson(60, 12)
    x = np.array([rng.multinomial(ni, w if t < 7 else [0.3, 0.25, 0.45]) for t, ni in enumerate(n)])

    def seg_loglik(rows, p):
        return sum(stats.multinomial.logpmf(r, r.sum(), p) for r in rows)

    def mle(rows):
        tot = rows.sum(axis=0)
        return tot / tot.sum()

    if model == "onset":
        null = seg_loglik(x, w)
        brute = [seg_loglik(x[:tau], w) + seg_loglik(x[tau:], mle(x[tau:])) - null for tau in range(12)]
    else:
        null = seg_loglik(x, mle(x))
        brute = [0.0] + [
            seg_loglik(x[:tau], mle(x[:tau])) + seg_loglik(x[tau:], mle(x[tau:])) - null
            for tau in range(1, 12)
        ]
    res = locate_onset(x, w, model=model)
    np.testing.assert_allclose(res.profile, brute, atol=1e-8)
    assert res.onset == int(np.argmax(brute))
    assert res.llr == pytest.approx(max(brute))


@pytest.mark.parametrize("model", ["onset", "two_segment"])
def test_step_change_located_and_band_covers(model):
    # Known by construction: the treatment share drops from 0.50 to 0.46 at hour 100
    # of 168 (about 400 units/hour). The band is Hinkley's (Biometrika 1970)
    # likelihood set with the chi2(1, 0.95)/2 cut-off; its coverage is only nominal,
    # so we require >= 85% (measured about 92-93% over these 400 seeds).
    runs, near, covered = 400, 0, 0
    for seed in range(runs):
        res = locate_onset(simulate_hours(np.random.default_rng(seed)), HALF, model=model)
        near += abs(res.onset - 100) <= 3
        covered += res.band[0] <= 100 <= res.band[1]
    assert near / runs >= 0.85
    assert covered / runs >= 0.85


def test_onset_result_fields():
    x = simulate_hours(np.random.default_rng(3), share_after=0.40)
    res = locate_onset(x, HALF)
    assert res.model == "onset"
    assert abs(res.onset - 100) <= 2
    lo, hi = res.band
    assert lo <= res.onset <= hi
    assert res.shares_before[1] == pytest.approx(x[: res.onset, 1].sum() / x[: res.onset].sum())
    assert res.shares_after[1] == pytest.approx(0.40, abs=0.01)
    assert res.units_before + res.units_after == x.sum()
    # a wider nominal level gives a band that contains the narrower one
    wide = locate_onset(x, HALF, band_level=0.99)
    assert wide.band[0] <= lo and wide.band[1] >= hi
    with pytest.raises(AttributeError):
        res.onset = 3  # frozen
    with pytest.raises(ValueError):
        res.profile[0] = 1.0  # read-only array
    assert_all_finite(res)


def test_cusum_matches_binomial_z_test():
    # Reference: statsmodels.stats.proportion.proportions_ztest with prop_var=0.5 is
    # the one-sample binomial z of the cumulative treatment share against 0.5.
    x = simulate_hours(np.random.default_rng(11))
    res = locate_onset(x, HALF)
    np.testing.assert_allclose(res.cusum.sum(axis=1), 0.0, atol=1e-9)
    for t in (10, 99, 167):
        cum_t, cum_n = x[: t + 1, 1].sum(), x[: t + 1].sum()
        z, _ = proportions_ztest(cum_t, cum_n, value=0.5, prop_var=0.5)
        assert res.cusum_z[t, 1] == pytest.approx(z, rel=1e-9)
        assert res.cusum[t, 1] == pytest.approx(cum_t - 0.5 * cum_n)


def test_onset_skips_empty_hours():
    # Known by construction: hours 50-54 carry no units, so onsets 50..55 tie
    # exactly; the documented rule picks the first hour that has units.
    x = np.tile([[300, 300]], (120, 1)).astype(float)
    x[50:55] = 0
    x[55:] = [360, 240]
    assert locate_onset(x, HALF).onset == 55
    assert locate_onset(x, HALF, model="two_segment").onset == 55


@pytest.mark.parametrize(
    "counts,weights",
    [
        (np.zeros((0, 2)), HALF),
        ([], HALF),
        (np.zeros((24, 2)), HALF),
        (np.full((24, 1), 50.0), [1.0]),
        (np.tile([[100, 100]], (24, 1)), HALF),
        (np.tile([[101, 202, 303]], (24, 1)), [1, 2, 3]),  # exactly the design, unequal weights
    ],
)
def test_onset_degenerate_inputs(counts, weights):
    res = locate_onset(counts, weights)
    assert res.onset is None and res.band is None and res.llr == 0.0
    np.testing.assert_allclose(res.shares_after, np.asarray(weights) / np.sum(weights))
    assert_all_finite(res)


@pytest.mark.parametrize(
    "kwargs",
    [
        dict(counts=[[1, 2]], weights=[0.5, 0.5, 0.0]),
        dict(counts=[[1, 2, 3]], weights=[0.5, 0.5]),
        dict(counts=[[1, -2]], weights=[0.5, 0.5]),
        dict(counts=[[1, np.nan]], weights=[0.5, 0.5]),
        dict(counts=[1, 2], weights=[0.5, 0.5]),
        dict(counts=[[1, 2]], weights=[0.5, 0.5], model="linear"),
        dict(counts=[[1, 2]], weights=[0.5, 0.5], band_level=1.5),
    ],
)
def test_onset_bad_input(kwargs):
    with pytest.raises(StatsError):
        locate_onset(**kwargs)


# ---------------------------------------------------------------------------
# 2. segment slices
# ---------------------------------------------------------------------------


def simulate_slices(rng, *, n_slices=30, bad=17, bad_share=0.40):
    units = rng.integers(800, 4000, n_slices)
    units[bad] = 6000
    p = np.full(n_slices, 0.5)
    p[bad] = bad_share
    t = rng.binomial(units, p)
    return np.column_stack([units - t, t])


def test_slice_tests_match_scipy_and_statsmodels():
    # References: scipy.stats.chisquare (per-slice and pooled Pearson tests);
    # statsmodels multipletests(method="holm") over the non-empty slices.
    rng = np.random.default_rng(5)
    w = np.array([0.2, 0.3, 0.5])
    x = np.array([rng.multinomial(n, w) for n in rng.integers(100, 900, 12)]).astype(float)
    x[4] = 0  # an empty slice
    res = diagnose_slices(x, w)
    nonempty = np.flatnonzero(x.sum(axis=1) > 0)
    for s in nonempty:
        ref = stats.chisquare(x[s], x[s].sum() * w)
        assert res.chi2[s] == pytest.approx(ref.statistic)
        assert res.p_value[s] == pytest.approx(ref.pvalue)
    assert res.chi2[4] == 0.0 and res.p_value[4] == 1.0 and res.p_holm[4] == 1.0
    np.testing.assert_allclose(res.p_holm[nonempty], multipletests(res.p_value[nonempty], method="holm")[1])
    tot = x.sum(axis=0)
    ref = stats.chisquare(tot, tot.sum() * w)
    assert res.pooled_chi2 == pytest.approx(ref.statistic)
    assert res.pooled_p_value == pytest.approx(ref.pvalue)
    # exact additive decomposition (by construction of the contribution)
    assert res.contribution.sum() == pytest.approx(res.pooled_chi2)
    assert res.df == 2
    assert_all_finite(res)


@pytest.mark.parametrize("seed", range(10))
def test_mismatch_in_one_of_30_slices_is_isolated(seed):
    # Known by construction: only slice 17 (6000 units) has a treatment share of 0.40.
    x = simulate_slices(np.random.default_rng(seed))
    res = diagnose_slices(x, HALF, level=0.001)
    assert res.pooled_p_value < 0.001
    assert res.removed == (17,)
    assert res.consistent and res.remainder_p_value >= 0.001
    assert int(np.argmax(res.contribution)) == 17
    assert res.p_holm[17] < 0.001


def test_spread_mismatch_needs_many_removals_and_max_removed():
    # Known by construction: every slice has share 0.48, so no single slice explains it.
    rng = np.random.default_rng(2)
    units = rng.integers(3000, 5000, 30)
    t = rng.binomial(units, 0.48)
    x = np.column_stack([units - t, t])
    res = diagnose_slices(x, HALF)
    assert len(res.removed) > 5
    assert len(res.remainder_p_values) == len(res.removed)
    capped = diagnose_slices(x, HALF, max_removed=2)
    assert len(capped.removed) == 2 and not capped.consistent
    assert capped.remainder_p_value == capped.remainder_p_values[-1] < 0.001


def test_consistent_slices_remove_nothing():
    x = simulate_slices(np.random.default_rng(4), bad_share=0.5)
    res = diagnose_slices(x, HALF)
    assert res.removed == () and res.consistent
    assert res.remainder_p_value == res.pooled_p_value


@pytest.mark.parametrize(
    "counts,weights", [(np.zeros((0, 2)), HALF), (np.zeros((5, 2)), HALF), ([[10.0], [20.0]], [1.0])]
)
def test_slices_degenerate(counts, weights):
    res = diagnose_slices(counts, weights)
    assert res.removed == () and res.pooled_p_value == 1.0 and res.consistent
    assert np.all(res.p_value == 1.0) and np.all(res.p_holm == 1.0)
    assert_all_finite(res)


def test_slices_bad_input():
    with pytest.raises(StatsError):
        diagnose_slices([[1, 2]], HALF, level=0.0)
    with pytest.raises(StatsError):
        diagnose_slices([[1, 2]], HALF, max_removed=-1)


# ---------------------------------------------------------------------------
# 3. pipeline stages
# ---------------------------------------------------------------------------


def test_filter_stage_dropping_treatment_is_attributed():
    # Known by construction: raw log balanced; the quality filter drops 4% of
    # treatment and 1% of control; the analysis filter drops 2% of both.
    # Drop tests referenced against scipy.stats.chi2_contingency(correction=False).
    rng = np.random.default_rng(8)
    raw = rng.multinomial(200000, HALF)
    filtered = raw - rng.binomial(raw, [0.01, 0.04])
    analysis = filtered - rng.binomial(filtered, [0.02, 0.02])
    x = np.vstack([raw, filtered, analysis])
    res = diagnose_stages(x, HALF)
    assert res.p_value[0] >= 0.001
    assert res.p_value[1] < 1e-6
    assert res.first_break == 1
    np.testing.assert_array_equal(res.dropped, x[:-1] - x[1:])
    np.testing.assert_allclose(res.drop_rate[0], [0.01, 0.04], atol=0.004)
    assert res.drop_p_value[0] < 1e-10
    assert res.drop_p_value[1] > 0.001
    for g in range(2):
        ref = stats.chi2_contingency(np.vstack([res.dropped[g], x[g + 1]]), correction=False)
        assert res.drop_chi2[g] == pytest.approx(ref.statistic)
        assert res.drop_p_value[g] == pytest.approx(ref.pvalue)
        assert res.drop_df[g] == ref.dof
    assert_all_finite(res)


def test_stage_zero_already_broken_and_never_broken():
    x = np.array([[5000, 4400], [4900, 4300]])
    assert diagnose_stages(x, HALF).first_break == 0
    y = np.array([[5000, 5010], [4900, 4905]])
    assert diagnose_stages(y, HALF).first_break is None


def test_stages_degenerate():
    for counts in (np.zeros((0, 2)), np.zeros((1, 2)), np.zeros((3, 2)), [[100, 100], [100, 100]]):
        res = diagnose_stages(counts, HALF)
        assert res.first_break is None
        assert np.all(res.drop_p_value == 1.0) and np.all(res.drop_df == 0)
        assert_all_finite(res)
    # a variant empty at one stage is left out of that transition's test
    res = diagnose_stages([[100, 0, 100], [90, 0, 80]], [1, 1, 1])
    assert res.drop_df[0] == 1 and res.drop_rate[0, 1] == 0.0
    with pytest.raises(StatsError, match="stage 0 to stage 1 in variant 1"):
        diagnose_stages([[100, 100], [90, 101]], HALF)


# ---------------------------------------------------------------------------
# 4. covariate balance
# ---------------------------------------------------------------------------


def test_homogeneity_matches_scipy_and_statsmodels():
    # References: scipy.stats.chi2_contingency(correction=False);
    # statsmodels Table.standardized_resids (Haberman 1973 adjusted residuals);
    # scipy.stats.contingency.association(method="cramer").
    t = np.array([[120, 90, 30], [45, 60, 20], [300, 310, 280], [12, 4, 9]], dtype=float)
    res = categorical_balance(t)
    ref = stats.chi2_contingency(t, correction=False)
    assert res.chi2 == pytest.approx(ref.statistic)
    assert res.p_value == pytest.approx(ref.pvalue)
    assert res.df == ref.dof
    np.testing.assert_allclose(res.expected, ref.expected_freq)
    np.testing.assert_allclose(res.adjusted_residuals, Table(t).standardized_resids, rtol=1e-10)
    assert res.cramers_v == pytest.approx(association(t.astype(int), method="cramer", correction=False))


def test_homogeneity_drops_empty_rows_and_columns():
    # Reference: scipy.stats.chi2_contingency on the table without empty rows/cols.
    t = np.array([[50, 0, 40, 30], [0, 0, 0, 0], [20, 0, 35, 25], [10, 0, 5, 15]], dtype=float)
    res = categorical_balance(t)
    reduced = t[[0, 2, 3]][:, [0, 2, 3]]
    ref = stats.chi2_contingency(reduced, correction=False)
    assert res.chi2 == pytest.approx(ref.statistic)
    assert res.df == ref.dof == 4
    assert res.p_value == pytest.approx(ref.pvalue)
    assert res.rows_used.tolist() == [True, False, True, True]
    assert res.cols_used.tolist() == [True, False, True, True]
    assert np.all(res.adjusted_residuals[1] == 0) and np.all(res.adjusted_residuals[:, 1] == 0)
    assert_all_finite(res)


@pytest.mark.parametrize("table", [np.zeros((0, 2)), [], np.zeros((3, 2)), [[5, 7]], [[5], [7]]])
def test_homogeneity_degenerate(table):
    res = categorical_balance(table)
    assert res.expected.shape == np.shape(table) if np.ndim(table) == 2 else res.expected.size == 0
    assert res.df == 0 and res.chi2 == 0.0 and res.p_value == 1.0 and res.cramers_v == 0.0
    assert_all_finite(res)


PLATFORMS = np.array([0.45, 0.30, 0.19, 0.06])  # web, android, ios, tablet (fictional app)


def simulate_units(rng, n=100000):
    variant = rng.integers(0, 2, n)
    platform = rng.choice(4, n, p=PLATFORMS)
    # weekly reading minutes, longer on tablets
    minutes = rng.gamma(2.0, 30.0, n) + 40.0 * (platform == 3)
    return variant, platform, minutes


def sufficient(variant, values):
    n = np.bincount(variant, minlength=2).astype(float)
    return n, np.bincount(variant, values, 2), np.bincount(variant, values**2, 2)


def test_balanced_srm_vs_missing_platform():
    # Known by construction. (a) 5% of treatment units lost at random: SRM but no
    # covariate imbalance. (b) tablet units never logged in treatment: SRM and the
    # platform distribution differs, with the tablet/treatment cell flagged.
    rng = np.random.default_rng(21)
    variant, platform, minutes = simulate_units(rng)

    lost_at_random = (variant == 1) & (rng.uniform(size=variant.size) < 0.05)
    lost_tablet = (variant == 1) & (platform == 3)
    for lost, imbalanced in ((lost_at_random, False), (lost_tablet, True)):
        v, p, m = variant[~lost], platform[~lost], minutes[~lost]
        counts = np.bincount(v, minlength=2)
        assert stats.chisquare(counts).pvalue < 1e-6  # both are SRMs
        table = np.zeros((4, 2))
        np.add.at(table, (p, v), 1)
        cat = categorical_balance(table)
        num = numeric_balance(*sufficient(v, m))
        tab = numeric_balance(*sufficient(v, (p == 3).astype(float)))
        if imbalanced:
            assert cat.p_value < 1e-10
            assert np.unravel_index(np.argmin(cat.adjusted_residuals), (4, 2)) == (3, 1)
            assert tab.imbalanced[1] and tab.smd[1] < -SMD_THRESHOLD
        else:
            assert cat.p_value > 0.01
            assert cat.cramers_v < 0.02
            assert not num.imbalanced.any() and not tab.imbalanced.any()


def test_smd_hand_computed_and_against_raw_data():
    # Hand-computed by construction: control 1,2,3,4 and treatment 2,3,4,5 have means
    # 2.5 / 3.5 and variances 5/3 each, so SMD = 1 / sqrt(5/3) (Austin, Stat Med 2009,
    # section 3.1 formula for continuous covariates).
    c, t = np.array([1.0, 2, 3, 4]), np.array([2.0, 3, 4, 5])
    res = numeric_balance([4, 4], [c.sum(), t.sum()], [(c**2).sum(), (t**2).sum()])
    assert res.smd[1] == pytest.approx(1 / np.sqrt(5 / 3))
    assert res.smd[0] == 0.0 and res.imbalanced.tolist() == [False, True]
    # against numpy on raw data, three variants, two attributes at once, control = 2
    rng = np.random.default_rng(9)
    raw = [[rng.normal(mu, sd, size) for mu, sd, size in zip(locs, (1, 2, 1.5), (300, 280, 310))] for locs in ((0, 0.1, 0.3), (5, 5, 4))]
    n = np.array([[a.size for a in attr] for attr in raw], dtype=float)
    s1 = np.array([[a.sum() for a in attr] for attr in raw])
    s2 = np.array([[(a**2).sum() for a in attr] for attr in raw])
    res = numeric_balance(n, s1, s2, control=2)
    for i, attr in enumerate(raw):
        for k in (0, 1):
            ref = (attr[k].mean() - attr[2].mean()) / np.sqrt((attr[k].var(ddof=1) + attr[2].var(ddof=1)) / 2)
            assert res.smd[i, k] == pytest.approx(ref, rel=1e-9)
        np.testing.assert_allclose(res.sd[i], [a.std(ddof=1) for a in attr], rtol=1e-9)
    assert res.smd.shape == (2, 3) and np.all(res.smd[:, 2] == 0)


def test_smd_degenerate():
    # zero units, one unit, constant attributes (equal and different)
    res = numeric_balance([[0, 0], [1, 5], [10, 10], [10, 10]], [[0, 0], [3, 5], [20, 20], [20, 30]], [[0, 0], [9, 7], [40, 40], [40, 90]])
    assert res.defined.tolist() == [[False, False]] * 4
    assert res.imbalanced[:, 1].tolist() == [False, False, False, True]
    assert_all_finite(res)
    with pytest.raises(StatsError):
        numeric_balance([1, 2], [1, 2], [1, 2], control=2)
    with pytest.raises(StatsError):
        numeric_balance([1, -2], [1, 2], [1, 2])
    with pytest.raises(StatsError):
        numeric_balance([1, 2], [1, 2, 3], [1, 2])


# ---------------------------------------------------------------------------
# 5. wide dimensions
# ---------------------------------------------------------------------------


def test_fold_small_slices_many_labels():
    rng = np.random.default_rng(13)
    s = 5000
    counts = rng.poisson(rng.pareto(1.5, (s, 1)) * 20, (s, 2)).astype(float)
    labels = [f"branch-{i:04d}" for i in range(s)]
    res = fold_small_slices(labels, counts, 20)
    assert len(res.labels) == 21 and res.labels[-1] == "(other)"
    assert res.counts.shape == (21, 2)
    np.testing.assert_allclose(res.counts.sum(axis=0), counts.sum(axis=0))
    units = counts.sum(axis=1)
    kept_units = units[res.kept_index]
    assert np.all(np.diff(kept_units) <= 0)
    assert kept_units.min() >= np.sort(units)[-20]
    assert res.n_folded == s - 20 and res.folded_units == pytest.approx(res.counts[-1].sum())
    # the folded result feeds the slice diagnosis
    assert_all_finite(diagnose_slices(res.counts, HALF))


def test_fold_small_slices_edges():
    res = fold_small_slices(["a", "b", "c"], [[5, 5], [0, 0], [9, 9]], 5)
    assert res.labels == ("c", "a") and res.n_folded == 1 and res.folded_units == 0.0
    res = fold_small_slices(["a", "b", "c"], [[5, 5], [5, 5], [9, 9]], 1)
    assert res.labels == ("c", "(other)") and res.counts[-1].tolist() == [10, 10]
    res = fold_small_slices(["a", "b"], [[5, 5], [5, 5]], 1)  # tie keeps input order
    assert res.labels == ("a", "(other)")
    res = fold_small_slices([], np.zeros((0, 2)), 3)
    assert res.labels == () and res.counts.shape == (0, 2) and res.n_folded == 0
    assert fold_small_slices(["a"], [[1, 1]], 0).labels == ("(other)",)
    with pytest.raises(StatsError):
        fold_small_slices(["(other)", "b"], [[9, 9], [1, 1]], 1)
    with pytest.raises(StatsError):
        fold_small_slices(["a"], [[1, 1], [2, 2]], 1)
    with pytest.raises(StatsError):
        fold_small_slices(["a"], [[1, 1]], -1)
