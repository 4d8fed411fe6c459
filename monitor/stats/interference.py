"""Statistics for interference between groups and between experiments.

Three pure, vectorised building blocks, all computed from aggregates:

* :func:`effect_trend` -- a fixed-effect weighted least-squares meta-regression of per-phase
  estimates on a covariate (the treatment share of a ramp phase), with Cochran's Q for the
  heterogeneity across phases. Used by the ``spillover`` check: an effect that changes with the
  treatment share is the footprint of groups competing for a shared resource or influencing each
  other.
* :func:`ratio_change` -- the relative change of a ratio of means measured twice on the same
  units (after versus before their first assignment), by the delta method. Used by the
  ``spillover`` check for the drift of the control group.
* :func:`independence_chi2` -- Pearson's chi-square test of independence of two assignments, per
  stratum and summed over strata. Used by the ``collision`` check: two experiments hashed with a
  shared seed give dependent variants.
* :func:`interaction_wald` -- the interaction contrasts of a two-way table of independent cell
  estimates (``K_A x K_B`` variants) and their joint Wald test. Used by the ``collision`` check
  for guardrail metrics.

No NaN or infinity escapes: undefined rows have ``defined`` False and finite placeholders.

References
----------
.. [1] W. G. Cochran, "The combination of estimates from different experiments", Biometrics,
   10(1), 101-129, 1954.
.. [2] M. Borenstein, L. V. Hedges, J. P. T. Higgins and H. R. Rothstein, "Introduction to
   Meta-Analysis", Wiley, 2009, chapters 16 (heterogeneity) and 20 (meta-regression).
.. [3] K. Pearson, "On the criterion that a given system of deviations from the probable in the
   case of a correlated system of variables is such that it can be reasonably supposed to have
   arisen from random sampling", Philosophical Magazine, 50(302), 157-175, 1900.
.. [4] A. Agresti, "Categorical Data Analysis", 3rd ed., Wiley, 2013, sections 3.2 (chi-square
   test of independence) and 6.4 (conditional independence across strata).
.. [5] A. Wald, "Tests of statistical hypotheses concerning several parameters when the number of
   observations is large", Transactions of the American Mathematical Society, 54(3), 426-482,
   1943.
.. [6] A. Deng, U. Knoblich and J. Lu, "Applying the Delta Method in Metric Analytics: A
   Practical Guide with Novel Ideas", KDD 2018.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from monitor.stats import StatsError
from monitor.stats.trend import weighted_sums

__all__ = [
    "IndependenceResult",
    "InteractionResult",
    "RatioChange",
    "TrendResult",
    "effect_trend",
    "independence_chi2",
    "interaction_wald",
    "ratio_change",
    "stratified_interaction_wald",
]


@dataclass(frozen=True)
class TrendResult:
    """Weighted least-squares trend of estimates on a covariate, per row.

    Attributes
    ----------
    slope, slope_se : numpy.ndarray
        Change of the estimate per unit of the covariate and its standard error.
    intercept, intercept_se : numpy.ndarray
        Fitted estimate at covariate 0 and its standard error.
    z, p_value : numpy.ndarray
        ``slope / slope_se`` and its two-sided normal p-value (1.0 where undefined).
    pooled, pooled_se : numpy.ndarray
        Inverse-variance weighted mean of the estimates and its standard error.
    q, q_df, q_p_value : numpy.ndarray
        Cochran's Q (heterogeneity of the estimates about ``pooled``), its degrees of freedom
        ``k - 1`` and chi-square p-value.
    q_residual : numpy.ndarray
        Residual heterogeneity about the fitted line (``k - 2`` degrees of freedom).
    i2 : numpy.ndarray
        Higgins' I^2 ``max(0, (Q - df) / Q)``: the share of the variation beyond chance.
    k : numpy.ndarray
        Number of estimates used.
    defined : numpy.ndarray of bool
        At least two estimates with positive standard errors and two distinct covariate values.
    """

    slope: np.ndarray
    slope_se: np.ndarray
    intercept: np.ndarray
    intercept_se: np.ndarray
    z: np.ndarray
    p_value: np.ndarray
    pooled: np.ndarray
    pooled_se: np.ndarray
    q: np.ndarray
    q_df: np.ndarray
    q_p_value: np.ndarray
    q_residual: np.ndarray
    i2: np.ndarray
    k: np.ndarray
    defined: np.ndarray

    def predict(self, x: object) -> tuple[np.ndarray, np.ndarray]:
        """Fitted value and its standard error at covariate ``x`` (per row).

        Needs the covariance of intercept and slope, which is
        ``-xbar_w / sum(w (x - xbar_w)^2)``; it is carried in ``_cov`` (private).
        """
        xv = np.asarray(x, dtype=float)
        fit = self.intercept + self.slope * xv
        var = self.intercept_se**2 + xv**2 * self.slope_se**2 + 2 * xv * self._cov  # type: ignore[attr-defined]
        return np.where(self.defined, fit, 0.0), np.where(self.defined, np.sqrt(np.maximum(var, 0.0)), 0.0)


def effect_trend(estimate: object, se: object, x: object, use: object = None) -> TrendResult:
    """Fixed-effect meta-regression of estimates on a covariate, along the last axis.

    Parameters
    ----------
    estimate, se : array_like, shape (..., k)
        Independent estimates (e.g. the relative effect in each ramp phase) and their standard
        errors. Entries with ``se <= 0`` (or ``use`` False) are left out.
    x : array_like, shape (..., k)
        Covariate of each estimate (e.g. the treatment share of the phase).
    use : array_like of bool, optional
        Which entries to use.

    Returns
    -------
    TrendResult
        Weighted least squares with weights ``w = 1 / se^2`` and the variances taken as known
        (no residual scale): ``slope = sum w (x - xbar)(y - ybar) / sum w (x - xbar)^2`` with
        ``Var(slope) = 1 / sum w (x - xbar)^2``, the meta-regression of [2]_ (ch. 20). Cochran's Q
        [1]_ is ``sum w (y - ybar)^2`` with ``k - 1`` degrees of freedom; it splits into the model
        part ``slope^2 / Var(slope)`` and the residual part.

    Notes
    -----
    The test of the slope is a normal z test; it assumes the estimates are independent (true for
    disjoint groups of units, e.g. units first assigned in different phases) and approximately
    normal with known variances. With the variances known, the coefficients equal those of an
    ordinary WLS fit and the standard errors are WLS's divided by the square root of its
    residual scale. Rows with fewer than two usable estimates, or one covariate value only, are
    undefined (``defined`` False, p-values 1).

    References
    ----------
    .. [1] W. G. Cochran, Biometrics, 10(1), 101-129, 1954.
    .. [2] M. Borenstein et al., "Introduction to Meta-Analysis", Wiley, 2009.
    """
    y = np.asarray(estimate, dtype=float)
    s = np.asarray(se, dtype=float)
    xv = np.asarray(x, dtype=float)
    y, s, xv = np.broadcast_arrays(y, s, xv)
    if y.ndim == 0:
        raise StatsError("effect_trend needs at least one estimate per row")
    ok = np.isfinite(y) & np.isfinite(s) & np.isfinite(xv) & (s > 0)
    if use is not None:
        ok &= np.broadcast_to(np.asarray(use, dtype=bool), y.shape)
    ws = weighted_sums(y, s, xv, ok)
    k, sw, safe_sw, ybar, xbar = ws.k, ws.sw, ws.safe_sw, ws.ybar, ws.xbar
    sxx, sxy, q = ws.sxx, ws.sxy, ws.q
    x0 = np.where(ok, xv, 0.0)
    # a covariate that is constant (up to rounding) has no trend
    hi = np.max(np.where(ok, x0, -np.inf), axis=-1, initial=-np.inf)
    lo = np.min(np.where(ok, x0, np.inf), axis=-1, initial=np.inf)
    spread = np.where(k > 0, hi - lo, 0.0)
    defined = (k >= 2) & (sw > 0) & (spread > 1e-12) & (sxx > 0)
    safe_sxx = np.where(defined, sxx, 1.0)
    slope = np.where(defined, sxy / safe_sxx, 0.0)
    slope_var = np.where(defined, 1.0 / safe_sxx, 0.0)
    intercept = np.where(defined, ybar - slope * xbar, 0.0)
    int_var = np.where(defined, 1.0 / safe_sw + xbar**2 * slope_var, 0.0)
    cov = np.where(defined, -xbar * slope_var, 0.0)
    slope_se = np.sqrt(slope_var)
    z = np.where(defined & (slope_se > 0), slope / np.where(slope_se > 0, slope_se, 1.0), 0.0)
    p = np.where(defined, 2.0 * stats.norm.sf(np.abs(z)), 1.0)
    q_df = np.maximum(k - 1, 0)
    q_ok = (k >= 2) & (sw > 0)
    q_p = np.where(q_ok, stats.chi2.sf(q, np.maximum(q_df, 1)), 1.0)
    q_res = np.where(defined, np.maximum(q - slope**2 * sxx, 0.0), 0.0)
    i2 = np.where(q_ok & (q > 0), np.maximum(0.0, (q - q_df) / np.where(q > 0, q, 1.0)), 0.0)
    pooled = np.where(sw > 0, ybar, 0.0)
    pooled_se = np.where(sw > 0, np.sqrt(1.0 / safe_sw), 0.0)
    res = TrendResult(slope, slope_se, intercept, np.sqrt(int_var), z, p, pooled, pooled_se,
                      np.where(q_ok, q, 0.0), q_df, q_p, q_res, i2, k, defined)
    object.__setattr__(res, "_cov", cov)
    return res


@dataclass(frozen=True)
class IndependenceResult:
    """Chi-square test of independence of two assignments, summed over strata.

    Attributes
    ----------
    chi2, df, p_value : numpy.ndarray
        Pearson statistic summed over strata, degrees of freedom summed over strata, and the
        upper-tail chi-square p-value (1.0 where ``df == 0``).
    n : numpy.ndarray
        Units in the table (all strata).
    cramers_v : numpy.ndarray
        ``sqrt(chi2 / (n * (min(r, c) - 1)))`` with the largest table's ``min(r, c)``: the
        strength of the dependence, 0 (none) to 1 (one assignment determines the other).
    stratum_chi2, stratum_df : numpy.ndarray, shape (..., S)
        Per-stratum statistic and degrees of freedom.
    """

    chi2: np.ndarray
    df: np.ndarray
    p_value: np.ndarray
    n: np.ndarray
    cramers_v: np.ndarray
    stratum_chi2: np.ndarray
    stratum_df: np.ndarray


def independence_chi2(table: object) -> IndependenceResult:
    """Pearson chi-square test of independence, per stratum, summed over strata.

    Parameters
    ----------
    table : array_like, shape (..., S, R, C)
        Non-negative counts: units by stratum (e.g. ramp phase of each experiment), variant of
        the first experiment (rows) and variant of the second (columns). Pad with zeros.

    Returns
    -------
    IndependenceResult
        Per stratum, ``sum (O - E)^2 / E`` with ``E = row total * column total / n`` over the
        cells with ``E > 0`` [3]_, and ``(r' - 1)(c' - 1)`` degrees of freedom where ``r'`` and
        ``c'`` count the non-empty rows and columns. The sum over strata tests conditional
        independence given the stratum [4]_ (sec. 6.4): variants that both follow calendar time
        (two experiments ramping at once) are not mistaken for a correlated hash.

    Notes
    -----
    No continuity correction: it equals ``scipy.stats.chi2_contingency(t, correction=False)``
    per stratum. Rows, columns or strata with no units contribute nothing; a table with one
    non-empty row or column has 0 degrees of freedom and p-value 1. The chi-square
    approximation wants expected counts of about 5 or more (common practice): callers test
    only pairs with enough overlap.

    References
    ----------
    .. [3] K. Pearson, Philosophical Magazine, 50(302), 157-175, 1900.
    .. [4] A. Agresti, "Categorical Data Analysis", 3rd ed., Wiley, 2013.
    """
    t = np.asarray(table, dtype=float)
    if t.ndim < 3:
        raise StatsError("independence_chi2 needs counts shaped (..., strata, rows, columns)")
    if np.any(~np.isfinite(t)) or np.any(t < 0):
        raise StatsError("independence_chi2 needs finite non-negative counts")
    rows = t.sum(axis=-1)
    cols = t.sum(axis=-2)
    n_s = rows.sum(axis=-1)
    safe_n = np.where(n_s > 0, n_s, 1.0)
    exp = rows[..., :, None] * cols[..., None, :] / safe_n[..., None, None]
    pos = exp > 0
    contrib = np.where(pos, (t - exp) ** 2 / np.where(pos, exp, 1.0), 0.0)
    chi_s = contrib.sum(axis=(-1, -2))
    df_s = np.maximum((rows > 0).sum(axis=-1) - 1, 0) * np.maximum((cols > 0).sum(axis=-1) - 1, 0)
    chi_s = np.where(df_s > 0, chi_s, 0.0)
    chi = chi_s.sum(axis=-1)
    df = df_s.sum(axis=-1)
    p = np.where(df > 0, stats.chi2.sf(chi, np.maximum(df, 1)), 1.0)
    n = n_s.sum(axis=-1)
    m = np.minimum((rows.sum(axis=-2) > 0).sum(axis=-1), (cols.sum(axis=-2) > 0).sum(axis=-1))
    denom = n * np.maximum(m - 1, 0)
    v = np.where(denom > 0, np.sqrt(np.minimum(chi / np.where(denom > 0, denom, 1.0), 1.0)), 0.0)
    return IndependenceResult(chi, df, p, n, v, chi_s, df_s)


@dataclass(frozen=True)
class InteractionResult:
    """Interaction contrasts of a two-way table of cell estimates and their Wald test.

    Attributes
    ----------
    contrast, contrast_se : numpy.ndarray, shape (..., R - 1, C - 1)
        ``m[i, j] - m[i, 0] - m[0, j] + m[0, 0]`` for every pair of non-control variants, and
        its standard error.
    wald, df, p_value : numpy.ndarray
        Joint Wald statistic of all contrasts, its degrees of freedom ``(R - 1)(C - 1)`` and the
        chi-square p-value (1.0 where undefined).
    defined : numpy.ndarray of bool
        Every cell has a positive variance.
    """

    contrast: np.ndarray
    contrast_se: np.ndarray
    wald: np.ndarray
    df: np.ndarray
    p_value: np.ndarray
    defined: np.ndarray


def interaction_wald(mean: object, var: object) -> InteractionResult:
    """Interaction of two factors from independent cell estimates.

    Parameters
    ----------
    mean : array_like, shape (..., R, C)
        Cell estimates (e.g. a guardrail's mean per unit for the units in variant ``i`` of one
        experiment and ``j`` of the other); row 0 and column 0 are the controls.
    var : array_like, shape (..., R, C)
        Variance of each cell estimate (squared standard error; for a mean ``s^2 / n``).

    Returns
    -------
    InteractionResult
        The ``(R - 1)(C - 1)`` interaction contrasts ``L m`` and the Wald statistic
        ``(L m)' (L V L')^{-1} (L m)`` with ``V = diag(var)`` [5]_; under no interaction and
        large cells it is chi-square with ``(R - 1)(C - 1)`` degrees of freedom. For a 2 x 2
        table it is the square of ``(m11 - m10 - m01 + m00) / sqrt(v11 + v10 + v01 + v00)``.

    Notes
    -----
    Cells must be independent (disjoint groups of units), which holds for a cross-classification
    of units. A row is undefined when any cell variance is not positive.

    References
    ----------
    .. [6] A. Deng, U. Knoblich and J. Lu, "Applying the Delta Method in Metric Analytics: A
   Practical Guide with Novel Ideas", KDD 2018.
.. [5] A. Wald, Transactions of the American Mathematical Society, 54(3), 426-482, 1943.
    """
    m = np.asarray(mean, dtype=float)
    v = np.asarray(var, dtype=float)
    m, v = np.broadcast_arrays(m, v)
    if m.ndim < 2 or m.shape[-1] < 2 or m.shape[-2] < 2:
        raise StatsError("interaction_wald needs cells shaped (..., R >= 2, C >= 2)")
    R, C = m.shape[-2:]
    defined = np.all(np.isfinite(v) & (v > 0) & np.isfinite(m), axis=(-1, -2))
    m0 = np.where(np.isfinite(m), m, 0.0)
    v0 = np.where(np.isfinite(v) & (v > 0), v, 1.0)
    L = _interaction_matrix(R, C)
    D = L.shape[0]
    flat_m = m0.reshape(*m0.shape[:-2], R * C)
    flat_v = v0.reshape(*v0.shape[:-2], R * C)
    c = flat_m @ L.T
    cov = np.einsum("dk,...k,ek->...de", L, flat_v, L)
    se = np.sqrt(np.einsum("...dd->...d", cov))
    sol = np.linalg.solve(cov, c[..., None])[..., 0]
    wald = np.einsum("...d,...d->...", c, sol)
    wald = np.where(defined, np.maximum(wald, 0.0), 0.0)
    p = np.where(defined, stats.chi2.sf(wald, D), 1.0)
    shape = (*m0.shape[:-2], R - 1, C - 1)
    return InteractionResult(
        np.where(defined[..., None], c, 0.0).reshape(shape),
        np.where(defined[..., None], se, 0.0).reshape(shape),
        wald, np.full(wald.shape, D), p, defined,
    )


def _interaction_matrix(R: int, C: int) -> np.ndarray:
    """Contrast matrix ``L``, shape ``((R-1)(C-1), R*C)``, of the interactions of an R x C table."""
    L = np.zeros(((R - 1) * (C - 1), R * C))
    d = 0
    for i in range(1, R):
        for j in range(1, C):
            L[d, i * C + j] += 1
            L[d, i * C] -= 1
            L[d, j] -= 1
            L[d, 0] += 1
            d += 1
    return L


def stratified_interaction_wald(mean: object, var: object) -> InteractionResult:
    """Interaction of two factors estimated within strata and pooled across them.

    Parameters
    ----------
    mean, var : array_like, shape (S, R, C)
        Cell estimates and their variances per stratum (e.g. per pair of ramp phases of the two
        experiments); strata with a cell of non-positive or non-finite variance are left out.

    Returns
    -------
    InteractionResult
        Scalar-shaped result: the inverse-variance weighted (fixed-effect) combination of the
        per-stratum contrast vectors ``c_s = L m_s`` with covariances ``S_s = L V_s L'``,
        ``c = (sum S_s^-1)^-1 sum S_s^-1 c_s``, and the Wald statistic ``c' (sum S_s^-1) c`` on
        ``(R - 1)(C - 1)`` degrees of freedom; undefined when no stratum is usable.

    Notes
    -----
    Comparing cells only within a stratum removes differences *between* strata from the
    contrast: when two experiments ramp at different times, units of different phase pairs
    arrived at different calendar times and have been observed for different lengths of time,
    and the four variant combinations mix those cohorts in different proportions. Within one
    pair of phases the variants of both experiments are drawn with fixed weights, independently
    of arrival, so the cells are comparable. Pooling independent strata by inverse variance is
    the usual fixed-effect combination (W. G. Cochran, "The combination of estimates from
    different experiments", Biometrics 10(1), 101-129, 1954).
    """
    m = np.asarray(mean, dtype=float)
    v = np.asarray(var, dtype=float)
    if m.ndim != 3 or m.shape != v.shape or m.shape[1] < 2 or m.shape[2] < 2:
        raise StatsError("stratified_interaction_wald needs mean and var shaped (S, R >= 2, C >= 2)")
    _, R, C = m.shape
    L = _interaction_matrix(R, C)
    D = L.shape[0]
    usable = np.all(np.isfinite(v) & (v > 0) & np.isfinite(m), axis=(1, 2))
    info = np.zeros((D, D))
    score = np.zeros(D)
    for k in np.flatnonzero(usable):
        cov_k = L @ np.diag(v[k].ravel()) @ L.T
        inv = np.linalg.inv(cov_k)
        info += inv
        score += inv @ (L @ m[k].ravel())
    defined = bool(usable.any())
    if defined:
        cov = np.linalg.inv(info)
        c = cov @ score
        wald = float(max(c @ info @ c, 0.0))
        se = np.sqrt(np.diag(cov))
        p = float(stats.chi2.sf(wald, D))
    else:
        c, se, wald, p = np.zeros(D), np.zeros(D), 0.0, 1.0
    return InteractionResult(c.reshape(R - 1, C - 1), se.reshape(R - 1, C - 1), np.asarray(wald),
                             np.asarray(D), np.asarray(p), np.asarray(defined))


@dataclass(frozen=True)
class RatioChange:
    """Relative change ``(mean_y / mean_x) / (mean_cy / mean_cx) - 1`` on the same units.

    Attributes
    ----------
    estimate, se : numpy.ndarray
        The relative change (a fraction) and its delta-method standard error.
    post, pre : numpy.ndarray
        ``mean_y / mean_x`` and ``mean_cy / mean_cx``.
    defined : numpy.ndarray of bool
        At least two units, non-zero denominators and a positive standard error.
    """

    estimate: np.ndarray
    se: np.ndarray
    post: np.ndarray
    pre: np.ndarray
    defined: np.ndarray


def ratio_change(n: object, sums: object, products: object) -> RatioChange:
    """Relative change of a ratio metric between two windows of the same units.

    Parameters
    ----------
    n : array_like, shape (...)
        Units.
    sums : array_like, shape (..., 4)
        Per-unit sums of ``(y, x, cy, cx)``: the numerator and denominator after the first
        assignment, and the same before it (``x = cx = 1`` for a mean per unit).
    products : array_like, shape (..., 4, 4)
        Sums of the pairwise products of the four per-unit values.

    Returns
    -------
    RatioChange
        ``g = (ybar cxbar) / (xbar cybar) - 1`` with ``Var(g) = grad' S grad / n``, where ``S`` is
        the per-unit covariance matrix of the four values and
        ``grad = (g + 1) (1/ybar, -1/xbar, -1/cybar, 1/cxbar)`` -- the delta method for a
        function of means [6]_. The pairing (the same units in both windows) enters through
        the covariances, so a stable per-unit level cancels.

    Notes
    -----
    Undefined (``defined`` False, zeros) when ``n < 2`` or a mean in a denominator is 0.
    The covariance uses the divisor ``n - 1``.

    References
    ----------
    .. [6] A. Deng, U. Knoblich and J. Lu, KDD 2018.
    """
    nn = np.asarray(n, dtype=float)
    sm = np.asarray(sums, dtype=float)
    pr = np.asarray(products, dtype=float)
    if sm.shape[-1:] != (4,) or pr.shape[-2:] != (4, 4):
        raise StatsError("ratio_change needs sums (..., 4) and products (..., 4, 4)")
    safe_n = np.where(nn >= 2, nn, 2.0)
    mean = sm / safe_n[..., None]
    cov = (pr - sm[..., :, None] * sm[..., None, :] / safe_n[..., None, None]) / (safe_n - 1)[..., None, None]
    ybar, xbar, cybar, cxbar = (mean[..., i] for i in range(4))
    ok = (nn >= 2) & (xbar != 0) & (cybar != 0) & (cxbar != 0) & (ybar != 0)
    sx, scy = np.where(ok, xbar, 1.0), np.where(ok, cybar, 1.0)
    post = np.where(xbar != 0, ybar / np.where(xbar != 0, xbar, 1.0), 0.0)
    pre = np.where(cxbar != 0, cybar / np.where(cxbar != 0, cxbar, 1.0), 0.0)
    g1 = np.where(ok, ybar * cxbar / (sx * scy), 1.0)
    grad = g1[..., None] * np.stack([
        1.0 / np.where(ok, ybar, 1.0), -1.0 / sx, -1.0 / scy, 1.0 / np.where(ok, cxbar, 1.0)], axis=-1)
    var = np.einsum("...i,...ij,...j->...", grad, cov, grad) / safe_n
    se = np.sqrt(np.maximum(var, 0.0))
    defined = ok & (se > 0)
    return RatioChange(np.where(defined, g1 - 1.0, 0.0), np.where(defined, se, 0.0), post, pre, defined)
