"""Diagnosis of a sample ratio mismatch: when it started, where it lives, what it touches.

Once the SRM check has fired for an experiment, these functions help an analyst find
the cause from counts the warehouse has already aggregated:

* :func:`locate_onset` -- maximum-likelihood change point of the variant shares in
  time, with a profile-likelihood band and a CUSUM trace for display;
* :func:`diagnose_slices` -- per-slice tests, Holm adjustment, each slice's share of
  the pooled chi-square, and a greedy search for the slices that explain it;
* :func:`diagnose_stages` -- the ratio at each stage of the data pipeline and whether
  the units dropped between stages were dropped at different rates per variant;
* :func:`categorical_balance` and :func:`numeric_balance` -- covariate balance across
  variants from a contingency table or from per-variant sufficient statistics;
* :func:`fold_small_slices` -- keep the ``k`` largest slices of a wide dimension and
  fold the rest into one "other" slice;
* :func:`holm_adjust` -- Holm step-down adjusted p-values.

Everything takes numpy arrays of counts (``K`` = number of variants, in the order of
the designed weights) and returns frozen dataclasses whose array attributes are
read-only. Nothing here performs I/O, prints or configures logging.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special, stats

from monitor.stats import StatsError

__all__ = [
    "CategoricalBalance",
    "FoldedSlices",
    "NumericBalance",
    "OnsetEstimate",
    "SliceDiagnosis",
    "StageDiagnosis",
    "categorical_balance",
    "diagnose_slices",
    "diagnose_stages",
    "fold_small_slices",
    "holm_adjust",
    "locate_onset",
    "numeric_balance",
]

#: Common practice (no source): an absolute standardized mean difference above 0.1 is
#: read as a meaningful imbalance of a baseline covariate.
SMD_THRESHOLD = 0.1

_MODELS = ("onset", "two_segment")


# ---------------------------------------------------------------------------
# result types
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class OnsetEstimate:
    """Maximum-likelihood change point of the variant shares over time.

    Attributes
    ----------
    model : str
        ``"onset"`` or ``"two_segment"`` (see :func:`locate_onset`).
    onset : int or None
        Index of the first period of the changed segment; None when there is no
        evidence of any change (``llr == 0``: no units, a single variant, or shares
        exactly constant).
    band : tuple of int or None
        ``(lo, hi)``, inclusive: the smallest and largest change point whose profile
        log-likelihood is within ``chi2(1).ppf(band_level) / 2`` of the maximum.
        None when ``onset`` is None.
    band_level : float
        Nominal level used for ``band``.
    llr : float
        Maximised log-likelihood ratio against the no-change model (natural log, >= 0).
    profile : ndarray, shape (T,)
        Log-likelihood ratio against the no-change model for each candidate change
        point ``tau = 0 .. T-1``; the profile log-likelihood up to a constant.
    shares_before, shares_after : ndarray, shape (K,)
        Observed variant shares of the units before ``onset`` and from ``onset`` on.
        A segment without units reports the design weights.
    units_before, units_after : float
        Number of units in each segment.
    cusum : ndarray, shape (T, K)
        Running sum over periods of observed minus expected units per variant,
        ``sum_{s<=t} (x_sk - w_k n_s)``; each row sums to zero.
    cusum_z : ndarray, shape (T, K)
        ``cusum`` divided by ``sqrt(N_t w_k (1 - w_k))``, ``N_t`` the running total:
        the binomial z-score of each variant's cumulative share (0 where undefined).
    """

    model: str
    onset: int | None
    band: tuple[int, int] | None
    band_level: float
    llr: float
    profile: np.ndarray
    shares_before: np.ndarray
    shares_after: np.ndarray
    units_before: float
    units_after: float
    cusum: np.ndarray
    cusum_z: np.ndarray


@dataclass(frozen=True)
class SliceDiagnosis:
    """Per-slice sample-ratio tests and the slices that explain a pooled mismatch.

    Attributes
    ----------
    units : ndarray, shape (S,)
        Units in each slice.
    shares : ndarray, shape (S, K)
        Observed variant shares per slice (design weights for an empty slice).
    chi2 : ndarray, shape (S,)
        Pearson goodness-of-fit statistic of each slice against the design.
    df : int
        Degrees of freedom of each per-slice and of the pooled test, ``K - 1``.
    p_value : ndarray, shape (S,)
        Per-slice p-values (1.0 for an empty slice).
    p_holm : ndarray, shape (S,)
        Holm-adjusted p-values over the non-empty slices (1.0 for an empty slice).
    contribution : ndarray, shape (S,)
        Additive share of each slice in the pooled chi-square; sums to ``pooled_chi2``
        and is negative for a slice that deviates against the overall direction.
    pooled_chi2, pooled_p_value : float
        Pearson test of all slices together (column totals) against the design.
    removed : tuple of int
        Slice indices removed by the greedy search, in removal order.
    remainder_p_values : tuple of float
        Pooled p-value of the remaining slices after each removal.
    remainder_p_value : float
        Pooled p-value of what is left after all removals (1.0 if nothing is left).
    consistent : bool
        Whether the remainder reached ``remainder_p_value >= level``.
    level : float
        Level used by the search.
    """

    units: np.ndarray
    shares: np.ndarray
    chi2: np.ndarray
    df: int
    p_value: np.ndarray
    p_holm: np.ndarray
    contribution: np.ndarray
    pooled_chi2: float
    pooled_p_value: float
    removed: tuple[int, ...]
    remainder_p_values: tuple[float, ...]
    remainder_p_value: float
    consistent: bool
    level: float


@dataclass(frozen=True)
class StageDiagnosis:
    """The sample ratio along the stages of a data pipeline.

    Attributes
    ----------
    units : ndarray, shape (G, K)
        The stage counts as given.
    chi2 : ndarray, shape (G,)
        Pearson goodness-of-fit statistic of each stage against the design.
    df : int
        ``K - 1``.
    p_value : ndarray, shape (G,)
        P-value at each stage.
    first_break : int or None
        First stage ``g`` with ``p_value[g] < level`` whose previous stage had
        ``p_value >= level`` (stage 0 breaks if it is already inconsistent);
        None if no stage breaks.
    dropped : ndarray, shape (G-1, K)
        Units lost per variant between stage ``g`` and ``g + 1``.
    drop_rate : ndarray, shape (G-1, K)
        ``dropped / units[g]`` (0.0 where the variant had no units at stage ``g``).
    drop_chi2 : ndarray, shape (G-1,)
        Pearson chi-square of the 2 x K table (dropped, kept) x variant.
    drop_df : ndarray of int, shape (G-1,)
        Its degrees of freedom after removing all-zero rows and columns.
    drop_p_value : ndarray, shape (G-1,)
        Test of equal drop rates across variants (1.0 when ``drop_df == 0``).
    level : float
        Level used for ``first_break``.
    """

    units: np.ndarray
    chi2: np.ndarray
    df: int
    p_value: np.ndarray
    first_break: int | None
    dropped: np.ndarray
    drop_rate: np.ndarray
    drop_chi2: np.ndarray
    drop_df: np.ndarray
    drop_p_value: np.ndarray
    level: float


@dataclass(frozen=True)
class CategoricalBalance:
    """Chi-square test of homogeneity of a categorical attribute across variants.

    Attributes
    ----------
    chi2 : float
        Pearson statistic (no continuity correction).
    df : int
        ``(L' - 1)(K' - 1)`` with ``L'``, ``K'`` the non-empty rows and columns.
    p_value : float
        Upper tail of chi-square(df); 1.0 when ``df == 0``.
    cramers_v : float
        ``sqrt(chi2 / (n (min(L', K') - 1)))``; 0.0 when ``df == 0``.
    n : float
        Total count.
    expected : ndarray, shape (L, K)
        Expected counts under homogeneity (0 in empty rows and columns).
    adjusted_residuals : ndarray, shape (L, K)
        Haberman's adjusted residuals (approximately standard normal under
        homogeneity); 0 in empty rows and columns.
    rows_used, cols_used : ndarray of bool
        Which levels and variants were non-empty and entered the test.
    """

    chi2: float
    df: int
    p_value: float
    cramers_v: float
    n: float
    expected: np.ndarray
    adjusted_residuals: np.ndarray
    rows_used: np.ndarray
    cols_used: np.ndarray


@dataclass(frozen=True)
class NumericBalance:
    """Standardized mean differences of numeric attributes, each variant vs control.

    All arrays have the broadcast shape ``(..., K)`` of the inputs.

    Attributes
    ----------
    mean, sd : ndarray
        Per-variant mean and sample standard deviation (``ddof=1``); 0.0 where
        undefined (no units for the mean, fewer than two units for the SD).
    smd : ndarray
        ``(m_v - m_c) / sqrt((s_v^2 + s_c^2) / 2)``; 0.0 for the control column and
        where ``defined`` is False.
    defined : ndarray of bool
        False for the control column, for variants or controls with fewer than two
        units, and where both variances are zero.
    imbalanced : ndarray of bool
        ``|smd| > threshold`` where defined; where the SMD is undefined only because
        both variances are zero, True if the two means differ.
    control : int
        Index of the control variant.
    threshold : float
        Flag threshold (0.1 by default, common practice).
    """

    mean: np.ndarray
    sd: np.ndarray
    smd: np.ndarray
    defined: np.ndarray
    imbalanced: np.ndarray
    control: int
    threshold: float


@dataclass(frozen=True)
class FoldedSlices:
    """A wide dimension reduced to its largest slices plus one "other" slice.

    Attributes
    ----------
    labels : tuple
        Kept labels, largest first, followed by the other-label if anything with
        units was folded.
    counts : ndarray, shape (len(labels), K)
        Counts of the kept slices and of the "other" slice.
    kept_index : ndarray of int
        Positions of the kept slices in the input.
    n_folded : int
        Number of input slices folded into "other" (including empty ones).
    folded_units : float
        Units in the "other" slice.
    """

    labels: tuple[Any, ...]
    counts: np.ndarray
    kept_index: np.ndarray
    n_folded: int
    folded_units: float


# ---------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _weights(weights: Any) -> np.ndarray:
    try:
        w = np.asarray(weights, dtype=float)
    except (TypeError, ValueError) as exc:
        raise StatsError(f"weights must be numbers, got {weights!r}") from exc
    if w.ndim != 1 or w.size == 0:
        raise StatsError(f"weights must be a non-empty 1-d sequence, got shape {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w <= 0):
        raise StatsError(f"weights must be finite and > 0, got {w.tolist()}")
    return w / w.sum()


def _counts(counts: Any, k: int | None, name: str) -> np.ndarray:
    try:
        x = np.asarray(counts, dtype=float)
    except (TypeError, ValueError) as exc:
        raise StatsError(f"{name} must be numeric counts") from exc
    if x.size == 0 and k is not None:
        return np.zeros((0, k))
    if x.ndim != 2:
        raise StatsError(f"{name} must be 2-d (rows x variants), got shape {x.shape}")
    if k is not None and x.shape[1] != k:
        raise StatsError(f"{name} has {x.shape[1]} variant columns but there are {k} weights")
    if not np.all(np.isfinite(x)):
        raise StatsError(f"{name} contains NaN or infinite values")
    if np.any(x < 0):
        raise StatsError(f"{name} contains negative counts")
    return x


def _level(level: float, name: str = "level") -> float:
    try:
        lv = float(level)
    except (TypeError, ValueError) as exc:
        raise StatsError(f"{name} must be a number in (0, 1), got {level!r}") from exc
    if not 0.0 < lv < 1.0:
        raise StatsError(f"{name} must be in (0, 1), got {level!r}")
    return lv


def _safe_div(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    a, b = np.broadcast_arrays(np.asarray(a, float), np.asarray(b, float))
    return np.divide(a, b, out=np.zeros(a.shape), where=b > 0)


def _shares(x: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Row shares of ``x`` (..., K); rows without units get the design ``w``."""
    n = x.sum(axis=-1, keepdims=True)
    return np.where(n > 0, _safe_div(x, n), w)


def _pearson_gof(x: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, int, np.ndarray]:
    """Pearson goodness-of-fit of each row of ``x`` (..., K) against shares ``w``."""
    k = w.size
    e = x.sum(axis=-1, keepdims=True) * w
    stat = _safe_div((x - e) ** 2, e).sum(axis=-1)
    df = k - 1
    p = stats.chi2.sf(stat, df) if df > 0 else np.ones_like(stat)
    return stat, df, np.asarray(p, dtype=float)


def _homogeneity(tables: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pearson homogeneity test of stacked tables (M, R, C).

    All-zero rows and columns have zero expected and zero observed counts, so they
    add nothing to the statistic; they only reduce the degrees of freedom.
    """
    rows = tables.sum(axis=2)  # (M, R)
    cols = tables.sum(axis=1)  # (M, C)
    n = rows.sum(axis=1)  # (M,)
    expected = _safe_div(rows[:, :, None] * cols[:, None, :], n[:, None, None])
    stat = _safe_div((tables - expected) ** 2, expected).sum(axis=(1, 2))
    df = np.maximum((rows > 0).sum(axis=1) - 1, 0) * np.maximum((cols > 0).sum(axis=1) - 1, 0)
    p = np.where(df > 0, stats.chi2.sf(stat, np.maximum(df, 1)), 1.0)
    stat = np.where(df > 0, stat, 0.0)
    return stat, df.astype(int), np.asarray(p, dtype=float), expected


# ---------------------------------------------------------------------------
# multiple testing
# ---------------------------------------------------------------------------


def holm_adjust(p_values: Any) -> np.ndarray:
    """Holm step-down adjusted p-values.

    Parameters
    ----------
    p_values : array_like, shape (m,)
        Unadjusted p-values in [0, 1].

    Returns
    -------
    ndarray, shape (m,)
        Adjusted p-values ``min(1, max_{j<=i} (m - j + 1) p_(j))`` in input order;
        rejecting where the adjusted value is below ``alpha`` controls the
        family-wise error rate at ``alpha`` under any dependence [1]_.

    Notes
    -----
    An empty input returns an empty array. Ties keep their input order.

    References
    ----------
    .. [1] S. Holm, "A simple sequentially rejective multiple test procedure",
       Scandinavian Journal of Statistics 6(2), 65-70, 1979.
    """
    p = np.asarray(p_values, dtype=float).ravel()
    if not np.all(np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise StatsError("p_values must be finite and in [0, 1]")
    m = p.size
    order = np.argsort(p, kind="stable")
    adj = np.minimum(np.maximum.accumulate((m - np.arange(m)) * p[order]), 1.0)
    out = np.empty(m)
    out[order] = adj
    return out


# ---------------------------------------------------------------------------
# 1. onset in time
# ---------------------------------------------------------------------------


def _free_loglik(x: np.ndarray) -> np.ndarray:
    """Maximised multinomial log-likelihood kernel ``sum_k x_k log(x_k / n)`` per row."""
    n = x.sum(axis=-1, keepdims=True)
    return special.xlogy(x, _safe_div(x, n)).sum(axis=-1)


def locate_onset(
    counts: Any,
    weights: Any,
    *,
    model: str = "onset",
    band_level: float = 0.95,
) -> OnsetEstimate:
    """Locate the period at which the variant shares changed.

    Parameters
    ----------
    counts : array_like, shape (T, K)
        Units assigned per period (hour or day, in time order) and variant. A
        size-0 input means no periods.
    weights : array_like, shape (K,)
        Designed shares of the variants; positive, normalised to sum to 1.
    model : {"onset", "two_segment"}
        ``"onset"`` (default): before the change point ``tau`` the shares equal the
        design ``w``; from ``tau`` on they are a free share vector ``p``. The
        no-change model is ``w`` throughout, so ``profile[tau]`` is half the G
        statistic of the units from ``tau`` on against ``w``. ``tau = 0`` means the
        mismatch was present from the first period.
        ``"two_segment"``: free shares before and after ``tau``; the no-change model is
        one free share vector for the whole series (a change in the ratio, whatever
        the design). ``tau = 0`` is the no-change fit itself (``profile[0] == 0``).
    band_level : float
        Nominal level of the profile-likelihood band (default 0.95).

    Returns
    -------
    OnsetEstimate

    Notes
    -----
    The per-period counts are treated as independent multinomial draws given the
    period totals, so the period totals themselves carry no information.
    The estimate maximises the profile log-likelihood over ``tau`` [1]_. Periods with
    no units give exactly tied values; among exact ties the latest ``tau`` is chosen,
    so the onset is a period that has units.

    The band is the set of ``tau`` with ``profile[tau] >= llr - chi2(1).ppf(level)/2``,
    reported as its hull ``(lo, hi)``. The change point is a discrete parameter for
    which the usual regularity conditions fail and the likelihood-ratio statistic is
    not chi-square distributed [1]_, so the level is nominal only; the test suite
    measures its coverage by simulation. ``llr`` is a maximum over ``T`` candidates
    and must not be referred to a chi-square table either.

    The CUSUM [2]_ traces are for display: a mismatch that starts at ``tau`` shows as
    a kink in the running excess of units at ``tau``.

    No periods, no units, a single variant, or shares that never deviate (``llr``
    numerically zero, below ``1e-10`` per unit) give ``onset = None``,
    ``band = None``, ``llr = 0``, a zero profile and design shares.

    References
    ----------
    .. [1] D. V. Hinkley, "Inference about the change-point in a sequence of random
       variables", Biometrika 57(1), 1-17, 1970.
    .. [2] E. S. Page, "Continuous inspection schemes", Biometrika 41(1/2), 100-115,
       1954.
    """
    if model not in _MODELS:
        raise StatsError(f"model must be one of {_MODELS}, got {model!r}")
    level = _level(band_level, "band_level")
    w = _weights(weights)
    x = _counts(counts, w.size, "counts")
    t_len, k = x.shape

    n_t = x.sum(axis=1)
    cum_n = np.cumsum(n_t)
    cusum = np.cumsum(x - n_t[:, None] * w, axis=0)
    cusum_z = _safe_div(cusum, np.sqrt(cum_n[:, None] * w * (1.0 - w)))

    # suffix[tau] = units from tau on; prefix[tau] = units before tau
    suffix = np.cumsum(x[::-1], axis=0)[::-1]
    prefix = np.vstack([np.zeros((1, k)), np.cumsum(x, axis=0)[:-1]]) if t_len else x.copy()
    if model == "onset":
        # log-lik(tau) - log-lik(null) = sum_k A_k log(A_k / (A w_k))
        profile = _free_loglik(suffix) - suffix @ np.log(w)
    else:
        total = x.sum(axis=0)
        profile = _free_loglik(prefix) + _free_loglik(suffix) - _free_loglik(total)
    profile = np.maximum(profile, 0.0)  # both are >= 0 exactly; clip rounding noise

    llr = float(profile.max()) if t_len else 0.0
    # both kernels sum ~N log(K) terms; below this the ratio is rounding noise
    if llr <= 1e-10 * max(1.0, float(n_t.sum())) or k == 1:
        return OnsetEstimate(
            model=model,
            onset=None,
            band=None,
            band_level=level,
            llr=0.0,
            profile=_frozen(np.zeros(t_len)),
            shares_before=_frozen(w),
            shares_after=_frozen(w),
            units_before=0.0,
            units_after=float(n_t.sum()),
            cusum=_frozen(cusum),
            cusum_z=_frozen(cusum_z),
        )
    tau = int(t_len - 1 - np.argmax(profile[::-1]))
    inside = np.flatnonzero(profile >= llr - stats.chi2.ppf(level, 1) / 2.0)
    before, after = prefix[tau], suffix[tau]
    return OnsetEstimate(
        model=model,
        onset=tau,
        band=(int(inside[0]), int(inside[-1])),
        band_level=level,
        llr=llr,
        profile=_frozen(profile),
        shares_before=_frozen(_shares(before, w)),
        shares_after=_frozen(_shares(after, w)),
        units_before=float(before.sum()),
        units_after=float(after.sum()),
        cusum=_frozen(cusum),
        cusum_z=_frozen(cusum_z),
    )


# ---------------------------------------------------------------------------
# 2. segment slices
# ---------------------------------------------------------------------------


def diagnose_slices(
    counts: Any,
    weights: Any,
    *,
    level: float = 0.001,
    max_removed: int | None = None,
) -> SliceDiagnosis:
    """Test each slice of a dimension and find the slices that explain a mismatch.

    Parameters
    ----------
    counts : array_like, shape (S, K)
        Units per slice (e.g. per platform or country) and variant. The slices should
        partition the experiment's units; size-0 input means no slices.
    weights : array_like, shape (K,)
        Designed shares; positive, normalised to sum to 1.
    level : float
        The remainder counts as consistent with the design once its pooled p-value is
        ``>= level`` (default 0.001, the common-practice SRM alert threshold).
    max_removed : int, optional
        Stop after this many removals (default: no limit).

    Returns
    -------
    SliceDiagnosis

    Notes
    -----
    Each slice gets a Pearson goodness-of-fit test with ``K - 1`` degrees of freedom;
    Holm's step-down adjustment [1]_ runs over the non-empty slices only.

    With ``D_k`` the pooled excess of units in variant ``k`` (observed minus
    expected) and ``E_k = N w_k``, the pooled statistic is ``sum_k D_k^2 / E_k``.
    Writing ``D_k = sum_s d_sk`` splits it exactly into slice contributions
    ``c_s = sum_k d_sk D_k / E_k``: a slice pushing in the overall direction gets a
    positive share, one pushing against it a negative share.

    The search is greedy: while the pooled test of the remaining slices has
    p-value ``< level``, remove the slice with the largest contribution to the
    *remaining* pooled chi-square (recomputed after each removal). A greedy set is
    small but not guaranteed to be the smallest; a mismatch spread evenly over all
    slices yields a long removal list, which itself says the cause is not local.
    Removing every slice leaves an empty remainder with p-value 1.0.

    The chi-square approximation is poor for slices with few expected units per
    variant (common practice: fewer than 5); their p-values should be read with care.
    No slices, or only empty ones, give empty or zero arrays and p-values of 1.0.

    References
    ----------
    .. [1] S. Holm, "A simple sequentially rejective multiple test procedure",
       Scandinavian Journal of Statistics 6(2), 65-70, 1979.
    .. [2] K. Pearson, "On the criterion that a given system of deviations from the
       probable in the case of a correlated system of variables is such that it can
       be reasonably supposed to have arisen from random sampling", Philosophical
       Magazine, Series 5, 50(302), 157-175, 1900.
    """
    lv = _level(level)
    w = _weights(weights)
    x = _counts(counts, w.size, "counts")
    s_len = x.shape[0]
    if max_removed is not None and (int(max_removed) != max_removed or max_removed < 0):
        raise StatsError(f"max_removed must be a non-negative integer, got {max_removed!r}")
    limit = s_len if max_removed is None else min(int(max_removed), s_len)

    units = x.sum(axis=1)
    chi2, df, p = _pearson_gof(x, w)
    nonempty = units > 0
    p_holm = np.ones(s_len)
    p_holm[nonempty] = holm_adjust(p[nonempty])

    def pooled(mask: np.ndarray) -> tuple[float, float, np.ndarray]:
        sub = x[mask]
        n = sub.sum()
        d = sub - sub.sum(axis=1, keepdims=True) * w  # (S', K) excess units
        big_d = d.sum(axis=0)
        e = n * w
        contrib = np.zeros(s_len)
        contrib[mask] = _safe_div(d * big_d, e).sum(axis=1)
        stat = float(_safe_div(big_d**2, e).sum())
        pv = float(stats.chi2.sf(stat, df)) if df > 0 and n > 0 else 1.0
        return stat, pv, contrib

    keep = np.ones(s_len, dtype=bool)
    pooled_stat, pooled_p, contribution = pooled(keep)
    removed: list[int] = []
    trace: list[float] = []
    current_p, current_c = pooled_p, contribution
    while current_p < lv and len(removed) < limit:
        worst = int(np.argmax(np.where(keep, current_c, -np.inf)))
        keep[worst] = False
        removed.append(worst)
        _, current_p, current_c = pooled(keep)
        trace.append(current_p)

    return SliceDiagnosis(
        units=_frozen(units),
        shares=_frozen(_shares(x, w)),
        chi2=_frozen(chi2),
        df=df,
        p_value=_frozen(p),
        p_holm=_frozen(p_holm),
        contribution=_frozen(contribution),
        pooled_chi2=pooled_stat,
        pooled_p_value=pooled_p,
        removed=tuple(removed),
        remainder_p_values=tuple(trace),
        remainder_p_value=current_p,
        consistent=current_p >= lv,
        level=lv,
    )


# ---------------------------------------------------------------------------
# 3. pipeline stages
# ---------------------------------------------------------------------------


def diagnose_stages(counts: Any, weights: Any, *, level: float = 0.001) -> StageDiagnosis:
    """Follow the sample ratio through successive stages of the data pipeline.

    Parameters
    ----------
    counts : array_like, shape (G, K)
        Units per variant counted at each stage, in pipeline order (for example raw
        assignment log, after bot and quality filters, analysis population). Each
        stage must be a subset of the previous one: counts may not increase.
    weights : array_like, shape (K,)
        Designed shares; positive, normalised to sum to 1.
    level : float
        A stage is inconsistent with the design when its p-value is ``< level``
        (default 0.001, common practice for SRM alerts).

    Returns
    -------
    StageDiagnosis

    Notes
    -----
    Each stage gets a Pearson goodness-of-fit test against ``w``. Between stage ``g``
    and ``g + 1`` the units of each variant are split into dropped and kept, and a
    Pearson test of homogeneity on that 2 x K table tests whether the drop rate
    differs across variants: the direct signature of a filter that treats variants
    differently. The stage tests share units and are not independent.

    Variants without units at stage ``g`` are left out of that transition's test;
    a transition that drops nothing (or everything) has ``drop_df == 0`` and
    p-value 1.0. No stages give empty arrays and ``first_break = None``.

    Raises
    ------
    StatsError
        If a count grows from one stage to the next.

    References
    ----------
    .. [1] A. Agresti, *Categorical Data Analysis*, 3rd ed., Wiley, 2013, chapters 1
       and 3 (Pearson goodness-of-fit and homogeneity tests).
    """
    lv = _level(level)
    w = _weights(weights)
    x = _counts(counts, w.size, "counts")
    g_len, k = x.shape

    chi2, df, p = _pearson_gof(x, w)
    # the first inconsistent stage is by definition preceded by a consistent one
    breaks = np.flatnonzero(p < lv)
    first_break = int(breaks[0]) if breaks.size else None

    dropped = x[:-1] - x[1:] if g_len else np.zeros((0, k))
    if np.any(dropped < 0):
        g, v = np.argwhere(dropped < 0)[0]
        raise StatsError(
            f"counts grow from stage {g} to stage {g + 1} in variant {v}: stages must be nested"
        )
    drop_rate = _safe_div(dropped, x[:-1]) if g_len else np.zeros((0, k))
    tables = np.stack([dropped, x[1:] if g_len else dropped], axis=1)  # (G-1, 2, K)
    d_chi2, d_df, d_p, _ = _homogeneity(tables)

    return StageDiagnosis(
        units=_frozen(x),
        chi2=_frozen(chi2),
        df=df,
        p_value=_frozen(p),
        first_break=first_break,
        dropped=_frozen(dropped),
        drop_rate=_frozen(drop_rate),
        drop_chi2=_frozen(d_chi2),
        drop_df=_frozen(d_df),
        drop_p_value=_frozen(d_p),
        level=lv,
    )


# ---------------------------------------------------------------------------
# 4. covariate balance
# ---------------------------------------------------------------------------


def categorical_balance(table: Any) -> CategoricalBalance:
    """Test whether a categorical attribute is distributed alike in every variant.

    Parameters
    ----------
    table : array_like, shape (L, K)
        Units per attribute level (rows) and variant (columns).

    Returns
    -------
    CategoricalBalance

    Notes
    -----
    Pearson's chi-square test of homogeneity without continuity correction [1]_,
    after removing all-zero rows and columns. Under an SRM caused by losing units
    at random, the attribute stays balanced; an SRM caused by losing a whole level in
    one variant (a platform that fails to log treatment, say) shows up here, and the
    adjusted residuals [2]_ point at the cell.

    Cramér's V [3]_ is reported as an effect size because with warehouse-scale
    counts even negligible differences are significant.

    Fewer than two non-empty rows or columns (including an empty table) give
    ``df = 0``, ``chi2 = 0``, ``p_value = 1``, ``cramers_v = 0``.

    References
    ----------
    .. [1] A. Agresti, *Categorical Data Analysis*, 3rd ed., Wiley, 2013, chapter 3.
    .. [2] S. J. Haberman, "The analysis of residuals in cross-classified tables",
       Biometrics 29(1), 205-220, 1973.
    .. [3] H. Cramér, *Mathematical Methods of Statistics*, Princeton University Press,
       1946.
    """
    if np.size(table):
        t = _counts(table, None, "table")
    else:
        shape = np.shape(table)
        t = np.zeros(shape if len(shape) == 2 else (0, 0))
    n_rows, n_cols = t.shape
    stat, df, p, expected = _homogeneity(t[None])
    stat_f, df_i, p_f, e = float(stat[0]), int(df[0]), float(p[0]), expected[0]
    rows, cols = t.sum(axis=1), t.sum(axis=0)
    n = float(t.sum())
    rows_used, cols_used = rows > 0, cols > 0
    if df_i > 0:
        var = e * (1.0 - rows[:, None] / n) * (1.0 - cols[None, :] / n)
        resid = _safe_div(t - e, np.sqrt(var))
        q = min(int(rows_used.sum()), int(cols_used.sum())) - 1
        v = float(np.sqrt(stat_f / (n * q)))
    else:
        resid = np.zeros((n_rows, n_cols))
        v = 0.0
    return CategoricalBalance(
        chi2=stat_f,
        df=df_i,
        p_value=p_f,
        cramers_v=v,
        n=n,
        expected=_frozen(e),
        adjusted_residuals=_frozen(resid),
        rows_used=_frozen(rows_used),
        cols_used=_frozen(cols_used),
    )


def numeric_balance(
    n: Any,
    total: Any,
    total_sq: Any,
    *,
    control: int = 0,
    threshold: float = SMD_THRESHOLD,
) -> NumericBalance:
    """Standardized mean differences of numeric attributes from sufficient statistics.

    Parameters
    ----------
    n, total, total_sq : array_like, shape (..., K)
        Per variant (last axis) the number of units with a value, the sum of the
        values and the sum of their squares. Leading axes (e.g. one row per
        attribute) are broadcast, so many attributes are handled at once.
    control : int
        Column of the control variant (default 0).
    threshold : float
        ``|SMD|`` above which an attribute is flagged (default 0.1, common practice).

    Returns
    -------
    NumericBalance

    Notes
    -----
    ``SMD = (m_v - m_c) / sqrt((s_v^2 + s_c^2) / 2)`` with sample variances
    ``s^2 = (Q - n m^2) / (n - 1)`` [1]_. For a 0/1 attribute this is within a factor
    ``n / (n - 1)`` of the binary form in [1]_. The variance is computed from raw
    sums and clipped at 0; for values with a large mean relative to their spread,
    centre them in the warehouse first to avoid cancellation.

    Where the SMD is undefined (fewer than two units in either group, or both
    variances zero) it is reported as 0.0 with ``defined = False``; two constant
    attributes with different values are flagged as imbalanced.

    References
    ----------
    .. [1] P. C. Austin, "Balance diagnostics for comparing the distribution of
       baseline covariates between treatment groups in propensity-score matched
       samples", Statistics in Medicine 28(25), 3083-3107, 2009.
    """
    try:
        cnt, s1, s2 = np.broadcast_arrays(
            np.asarray(n, dtype=float), np.asarray(total, dtype=float), np.asarray(total_sq, dtype=float)
        )
    except ValueError as exc:
        raise StatsError("n, total and total_sq must have broadcastable shapes") from exc
    if cnt.ndim == 0 or cnt.shape[-1] == 0:
        raise StatsError("n, total and total_sq need a last axis of variants")
    k = cnt.shape[-1]
    if int(control) != control or not 0 <= control < k:
        raise StatsError(f"control must be a variant index in [0, {k}), got {control!r}")
    if not (np.all(np.isfinite(cnt)) and np.all(np.isfinite(s1)) and np.all(np.isfinite(s2))):
        raise StatsError("n, total and total_sq must be finite")
    if np.any(cnt < 0) or np.any(s2 < 0):
        raise StatsError("n and total_sq must be non-negative")
    thr = float(threshold)
    if not thr > 0:
        raise StatsError(f"threshold must be > 0, got {threshold!r}")

    mean = _safe_div(s1, cnt)
    var = np.maximum(_safe_div(s2 - cnt * mean**2, cnt - 1.0), 0.0)
    var = np.where(cnt >= 2, var, 0.0)
    sd = np.sqrt(var)

    c = int(control)
    m_c, v_c, n_c = mean[..., c : c + 1], var[..., c : c + 1], cnt[..., c : c + 1]
    pooled = np.sqrt((var + v_c) / 2.0)
    enough = (cnt >= 2) & (n_c >= 2)
    is_control = np.zeros(k, dtype=bool)
    is_control[c] = True
    defined = enough & (pooled > 0) & ~is_control
    smd = np.where(defined, _safe_div(mean - m_c, pooled), 0.0)
    constant_apart = enough & (pooled == 0) & (mean != m_c) & ~is_control
    imbalanced = (defined & (np.abs(smd) > thr)) | constant_apart
    return NumericBalance(
        mean=_frozen(mean),
        sd=_frozen(sd),
        smd=_frozen(smd),
        defined=_frozen(defined),
        imbalanced=_frozen(imbalanced),
        control=c,
        threshold=thr,
    )


# ---------------------------------------------------------------------------
# 5. wide dimensions
# ---------------------------------------------------------------------------


def fold_small_slices(
    labels: Sequence[Any],
    counts: Any,
    k: int,
    *,
    other_label: Any = "(other)",
) -> FoldedSlices:
    """Keep the ``k`` largest slices of a dimension and fold the rest into one.

    Parameters
    ----------
    labels : sequence, length S
        Slice labels (e.g. country codes, app versions).
    counts : array_like, shape (S, K)
        Units per slice and variant.
    k : int
        Number of slices to keep (>= 0).
    other_label : hashable
        Label of the folded slice; must not clash with a kept label.

    Returns
    -------
    FoldedSlices

    Notes
    -----
    Slices are ranked by their total units, largest first; ties keep input order.
    Only slices with units are kept, so fewer than ``k`` may remain. The "other"
    slice is appended only when the folded slices hold units; its counts are the
    column sums of everything folded, so the totals per variant are unchanged.
    An empty input gives empty output.
    """
    labs = list(labels)
    if int(k) != k or k < 0:
        raise StatsError(f"k must be a non-negative integer, got {k!r}")
    x = np.asarray(counts, dtype=float)
    if x.size == 0:
        x = np.zeros((0, x.shape[1] if x.ndim == 2 else 0))
    else:
        x = _counts(x, None, "counts")
    if len(labs) != x.shape[0]:
        raise StatsError(f"{len(labs)} labels but {x.shape[0]} rows of counts")
    units = x.sum(axis=1)
    order = np.argsort(-units, kind="stable")
    order = order[units[order] > 0]
    kept = order[: int(k)]
    fold_mask = np.ones(len(labs), dtype=bool)
    fold_mask[kept] = False
    kept_labels = [labs[i] for i in kept]
    if any(lab == other_label for lab in kept_labels):
        raise StatsError(f"other_label {other_label!r} clashes with a kept slice label")
    other = x[fold_mask].sum(axis=0)
    folded_units = float(other.sum())
    if folded_units > 0:
        out_counts = np.vstack([x[kept], other[None, :]])
        out_labels = (*kept_labels, other_label)
    else:
        out_counts = x[kept]
        out_labels = tuple(kept_labels)
    return FoldedSlices(
        labels=out_labels,
        counts=_frozen(out_counts),
        kept_index=_frozen(kept.astype(int)),
        n_folded=int(fold_mask.sum()),
        folded_units=folded_units,
    )
