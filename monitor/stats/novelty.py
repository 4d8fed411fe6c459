"""Time-varying treatment effects: trend by age since first exposure, heterogeneity, long-run value.

The input is one treatment effect estimate per *age* (whole days since a unit's
first exposure: day 0, 1, 2, ...) with its standard error, for many rows at once
(experiment x metric x treatment). Three questions are answered per row:

* Does the effect change with age? Weighted least squares of the effect on
  ``log(1 + age)`` with inverse-variance weights (a fixed-effect meta-regression
  [1]_ [2]_), and a z-test of its slope.
* How heterogeneous are the per-age effects? Cochran's Q [3]_, I^2 [4]_ and
  the DerSimonian-Laird between-age variance tau^2 [5]_.
* What does the effect converge to? A fitted exponential approach
  ``effect(a) = long_run + (early - long_run) * exp(-a / tau)`` (the shape of a
  novelty effect that wears off or of a learning effect that builds up [6]_),
  profiled over a grid of time constants ``tau``, with an interval that takes
  the uncertainty in ``tau`` into account (below).

Every function is vectorised over the leading axis; ages that are not usable
(``mask`` False) are left out row by row. No NaN or infinity is returned.

References
----------
.. [1] S. G. Thompson and J. P. T. Higgins, "How should meta-regression analyses
   be undertaken and interpreted?", Statistics in Medicine, 21(11), 1559-1573, 2002.
.. [2] L. V. Hedges and I. Olkin, Statistical Methods for Meta-Analysis,
   Academic Press, 1985, chapter 8 (fixed-effect models with a covariate).
.. [3] W. G. Cochran, "The combination of estimates from different experiments",
   Biometrics, 10(1), 101-129, 1954.
.. [4] J. P. T. Higgins and S. G. Thompson, "Quantifying heterogeneity in a
   meta-analysis", Statistics in Medicine, 21(11), 1539-1558, 2002.
.. [5] R. DerSimonian and N. Laird, "Meta-analysis in clinical trials",
   Controlled Clinical Trials, 7(3), 177-188, 1986.
.. [6] R. Kohavi, D. Tang and Y. Xu, Trustworthy Online Controlled Experiments,
   Cambridge University Press, 2020, chapter 23, "Measuring Long-Term
   Treatment Effects" (novelty and primacy effects; chapter number recalled
   from memory).
.. [7] D. J. Venzon and S. H. Moolgavkar, "A method for computing
   profile-likelihood-based confidence intervals", Applied Statistics, 37(1),
   87-94, 1988.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from monitor.stats import StatsError
from monitor.stats.trend import weighted_sums

__all__ = [
    "AgeTrend",
    "ConvergedEffect",
    "age_trend",
    "converged_effect",
    "first_judgeable_look",
    "look_alpha",
]

#: Time constants (days) tried by :func:`converged_effect` (geometric grid).
DEFAULT_TAUS = np.geomspace(0.25, 60.0, 49)


def _inputs(effect: object, se: object, age: object, mask: object | None
            ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    r = np.atleast_2d(np.asarray(effect, dtype=np.float64))
    s = np.atleast_2d(np.asarray(se, dtype=np.float64))
    a = np.broadcast_to(np.asarray(age, dtype=np.float64), r.shape)
    if r.shape != s.shape:
        raise StatsError(f"effect and se must have one shape, got {r.shape} and {s.shape}")
    m = np.ones(r.shape, dtype=bool) if mask is None else np.broadcast_to(np.asarray(mask, dtype=bool), r.shape)
    ok = m & np.isfinite(r) & np.isfinite(s) & (s > 0) & np.isfinite(a) & (a >= 0)
    return np.where(ok, r, 0.0), np.where(ok, s, 1.0), np.where(ok, a, 0.0), ok


@dataclass(frozen=True, eq=False)
class AgeTrend:
    """Trend and heterogeneity of per-age effects, per row.

    Attributes
    ----------
    k : numpy.ndarray of int
        Usable ages.
    pooled, pooled_se : numpy.ndarray
        Inverse-variance weighted mean of the per-age effects and its standard
        error ``1 / sqrt(sum w)`` (fixed-effect model).
    slope, slope_se : numpy.ndarray
        WLS slope of the effect on the regressor (``log(1 + age)`` or ``age``)
        and its standard error with the weights taken as known variances, i.e.
        ``1 / sqrt(sum w (x - xbar)^2)`` (no residual scale factor).
    intercept : numpy.ndarray
        Fitted effect at regressor 0 (age 0).
    z, p_value : numpy.ndarray
        ``slope / slope_se`` and its two-sided normal p-value (1.0 when k < 3).
    q, q_df, q_p_value : numpy.ndarray
        Cochran's Q about the pooled mean, ``k - 1`` and the chi-square p-value.
    q_residual, q_residual_p_value : numpy.ndarray
        Q left after the trend (``k - 2`` degrees of freedom): heterogeneity the
        trend does not explain.
    i2 : numpy.ndarray
        ``max(0, (Q - df) / Q)``.
    tau2 : numpy.ndarray
        DerSimonian-Laird between-age variance ``max(0, (Q - df) / (S1 - S2 / S1))``.
    defined : numpy.ndarray of bool
        At least 3 usable ages with distinct regressor values.
    """

    k: np.ndarray
    pooled: np.ndarray
    pooled_se: np.ndarray
    slope: np.ndarray
    slope_se: np.ndarray
    intercept: np.ndarray
    z: np.ndarray
    p_value: np.ndarray
    q: np.ndarray
    q_df: np.ndarray
    q_p_value: np.ndarray
    q_residual: np.ndarray
    q_residual_p_value: np.ndarray
    i2: np.ndarray
    tau2: np.ndarray
    defined: np.ndarray


def _cov(cov: object | None, ok: np.ndarray) -> np.ndarray | None:
    if cov is None:
        return None
    c = np.asarray(cov, dtype=np.float64)
    if c.ndim == 2:
        c = c[None]
    if c.shape != ok.shape + ok.shape[-1:]:
        raise StatsError(f"cov must have shape {ok.shape + ok.shape[-1:]}, got {c.shape}")
    both = ok[..., :, None] & ok[..., None, :]
    return np.where(both & np.isfinite(c), c, 0.0)


def _quad(v: np.ndarray, cov: np.ndarray | None, independent: np.ndarray) -> np.ndarray:
    """``v' cov v`` (last axis), never below the variance under independence."""
    if cov is None:
        return independent
    if v.ndim == cov.ndim - 1:
        q = np.einsum("...a,...ab,...b->...", v, cov, v)
    else:  # v has an extra axis (taus) before the ages
        q = np.einsum("...ta,...ab,...tb->...t", v, cov, v)
    return np.maximum(q, independent)


def age_trend(effect: object, se: object, age: object, *, mask: object | None = None,
              log_age: bool = True, cov: object | None = None) -> AgeTrend:
    """Weighted least-squares trend of per-age effects, Cochran's Q, I^2 and tau^2.

    Parameters
    ----------
    effect, se : array_like, shape (rows, ages) or (ages,)
        Per-age effect estimates and their standard errors.
    age : array_like
        Age (days since first exposure) of each column; broadcasts to ``effect``.
    mask : array_like of bool, optional
        Usable cells; cells with a non-finite value or ``se <= 0`` are always dropped.
    log_age : bool, default True
        Regress on ``log(1 + age)`` (most of a novelty effect's change happens in
        the first days) instead of ``age``.
    cov : array_like, shape (rows, ages, ages), optional
        Covariance matrix of the per-age estimates (its diagonal should be
        ``se^2``). When given, the standard errors of the slope and of the
        pooled mean are the sandwich ``c' cov c`` of the WLS weights ``c``
        (the estimates keep the weights ``1 / se^2``), but never smaller than
        under independence.

    Returns
    -------
    AgeTrend

    Notes
    -----
    Weights are ``w = 1 / se^2``. The slope's standard error treats the per-age
    variances as known, as in a fixed-effect meta-regression [1]_; statsmodels'
    WLS reports the same coefficients with standard errors multiplied by the
    square root of the residual mean square. Rows with fewer than 3 usable ages
    (or all at one age) have ``defined`` False, slope 0 and p-value 1; with fewer
    than 2, Q is 0 with p-value 1.

    Without ``cov`` the test assumes independent per-age estimates. Per-age
    estimates of one experiment are not independent: the same units recur at
    several ages, and the older ages are estimated from the earlier cohorts
    only, so a chance imbalance in those cohorts tilts the line. Pass ``cov``
    to account for it. Q, I^2 and tau^2 are computed as if the ages were
    independent (descriptive).
    """
    r, s, a, ok = _inputs(effect, se, age, mask)
    x = np.log1p(a) if log_age else a
    ws = weighted_sums(r, s, x, ok)
    w, k, sw, safe_sw, pooled, xbar, dx, sxx = ws.w, ws.k, ws.sw, ws.safe_sw, ws.ybar, ws.xbar, ws.dx, ws.sxx
    defined = (k >= 3) & (sxx > 1e-12 * np.maximum(sw, 1e-300))
    safe_sxx = np.where(defined, sxx, 1.0)
    slope = np.where(defined, ws.sxy / safe_sxx, 0.0)
    c = _cov(cov, ok)
    coef = w * dx / safe_sxx[..., None]
    slope_se = np.where(defined, np.sqrt(_quad(coef, c, 1.0 / safe_sxx)), 0.0)
    pooled_se = np.where(sw > 0, np.sqrt(_quad(w / safe_sw[..., None], c, 1.0 / safe_sw)), 0.0)
    intercept = np.where(defined, pooled - slope * xbar, pooled)
    z = np.where(defined, slope / np.where(defined, slope_se, 1.0), 0.0)
    p = np.where(defined, 2.0 * stats.norm.sf(np.abs(z)), 1.0)
    q = ws.q
    q_df = np.maximum(k - 1, 0).astype(np.float64)
    q_p = np.where(k >= 2, stats.chi2.sf(q, np.maximum(q_df, 1.0)), 1.0)
    q_res = np.where(defined, np.maximum(q - slope**2 * sxx, 0.0), 0.0)
    q_res_p = np.where(defined & (k >= 3), stats.chi2.sf(q_res, np.maximum(k - 2, 1)), 1.0)
    i2 = np.where(q > 0, np.maximum(0.0, (q - q_df) / np.where(q > 0, q, 1.0)), 0.0)
    c = sw - (w**2).sum(axis=-1) / safe_sw
    tau2 = np.where((k >= 2) & (c > 0), np.maximum(0.0, (q - q_df) / np.where(c > 0, c, 1.0)), 0.0)
    return AgeTrend(k=k, pooled=pooled, pooled_se=pooled_se, slope=slope, slope_se=slope_se, intercept=intercept,
                    z=z, p_value=p, q=q, q_df=q_df, q_p_value=q_p, q_residual=q_res, q_residual_p_value=q_res_p,
                    i2=i2, tau2=tau2, defined=defined)


@dataclass(frozen=True, eq=False)
class ConvergedEffect:
    """The effect a time-varying effect approaches, per row.

    Attributes
    ----------
    long_run : numpy.ndarray
        Fitted asymptote ``long_run`` of the exponential approach at the best ``tau``.
    lower, upper : numpy.ndarray
        ``1 - alpha`` interval for ``long_run`` (see :func:`converged_effect`).
    early : numpy.ndarray
        Fitted effect at age 0.
    tau : numpy.ndarray
        Best time constant (days).
    tau_lower, tau_upper : numpy.ndarray
        Smallest and largest ``tau`` of the profile confidence set.
    stabilised_after : numpy.ndarray
        First whole age (days) from which the fitted curve stays within
        ``tolerance`` of ``long_run``.
    stabilised : numpy.ndarray of bool
        ``stabilised_after`` is within the observed ages.
    defined : numpy.ndarray of bool
        At least 3 usable ages.
    """

    long_run: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    early: np.ndarray
    tau: np.ndarray
    tau_lower: np.ndarray
    tau_upper: np.ndarray
    stabilised_after: np.ndarray
    stabilised: np.ndarray
    defined: np.ndarray


def converged_effect(effect: object, se: object, age: object, *, mask: object | None = None,
                     alpha: float = 0.05, tolerance: float = 0.01,
                     taus: object = None, cov: object | None = None) -> ConvergedEffect:
    """Fit ``effect(a) = long_run + delta * exp(-a / tau)`` and estimate ``long_run``.

    Parameters
    ----------
    effect, se, age, mask :
        As for :func:`age_trend`.
    alpha : float, default 0.05
        Error rate of the interval.
    tolerance : float, default 0.01
        Distance from ``long_run`` (in the effect's units) counted as stabilised.
    taus : array_like, optional
        Time constants to profile over (days); default :data:`DEFAULT_TAUS`,
        capped per row at twice the largest observed age.
    cov : array_like, optional
        Covariance of the per-age estimates, as for :func:`age_trend`: the
        conditional standard errors of ``long_run`` become sandwich ones.

    Returns
    -------
    ConvergedEffect

    Notes
    -----
    For a fixed ``tau`` the model is linear in ``(long_run, delta)`` and is fitted
    by weighted least squares with weights ``1 / se^2`` (known variances). The
    best ``tau`` minimises the weighted residual sum of squares ``S(tau)``. The
    profile confidence set for ``tau`` holds every grid value with
    ``S(tau) - min S <= chi2_{1, 1-alpha}`` [7]_, and the interval for
    ``long_run`` is the union of the conditional intervals
    ``long_run(tau) +- z_{1-alpha/2} se(tau)`` over that set, so it widens when
    the data cannot tell a fast approach from a slow one (a slow approach
    extrapolates further). This union is conservative rather than exact.

    ``stabilised_after`` is ``ceil(tau * log(|delta| / tolerance))`` (0 when
    ``|delta| <= tolerance``). Rows with fewer than 3 usable ages are undefined:
    ``long_run`` is then the pooled mean and the interval its normal interval.
    """
    if not 0 < alpha < 1:
        raise StatsError(f"alpha must be in (0, 1), got {alpha!r}")
    r, s, a, ok = _inputs(effect, se, age, mask)
    grid = DEFAULT_TAUS if taus is None else np.asarray(taus, dtype=np.float64)
    if grid.ndim != 1 or grid.size == 0 or np.any(grid <= 0):
        raise StatsError("taus must be a non-empty list of positive time constants")
    w = np.where(ok, 1.0 / s**2, 0.0)
    k = ok.sum(axis=-1)
    max_age = np.where(ok, a, 0.0).max(axis=-1)
    # design [1, exp(-a / tau)] for every tau: shapes (rows, taus, ages)
    e = np.exp(-a[..., None, :] / grid[:, None])
    w3 = w[..., None, :]
    s00 = w3.sum(axis=-1)
    s01 = (w3 * e).sum(axis=-1)
    s11 = (w3 * e * e).sum(axis=-1)
    b0 = (w3 * r[..., None, :]).sum(axis=-1)
    b1 = (w3 * e * r[..., None, :]).sum(axis=-1)
    det = s00 * s11 - s01**2
    usable = (det > 1e-12 * np.maximum(s00 * s11, 1e-300)) & (grid <= np.maximum(2.0 * max_age, 1.0)[..., None])
    safe = np.where(usable, det, 1.0)
    lr = (s11 * b0 - s01 * b1) / safe
    dl = (s00 * b1 - s01 * b0) / safe
    h = w3 * (s11[..., None] - s01[..., None] * e) / safe[..., None]  # long_run(tau) = h . effect
    var_lr = _quad(h, _cov(cov, ok), s11 / safe)
    fit = lr[..., None] + dl[..., None] * e
    rss = (w3 * (r[..., None, :] - fit) ** 2).sum(axis=-1)
    rss = np.where(usable, rss, np.inf)
    best = np.argmin(rss, axis=-1)
    defined = (k >= 3) & np.isfinite(np.take_along_axis(rss, best[..., None], axis=-1)[..., 0])
    take = (lambda v: np.take_along_axis(v, best[..., None], axis=-1)[..., 0])
    crit = stats.chi2.ppf(1.0 - alpha, 1)
    zq = stats.norm.ppf(1.0 - alpha / 2.0)
    best_rss = np.where(defined, take(rss), 0.0)
    in_set = usable & defined[..., None] & (np.where(usable, rss, 0.0) - best_rss[..., None] <= crit)
    half = zq * np.sqrt(np.maximum(np.where(usable, var_lr, 0.0), 0.0))
    lo = np.where(in_set, lr - half, np.inf).min(axis=-1)
    hi = np.where(in_set, lr + half, -np.inf).max(axis=-1)
    tau_grid = np.broadcast_to(grid, rss.shape)
    t_lo = np.where(in_set, tau_grid, np.inf).min(axis=-1)
    t_hi = np.where(in_set, tau_grid, -np.inf).max(axis=-1)
    # fallback: the pooled mean
    sw = w.sum(axis=-1)
    safe_sw = np.where(sw > 0, sw, 1.0)
    pooled = (w * r).sum(axis=-1) / safe_sw
    pse = np.where(sw > 0, np.sqrt(_quad(w / safe_sw[..., None], _cov(cov, ok), 1.0 / safe_sw)), 0.0)
    long_run = np.where(defined, take(lr), pooled)
    delta = np.where(defined, take(dl), 0.0)
    tau = np.where(defined, grid[best], 0.0)
    lower = np.where(defined, lo, pooled - zq * pse)
    upper = np.where(defined, hi, pooled + zq * pse)
    if tolerance <= 0:
        raise StatsError(f"tolerance must be positive, got {tolerance!r}")
    ratio = np.abs(delta) / tolerance
    after = np.where(ratio > 1, np.ceil(tau * np.log(np.where(ratio > 1, ratio, 1.0))), 0.0)
    return ConvergedEffect(
        long_run=long_run, lower=lower, upper=upper, early=long_run + delta, tau=tau,
        tau_lower=np.where(defined, t_lo, 0.0), tau_upper=np.where(defined, t_hi, 0.0),
        stabilised_after=after.astype(np.int64), stabilised=defined & (after <= max_age), defined=defined,
    )


def first_judgeable_look(look_days: int, min_days: int) -> int:
    """The first look that can have ``min_days`` usable ages, looks being ``look_days`` apart.

    At the look ``k`` the data cover ``k * look_days`` whole days since the first
    exposure day, and an age ``a`` is complete for some unit only when ``a + 1``
    whole days have passed since that unit's first exposure, so at most
    ``k * look_days - 1`` ages are usable. The first look with ``min_days`` of
    them is ``ceil((min_days + 1) / look_days)`` (2 with the defaults 7 and 7).
    """
    if look_days < 1 or min_days < 0:
        raise StatsError(f"look_days must be >= 1 and min_days >= 0, got {look_days} and {min_days}")
    return max(1, -(-(min_days + 1) // look_days))


def look_alpha(alpha: float, look: object, *, first: int = 1) -> np.ndarray:
    """Error rate spent at the ``look``-th look: ``alpha * 6 / (pi^2 j^2)``, ``j = look - first + 1``.

    The levels sum to ``alpha`` over looks ``first``, ``first + 1``, ... (sum of
    ``1 / j^2`` is ``pi^2 / 6``), so by the union bound the chance of *ever*
    flagging a constant effect, over any number of looks, is at most ``alpha``.
    Looks before ``first`` (those that cannot be judged, see
    :func:`first_judgeable_look`) get 0, so no budget is spent where no test is
    made. A simple alpha-spending rule (common practice); it needs no assumption
    about how the looks are correlated and is conservative for that reason.
    """
    k = np.asarray(look, dtype=np.float64)
    j = np.maximum(k - (first - 1), 1.0)
    return np.where(k >= first, alpha * 6.0 / (np.pi**2 * j**2), 0.0)
