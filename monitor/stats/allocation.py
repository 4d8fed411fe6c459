"""Allocation-ratio checks: is each variant receiving the share of units it was designed for?

A sample ratio mismatch (SRM) is a difference between the designed allocation weights and the
observed split of units between variants. It usually means that assignment, logging or filtering
is broken, so every other number from the experiment is suspect. This module provides two
vectorised tests, both operating on many experiments at once:

* :func:`chisquare_gof`, Pearson's chi-square goodness-of-fit test of the observed counts against
  the designed weights [1]_. It is valid for a single, pre-planned look at the data only.
* :func:`srm_sequential`, an anytime-valid e-process built from Dirichlet-multinomial Bayes
  factors [2]_ (:func:`dm_log_bayes_factor`). It may be inspected after every hourly load, for as
  long as the experiment runs, while keeping the probability of *ever* raising a false alarm
  below ``alpha`` (Ville's inequality [3]_).

Arrays are laid out as ``(E, K)`` (experiments x variant slots) for the one-shot functions and
``(E, T, K)`` (experiments x looks x variant slots) for the sequential one. Experiments with fewer
variants than ``K`` are padded with slots of weight 0 and count 0; such slots are ignored.

Choice of ``DEFAULT_CONCENTRATIONS``
------------------------------------
Under the alternative, the Bayes factor for a single concentration ``c`` uses the prior
``Dirichlet(c * w)`` for the true variant shares, centred on the design weights ``w``; ``c`` is
the prior's "number of pseudo-units", so the prior's standard deviation of a share is about
``sqrt(w (1 - w) / c)``. With ``D = K - 1`` degrees of freedom and Pearson statistic ``X2`` on
``n`` units, a Laplace approximation gives::

    log BF_c  ~=  -(D / 2) log(1 + n / c)  +  (X2 / 2) * n / (n + c),

which is maximised at ``c* ~= n D / (X2 - D)``. A signal near the detection boundary has
``X2`` around 20-40, so the best ``c`` is roughly ``n / 30``: a small ``c`` suits a gross
imbalance seen early, a large ``c`` a slight imbalance seen after millions of units. No single
value serves both. For example, for 821,588 vs 815,482 units on a 50/50 design (the SRM example in
Kohavi, Tang & Xu [4]_; chi-square 22.77, p = 1.8e-6) the single-concentration log Bayes factor
is 4.01 for ``c = 1``, 6.53 for ``c = 1e2``, 8.77 for ``c = 1e4`` and 9.30 for ``c = 1e5``,
against the threshold ``log(1 / 0.001) = 6.91``: a diffuse prior misses this SRM.

An equal-weight mixture of e-processes is again an e-process, so we average the Bayes factors
over the grid ``c = 1e1, 1e2, 1e3, 1e4, 1e5, 1e6``. Relative to the best grid point the mixture
costs at most ``log(6) = 1.79`` nats, and because ``log BF_c`` changes slowly in ``log c`` near
its maximum, a grid step of one decade loses at most about half a further nat (by the
approximation above, for ``X2`` between 30 and 100). The grid covers the best ``c`` for
``n`` between a few hundred and a few tens of millions of units, the range in which hourly
monitoring makes its decisions; beyond it power degrades only logarithmically. The lowest point,
``c = 10``, is there for gross failures (a variant that receives almost nothing) seen in the
first hours; in simulation it raised detection of a 70/30 split within 200 units from about two
thirds to about nine in ten, at a cost of under one percentage point of power elsewhere. With
this grid the example above gives a mixture log Bayes factor of 8.17 and is flagged at
``alpha = 0.001``. Measured by simulation (see ``tests/test_stats_allocation.py``): share shifts
of 2 percentage points on a 50/50 design are essentially always flagged by 50,000 units, 1 point
shifts a little over half the time (58% in 2,000 runs), and 60/40 within 2,000 units; under the
null, 30 days of hourly looks raised a false alarm in 1.5% of runs at ``alpha = 0.05``, against
60% for a chi-square test re-applied at every look.

References
----------
.. [1] K. Pearson, "On the criterion that a given system of deviations from the probable in the
   case of a correlated system of variables is such that it can be reasonably supposed to have
   arisen from random sampling", Philosophical Magazine, 50(302), 157-175, 1900.
.. [2] M. Lindon and A. Malek, "Anytime-Valid Inference for Multinomial Count Data", Advances in
   Neural Information Processing Systems 35 (NeurIPS), 2022.
.. [3] J. Ville, "Etude critique de la notion de collectif", Gauthier-Villars, Paris, 1939.
.. [4] R. Kohavi, D. Tang and Y. Xu, "Trustworthy Online Controlled Experiments: A Practical
   Guide to A/B Testing", Cambridge University Press, 2020, chapter 21.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from monitor.stats import StatsError

__all__ = [
    "DEFAULT_CONCENTRATIONS",
    "ChiSquareResult",
    "SequentialSRMResult",
    "chisquare_gof",
    "dm_log_bayes_factor",
    "srm_sequential",
]

DEFAULT_CONCENTRATIONS: tuple[float, ...] = (1e1, 1e2, 1e3, 1e4, 1e5, 1e6)
"""Prior concentration grid of the Dirichlet-multinomial mixture (see the module docstring)."""

_WEIGHT_SUM_TOL = 1e-6


# ----------------------------------------------------------------------------------------------
# Result types
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ChiSquareResult:
    """Pearson chi-square goodness-of-fit test of allocation, one row per experiment.

    Attributes
    ----------
    statistic : numpy.ndarray
        ``(E,)`` Pearson statistic ``sum_k (x_k - n w_k)^2 / (n w_k)`` over non-padding slots.
    df : numpy.ndarray
        ``(E,)`` integer degrees of freedom: number of slots with positive weight minus one.
    pvalue : numpy.ndarray
        ``(E,)`` upper-tail probability of the chi-square distribution with ``df`` degrees of
        freedom; 1.0 when ``df == 0`` or ``n == 0``.
    expected : numpy.ndarray
        ``(E, K)`` expected counts ``n w_k`` (0 in padding slots).
    observed_share : numpy.ndarray
        ``(E, K)`` observed shares ``x_k / n`` (all 0 when ``n == 0``).
    expected_share : numpy.ndarray
        ``(E, K)`` design weights normalised to sum exactly to 1.
    """

    statistic: np.ndarray
    df: np.ndarray
    pvalue: np.ndarray
    expected: np.ndarray
    observed_share: np.ndarray
    expected_share: np.ndarray


@dataclass(frozen=True)
class SequentialSRMResult:
    """Anytime-valid SRM e-process over hourly looks, one row per experiment.

    Attributes
    ----------
    log_e : numpy.ndarray
        ``(E, T)`` natural log of the e-value after each look (product over allocation phases).
    log_e_final : numpy.ndarray
        ``(E,)`` log e-value after the last look (0.0 when there are no looks).
    log_e_max : numpy.ndarray
        ``(E,)`` largest log e-value over the looks (0.0 when there are no looks).
    crossed : numpy.ndarray
        ``(E,)`` bool, True if ``log_e`` reached ``threshold`` at some look.
    first_cross : numpy.ndarray
        ``(E,)`` int index of the first look with ``log_e >= threshold``; -1 if none.
    threshold : float
        ``log(1 / alpha)``.
    """

    log_e: np.ndarray
    log_e_final: np.ndarray
    log_e_max: np.ndarray
    crossed: np.ndarray
    first_cross: np.ndarray
    threshold: float


# ----------------------------------------------------------------------------------------------
# Validation helpers
# ----------------------------------------------------------------------------------------------


def _checked_counts(counts: object, name: str) -> np.ndarray:
    """Return ``counts`` as an int64 or float64 array after checking it holds non-negative integers.

    Integer input is not copied into floats (and needs no finiteness or integrality check).
    """
    arr = np.asarray(counts)
    if arr.dtype == bool or not (
        np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)
    ):
        raise StatsError(
            f"{name} must be a numeric array of non-negative integers, got dtype {arr.dtype}"
        )
    if np.issubdtype(arr.dtype, np.integer):
        arr = arr.astype(np.int64, copy=False)
        if arr.size and arr.min() < 0:
            raise StatsError(f"{name} contains negative counts")
        return arr
    arr = arr.astype(np.float64, copy=False)
    if not np.all(np.isfinite(arr)):
        raise StatsError(f"{name} contains NaN or infinite values")
    if np.any(arr < 0):
        raise StatsError(f"{name} contains negative counts")
    if np.any(arr != np.floor(arr)):
        raise StatsError(f"{name} contains non-integer counts")
    return arr


def _as_counts(counts: object, name: str) -> np.ndarray:
    """Return ``counts`` as a float64 array after checking it holds non-negative integers."""
    return _checked_counts(counts, name).astype(np.float64)


def _as_weights(
    weights: object, shape: tuple[int, ...], name: str, allow_empty_rows: bool
) -> np.ndarray:
    """Return ``weights`` as float64 with rows normalised to sum to 1.

    Rows summing to exactly 0 are allowed (and left at 0) only if ``allow_empty_rows``.
    """
    arr = np.asarray(weights, dtype=np.float64)
    if arr.shape != shape:
        raise StatsError(f"{name} has shape {arr.shape}, expected {shape} (same as the counts)")
    if arr.size and not (arr.min() >= 0 and arr.max() < np.inf):  # NaN fails both
        if not np.all(np.isfinite(arr)):
            raise StatsError(f"{name} contains NaN or infinite values")
        raise StatsError(f"{name} contains negative weights")
    total = _slot_sum(arr)[..., np.newaxis]
    empty = total == 0
    bad = np.abs(total - 1.0) > _WEIGHT_SUM_TOL
    if allow_empty_rows:
        bad &= ~empty
    if np.any(bad):
        worst = float(total[bad].flat[0])
        raise StatsError(
            f"{name} rows must sum to 1 (tolerance {_WEIGHT_SUM_TOL:g}); "
            f"found a row summing to {worst:.9g}"
        )
    if np.all(empty | (total == 1.0)):
        return arr  # already normalised: dividing by 1 would change nothing
    return np.divide(arr, total, out=np.zeros_like(arr), where=~empty)


def _slot_sum(a: np.ndarray) -> np.ndarray:
    """``a.sum(axis=-1)`` for a short last axis (slot by slot, which is faster there)."""
    out = a[..., 0].copy()
    for k in range(1, a.shape[-1]):
        out += a[..., k]
    return out


def _check_padding(counts: np.ndarray, weights: np.ndarray, name: str) -> None:
    """Raise if a slot of weight 0 (a padding slot) holds units."""
    if np.any((weights == 0) & (counts > 0)):
        raise StatsError(
            f"{name} has units in a slot whose weight is 0 (padding slots must have count 0)"
        )


def _as_concentrations(concentrations: object) -> np.ndarray:
    """Return the concentration grid as a 1-D float64 array of positive finite values."""
    arr = np.asarray(concentrations, dtype=np.float64)
    if arr.ndim != 1 or arr.size == 0:
        raise StatsError("concentrations must be a non-empty 1-D sequence of positive numbers")
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise StatsError("concentrations must all be positive and finite")
    return arr


def _prepare_one_shot(counts: object, weights: object) -> tuple[np.ndarray, np.ndarray]:
    """Validate ``(E, K)`` or ``(K,)`` counts and weights; return 2-D float arrays."""
    x = _as_counts(counts, "counts")
    if x.ndim == 1:
        x = x[np.newaxis, :]
        w_in = np.asarray(weights, dtype=np.float64)
        w_in = w_in[np.newaxis, :] if w_in.ndim == 1 else w_in
    elif x.ndim == 2:
        w_in = weights
    else:
        raise StatsError(f"counts must have shape (E, K) or (K,), got {x.ndim} dimensions")
    if x.shape[-1] == 0:
        raise StatsError("counts must have at least one variant slot (K >= 1)")
    w = _as_weights(w_in, x.shape, "weights", allow_empty_rows=False)
    _check_padding(x, w, "counts")
    return x, w


# ----------------------------------------------------------------------------------------------
# Core computations (no validation)
# ----------------------------------------------------------------------------------------------


def _log_bf_single(x: np.ndarray, w: np.ndarray, c: float) -> np.ndarray:
    """Log Dirichlet-multinomial(c w) vs multinomial(w) Bayes factor over the last axis.

    Slots with ``w == 0`` must have ``x == 0`` and are dropped from the sums.
    """
    live = w > 0
    n = x.sum(axis=-1)
    a = np.where(live, c * w, 1.0)
    per_slot = special.gammaln(a + x) - special.gammaln(a) - x * np.log(np.where(live, w, 1.0))
    per_slot = np.where(live, per_slot, 0.0)
    return per_slot.sum(axis=-1) + (special.gammaln(c) - special.gammaln(c + n))


def _logmeanexp(per_c: np.ndarray) -> np.ndarray:
    """``log(mean(exp(per_c), axis=0))`` without overflow (all inputs finite)."""
    top = per_c.max(axis=0)
    acc = np.zeros_like(top)
    for row in per_c:
        acc += np.exp(row - top)
    return top + np.log(acc) - np.log(per_c.shape[0])


def _log_bf_mixture(x: np.ndarray, w: np.ndarray, conc: np.ndarray) -> np.ndarray:
    """Log of the equal-weight mixture over ``conc`` of the single-concentration Bayes factors."""
    per_c = np.stack([_log_bf_single(x, w, float(c)) for c in conc], axis=0)
    return _logmeanexp(per_c)


# Cells (experiments x looks) per block of the sequential computation: bounds the working
# memory (a few arrays of ``len(conc) x _BLOCK`` floats) whatever the number of experiments.
_BLOCK = 1 << 16
# Largest memoised log-gamma table (entries per concentration; 8 MiB) and most distinct weight
# values per block for the memoised path; beyond them terms are computed per cell.
_TABLE_MAX = 1 << 20
_MAX_WEIGHT_VALUES = 16


def _weight_codes(w: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Distinct weight values of ``(N, K)`` cells and each cell's index into them.

    Weights are constant within a phase, so a block of cells holds few distinct values: the
    candidates come from a sample of the cells, and every cell is then checked to equal its
    candidate exactly (all values are collected if one does not). None if there are more
    than :data:`_MAX_WEIGHT_VALUES`. The value 0 (padding) is always present.
    """
    step = max(1, w.shape[0] // 512)
    values = np.unique(np.concatenate([w[::step].ravel(), w[-1], [0.0]]))
    for attempt in range(2):
        if values.size > _MAX_WEIGHT_VALUES:
            return None
        codes = np.zeros(w.shape, dtype=np.int64)
        for v in values[1:]:
            codes += w >= v
        if np.array_equal(values[codes], w):
            return values, codes
        values = np.union1d(np.unique(w), [0.0])
    return None  # pragma: no cover - the full set of values always matches


class _Terms:
    """Sums of log-gamma terms of ``log BF_c`` per cell, memoised over integer counts.

    The terms of a cell depend only on its integer counts, its weights and ``c``. When the
    weights take few distinct values and the counts are small compared with the number of
    cells (hourly looks of many experiments), each term ``gammaln(a + j) - gammaln(a) - j log w``
    (``a = c w``) and ``gammaln(c) - gammaln(c + j)`` is computed once per distinct weight and
    count, and looked up per cell: the same floating-point expressions as
    :func:`_log_bf_single`, so the same numbers. Otherwise they are evaluated per cell.
    """

    def __init__(self, conc: np.ndarray, x_max: int, n_max: int, n_cells: int, n_slots: int):
        self.conc = conc
        self.x_len, self.n_len = x_max + 1, n_max + 1
        cost = 2 * self.x_len + self.n_len
        self.tabulate = cost <= _TABLE_MAX and 4 * cost <= n_cells * (n_slots + 1)
        self._slot: dict[float, np.ndarray] = {}
        self._stacked: dict[bytes, np.ndarray] = {}
        self._total: np.ndarray | None = None

    def _slot_table(self, v: float) -> np.ndarray:
        """``(C, x_len)``: per-slot terms for weight ``v`` (zeros for a padding slot)."""
        if v not in self._slot:
            tab = np.zeros((self.conc.size, self.x_len))
            if v > 0:
                j = np.arange(self.x_len, dtype=np.float64)
                for r, c in enumerate(self.conc):
                    a = float(c) * v
                    tab[r] = special.gammaln(a + j) - special.gammaln(a) - j * np.log(v)
            self._slot[v] = tab
        return self._slot[v]

    def _tables(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
        key = values.tobytes()
        if key not in self._stacked:
            if (len(self._slot) + values.size) * self.x_len > _TABLE_MAX:
                return None
            # (C, d * x_len): row r holds, for concentration r, the terms of each value in turn
            self._stacked[key] = np.concatenate([self._slot_table(float(v)) for v in values], axis=1)
        if self._total is None:
            j = np.arange(self.n_len, dtype=np.float64)
            self._total = np.stack([special.gammaln(c) - special.gammaln(c + j) for c in self.conc])
        return self._stacked[key], self._total

    def mixture(self, x: np.ndarray, w: np.ndarray) -> np.ndarray:
        """Log mixture Bayes factor of ``(N, K)`` cells (integer-valued counts ``x``)."""
        coded = _weight_codes(w) if self.tabulate and x.shape[0] else None
        tables = self._tables(coded[0]) if coded is not None else None
        if coded is None or tables is None:
            return _log_bf_mixture(x.astype(np.float64, copy=False), w, self.conc)
        slot, total = tables
        xi = x.astype(np.int64, copy=False)
        index = coded[1] * self.x_len + xi
        n = _slot_sum(xi)
        per_c = np.empty((self.conc.size, x.shape[0]))
        for r in range(self.conc.size):
            row = per_c[r]
            np.take(slot[r], index[:, 0], out=row)
            for k in range(1, x.shape[1]):
                row += np.take(slot[r], index[:, k])
            row += np.take(total[r], n)
        return _logmeanexp(per_c)


def _weight_changes(
    w: np.ndarray, start: np.ndarray, has_weights: np.ndarray
) -> np.ndarray | None:
    """``(B, T - 1)`` True where the weights change within a phase; None if they never do."""
    if np.array_equal(w[:, 1:], w[:, :-1]):
        return None
    same_phase = ~start[:, 1:] & has_weights[:, 1:] & has_weights[:, :-1]
    step = w[:, 1:] - w[:, :-1]
    moved = np.zeros(same_phase.shape, dtype=bool)
    for k in range(w.shape[-1]):
        moved |= np.abs(step[..., k]) > _WEIGHT_SUM_TOL
        moved |= (w[:, 1:, k] > 0) != (w[:, :-1, k] > 0)
    changed = same_phase & moved
    return changed if changed.any() else None


def _sequential_block(
    inc: np.ndarray, w_in: np.ndarray, ph: np.ndarray, row0: int, terms: _Terms
) -> np.ndarray:
    """Log e-values ``(B, T)`` of a block of experiments (rows ``row0 ...`` of the input)."""
    n_exp, n_looks, n_slots = inc.shape
    w = _as_weights(w_in, inc.shape, "weights", allow_empty_rows=True)
    _check_padding(inc, w, "increments")
    look = np.arange(n_looks)
    rows = np.arange(n_exp)[:, np.newaxis]
    # Phase boundaries: start[e, t] is True at the first look of a phase, end[e, t] at its last.
    start = np.ones((n_exp, n_looks), dtype=bool)
    start[:, 1:] = ph[:, 1:] != ph[:, :-1]
    end = np.ones((n_exp, n_looks), dtype=bool)
    end[:, :-1] = start[:, 1:]
    one_phase = not start[:, 1:].any()
    start_idx = np.maximum.accumulate(np.where(start, look, 0), axis=1)

    # Forward-fill weights over padded looks, within the phase only.
    active = _slot_sum(w) > 0
    if active.all():
        has_weights, w_filled = active, w
    else:
        last_active = np.maximum.accumulate(np.where(active, look, -1), axis=1)
        has_weights = last_active >= start_idx
        w_filled = w[rows, np.maximum(last_active, 0)]
        w_filled = np.where(has_weights[..., np.newaxis], w_filled, 0.0)
    changed = _weight_changes(w_filled, start, has_weights)
    if changed is not None:
        e_bad, t_bad = np.argwhere(changed)[0]
        raise StatsError(
            f"weights change within a phase (experiment row {row0 + e_bad}, look {t_bad + 1}); "
            "start a new phase id"
        )

    # Units accumulated since the start of the current phase.
    cum = np.cumsum(inc, axis=1)
    if one_phase:
        in_phase = cum
    else:
        cum_pad = np.concatenate([np.zeros((n_exp, 1, n_slots), dtype=cum.dtype), cum], axis=1)
        in_phase = cum - cum_pad[rows, start_idx]

    # A phase with no weights so far has no units so far; its factor is exactly 1.
    lbf = terms.mixture(in_phase.reshape(-1, n_slots), w_filled.reshape(-1, n_slots))
    lbf = np.where(has_weights, lbf.reshape(n_exp, n_looks), 0.0)
    if one_phase:
        return lbf

    # Sum of the final values of the phases completed before each look.
    completed = np.cumsum(np.where(end, lbf, 0.0), axis=1)
    before = np.concatenate([np.zeros((n_exp, 1)), completed[:, :-1]], axis=1)
    return before + lbf


# ----------------------------------------------------------------------------------------------
# Public API
# ----------------------------------------------------------------------------------------------


def chisquare_gof(counts: object, weights: object) -> ChiSquareResult:
    """Pearson chi-square goodness-of-fit test of observed variant counts against design weights.

    Parameters
    ----------
    counts : array_like
        ``(E, K)`` or ``(K,)`` non-negative integer unit counts per variant slot.
    weights : array_like
        Same shape as ``counts``; non-negative design weights, each row summing to 1 within
        1e-6 (rows are renormalised to sum exactly to 1). A weight of 0 marks a padding slot.

    Returns
    -------
    ChiSquareResult
        Arrays of leading length ``E`` (``E = 1`` for 1-D input).

    Raises
    ------
    StatsError
        If counts are negative, non-integer or non-finite, if shapes differ, if a weight row does
        not sum to 1, or if a padding slot (weight 0) holds units.

    Notes
    -----
    The statistic is ``X2 = sum_k (x_k - n w_k)^2 / (n w_k)`` over slots with ``w_k > 0`` and is
    referred to a chi-square distribution with ``df = #{k: w_k > 0} - 1`` degrees of freedom [1]_.
    The approximation is trusted when every expected count is at least 5 (common practice); hourly
    SRM monitoring normally sees thousands of units, far above that. Edge cases:

    * ``n == 0``: statistic 0, p-value 1, observed shares 0, expected counts 0.
    * A single variant with positive weight: ``df == 0``, statistic 0, p-value 1.
    * Padding slots (weight 0) must have count 0 and do not count towards ``df``.

    This test assumes a single look at the data; re-applying it after every hourly load inflates
    the false-alarm rate far above its nominal level. Use :func:`srm_sequential` for monitoring.

    References
    ----------
    .. [1] K. Pearson, Philosophical Magazine, 50(302), 157-175, 1900.
    """
    x, w = _prepare_one_shot(counts, weights)
    live = w > 0
    n = x.sum(axis=-1)
    df = live.sum(axis=-1).astype(np.int64) - 1
    expected = w * n[:, np.newaxis]
    safe_expected = np.where(expected > 0, expected, 1.0)
    contrib = np.where(expected > 0, (x - expected) ** 2 / safe_expected, 0.0)
    testable = (n > 0) & (df > 0)
    statistic = np.where(testable, contrib.sum(axis=-1), 0.0)
    pvalue = np.ones_like(statistic)
    if np.any(testable):
        pvalue[testable] = stats.chi2.sf(statistic[testable], df[testable])
    pvalue = np.clip(pvalue, 0.0, 1.0)
    n_col = n[:, np.newaxis]
    observed_share = np.divide(x, n_col, out=np.zeros_like(x), where=n_col > 0)
    return ChiSquareResult(
        statistic=statistic,
        df=df,
        pvalue=pvalue,
        expected=expected,
        observed_share=observed_share,
        expected_share=w,
    )


def dm_log_bayes_factor(
    counts: object,
    weights: object,
    concentrations: object = DEFAULT_CONCENTRATIONS,
) -> np.ndarray:
    """Log mixture Dirichlet-multinomial Bayes factor against the designed allocation.

    Parameters
    ----------
    counts : array_like
        ``(E, K)`` or ``(K,)`` non-negative integer cumulative unit counts per variant slot.
    weights : array_like
        Same shape as ``counts``; design weights, each row summing to 1 within 1e-6.
        A weight of 0 marks a padding slot, which must have count 0 and is ignored.
    concentrations : sequence of float, optional
        Prior concentrations ``c`` to mix over with equal weight; default
        :data:`DEFAULT_CONCENTRATIONS`.

    Returns
    -------
    numpy.ndarray
        ``(E,)`` natural log of the Bayes factor (``E = 1`` for 1-D input).

    Raises
    ------
    StatsError
        On invalid counts or weights (as :func:`chisquare_gof`) or a concentration that is not
        positive and finite.

    Notes
    -----
    For one concentration ``c`` and ``a_k = c w_k``, the Bayes factor of the Dirichlet-multinomial
    alternative against the multinomial null ``w`` is [1]_::

        BF_c = Gamma(c) / Gamma(c + n) * prod_k Gamma(a_k + x_k) / (Gamma(a_k) w_k^x_k),

    the multinomial coefficient cancelling. The returned value is
    ``logsumexp_c(log BF_c) - log(len(concentrations))``, evaluated with ``gammaln``. Evaluated at
    the cumulative counts of a stream of units it is a non-negative martingale with mean 1 under
    the null, hence an e-process. Edge cases: ``n == 0`` or a single live variant gives exactly 0;
    padding slots contribute nothing. For ``n`` near 1e12 the absolute rounding error is about
    1e-2 nats (cancellation between terms of size ``n log n``); the value stays finite.

    References
    ----------
    .. [1] M. Lindon and A. Malek, "Anytime-Valid Inference for Multinomial Count Data",
       NeurIPS 2022.
    """
    conc = _as_concentrations(concentrations)
    x, w = _prepare_one_shot(counts, weights)
    return _log_bf_mixture(x, w, conc)


def srm_sequential(
    increments: object,
    weights: object,
    phase: object,
    *,
    alpha: float = 0.001,
    concentrations: object = DEFAULT_CONCENTRATIONS,
) -> SequentialSRMResult:
    """Anytime-valid SRM monitoring: a mixture Dirichlet-multinomial e-process over looks.

    Parameters
    ----------
    increments : array_like
        ``(E, T, K)`` (or ``(T, K)`` for one experiment) new units per look and variant slot,
        non-negative integers, zero-padded.
    weights : array_like
        Same shape; design weights in force at each look, each row summing to 1 within 1e-6.
        Weights must be constant within a phase (within 1e-6). A row of all zeros marks a padded
        look and is allowed only where that look's increments are all 0; it carries the e-value
        forward unchanged.
    phase : array_like
        ``(E, T)`` (or ``(T,)``) integer allocation-phase id per look, non-decreasing along ``T``.
        A new phase starts whenever the id changes (for example after a ramp-up of the weights).
    alpha : float, optional
        False-alarm level in (0, 1); the threshold is ``log(1 / alpha)``. Default 0.001.
    concentrations : sequence of float, optional
        Prior concentration grid, as for :func:`dm_log_bayes_factor`.

    Returns
    -------
    SequentialSRMResult
        Log e-values per look and summary per experiment (``E = 1`` for 2-D input).

    Raises
    ------
    StatsError
        On shape mismatches, invalid counts or weights, weights that change within a phase,
        decreasing phase ids, ``alpha`` outside (0, 1) or an invalid concentration grid.

    Notes
    -----
    Within phase ``p`` the e-process is the mixture Bayes factor of :func:`dm_log_bayes_factor`
    evaluated at the units accumulated since the phase started, with that phase's weights; it
    equals 1 (log 0) before the phase's first unit. Across phases the e-processes multiply: a
    completed phase contributes its final value. Because each factor has conditional mean at most
    1 under the null given the past, the product is an e-process, and by Ville's inequality [2]_
    ``P(sup_t E_t >= 1 / alpha) <= alpha`` however many looks are taken [1]_. ``crossed`` can
    therefore be acted on the first time it becomes True.

    Edge cases: looks with no units leave the e-value unchanged; a single live variant or
    ``n == 0`` gives log e-value 0; padding slots (weight 0) must stay at 0 units; ``T == 0``
    gives empty ``log_e`` and final/max values of 0.0 with ``first_cross == -1``.

    The computation is vectorised: cumulative sums along ``T`` with per-phase resets and a
    cumulative sum of completed-phase contributions, in blocks of experiments so that memory
    stays bounded. The log-gamma terms are memoised over integer counts when that is cheaper
    than evaluating them per look (many experiments with counts in the tens of thousands); the
    result is the same either way.

    References
    ----------
    .. [1] M. Lindon and A. Malek, "Anytime-Valid Inference for Multinomial Count Data",
       NeurIPS 2022.
    .. [2] J. Ville, "Etude critique de la notion de collectif", Gauthier-Villars, 1939.
    """
    alpha_f = float(alpha)
    if not np.isfinite(alpha_f) or not 0.0 < alpha_f < 1.0:
        raise StatsError(f"alpha must be strictly between 0 and 1, got {alpha!r}")
    conc = _as_concentrations(concentrations)
    inc = _checked_counts(increments, "increments")
    ph = np.asarray(phase)
    if inc.ndim == 2:
        inc = inc[np.newaxis]
        w_in = np.asarray(weights, dtype=np.float64)
        w_in = w_in[np.newaxis] if w_in.ndim == 2 else w_in
        ph = ph[np.newaxis] if ph.ndim == 1 else ph
    elif inc.ndim == 3:
        w_in = np.asarray(weights, dtype=np.float64)
    else:
        raise StatsError(
            f"increments must have shape (E, T, K) or (T, K), got {inc.ndim} dimensions"
        )
    n_exp, n_looks, n_slots = inc.shape
    if n_slots == 0:
        raise StatsError("increments must have at least one variant slot (K >= 1)")
    if ph.shape != (n_exp, n_looks):
        raise StatsError(f"phase has shape {ph.shape}, expected {(n_exp, n_looks)}")
    if ph.size and not np.issubdtype(ph.dtype, np.integer):
        integral = np.issubdtype(ph.dtype, np.floating) and bool(
            np.all(np.isfinite(ph)) and np.all(ph == np.floor(ph))
        )
        if not integral:
            raise StatsError("phase must hold integer phase ids")
    ph = ph.astype(np.int64, copy=False)
    if np.any(ph[:, 1:] < ph[:, :-1]):
        raise StatsError("phase ids must be non-decreasing along the look axis")
    if w_in.shape != inc.shape:
        raise StatsError(
            f"weights has shape {w_in.shape}, expected {inc.shape} (same as the counts)"
        )
    threshold = float(np.log(1.0 / alpha_f))

    if n_looks == 0 or n_exp == 0:
        zeros = np.zeros(n_exp)
        return SequentialSRMResult(
            log_e=np.zeros((n_exp, n_looks)),
            log_e_final=zeros,
            log_e_max=zeros.copy(),
            crossed=np.zeros(n_exp, dtype=bool),
            first_cross=np.full(n_exp, -1, dtype=np.int64),
            threshold=threshold,
        )

    # Counts since a phase start never exceed an experiment's totals: bounds of the tables.
    per_slot = inc.sum(axis=1)
    terms = _Terms(conc, int(per_slot.max()), int(per_slot.sum(axis=1).max()),
                   n_exp * n_looks, n_slots)
    log_e = np.empty((n_exp, n_looks))
    step = max(1, _BLOCK // n_looks)
    for lo in range(0, n_exp, step):
        hi = min(lo + step, n_exp)
        log_e[lo:hi] = _sequential_block(inc[lo:hi], w_in[lo:hi], ph[lo:hi], lo, terms)

    hit = log_e >= threshold
    crossed = hit.any(axis=1)
    first_cross = np.where(crossed, hit.argmax(axis=1), -1).astype(np.int64)
    return SequentialSRMResult(
        log_e=log_e,
        log_e_final=log_e[:, -1].copy(),
        log_e_max=log_e.max(axis=1),
        crossed=crossed,
        first_cross=first_cross,
        threshold=threshold,
    )
