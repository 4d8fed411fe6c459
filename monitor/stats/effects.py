"""Treatment-effect statistics for guardrail metrics, computed from sufficient statistics.

Everything here is pure numpy/scipy, vectorised over arbitrarily shaped arrays of rows (for example
experiments x treatment variants x metrics), and works from the per-variant sufficient statistics
the warehouse returns:

* per-unit metrics ``y``: ``n`` (units), ``sum_y``, ``sum_y2``  (:func:`moments`);
* proportions: ``n`` and the number of units with ``y = 1``  (:func:`proportion_moments`);
* ratio metrics ``sum(y) / sum(x)`` over units: additionally ``sum_x``, ``sum_x2``, ``sum_xy``
  (:func:`ratio_moments`);
* CUPED: additionally a pre-period covariate ``c`` with ``sum_c``, ``sum_c2``, ``sum_yc``
  (:func:`cuped`).

The comparisons (:func:`compare_means`, :func:`compare_proportions`, :func:`compare_ratios`)
return an :class:`EffectEstimate` holding, per row, the absolute difference treatment - control,
the relative difference ``treatment / control - 1`` (a fraction: multiply by 100 for percent),
fixed-horizon statistics (standard error, t or z statistic, p-value, confidence interval), and the
anytime-valid quantities: an asymptotic confidence sequence for both differences [4]_ and the
matching Gaussian-mixture e-value. :func:`guardrail_status` turns relative bounds into
"alert" / "warn" / "ok", and :func:`bh` / :func:`ebh` control the false discovery rate across many
guardrails.

Undefined values
----------------
No NaN or infinity is ever returned. Wherever a quantity cannot be computed (fewer than two units
in a variant, zero variance in both variants, a control mean of zero for the relative difference,
a ratio metric whose denominator sums to zero) the numeric fields hold a documented finite
placeholder and a boolean mask (``defined``, ``rel_defined``) is False. :meth:`EffectEstimate.row`
returns a single row as a dictionary with ``None`` in place of every undefined value. No warning
is raised for such rows: in a batch of thousands of experiments they are ordinary, and the masks
carry the information.

The confidence sequence for a difference of two means
-----------------------------------------------------
For i.i.d. observations with mean ``mu`` and a consistent variance estimate ``s_t``, Waudby-Smith
et al. [4]_ (Theorem 2.2) show that::

    mean_t +/- s_t * sqrt( 2 (t rho^2 + 1) / (t^2 rho^2) * log( sqrt(t rho^2 + 1) / alpha ) )

is a two-sided asymptotic (1 - alpha) confidence sequence: the limiting probability that ``mu``
is *ever* outside the interval, from a late enough start onwards, is at most ``alpha``. It is the
time-uniform boundary of Robbins' normal mixture martingale [5]_ with mixing variance ``rho^2``,
with the unknown standard deviation replaced by its estimate.

We apply it to a two-sample difference as follows. With ``n = n_control + n_treatment`` units and
treatment share ``p = n_treatment / n``, the difference of means is the average over all units of
the influence values ``psi_i = Z_i (y_i - mu_t) / p - (1 - Z_i)(y_i - mu_c) / (1 - p)`` (``Z_i`` is
1 for treated units), whose variance ``sigma_t^2 / p + sigma_c^2 / (1 - p)`` is estimated by
``n * SE^2`` with the unpooled (Welch) standard error ``SE``. Substituting ``s_t = SE * sqrt(n)``
and ``t = n`` gives the radius used throughout this module::

    radius = SE * sqrt( (n rho^2 + 1) / (n rho^2) * ( log(n rho^2 + 1) - 2 log(alpha) ) )

Ratio metrics are smooth functions of means; by the delta method their estimators are
asymptotically linear, so the same radius is applied with their delta-method standard errors.
Assumptions: units enter the experiment in an order unrelated to their outcomes,
the assignment probability is fixed, each unit contributes one value (a unit's cumulative metric
is treated as final when it is read), variances are finite (the theorem needs slightly more than
two moments), and the guarantee is asymptotic: for small ``n`` the interval is only approximately
valid, exactly like a CLT confidence interval. The unpooled standard error is always used for the
sequential quantities, also when ``pooled=True`` asks for a pooled fixed-horizon test.

The tuning parameter ``rho`` sets the sample size at which the sequence is tightest. Rather than
asking for ``rho`` directly, the functions take ``n_star``: the total number of units (both
variants together) at which the interval should be narrowest; :func:`mixture_rho` returns the
``rho`` that minimises the radius at ``n = n_star``. The default, ``n_star = 10_000``, suits a
guardrail that should be decisive after a few thousand units per variant. Set it to the planned
total sample size of the experiment (or of the point at which a decision is most likely), and fix
it before looking at the data: choosing it after seeing the data voids the guarantee. The width is
insensitive to ``n_star`` within a factor of a few: too small a value widens late intervals, too
large a value widens early ones.

The confidence sequence for the relative difference (Fieller inversion)
------------------------------------------------------------------------
The relative difference ``r = mu_t / mu_c - 1`` is *not* given a delta-method interval
``rel +/- radius * rel_se``: that standard error is evaluated at the *estimated* means, so when the
treatment mean is low by chance the interval shrinks with it and excludes 0 too often, always
towards "treatment decreased" (for skewed, zero-inflated and rare-event metrics an A/A
simulation missed 0 in 7-36% of runs at ``alpha = 0.05``). Instead the sequence is obtained by
inverting, for every candidate ratio ``theta = 1 + r``, the time-uniform test of the linear
contrast ``mu_t - theta mu_c = 0``, as in Fieller's construction of an interval for a ratio [10]_.
For a fixed ``theta`` the contrast is again an average of influence values, so its estimate
``m_t - theta m_c`` with standard error ``sqrt(v_t + theta^2 v_c)`` has the asymptotic confidence
sequence above [4]_ with the same radius factor ``k``. The set of ``theta`` it does not reject,
``(m_t - theta m_c)^2 <= k^2 (v_t + theta^2 v_c)``, is a quadratic inequality in ``theta``; when
``a = m_c^2 - k^2 v_c > 0`` (the control mean is bounded away from 0 by its own sequence) it is
the interval::

    theta = ( m_t m_c -/+ k sqrt(m_t^2 v_c + a v_t) ) / a

Why it is valid: the sequence misses the true ``r`` at some look only if the single sequence of
the contrast at the true ``theta`` misses 0 at that look, so its time-uniform error is that of
one asymptotic confidence sequence, at most ``alpha`` asymptotically; no union bound or
linearisation at estimated means is involved. At ``r = 0`` the contrast is the difference of
means itself, so the relative sequence excludes 0 exactly when the difference sequence does and
the e-value reaches ``1 / alpha``. Where ``a <= 0`` the set is unbounded (the data cannot yet
bound the control mean away from 0) and ``rel_bounded`` is False: no relative bound is given.
The fixed-horizon relative interval ``rel_ci_*`` remains the delta-method interval.

Measured by seeded simulation (``tests/test_stats_effects.py``; 1,000 A/A runs, 100 units per
variant per day, 30 daily looks, ``alpha = 0.05``): the confidence sequence missed 0 at some look
in 0.8% of runs for a skewed (exponential) metric and 0.6% for a proportion, whereas a fixed 95%
interval re-checked daily missed in 28% and 27%. With a look after every 10 units per variant
(300 looks) the sequence still missed in at most 1.5% of runs. The A/A study of the relative
sequence over lognormal, zero-inflated and rare-event metrics is in
``tests/test_stats_relative_cs.py``.

References
----------
.. [1] B. L. Welch, "The generalization of 'Student's' problem when several different population
   variances are involved", Biometrika, 34(1-2), 28-35, 1947.
.. [2] F. E. Satterthwaite, "An approximate distribution of estimates of variance components",
   Biometrics Bulletin, 2(6), 110-114, 1946.
.. [3] A. Deng, U. Knoblich and J. Lu, "Applying the Delta Method in Metric Analytics: A Practical
   Guide with Novel Ideas", Proceedings of the 24th ACM SIGKDD International Conference on
   Knowledge Discovery & Data Mining (KDD), 2018.
.. [4] I. Waudby-Smith, D. Arbour, R. Sinha, E. H. Kennedy and A. Ramdas, "Time-uniform central
   limit theory and asymptotic confidence sequences", The Annals of Statistics, 52(6), 2024.
.. [5] H. Robbins, "Statistical methods related to the law of the iterated logarithm", The Annals
   of Mathematical Statistics, 41(5), 1397-1409, 1970.
.. [6] A. Deng, Y. Xu, R. Kohavi and T. Walker, "Improving the Sensitivity of Online Controlled
   Experiments by Utilizing Pre-Experiment Data", Proceedings of the Sixth ACM International
   Conference on Web Search and Data Mining (WSDM), 2013.
.. [7] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate: a practical and
   powerful approach to multiple testing", Journal of the Royal Statistical Society B, 57(1),
   289-300, 1995.
.. [8] R. Wang and A. Ramdas, "False discovery rate control with e-values", Journal of the Royal
   Statistical Society B, 84(3), 822-852, 2022.
.. [9] J. Ville, "Etude critique de la notion de collectif", Gauthier-Villars, Paris, 1939.
.. [10] E. C. Fieller, "Some problems in interval estimation", Journal of the Royal Statistical
   Society B, 16(2), 175-185, 1954.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any

import numpy as np
from scipy import stats

from monitor.stats import StatsError

__all__ = [
    "DEFAULT_ALPHA",
    "DEFAULT_N_STAR",
    "LOG_E_VALUE_CAP",
    "Moments",
    "RatioMoments",
    "EffectEstimate",
    "ConfidenceSequence",
    "GuardrailStatus",
    "CupedResult",
    "MultipleTestResult",
    "moments",
    "proportion_moments",
    "ratio_moments",
    "compare_means",
    "compare_proportions",
    "compare_ratios",
    "mixture_rho",
    "confidence_sequence",
    "mixture_e_value",
    "guardrail_status",
    "cuped",
    "bh",
    "ebh",
]

#: Default error rate for intervals, confidence sequences and FDR procedures.
DEFAULT_ALPHA = 0.05
#: Default total sample size (both variants) at which the confidence sequence is tightest.
DEFAULT_N_STAR = 10_000
#: e-values are capped at ``exp(LOG_E_VALUE_CAP)`` (about 1e304) so they stay finite; a capped
#: e-value is still an e-value because it is never larger than the uncapped one.
LOG_E_VALUE_CAP = 700.0

# Relative tolerance for rounding error when a centred sum of squares is formed from raw sums.
_SS_RTOL = 1e-8


# ------------------------------------------------------------------------------------------------
# result types
# ------------------------------------------------------------------------------------------------


def _coerce_arrays(obj: object) -> None:
    """Store every numpy-scalar field of a frozen result as a (possibly 0-d) ndarray."""
    for f in fields(obj):  # type: ignore[arg-type]
        value = getattr(obj, f.name)
        if isinstance(value, np.generic):
            object.__setattr__(obj, f.name, np.asarray(value))


@dataclass(frozen=True, eq=False)
class Moments:
    """Mean and per-unit variance of one metric in one variant, per row.

    Attributes
    ----------
    n : numpy.ndarray
        Number of units.
    mean : numpy.ndarray
        Sample mean; 0.0 when ``n == 0``.
    var : numpy.ndarray
        Per-unit variance (unbiased from :func:`moments`, Bernoulli ``p (1 - p)`` from
        :func:`proportion_moments`, covariate-adjusted from :func:`cuped`); 0.0 when ``n < 2``.
    defined : numpy.ndarray of bool
        True where ``n >= 2``, i.e. where both ``mean`` and ``var`` are usable.
    """

    n: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    defined: np.ndarray

    def __post_init__(self) -> None:
        _coerce_arrays(self)

    def __getitem__(self, key: Any) -> Moments:
        """Index every field alike, e.g. ``m[..., 0]`` for the first variant slot."""
        return Moments(self.n[key], self.mean[key], self.var[key], self.defined[key])


@dataclass(frozen=True, eq=False)
class RatioMoments:
    """A ratio metric ``sum(y) / sum(x)`` in one variant, with its delta-method variance.

    Attributes
    ----------
    n : numpy.ndarray
        Number of units (the randomisation units, not events).
    ratio : numpy.ndarray
        ``sum_y / sum_x``; 0.0 where undefined.
    var_ratio : numpy.ndarray
        Delta-method variance of the ratio estimator (the squared standard error, not a per-unit
        variance); 0.0 where undefined.
    mean_x : numpy.ndarray
        Mean denominator per unit; 0.0 when ``n == 0``.
    defined : numpy.ndarray of bool
        True where ``n >= 2`` and ``sum_x != 0``.
    """

    n: np.ndarray
    ratio: np.ndarray
    var_ratio: np.ndarray
    mean_x: np.ndarray
    defined: np.ndarray

    def __post_init__(self) -> None:
        _coerce_arrays(self)

    def __getitem__(self, key: Any) -> RatioMoments:
        """Index every field alike."""
        return RatioMoments(
            self.n[key], self.ratio[key], self.var_ratio[key], self.mean_x[key], self.defined[key]
        )


@dataclass(frozen=True, eq=False)
class EffectEstimate:
    """Treatment-vs-control comparison of one metric, per row.

    All array fields share one shape and are free of NaN and infinity.

    Attributes
    ----------
    n_control, n_treatment : numpy.ndarray
        Units in each variant.
    mean_control, mean_treatment : numpy.ndarray
        Per-variant estimates (means, proportions, or ratios for ratio metrics).
    diff : numpy.ndarray
        ``mean_treatment - mean_control``; 0.0 if a variant has no units.
    diff_se : numpy.ndarray
        Standard error of ``diff`` for the chosen fixed-horizon method (Welch or pooled); 0.0
        where not ``defined``.
    df : numpy.ndarray
        Degrees of freedom of the t reference (Welch-Satterthwaite or ``n_c + n_t - 2``); 0.0
        where the reference is the standard normal (see ``normal_reference``) or not ``defined``.
    statistic : numpy.ndarray
        ``diff / diff_se``; 0.0 where not ``defined``.
    p_value : numpy.ndarray
        Two-sided fixed-horizon p-value; 1.0 where not ``defined``.
    ci_lower, ci_upper : numpy.ndarray
        Fixed-horizon ``1 - alpha`` confidence interval for ``diff``; both equal ``diff`` where
        not ``defined``.
    cs_lower, cs_upper : numpy.ndarray
        Asymptotic ``1 - alpha`` confidence sequence for ``diff``; both equal ``diff`` where not
        ``defined``.
    e_value : numpy.ndarray
        Gaussian-mixture e-value against ``diff == 0``, dual to the confidence sequence
        (``e_value >= 1 / alpha`` exactly when 0 is outside ``[cs_lower, cs_upper]``); 1.0 where
        not ``defined``.
    defined : numpy.ndarray of bool
        Both variants have at least two units and the standard error is positive.
    rel : numpy.ndarray
        Relative difference ``mean_treatment / mean_control - 1`` (a fraction); 0.0 where not
        ``rel_defined``.
    rel_se : numpy.ndarray
        Delta-method standard error of ``rel``; 0.0 where not ``rel_defined``.
    rel_ci_lower, rel_ci_upper : numpy.ndarray
        Fixed-horizon normal-theory interval for ``rel``; 0.0 where not ``rel_defined``.
    rel_cs_lower, rel_cs_upper : numpy.ndarray
        Asymptotic confidence sequence for ``rel`` by Fieller inversion of the contrast
        sequences (see the module notes); 0.0 where not ``rel_bounded``, so that a placeholder
        never excludes 0.
    rel_defined : numpy.ndarray of bool
        ``defined``, the control estimate is non-zero and ``rel_se`` is positive.
    rel_bounded : numpy.ndarray of bool
        ``rel_defined`` and the relative confidence sequence is a finite interval (the control
        mean is bounded away from 0 by its own sequence); where False, ``rel_cs_*`` are
        placeholders and no relative bound exists yet.
    rho : numpy.ndarray
        Mixture tuning parameter used for the sequential quantities.
    alpha : float
        Error rate of all intervals and sequences.
    normal_reference : bool
        True when p-values and intervals use the standard normal instead of a t distribution.
    """

    n_control: np.ndarray
    n_treatment: np.ndarray
    mean_control: np.ndarray
    mean_treatment: np.ndarray
    diff: np.ndarray
    diff_se: np.ndarray
    df: np.ndarray
    statistic: np.ndarray
    p_value: np.ndarray
    ci_lower: np.ndarray
    ci_upper: np.ndarray
    cs_lower: np.ndarray
    cs_upper: np.ndarray
    e_value: np.ndarray
    defined: np.ndarray
    rel: np.ndarray
    rel_se: np.ndarray
    rel_ci_lower: np.ndarray
    rel_ci_upper: np.ndarray
    rel_cs_lower: np.ndarray
    rel_cs_upper: np.ndarray
    rel_defined: np.ndarray
    rel_bounded: np.ndarray
    rho: np.ndarray
    alpha: float
    normal_reference: bool

    def __post_init__(self) -> None:
        _coerce_arrays(self)

    _ABSOLUTE = ("diff_se", "df", "statistic", "p_value", "ci_lower", "ci_upper", "cs_lower",
                 "cs_upper", "e_value")
    _RELATIVE = ("rel", "rel_se", "rel_ci_lower", "rel_ci_upper")
    _RELATIVE_SEQUENCE = ("rel_cs_lower", "rel_cs_upper")

    def row(self, index: Any) -> dict[str, Any]:
        """One row as a dictionary of Python scalars, with ``None`` for undefined values.

        Parameters
        ----------
        index : int or tuple of int
            Position of the row in the result arrays.

        Returns
        -------
        dict
            Field name to value. Statistics of the absolute difference are ``None`` where
            ``defined`` is False, those of the relative difference where ``rel_defined`` is
            False, the relative sequence's bounds also where ``rel_bounded`` is False, and
            ``df`` also when ``normal_reference`` is True.
        """
        out: dict[str, Any] = {}
        missing: set[str] = {"df"} if self.normal_reference else set()
        for names, mask in ((self._ABSOLUTE, self.defined), (self._RELATIVE, self.rel_defined),
                            (self._RELATIVE_SEQUENCE, self.rel_bounded)):
            if not bool(mask[index]):
                missing.update(names)
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, np.ndarray):
                value = value[index].item()
            out[f.name] = None if f.name in missing else value
        return out


@dataclass(frozen=True, eq=False)
class ConfidenceSequence:
    """Bounds of an asymptotic confidence sequence, per row.

    Attributes
    ----------
    lower, upper : numpy.ndarray
        ``estimate -/+ radius``.
    radius : numpy.ndarray
        Half-width; 0.0 where not ``defined``.
    rho : numpy.ndarray
        Mixture tuning parameter used.
    defined : numpy.ndarray of bool
        True where ``se > 0`` and ``n > 0``.
    """

    lower: np.ndarray
    upper: np.ndarray
    radius: np.ndarray
    rho: np.ndarray
    defined: np.ndarray

    def __post_init__(self) -> None:
        _coerce_arrays(self)



@dataclass(frozen=True, eq=False)
class GuardrailStatus:
    """Guardrail decision per row.

    Attributes
    ----------
    status : numpy.ndarray of str
        "alert", "warn", "ok" or "undefined".
    alert : numpy.ndarray of bool
        The whole interval lies on the bad side beyond the margin.
    warn : numpy.ndarray of bool
        The interval excludes 0 on the bad side but not the margin.
    defined : numpy.ndarray of bool
        Rows that were judged (the others have status "undefined").
    """

    status: np.ndarray
    alert: np.ndarray
    warn: np.ndarray
    defined: np.ndarray

    def __post_init__(self) -> None:
        _coerce_arrays(self)



@dataclass(frozen=True, eq=False)
class CupedResult:
    """CUPED adjustment of one metric with a pre-period covariate, per row and variant.

    Attributes
    ----------
    theta : numpy.ndarray
        Adjustment coefficient pooled across variants (shape without the variant axis); 0.0
        where not ``theta_defined``.
    theta_defined : numpy.ndarray of bool
        At least two units in total and a covariate with positive pooled variance.
    adjusted : Moments
        Adjusted means and per-unit variances per variant, ready for :func:`compare_means`.
    unadjusted : Moments
        The plain moments of the metric per variant.
    variance_reduction : numpy.ndarray
        ``1 - var_adjusted / var_unadjusted`` per variant; 0.0 where the unadjusted variance is
        0 or fewer than two units. It can be slightly negative when the pooled ``theta`` fits one
        variant worse than no adjustment at all.
    covariate_mean : numpy.ndarray
        Pooled covariate mean used as the centring point (shape without the variant axis).
    """

    theta: np.ndarray
    theta_defined: np.ndarray
    adjusted: Moments
    unadjusted: Moments
    variance_reduction: np.ndarray
    covariate_mean: np.ndarray

    def __post_init__(self) -> None:
        _coerce_arrays(self)



@dataclass(frozen=True, eq=False)
class MultipleTestResult:
    """Result of a false-discovery-rate procedure, per family.

    Attributes
    ----------
    adjusted : numpy.ndarray
        Adjusted p-values (BH) or adjusted levels (e-BH): the smallest ``alpha`` at which the
        hypothesis is rejected, capped at 1.
    rejected : numpy.ndarray of bool
        ``adjusted <= alpha``.
    n_rejected : numpy.ndarray of int
        Number of rejections per family (shape without the family axis).
    alpha : float
        Target false discovery rate.
    """

    adjusted: np.ndarray
    rejected: np.ndarray
    n_rejected: np.ndarray
    alpha: float

    def __post_init__(self) -> None:
        _coerce_arrays(self)



# ------------------------------------------------------------------------------------------------
# input validation
# ------------------------------------------------------------------------------------------------


def _as_float(x: object, name: str) -> np.ndarray:
    try:
        arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError) as exc:
        raise StatsError(f"{name} must be numeric, got {type(x).__name__}") from exc
    if not np.all(np.isfinite(arr)):
        raise StatsError(f"{name} contains NaN or infinite values ({np.sum(~np.isfinite(arr))})")
    return arr


def _as_count(x: object, name: str) -> np.ndarray:
    arr = _as_float(x, name)
    if np.any(arr < 0):
        raise StatsError(f"{name} must be >= 0, found {np.sum(arr < 0)} negative value(s)")
    return arr


def _check_alpha(alpha: object) -> float:
    try:
        a = float(alpha)  # type: ignore[arg-type]
    except (TypeError, ValueError) as exc:
        raise StatsError(f"alpha must be a number in (0, 1), got {alpha!r}") from exc
    if not 0.0 < a < 1.0:
        raise StatsError(f"alpha must be in (0, 1), got {a}")
    return a


def _centred(
    s_ab: np.ndarray,
    s_a: np.ndarray,
    s_b: np.ndarray,
    n: np.ndarray,
    scale: np.ndarray | None,
    name: str,
) -> np.ndarray:
    """Centred cross-product ``s_ab - s_a s_b / n`` (0 for n == 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(n > 0, s_ab - s_a * s_b / np.where(n > 0, n, 1.0), 0.0)
    if scale is not None:  # a sum of squares: must not be negative beyond rounding
        bad = c < -_SS_RTOL * np.maximum(scale, 1.0)
        if np.any(bad):
            raise StatsError(
                f"inconsistent sufficient statistics: {name} < sum**2 / n in {np.sum(bad)} row(s)"
            )
        c = np.maximum(c, 0.0)
    return c


# ------------------------------------------------------------------------------------------------
# moments from sufficient statistics
# ------------------------------------------------------------------------------------------------


def moments(n: object, sum_y: object, sum_y2: object) -> Moments:
    """Mean and unbiased per-unit variance from ``n``, ``sum(y)`` and ``sum(y^2)``.

    Parameters
    ----------
    n : array_like
        Number of units, >= 0.
    sum_y, sum_y2 : array_like
        Sum and sum of squares of the per-unit values; broadcast against ``n``.

    Returns
    -------
    Moments
        ``mean = sum_y / n`` and ``var = (sum_y2 - sum_y^2 / n) / (n - 1)``.

    Raises
    ------
    StatsError
        Non-finite input, negative ``n`` or ``sum_y2``, ``sum_y != 0`` with ``n == 0``, or a sum
        of squares smaller than ``sum_y^2 / n`` beyond rounding error (impossible for real data).

    Notes
    -----
    ``n == 0`` gives mean 0; ``n < 2`` gives variance 0 and ``defined`` False. Zero variance
    (a constant metric) is a valid, defined result; comparisons treat a zero standard error as
    undefined. Rounding error in ``sum_y2 - sum_y^2 / n`` (catastrophic cancellation when the
    mean is large relative to the spread) is clipped at 0; warehouse queries should centre large
    values, or return sums in double precision, to keep it small.
    """
    n_, sy, syy = np.broadcast_arrays(
        _as_count(n, "n"), _as_float(sum_y, "sum_y"), _as_count(sum_y2, "sum_y2")
    )
    if np.any((n_ == 0) & (sy != 0)):
        raise StatsError("sum_y is non-zero in a row with n == 0")
    has = n_ > 0
    mean = np.where(has, sy / np.where(has, n_, 1.0), 0.0)
    ss = _centred(syy, sy, sy, n_, syy, "sum_y2")
    defined = n_ >= 2
    var = np.where(defined, ss / np.where(defined, n_ - 1.0, 1.0), 0.0)
    return Moments(n=n_.astype(float), mean=mean, var=var, defined=defined)


def proportion_moments(n: object, successes: object) -> Moments:
    """Moments of a 0/1 metric from the number of units and of units with value 1.

    Parameters
    ----------
    n : array_like
        Number of units, >= 0.
    successes : array_like
        Number of units with ``y = 1``, ``0 <= successes <= n``.

    Returns
    -------
    Moments
        ``mean = p = successes / n`` and the Bernoulli variance ``var = p (1 - p)`` (divisor
        ``n``, as in the usual two-proportion z-tests).

    Raises
    ------
    StatsError
        Non-finite or negative input, or ``successes > n``.

    Notes
    -----
    ``n == 0`` gives ``p = 0``; ``n < 2`` gives ``defined`` False. ``p`` of 0 or 1 gives
    variance 0.
    """
    n_, s = np.broadcast_arrays(_as_count(n, "n"), _as_count(successes, "successes"))
    if np.any(s > n_):
        raise StatsError(f"successes exceed n in {np.sum(s > n_)} row(s)")
    has = n_ > 0
    p = np.where(has, s / np.where(has, n_, 1.0), 0.0)
    return Moments(n=n_.astype(float), mean=p, var=p * (1.0 - p), defined=n_ >= 2)


def ratio_moments(
    n: object,
    sum_y: object,
    sum_y2: object,
    sum_x: object,
    sum_x2: object,
    sum_xy: object,
) -> RatioMoments:
    """A ratio metric ``sum(y) / sum(x)`` over units and its delta-method variance.

    Parameters
    ----------
    n : array_like
        Number of units (randomisation units, e.g. readers), >= 0.
    sum_y, sum_y2 : array_like
        Sum and sum of squares of the per-unit numerator (e.g. pages read per reader).
    sum_x, sum_x2 : array_like
        Sum and sum of squares of the per-unit denominator (e.g. sessions per reader).
    sum_xy : array_like
        Sum of per-unit products ``x * y``.

    Returns
    -------
    RatioMoments
        ``ratio = R = sum_y / sum_x`` and, with unbiased per-unit moments,
        ``var_ratio = (var_y - 2 R cov_xy + R^2 var_x) / (n mean_x^2)`` [3]_.

    Raises
    ------
    StatsError
        Non-finite input, negative counts or sums of squares, or inconsistent sums.

    Notes
    -----
    The delta method linearises ``R`` around the per-unit means; it treats units as i.i.d.
    (events within a unit may be correlated, which is why the per-unit sums are needed) and
    needs ``mean_x`` away from 0. A variant with ``sum_x == 0`` or fewer than two units is
    undefined: ``ratio`` and ``var_ratio`` are 0 and ``defined`` False. A tiny negative value
    of the linearised variance caused by rounding is clipped to 0.

    References
    ----------
    .. [3] A. Deng, U. Knoblich and J. Lu, "Applying the Delta Method in Metric Analytics: A
       Practical Guide with Novel Ideas", KDD 2018, section 3.
    """
    n_, sy, syy, sx, sxx, sxy = np.broadcast_arrays(
        _as_count(n, "n"),
        _as_float(sum_y, "sum_y"),
        _as_count(sum_y2, "sum_y2"),
        _as_float(sum_x, "sum_x"),
        _as_count(sum_x2, "sum_x2"),
        _as_float(sum_xy, "sum_xy"),
    )
    if np.any((n_ == 0) & ((sy != 0) | (sx != 0))):
        raise StatsError("sum_y or sum_x is non-zero in a row with n == 0")
    defined = (n_ >= 2) & (sx != 0)
    safe_n = np.where(n_ >= 2, n_, 2.0)
    ss_y = _centred(syy, sy, sy, n_, syy, "sum_y2")
    ss_x = _centred(sxx, sx, sx, n_, sxx, "sum_x2")
    sp_xy = _centred(sxy, sx, sy, n_, None, "sum_xy")
    var_y, var_x, cov_xy = ss_y / (safe_n - 1), ss_x / (safe_n - 1), sp_xy / (safe_n - 1)
    safe_sx = np.where(defined, sx, 1.0)
    ratio = np.where(defined, sy / safe_sx, 0.0)
    mean_x = np.where(n_ > 0, sx / np.where(n_ > 0, n_, 1.0), 0.0)
    safe_mx = np.where(defined, mean_x, 1.0)
    lin = var_y - 2.0 * ratio * cov_xy + ratio**2 * var_x
    var_ratio = np.where(defined, np.maximum(lin, 0.0) / (safe_n * safe_mx**2), 0.0)
    return RatioMoments(
        n=n_.astype(float), ratio=ratio, var_ratio=var_ratio, mean_x=mean_x, defined=defined
    )


# ------------------------------------------------------------------------------------------------
# confidence sequence and e-value
# ------------------------------------------------------------------------------------------------


def mixture_rho(n_star: object = DEFAULT_N_STAR, alpha: float = DEFAULT_ALPHA) -> np.ndarray:
    """Mixture tuning parameter ``rho`` that makes the confidence sequence tightest at ``n_star``.

    Parameters
    ----------
    n_star : array_like, default 10_000
        Total number of units (both variants) at which the radius should be smallest, > 0.
    alpha : float, default 0.05
        Error rate of the confidence sequence.

    Returns
    -------
    numpy.ndarray
        ``rho = sqrt(u / n_star)`` where ``u > 0`` solves ``u = log(1 + u) - 2 log(alpha)``
        (for ``alpha = 0.05``, ``u = 8.212``).

    Raises
    ------
    StatsError
        ``n_star`` not positive, or ``alpha`` outside (0, 1).

    Notes
    -----
    The radius at ``n`` is proportional to ``sqrt(g(n rho^2))`` with
    ``g(u) = (1 + 1/u) (log(1 + u) - 2 log alpha)``; setting ``g'(u) = 0`` gives the fixed-point
    equation above, solved exactly here by iteration (a contraction with factor
    ``1 / (1 + u) < 1/5``). One iteration from ``u = -2 log alpha`` gives the closed-form
    approximation ``rho^2 = (-2 log alpha + log(1 - 2 log alpha)) / n_star`` that appears in
    the literature [4]_.

    References
    ----------
    .. [4] I. Waudby-Smith et al., "Time-uniform central limit theory and asymptotic confidence
       sequences", The Annals of Statistics, 52(6), 2024.
    """
    a = _check_alpha(alpha)
    ns = _as_float(n_star, "n_star")
    if np.any(ns <= 0):
        raise StatsError("n_star must be > 0")
    c = -2.0 * np.log(a)
    u = c
    for _ in range(100):
        u_new = np.log1p(u) + c
        if abs(u_new - u) <= 1e-14 * u:
            u = u_new
            break
        u = u_new
    return np.asarray(np.sqrt(u / ns))


def _resolve_rho(rho: object, n_star: object, alpha: float) -> np.ndarray:
    if rho is None:
        return mixture_rho(n_star, alpha)
    r = _as_float(rho, "rho")
    if np.any(r <= 0):
        raise StatsError("rho must be > 0")
    return r


def _radius_factor(n: np.ndarray, rho: np.ndarray, alpha: float) -> np.ndarray:
    """``radius / SE`` for total sample size ``n`` (0 where n == 0)."""
    u = n * rho**2
    safe_u = np.where(u > 0, u, 1.0)
    g = (1.0 + 1.0 / safe_u) * (np.log1p(safe_u) - 2.0 * np.log(alpha))
    return np.where(u > 0, np.sqrt(g), 0.0)


def _log_e(z: np.ndarray, n: np.ndarray, rho: np.ndarray) -> np.ndarray:
    """Log of the normal-mixture martingale for standardised statistic ``z`` at ``n`` units."""
    u = n * rho**2
    log_e = -0.5 * np.log1p(u) + 0.5 * z**2 * u / (1.0 + u)
    return np.minimum(log_e, LOG_E_VALUE_CAP)


def confidence_sequence(
    estimate: object,
    se: object,
    n: object,
    *,
    alpha: float = DEFAULT_ALPHA,
    n_star: object = DEFAULT_N_STAR,
    rho: object = None,
) -> ConfidenceSequence:
    """Asymptotic confidence sequence for an asymptotically linear estimate from its SE.

    Parameters
    ----------
    estimate : array_like
        Point estimate at the current look (e.g. a difference of means).
    se : array_like
        Its standard error at the current look, >= 0.
    n : array_like
        Total number of units behind the estimate (both variants together), >= 0.
    alpha : float, default 0.05
        The probability of the sequence *ever* missing the true value is asymptotically at most
        ``alpha``.
    n_star : array_like, default 10_000
        Total units at which the sequence should be tightest; ignored if ``rho`` is given.
    rho : array_like, optional
        Mixture tuning parameter (> 0) to use instead of the one derived from ``n_star``.

    Returns
    -------
    ConfidenceSequence
        ``estimate -/+ radius`` with
        ``radius = se * sqrt((n rho^2 + 1) / (n rho^2) * (log(n rho^2 + 1) - 2 log alpha))``.

    Raises
    ------
    StatsError
        Non-finite input, negative ``se`` or ``n``, bad ``alpha``, ``n_star`` or ``rho``.

    Notes
    -----
    This is the Gaussian-mixture asymptotic confidence sequence of [4]_ (Theorem 2.2) written
    in terms of the standard error: the per-unit standard deviation is estimated by
    ``se * sqrt(n)`` (see the module notes for the two-sample construction and its
    assumptions). Rows with ``se == 0`` or ``n == 0`` get radius 0, bounds equal to
    ``estimate`` and ``defined`` False. At every ``n`` the radius exceeds the fixed-horizon
    normal radius ``z_{1 - alpha/2} * se``; at ``n_star`` and ``alpha = 0.05`` it is about
    ``3.0 * se`` instead of ``1.96 * se``.

    References
    ----------
    .. [4] I. Waudby-Smith, D. Arbour, R. Sinha, E. H. Kennedy and A. Ramdas, "Time-uniform
       central limit theory and asymptotic confidence sequences", The Annals of Statistics,
       52(6), 2024.
    """
    a = _check_alpha(alpha)
    est, se_, n_, r = np.broadcast_arrays(
        _as_float(estimate, "estimate"),
        _as_count(se, "se"),
        _as_count(n, "n"),
        _resolve_rho(rho, n_star, a),
    )
    defined = (se_ > 0) & (n_ > 0)
    radius = np.where(defined, se_ * _radius_factor(n_, r, a), 0.0)
    return ConfidenceSequence(
        lower=est - radius, upper=est + radius, radius=radius, rho=np.array(r), defined=defined
    )


def mixture_e_value(
    estimate: object,
    se: object,
    n: object,
    *,
    null: object = 0.0,
    alpha: float = DEFAULT_ALPHA,
    n_star: object = DEFAULT_N_STAR,
    rho: object = None,
) -> np.ndarray:
    """Gaussian-mixture e-value against ``estimate == null``, dual to :func:`confidence_sequence`.

    Parameters
    ----------
    estimate, se, n : array_like
        As for :func:`confidence_sequence`.
    null : array_like, default 0.0
        Hypothesised value of the estimand.
    alpha : float, default 0.05
        Only used to derive ``rho`` from ``n_star`` so that the e-value matches the confidence
        sequence at this level.
    n_star : array_like, default 10_000
        As for :func:`confidence_sequence`.
    rho : array_like, optional
        Mixture tuning parameter to use instead of the one derived from ``n_star``.

    Returns
    -------
    numpy.ndarray
        ``E = (1 + n rho^2)^(-1/2) * exp(z^2 n rho^2 / (2 (1 + n rho^2)))`` with
        ``z = (estimate - null) / se``, capped at ``exp(LOG_E_VALUE_CAP)``; 1.0 where
        ``se == 0`` or ``n == 0``.

    Notes
    -----
    ``E`` is Robbins' normal mixture ``integral exp(lam S - lam^2 n / 2) dN(0, rho^2)(lam)`` of
    the standardised sum ``S = sqrt(n) z`` [5]_. Under the null it is (asymptotically) a
    nonnegative martingale with mean 1, so by Ville's inequality [9]_ the chance that it ever
    exceeds ``1 / alpha`` is at most ``alpha``; ``E >= 1 / alpha`` holds exactly when ``null``
    lies outside the confidence sequence with the same ``rho`` and ``alpha``. It may therefore
    be monitored at every look and passed to :func:`ebh`.

    References
    ----------
    .. [5] H. Robbins, "Statistical methods related to the law of the iterated logarithm", The
       Annals of Mathematical Statistics, 41(5), 1397-1409, 1970.
    .. [9] J. Ville, "Etude critique de la notion de collectif", Gauthier-Villars, 1939.
    """
    a = _check_alpha(alpha)
    est, se_, n_, h0, r = np.broadcast_arrays(
        _as_float(estimate, "estimate"),
        _as_count(se, "se"),
        _as_count(n, "n"),
        _as_float(null, "null"),
        _resolve_rho(rho, n_star, a),
    )
    defined = (se_ > 0) & (n_ > 0)
    z = np.where(defined, (est - h0) / np.where(defined, se_, 1.0), 0.0)
    return np.where(defined, np.exp(_log_e(z, n_, r)), 1.0)


# ------------------------------------------------------------------------------------------------
# two-sample comparisons
# ------------------------------------------------------------------------------------------------


def _fieller(
    m_c: np.ndarray,
    m_t: np.ndarray,
    v_c: np.ndarray,
    v_t: np.ndarray,
    k: np.ndarray,
    defined: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bounds on ``m_t / m_c - 1`` from the contrast sequences ``m_t - theta m_c`` (radius
    ``k sqrt(v_t + theta^2 v_c)``), as ``(bounded, lower, upper)``; see the module notes [10]_."""
    a = m_c**2 - k**2 * v_c
    bounded = defined & (a > 0)
    safe_a = np.where(bounded, a, 1.0)
    half = k * np.sqrt(np.maximum(m_t**2 * v_c + safe_a * v_t, 0.0))
    lower = np.where(bounded, (m_t * m_c - half) / safe_a - 1.0, 0.0)
    upper = np.where(bounded, (m_t * m_c + half) / safe_a - 1.0, 0.0)
    ok = bounded & np.isfinite(lower) & np.isfinite(upper)
    return ok, np.where(ok, lower, 0.0), np.where(ok, upper, 0.0)


def _assemble(
    n_c: np.ndarray,
    n_t: np.ndarray,
    est_c: np.ndarray,
    est_t: np.ndarray,
    v_c: np.ndarray,
    v_t: np.ndarray,
    arms_defined: np.ndarray,
    se_fixed: np.ndarray,
    df: np.ndarray | None,
    alpha: float,
    n_star: object,
    rho: object,
) -> EffectEstimate:
    """Common tail of the comparisons; ``v_*`` are variances of the per-variant estimators."""
    r = _resolve_rho(rho, n_star, alpha)
    df_in = np.zeros(()) if df is None else df
    n_c, n_t, est_c, est_t, v_c, v_t, arms_defined, se_fixed, df_in, r = np.broadcast_arrays(
        n_c, n_t, est_c, est_t, v_c, v_t, arms_defined, se_fixed, df_in, r
    )
    se_seq = np.sqrt(v_c + v_t)
    defined = arms_defined & (se_seq > 0) & (se_fixed > 0)
    one = np.ones_like(est_c)
    diff = np.where((n_c > 0) & (n_t > 0), est_t - est_c, 0.0)

    # fixed horizon
    se_f = np.where(defined, se_fixed, 0.0)
    stat = np.where(defined, diff / np.where(defined, se_fixed, 1.0), 0.0)
    if df is None:
        normal = True
        p = 2.0 * stats.norm.sf(np.abs(stat))
        crit = stats.norm.ppf(1.0 - alpha / 2.0) * one
        df_out = np.zeros_like(est_c)
    else:
        normal = False
        safe_df = np.where(defined & (df_in > 0), df_in, 1.0)
        p = 2.0 * stats.t.sf(np.abs(stat), safe_df)
        crit = stats.t.ppf(1.0 - alpha / 2.0, safe_df)
        df_out = np.where(defined, df_in, 0.0)
    p = np.where(defined, np.clip(p, 0.0, 1.0), 1.0)
    half = crit * se_f

    # sequential (always with the unpooled standard error)
    n_tot = n_c + n_t
    factor = _radius_factor(n_tot, r, alpha)
    se_s = np.where(defined, se_seq, 0.0)
    radius = factor * se_s
    z_seq = np.where(defined, diff / np.where(defined, se_seq, 1.0), 0.0)
    e_value = np.where(defined, np.exp(_log_e(z_seq, n_tot, r)), 1.0)

    # relative difference, delta method
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        safe_c = np.where(est_c != 0, est_c, 1.0)
        rel_raw = est_t / safe_c - 1.0
        rel_var = v_t / safe_c**2 + est_t**2 * v_c / safe_c**4
        rel_se_raw = np.sqrt(rel_var)
    rel_defined = (
        defined & (est_c != 0) & np.isfinite(rel_raw) & np.isfinite(rel_se_raw) & (rel_se_raw > 0)
    )
    rel = np.where(rel_defined, rel_raw, 0.0)
    rel_se = np.where(rel_defined, rel_se_raw, 0.0)
    z_crit = stats.norm.ppf(1.0 - alpha / 2.0)
    rel_half = z_crit * rel_se
    zero = np.zeros_like(rel)
    rel_bounded, rel_cs_lo, rel_cs_up = _fieller(est_c, est_t, v_c, v_t, factor, rel_defined)

    return EffectEstimate(
        n_control=n_c * one,
        n_treatment=n_t * one,
        mean_control=est_c * one,
        mean_treatment=est_t * one,
        diff=diff,
        diff_se=se_f,
        df=df_out,
        statistic=stat,
        p_value=p,
        ci_lower=diff - half,
        ci_upper=diff + half,
        cs_lower=diff - radius,
        cs_upper=diff + radius,
        e_value=e_value,
        defined=defined,
        rel=rel,
        rel_se=rel_se,
        rel_ci_lower=np.where(rel_defined, rel - rel_half, zero),
        rel_ci_upper=np.where(rel_defined, rel + rel_half, zero),
        rel_cs_lower=rel_cs_lo,
        rel_cs_upper=rel_cs_up,
        rel_defined=rel_defined,
        rel_bounded=rel_bounded,
        rho=np.array(r, dtype=float),
        alpha=alpha,
        normal_reference=normal,
    )


def _check_moments(m: object, name: str) -> Moments:
    if not isinstance(m, Moments):
        raise StatsError(f"{name} must be a Moments object, got {type(m).__name__}")
    return m


def compare_means(
    control: Moments,
    treatment: Moments,
    *,
    pooled: bool = False,
    alpha: float = DEFAULT_ALPHA,
    n_star: object = DEFAULT_N_STAR,
    rho: object = None,
) -> EffectEstimate:
    """Compare the mean of a per-unit metric, treatment vs control (Welch or pooled t).

    Parameters
    ----------
    control, treatment : Moments
        From :func:`moments` (or :func:`cuped`); shapes broadcast.
    pooled : bool, default False
        False: Welch standard error ``sqrt(v_c / n_c + v_t / n_t)`` with Welch-Satterthwaite
        degrees of freedom [1]_ [2]_. True: pooled-variance (Student) standard error
        ``s_p sqrt(1 / n_c + 1 / n_t)`` with ``n_c + n_t - 2`` degrees of freedom, which assumes
        equal variances.
    alpha : float, default 0.05
        Error rate of the intervals and the confidence sequences.
    n_star, rho :
        Tuning of the confidence sequence, see :func:`confidence_sequence`.

    Returns
    -------
    EffectEstimate
        ``diff = mean_t - mean_c``; ``rel = mean_t / mean_c - 1`` with delta-method variance
        ``v_t / (n_t m_c^2) + m_t^2 v_c / (n_c m_c^4)``; fixed-horizon t statistic, p-value and
        interval; confidence sequences and e-value (always from the Welch standard error);
        the relative sequence by Fieller inversion (module notes).

    Raises
    ------
    StatsError
        Arguments are not :class:`Moments`, or bad tuning parameters.

    Notes
    -----
    A row is undefined when a variant has fewer than two units or both variances are 0 (for
    example an all-zero metric); see :class:`EffectEstimate` for the placeholders. The
    relative difference is undefined when the control mean is 0. With one variance 0 the Welch
    degrees of freedom are those of the other variant, ``n - 1``.

    References
    ----------
    .. [1] B. L. Welch, Biometrika, 34(1-2), 28-35, 1947.
    .. [2] F. E. Satterthwaite, Biometrics Bulletin, 2(6), 110-114, 1946.
    """
    a = _check_alpha(alpha)
    c, t = _check_moments(control, "control"), _check_moments(treatment, "treatment")
    n_c, n_t, m_c, m_t, s2_c, s2_t, d_c, d_t = np.broadcast_arrays(
        c.n, t.n, c.mean, t.mean, c.var, t.var, c.defined, t.defined
    )
    arms = d_c & d_t
    safe_nc, safe_nt = np.where(arms, n_c, 2.0), np.where(arms, n_t, 2.0)
    v_c = np.where(arms, s2_c / safe_nc, 0.0)
    v_t = np.where(arms, s2_t / safe_nt, 0.0)
    if pooled:
        sp2 = ((safe_nc - 1) * s2_c + (safe_nt - 1) * s2_t) / (safe_nc + safe_nt - 2)
        se = np.where(arms, np.sqrt(sp2 * (1.0 / safe_nc + 1.0 / safe_nt)), 0.0)
        df = np.where(arms, n_c + n_t - 2.0, 0.0)
    else:
        se = np.sqrt(v_c + v_t)
        denom = v_c**2 / (safe_nc - 1) + v_t**2 / (safe_nt - 1)
        df = np.where(denom > 0, (v_c + v_t) ** 2 / np.where(denom > 0, denom, 1.0), 0.0)
    return _assemble(n_c, n_t, m_c, m_t, v_c, v_t, arms, se, df, a, n_star, rho)


def compare_proportions(
    control: Moments,
    treatment: Moments,
    *,
    pooled: bool = False,
    alpha: float = DEFAULT_ALPHA,
    n_star: object = DEFAULT_N_STAR,
    rho: object = None,
) -> EffectEstimate:
    """Compare a proportion (0/1 metric), treatment vs control, with a two-proportion z-test.

    Parameters
    ----------
    control, treatment : Moments
        From :func:`proportion_moments` (or :func:`moments` of 0/1 data; the variance is
        recomputed as ``p (1 - p)`` from the mean).
    pooled : bool, default False
        False: unpooled (Wald) standard error ``sqrt(p_c (1 - p_c) / n_c + p_t (1 - p_t) / n_t)``.
        True: standard error under the null of equal proportions,
        ``sqrt(pbar (1 - pbar) (1 / n_c + 1 / n_t))`` with the pooled proportion ``pbar``.
    alpha : float, default 0.05
        Error rate of the intervals and the confidence sequences.
    n_star, rho :
        Tuning of the confidence sequence, see :func:`confidence_sequence`.

    Returns
    -------
    EffectEstimate
        With ``normal_reference`` True and ``df`` 0.

    Raises
    ------
    StatsError
        A mean outside [0, 1], arguments that are not :class:`Moments`, or bad tuning.

    Notes
    -----
    Undefined when a variant has fewer than two units or when both proportions are 0 or 1
    (no variability: the unpooled standard error is 0). The relative difference is undefined
    when the control proportion is 0.
    """
    a = _check_alpha(alpha)
    c, t = _check_moments(control, "control"), _check_moments(treatment, "treatment")
    n_c, n_t, p_c, p_t, d_c, d_t = np.broadcast_arrays(
        c.n, t.n, c.mean, t.mean, c.defined, t.defined
    )
    if np.any((p_c < 0) | (p_c > 1) | (p_t < 0) | (p_t > 1)):
        raise StatsError("compare_proportions needs means in [0, 1]")
    arms = d_c & d_t
    safe_nc, safe_nt = np.where(arms, n_c, 2.0), np.where(arms, n_t, 2.0)
    v_c = np.where(arms, p_c * (1 - p_c) / safe_nc, 0.0)
    v_t = np.where(arms, p_t * (1 - p_t) / safe_nt, 0.0)
    if pooled:
        pbar = (n_c * p_c + n_t * p_t) / (safe_nc + safe_nt)
        se = np.where(arms, np.sqrt(pbar * (1 - pbar) * (1 / safe_nc + 1 / safe_nt)), 0.0)
    else:
        se = np.sqrt(v_c + v_t)
    return _assemble(n_c, n_t, p_c, p_t, v_c, v_t, arms, se, None, a, n_star, rho)


def compare_ratios(
    control: RatioMoments,
    treatment: RatioMoments,
    *,
    alpha: float = DEFAULT_ALPHA,
    n_star: object = DEFAULT_N_STAR,
    rho: object = None,
) -> EffectEstimate:
    """Compare a ratio metric ``sum(y) / sum(x)``, treatment vs control (delta method).

    Parameters
    ----------
    control, treatment : RatioMoments
        From :func:`ratio_moments`.
    alpha : float, default 0.05
        Error rate of the intervals and the confidence sequences.
    n_star, rho :
        Tuning of the confidence sequence, see :func:`confidence_sequence`.

    Returns
    -------
    EffectEstimate
        ``diff = R_t - R_c`` with ``SE = sqrt(V_t + V_c)``; ``rel = R_t / R_c - 1`` with
        ``Var(rel) = V_t / R_c^2 + R_t^2 V_c / R_c^4`` [3]_ (fixed-horizon interval; the
        relative sequence by Fieller inversion, module notes); normal reference.

    Raises
    ------
    StatsError
        Arguments that are not :class:`RatioMoments`, or bad tuning parameters.

    Notes
    -----
    Undefined when either variant's ratio is undefined (``sum_x == 0`` or ``n < 2``) or both
    delta-method variances are 0. ``rel`` is undefined when the control ratio is 0. The sample
    size of the confidence sequence is the number of units ``n_c + n_t``.

    References
    ----------
    .. [3] A. Deng, U. Knoblich and J. Lu, "Applying the Delta Method in Metric Analytics: A
       Practical Guide with Novel Ideas", KDD 2018.
    """
    a = _check_alpha(alpha)
    for m, name in ((control, "control"), (treatment, "treatment")):
        if not isinstance(m, RatioMoments):
            raise StatsError(f"{name} must be a RatioMoments object, got {type(m).__name__}")
    n_c, n_t, r_c, r_t, v_c, v_t, d_c, d_t = np.broadcast_arrays(
        control.n, treatment.n, control.ratio, treatment.ratio, control.var_ratio,
        treatment.var_ratio, control.defined, treatment.defined,
    )
    arms = d_c & d_t
    v_c, v_t = np.where(arms, v_c, 0.0), np.where(arms, v_t, 0.0)
    return _assemble(n_c, n_t, r_c, r_t, v_c, v_t, arms, np.sqrt(v_c + v_t), None, a, n_star, rho)


# ------------------------------------------------------------------------------------------------
# guardrail decision
# ------------------------------------------------------------------------------------------------


def guardrail_status(
    lower: object,
    upper: object,
    bad_direction: object,
    *,
    margin: object = 0.02,
    defined: object = None,
) -> GuardrailStatus:
    """Classify relative-effect bounds of a guardrail metric as "alert", "warn" or "ok".

    Parameters
    ----------
    lower, upper : array_like
        Bounds on the relative difference ``treatment / control - 1`` (fractions), normally
        ``EffectEstimate.rel_cs_lower`` / ``rel_cs_upper`` so that the decision may be re-taken
        at every look.
    bad_direction : str or array_like of str
        "increase" (e.g. the loan-failure rate) or "decrease" (e.g. books borrowed per reader).
    margin : array_like, default 0.02
        Relative non-inferiority margin, >= 0 (0.02 = a 2% relative change).
    defined : array_like of bool, optional
        Rows to judge (normally ``EffectEstimate.rel_defined``); the others get "undefined".

    Returns
    -------
    GuardrailStatus
        For "increase" bad: "alert" if ``lower > margin``, "warn" if ``0 < lower <= margin``.
        For "decrease" bad: "alert" if ``upper < -margin``, "warn" if ``-margin <= upper < 0``.
        "ok" otherwise, in particular for any interval that lies on the good side: a
        significant improvement never raises an alert.

    Raises
    ------
    StatsError
        Unknown direction, negative or non-finite margin, ``lower > upper``, or non-finite bounds.

    Notes
    -----
    The rule is stated on the relative scale so that one margin fits metrics of any unit. An
    "alert" means the data are incompatible with any harm smaller than the margin; a "warn"
    means harm is established but may be within the tolerated margin. Comparisons are strict,
    so an interval touching 0 or the margin does not cross it.
    """
    lo, up = np.broadcast_arrays(_as_float(lower, "lower"), _as_float(upper, "upper"))
    if np.any(lo > up):
        raise StatsError(f"lower > upper in {np.sum(lo > up)} row(s)")
    mg = _as_float(margin, "margin")
    if np.any(mg < 0):
        raise StatsError("margin must be >= 0")
    direction = np.asarray(bad_direction, dtype=str)
    unknown = ~np.isin(direction, ["increase", "decrease"])
    if np.any(unknown):
        raise StatsError(
            f"bad_direction must be 'increase' or 'decrease', got {direction[unknown].flat[0]!r}"
        )
    ok_mask = np.ones(lo.shape, bool) if defined is None else np.asarray(defined, dtype=bool)
    lo, up, mg, inc, ok_mask = np.broadcast_arrays(lo, up, mg, direction == "increase", ok_mask)
    bad_bound = np.where(inc, lo, -up)  # > 0 means significantly on the bad side
    alert = ok_mask & (bad_bound > mg)
    warn = ok_mask & (bad_bound > 0) & ~alert
    status = np.where(alert, "alert", np.where(warn, "warn", "ok")).astype("<U9")
    status = np.where(ok_mask, status, "undefined")
    return GuardrailStatus(status=status, alert=alert, warn=warn, defined=ok_mask.copy())


# ------------------------------------------------------------------------------------------------
# CUPED
# ------------------------------------------------------------------------------------------------


def cuped(
    n: object,
    sum_y: object,
    sum_y2: object,
    sum_c: object,
    sum_c2: object,
    sum_yc: object,
    *,
    axis: int = -1,
) -> CupedResult:
    """CUPED adjustment with a pre-experiment covariate, from per-variant sufficient statistics.

    Parameters
    ----------
    n : array_like
        Units per variant; the variants of one experiment lie along ``axis``.
    sum_y, sum_y2 : array_like
        Sum and sum of squares of the metric ``y``.
    sum_c, sum_c2 : array_like
        Sum and sum of squares of the pre-period covariate ``c`` (e.g. the same metric in the
        weeks before the experiment; 0 for units without history).
    sum_yc : array_like
        Sum of per-unit products ``y * c``.
    axis : int, default -1
        Variant axis; ``theta`` is pooled over it.

    Returns
    -------
    CupedResult
        ``theta = cov(y, c) / var(c)`` over all units of all variants together [6]_; adjusted
        mean ``mean_y - theta (mean_c - pooled_mean_c)`` and per-unit variance
        ``var_y - 2 theta cov_yc + theta^2 var_c`` per variant (unbiased moments), and
        ``variance_reduction = 1 - var_adjusted / var_y``.

    Raises
    ------
    StatsError
        Non-finite input, negative counts or sums of squares, or inconsistent sums.

    Notes
    -----
    Because the covariate is measured before assignment, its mean is the same in all variants
    in expectation and the adjusted difference of means is unbiased for the treatment effect.
    Pooling ``theta`` across variants keeps the same coefficient in every variant; its own
    sampling error is ignored in the variances (an ``O(1/n)`` effect). With a covariate of
    zero pooled variance, or fewer than two units in total, ``theta`` is 0, the adjusted
    moments equal the unadjusted ones and ``theta_defined`` is False. With correlation ``r``
    between ``y`` and ``c`` the variance falls by the factor ``1 - r^2``.

    References
    ----------
    .. [6] A. Deng, Y. Xu, R. Kohavi and T. Walker, "Improving the Sensitivity of Online
       Controlled Experiments by Utilizing Pre-Experiment Data", WSDM 2013, section 3.
    """
    arrs = np.broadcast_arrays(
        _as_count(n, "n"),
        _as_float(sum_y, "sum_y"),
        _as_count(sum_y2, "sum_y2"),
        _as_float(sum_c, "sum_c"),
        _as_count(sum_c2, "sum_c2"),
        _as_float(sum_yc, "sum_yc"),
    )
    if arrs[0].ndim == 0:
        raise StatsError("cuped needs a variant axis (arrays of at least one dimension)")
    n_, sy, syy, sc, scc, syc = (np.moveaxis(x, axis, -1) for x in arrs)
    if np.any((n_ == 0) & (sc != 0)):
        raise StatsError("sum_c is non-zero in a row with n == 0")
    y = moments(n_, sy, syy)
    cm = moments(n_, sc, scc)
    safe_n1 = np.where(y.defined, n_ - 1.0, 1.0)
    cov_v = np.where(y.defined, _centred(syc, sy, sc, n_, None, "sum_yc") / safe_n1, 0.0)

    N, Sy, Sc = n_.sum(-1), sy.sum(-1), sc.sum(-1)
    Scc, Syc = scc.sum(-1), syc.sum(-1)
    ss_c = _centred(Scc, Sc, Sc, N, Scc, "sum_c2")
    sp_yc = _centred(Syc, Sy, Sc, N, None, "sum_yc")
    theta_defined = (N >= 2) & (ss_c > 0)
    theta = np.where(theta_defined, sp_yc / np.where(theta_defined, ss_c, 1.0), 0.0)
    mu_c = np.where(N > 0, Sc / np.where(N > 0, N, 1.0), 0.0)

    th = theta[..., None]
    mean_adj = np.where(n_ > 0, y.mean - th * (cm.mean - mu_c[..., None]), 0.0)
    var_adj = np.where(
        y.defined, np.maximum(y.var - 2.0 * th * cov_v + th**2 * cm.var, 0.0), 0.0
    )
    vr = np.where(y.var > 0, 1.0 - var_adj / np.where(y.var > 0, y.var, 1.0), 0.0)

    def back(x: np.ndarray) -> np.ndarray:
        return np.moveaxis(x, -1, axis)

    adjusted = Moments(n=back(y.n), mean=back(mean_adj), var=back(var_adj),
                       defined=back(y.defined))
    unadjusted = Moments(n=back(y.n), mean=back(y.mean), var=back(y.var), defined=back(y.defined))
    return CupedResult(
        theta=theta,
        theta_defined=theta_defined,
        adjusted=adjusted,
        unadjusted=unadjusted,
        variance_reduction=back(vr),
        covariate_mean=mu_c,
    )


# ------------------------------------------------------------------------------------------------
# multiplicity
# ------------------------------------------------------------------------------------------------


def _family_view(x: np.ndarray, axis: int) -> np.ndarray:
    if x.ndim == 0:
        raise StatsError("a family of hypotheses must be an array of at least one dimension")
    return np.moveaxis(x, axis, -1)


def _unsort(sorted_vals: np.ndarray, order: np.ndarray) -> np.ndarray:
    out = np.empty_like(sorted_vals)
    np.put_along_axis(out, order, sorted_vals, axis=-1)
    return out


def bh(p_values: object, *, alpha: float = DEFAULT_ALPHA, axis: int = -1) -> MultipleTestResult:
    """Benjamini-Hochberg adjusted p-values and rejections, per family.

    Parameters
    ----------
    p_values : array_like
        Fixed-horizon p-values in [0, 1]; each slice along ``axis`` is one family.
    alpha : float, default 0.05
        Target false discovery rate.
    axis : int, default -1
        Axis that runs over the hypotheses of a family.

    Returns
    -------
    MultipleTestResult
        ``adjusted_(i) = min_{k >= i} min(1, m p_(k) / k)`` for the sorted p-values [7]_;
        rejecting ``adjusted <= alpha`` is the BH step-up procedure.

    Raises
    ------
    StatsError
        p-values outside [0, 1] or non-finite, a zero-dimensional input, or bad ``alpha``.

    Notes
    -----
    FDR control holds for independent or positively dependent (PRDS) p-values [7]_. An empty
    family gives empty arrays and zero rejections. Valid only for p-values computed once, at a
    planned horizon; for monitored guardrails use e-values and :func:`ebh`.

    References
    ----------
    .. [7] Y. Benjamini and Y. Hochberg, Journal of the Royal Statistical Society B, 57(1),
       289-300, 1995.
    """
    a = _check_alpha(alpha)
    p = _family_view(_as_float(p_values, "p_values"), axis)
    if np.any((p < 0) | (p > 1)):
        raise StatsError("p_values must lie in [0, 1]")
    m = p.shape[-1]
    if m == 0:
        adj = p.copy()
    else:
        order = np.argsort(p, axis=-1, kind="stable")
        ps = np.take_along_axis(p, order, axis=-1)
        q = ps * m / np.arange(1, m + 1)
        q = np.minimum.accumulate(q[..., ::-1], axis=-1)[..., ::-1]
        adj = _unsort(np.minimum(q, 1.0), order)
    if m == 0:
        rejected = np.zeros(p.shape, dtype=bool)
    else:
        # the step-up rule on the p-values themselves (p_(k) <= k alpha / m), so that a p-value
        # exactly at its boundary is rejected whatever the rounding of m p / k
        below = ps <= a * np.arange(1, m + 1) / m
        k_max = np.where(below.any(axis=-1), m - np.argmax(below[..., ::-1], axis=-1), 0)
        rejected = _unsort(np.arange(m) < k_max[..., None], order)
    return MultipleTestResult(
        adjusted=np.moveaxis(adj, -1, axis),
        rejected=np.moveaxis(rejected, -1, axis),
        n_rejected=rejected.sum(axis=-1),
        alpha=a,
    )


def ebh(e_values: object, *, alpha: float = DEFAULT_ALPHA, axis: int = -1) -> MultipleTestResult:
    """e-BH procedure of Wang and Ramdas, per family.

    Parameters
    ----------
    e_values : array_like
        Nonnegative e-values (``+inf`` allowed); each slice along ``axis`` is one family.
    alpha : float, default 0.05
        Target false discovery rate.
    axis : int, default -1
        Axis that runs over the hypotheses of a family.

    Returns
    -------
    MultipleTestResult
        Rejects the ``k*`` hypotheses with the largest e-values, where
        ``k* = max{k : e_[k] >= m / (alpha k)}`` and ``e_[k]`` is the k-th largest e-value
        [8]_ (0 if no such k). ``adjusted`` is the smallest ``alpha`` at which each
        hypothesis would be rejected, ``min_{k >= rank} m / (k e_[k])``, capped at 1.

    Raises
    ------
    StatsError
        Negative or NaN e-values, a zero-dimensional input, or bad ``alpha``.

    Notes
    -----
    e-BH controls the FDR at ``alpha`` under arbitrary dependence between the e-values [8]_,
    which suits guardrails of one experiment (computed on the same units). The mixture
    e-values of :func:`mixture_e_value` are (asymptotically) e-processes, so by optional
    stopping their values at a stopping time, such as the first look at which e-BH rejects
    anything, are still e-values and e-BH applied there keeps its guarantee. An e-value of 0
    gives ``adjusted = 1``; ties get equal adjusted values.

    References
    ----------
    .. [8] R. Wang and A. Ramdas, "False discovery rate control with e-values", Journal of the
       Royal Statistical Society B, 84(3), 822-852, 2022.
    """
    a = _check_alpha(alpha)
    try:
        e = np.asarray(e_values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise StatsError("e_values must be numeric") from exc
    if np.any(np.isnan(e)) or np.any(e < 0):
        raise StatsError("e_values must be nonnegative numbers (NaN is not allowed)")
    e = _family_view(e, axis)
    m = e.shape[-1]
    if m == 0:
        adj = e.copy()
    else:
        order = np.argsort(-e, axis=-1, kind="stable")
        es = np.take_along_axis(e, order, axis=-1)
        k = np.arange(1, m + 1)
        with np.errstate(divide="ignore", over="ignore"):
            level = np.where(es > 0, m / (k * np.where(es > 0, es, 1.0)), np.inf)
        level = np.minimum.accumulate(level[..., ::-1], axis=-1)[..., ::-1]
        adj = _unsort(np.minimum(level, 1.0), order)
    rejected = adj <= a
    return MultipleTestResult(
        adjusted=np.moveaxis(adj, -1, axis),
        rejected=np.moveaxis(rejected, -1, axis),
        n_rejected=rejected.sum(axis=-1),
        alpha=a,
    )
