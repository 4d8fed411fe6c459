"""Allocation-ratio checks: turn hourly unit counts into findings.

Input is the tidy frame of new units per experiment x variant x hour (x segment)
for each pipeline stage, as pulled by :mod:`monitor.pull`. Checks:

``srm``
    Per stage. Units are attributed to the ramp phase of their first assignment
    and tested against that phase's designed weights. The alert is driven by the
    anytime-valid Dirichlet-multinomial e-process (:func:`monitor.stats.allocation.srm_sequential`),
    evaluated at every hour since the experiment started, so hourly monitoring does
    not inflate false alarms; phases multiply. The ``warn`` is driven by the same
    e-process: it has reached ``srm_warn_e_value`` (default 1/sqrt(alpha), 32 at alpha
    0.001) at some look, a level a correct split ever reaches with probability at
    most sqrt(alpha) however often it is looked at (Ville's inequality for a test martingale; Ramdas,
    Grünwald, Vovk & Shafer, "Game-theoretic statistics and safe anytime-valid
    inference", Statistical Science, 2023, arXiv:2210.01948). The fixed-horizon Pearson chi-square is
    reported beside it as information only: re-applied at every hourly look its
    p-value dips below alpha on healthy experiments now and then, so it sets no
    status.
``leakage``
    Share of units seen in more than one variant (first stage only), against
    fixed share thresholds (no test, so nothing is re-applied per look).
``unknown_variant``
    Units whose variant is NULL or not in the registry (first stage only).
``freshness``
    No new units for longer than ``freshness_gap_hours`` while the same hours of
    the previous days brought enough units that silence is implausible
    (Poisson probability of zero arrivals below alpha).
``design``
    The registry describes the experiment in a way no check can use.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta

import numpy as np
import pandas as pd
from scipy import stats as sps

from monitor.config import CheckConfig
from monitor.findings import Finding
from monitor.registry import Experiment, RegistryProblem
from monitor.stats.allocation import DEFAULT_CONCENTRATIONS, chisquare_gof, srm_sequential
from monitor.wording import ceil_hour, floor_hour, fmt_p

__all__ = ["HourlyCounts", "allocation_findings", "allocation_findings_from", "design_findings", "hour_index", "hourly_by_variant"]

HOUR = timedelta(hours=1)


def _fmt_share(shares: dict[str, float]) -> str:
    return "/".join(f"{100 * s:.1f}" for s in shares.values())


def _fmt_e(log_e: float) -> str:
    if log_e < math.log(1e6):
        return f"{math.exp(log_e):,.0f}" if log_e > math.log(10) else f"{math.exp(log_e):.2g}"
    log10 = log_e / math.log(10)
    exponent = math.floor(log10)
    return f"{10 ** (log10 - exponent):.1f}e{exponent}"


def hourly_by_variant(frame: pd.DataFrame) -> pd.DataFrame:
    """Sum a counts frame over segments: experiment x variant x hour (x leak_hour when present)."""
    keys = ["experiment", "variant", "hour"] + (["leak_hour"] if "leak_hour" in frame.columns else [])
    if frame.empty:
        return pd.DataFrame({c: [] for c in keys + ["units", "leaked"]})
    g = frame.assign(variant=frame["variant"].astype(object).where(frame["variant"].notna(), None))
    return (
        g.groupby(keys, dropna=False, sort=False)[["units", "leaked"]]
        .sum()
        .reset_index()
    )


#: ``leak_hour`` of units that never leaked, and of leaked units whose leak time is not known
#: (a normal pull: they count as leaked at any time asked about).
NEVER = np.iinfo(np.int64).max
UNKNOWN_LEAK = np.iinfo(np.int64).min
_EPOCH = pd.Timestamp("1970-01-01", tz="UTC")


def hour_index(t: datetime) -> int:
    """Whole hours since the Unix epoch of an aware time (floored)."""
    return int((pd.Timestamp(t).tz_convert("UTC") - _EPOCH) // pd.Timedelta(hours=1))


def _hour_time(index: int) -> datetime:
    return (_EPOCH + pd.Timedelta(hours=int(index))).to_pydatetime()


@dataclass(frozen=True)
class HourlyCounts:
    """One experiment's counts at one stage, summed over segments, as small arrays.

    Row ``r`` holds ``units[r]`` clean and ``leaked[r]`` leaked units first assigned in
    variant ``names[code[r]]`` (None: NULL variant) in hour ``hour[r]`` (hours since the
    epoch). ``leak_hour[r]`` is the hour the leaked units were first seen in another
    variant: :data:`UNKNOWN_LEAK` for a normal pull, a real hour for a replay pull, so
    :meth:`before` can give the counts as they stood at an earlier time.
    """

    names: tuple[str | None, ...]
    code: np.ndarray
    hour: np.ndarray
    units: np.ndarray
    leaked: np.ndarray
    leak_hour: np.ndarray

    @classmethod
    def tables(cls, frame: pd.DataFrame) -> dict[str, HourlyCounts]:
        """Per experiment, from a counts frame (experiment, variant, hour, units, leaked[, leak_hour])."""
        hourly = hourly_by_variant(frame)
        out: dict[str, HourlyCounts] = {}
        if hourly.empty:
            return out
        hours = pd.to_datetime(hourly["hour"], utc=True)
        h_idx = ((hours - _EPOCH) // pd.Timedelta(hours=1)).to_numpy().astype(np.int64)
        if "leak_hour" in hourly.columns:
            lh = pd.to_datetime(hourly["leak_hour"], utc=True)
            l_idx = np.where(lh.isna().to_numpy(), NEVER,
                             ((lh - _EPOCH) // pd.Timedelta(hours=1)).fillna(0).to_numpy().astype(np.int64))
        else:
            l_idx = np.full(len(hourly), UNKNOWN_LEAK, dtype=np.int64)
        codes, uniques = pd.factorize(hourly["variant"], use_na_sentinel=True)
        names = tuple(str(u) for u in uniques)
        has_null = bool((codes < 0).any())
        codes = np.where(codes < 0, len(names), codes).astype(np.int64)
        if has_null:
            names = names + (None,)
        units = hourly["units"].to_numpy().astype(np.int64)
        leaked = hourly["leaked"].to_numpy().astype(np.int64)
        exp = hourly["experiment"].astype(str).to_numpy()
        order = np.argsort(exp, kind="stable")
        bounds = np.flatnonzero(np.r_[True, exp[order][1:] != exp[order][:-1], True])
        for a, b in itertools.pairwise(bounds):
            rows = order[a:b]
            out[str(exp[rows[0]])] = cls(names, codes[rows], h_idx[rows], units[rows], leaked[rows], l_idx[rows])
        return out

    def before(self, hour: int) -> HourlyCounts:
        """The counts as they stood at the start of ``hour`` (hours since the epoch)."""
        keep = self.hour < hour
        leaked = self.leaked[keep]
        late = self.leak_hour[keep] >= hour
        return HourlyCounts(self.names, self.code[keep], self.hour[keep], self.units[keep] + np.where(late, leaked, 0),
                            np.where(late, 0, leaked), self.leak_hour[keep])

    def by_name(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rows, units and leaked per entry of ``names``."""
        m = len(self.names)
        return (np.bincount(self.code, minlength=m),
                np.bincount(self.code, weights=self.units, minlength=m).astype(np.int64),
                np.bincount(self.code, weights=self.leaked, minlength=m).astype(np.int64))

    def name_order(self) -> list[int]:
        """Indices of ``names`` sorted by name, NULL last."""
        return sorted(range(len(self.names)), key=lambda k: (self.names[k] is None, self.names[k] or ""))


def design_findings(problems: Sequence[RegistryProblem]) -> list[Finding]:
    return [
        Finding(p.experiment, "design", "registry", "alert", f"registry: {p.message}; other checks skipped",
                {"problem": p.message})
        for p in problems
    ]


# -- SRM ------------------------------------------------------------------------------------


def _phase_grid(exp: Experiment, t0: datetime, n_hours: int) -> tuple[np.ndarray, np.ndarray]:
    """Phase number and weight row per hour; 0 / zero weights where an hour is not
    wholly inside one phase (before the start, in a gap, or straddling a ramp)."""
    phase = np.zeros(n_hours, dtype=np.int64)
    weights = np.zeros((n_hours, len(exp.variants)))
    for ph in exp.phases:
        lo = max(0, math.ceil((ph.start - t0) / HOUR))
        hi = n_hours if ph.end is None else min(n_hours, math.floor((ph.end - t0) / HOUR))
        if hi > lo:
            phase[lo:hi] = ph.number
            weights[lo:hi] = exp.weight_vector(ph)
    return phase, weights


def _srm_findings(
    exps: Sequence[Experiment], tables: dict[str, HourlyCounts], source: str, as_of: datetime, cfg: CheckConfig
) -> list[Finding]:
    if not exps:
        return []
    E = len(exps)
    K = max(len(e.variants) for e in exps)
    t0s = [floor_hour(e.start) for e in exps]
    t_end = ceil_hour(as_of)
    T = max(1, max(int((t_end - t) / HOUR) for t in t0s))
    inc = np.zeros((E, T, K), dtype=np.int64)
    w = np.zeros((E, T, K))
    ph = np.zeros((E, T), dtype=np.int64)
    outside = np.zeros(E, dtype=np.int64)
    for i, e in enumerate(exps):
        n_h = int((t_end - t0s[i]) / HOUR)
        phase_i, w_i = _phase_grid(e, t0s[i], n_h)
        ph[i, :n_h] = phase_i
        w[i, :n_h, : len(e.variants)] = w_i
        h = tables.get(e.id)
        if h is None or not len(h.code):
            continue
        slot = np.array([e.variants.index(n) if n in e.variants else -1 for n in h.names], dtype=np.int64)
        k_idx = slot[h.code]
        t_idx = h.hour - hour_index(t0s[i])
        ok = (k_idx >= 0) & (t_idx >= 0) & (t_idx < T)
        np.add.at(inc[i], (t_idx[ok], k_idx[ok]), h.units[ok])
    # units in hours that belong to no single phase are excluded (reported)
    no_phase = ph == 0
    outside = (inc * no_phase[:, :, None]).sum(axis=(1, 2))
    inc[no_phase] = 0
    # phase ids must be non-decreasing: carry the previous phase id through gaps
    ph_ff = np.maximum.accumulate(np.where(no_phase, 0, ph), axis=1)
    ph_ff = np.where(ph_ff == 0, 1, ph_ff)
    conc = tuple(cfg.srm_prior_concentrations) if cfg.srm_prior_concentrations else DEFAULT_CONCENTRATIONS
    seq = srm_sequential(inc, w, ph_ff, alpha=cfg.alpha, concentrations=conc)
    warn_e = cfg.srm_warn_e_value or 1.0 / math.sqrt(cfg.alpha)
    log_warn = math.log(warn_e)

    out: list[Finding] = []
    for i, e in enumerate(exps):
        kv = len(e.variants)
        phase_stats = []
        rows_counts, rows_w = [], []
        for p in e.phases:
            mask = ph[i] == p.number
            if not mask.any():
                continue
            rows_counts.append(inc[i, mask, :kv].sum(axis=0))
            rows_w.append(e.weight_vector(p))
            phase_stats.append(p)
        total_units = inc[i, :, :kv].sum(axis=0)
        units_json = {v: int(total_units[k]) for k, v in enumerate(e.variants)}
        stats: dict[str, object] = {
            "units": units_json,
            "units_outside_phases": int(outside[i]),
            "alpha": cfg.alpha,
            "threshold_e_value": 1.0 / cfg.alpha,
            "warn_e_value": warn_e,
            "warn_reached_at": (t0s[i] + HOUR * (int(np.argmax(seq.log_e[i] >= log_warn)) + 1)
                                if seq.log_e_max[i] >= log_warn else None),
            "log_e_value": float(seq.log_e_final[i]),
            "log_e_value_max": float(seq.log_e_max[i]),
            "e_value": math.exp(min(seq.log_e_final[i], 700.0)) if seq.log_e_final[i] < 700 else None,
            "first_crossed_at": (t0s[i] + HOUR * (int(seq.first_cross[i]) + 1)) if seq.crossed[i] else None,
            "phases": [],
        }
        worst_dev, worst_p, current = 0.0, 1.0, None
        chi_total, df_total = 0.0, 0
        if rows_counts:
            chi = chisquare_gof(np.array(rows_counts), np.array(rows_w))
            for j, p in enumerate(phase_stats):
                n = int(np.sum(rows_counts[j]))
                obs = {v: float(chi.observed_share[j, k]) for k, v in enumerate(e.variants)}
                expd = {v: float(chi.expected_share[j, k]) for k, v in enumerate(e.variants)}
                pval = float(chi.pvalue[j])
                entry = {
                    "phase": p.number, "start": p.start, "end": p.end, "n": n,
                    "units": {v: int(rows_counts[j][k]) for k, v in enumerate(e.variants)},
                    "observed_share": obs, "expected_share": expd,
                    "chi2": float(chi.statistic[j]), "df": int(chi.df[j]), "p_value": pval,
                }
                stats["phases"].append(entry)  # type: ignore[attr-defined]
                if n > 0:
                    current = entry
                chi_total += float(chi.statistic[j])
                df_total += int(chi.df[j])
                if n >= cfg.srm_min_units:
                    worst_p = min(worst_p, pval)
                    dev = max(abs(obs[v] / expd[v] - 1.0) for v in e.variants if expd[v] > 0)
                    worst_dev = max(worst_dev, dev)
        p_comb = float(sps.chi2.sf(chi_total, df_total)) if df_total > 0 else 1.0
        stats.update({"chi2": chi_total, "df": df_total, "p_value": p_comb, "max_relative_deviation": worst_dev})
        phase_no = current["phase"] if current else None
        where = f"stage {source}"
        if seq.crossed[i]:
            assert current is not None
            crossed_at = stats["first_crossed_at"]
            summary = (
                f"SRM at {where}: shares {_fmt_share(current['observed_share'])}% vs designed "
                f"{_fmt_share(current['expected_share'])}% (phase {phase_no}, n={current['n']:,}); "
                f"e-value {_fmt_e(seq.log_e_final[i])} passed 1/alpha={1 / cfg.alpha:,.0f} at "
                f"{crossed_at:%Y-%m-%d %H:%M} UTC; chi-square p={fmt_p(p_comb)}"
            )
            out.append(Finding(e.id, "srm", source, "alert", summary, stats, phase_no,
                               critical=worst_dev >= cfg.srm_critical_deviation))
        elif seq.log_e_max[i] >= log_warn:
            summary = (
                f"possible SRM at {where}: the always-valid e-value reached the warn level {warn_e:,.0f} at "
                f"{stats['warn_reached_at']:%Y-%m-%d %H:%M} UTC (now {_fmt_e(seq.log_e_final[i])}) but not yet the "
                f"{1 / cfg.alpha:,.0f} an alert needs; chi-square p={fmt_p(p_comb)} (one look, for information)"
            )
            out.append(Finding(e.id, "srm", source, "warn", summary, stats, phase_no))
        else:
            n_all = int(total_units.sum())
            note = ""
            if worst_p < cfg.alpha:
                note = (f"; the one-look chi-square p={fmt_p(worst_p)} is below alpha, but under hourly looks that "
                        f"happens to correct splits too, and the e-value has not reached the warn level {warn_e:,.0f}")
            summary = (
                f"split as designed at {where} (n={n_all:,}, e-value {_fmt_e(seq.log_e_final[i])}, "
                f"chi-square p={fmt_p(p_comb)}){note}"
            )
            out.append(Finding(e.id, "srm", source, "ok", summary, stats, phase_no))
    return out


# -- leakage, unknown variants, freshness -------------------------------------------------


def _leakage(e: Experiment, h: HourlyCounts | None, source: str, cfg: CheckConfig) -> Finding:
    if h is not None and len(h.code):
        _, units_by, leaked_by = h.by_name()
        units, leaked = int(units_by.sum()), int(leaked_by.sum())
        by_var = {("(null)" if h.names[k] is None else str(h.names[k])): int(leaked_by[k])
                  for k in h.name_order() if leaked_by[k]}
    else:
        units, leaked, by_var = 0, 0, {}
    total = units + leaked
    share = leaked / total if total else 0.0
    stats = {"leaked_units": leaked, "units": total, "share": share,
             "leaked_by_first_variant": by_var,
             "warn_share": cfg.leakage_warn_share, "alert_share": cfg.leakage_alert_share}
    if total and share >= cfg.leakage_alert_share and leaked > 0:
        return Finding(e.id, "leakage", source, "alert",
                       f"{leaked:,} of {total:,} units ({100 * share:.2f}%) were seen in more than one variant; they are excluded from every count",
                       stats, critical=share >= cfg.critical_factor * cfg.leakage_alert_share)
    if total and share >= cfg.leakage_warn_share and leaked > 0:
        return Finding(e.id, "leakage", source, "warn",
                       f"{leaked:,} of {total:,} units ({100 * share:.3f}%) were seen in more than one variant (excluded)", stats)
    return Finding(e.id, "leakage", source, "ok", f"{leaked:,} units seen in more than one variant", stats)


def _unknown(e: Experiment, h: HourlyCounts | None, source: str, cfg: CheckConfig) -> Finding:
    n_null, total, by_name = 0, 0, {}
    if h is not None and len(h.code):
        rows_by, units_by, leaked_by = h.by_name()
        both = units_by + leaked_by
        total = int(both.sum())
        for k in h.name_order():
            name = h.names[k]
            if name is None:
                n_null = int(both[k])
            elif rows_by[k] and name not in e.variants:
                by_name[str(name)] = int(both[k])
    n_unknown = sum(by_name.values())
    bad = n_null + n_unknown
    share = bad / total if total else 0.0
    stats = {"null_variant_units": n_null, "unknown_variant_units": by_name,
             "units": total, "share": share, "known_variants": list(e.variants)}
    if bad == 0:
        return Finding(e.id, "unknown_variant", source, "ok", "every unit has a designed variant", stats)
    parts = []
    if n_null:
        parts.append(f"{n_null:,} with a NULL variant")
    if n_unknown:
        names = ", ".join(repr(k) for k in list(by_name)[:5])
        parts.append(f"{n_unknown:,} in variants not in the registry ({names})")
    summary = f"{' and '.join(parts)}: {100 * share:.2f}% of units; they are left out of the SRM test"
    status = "alert" if share >= cfg.unknown_variant_alert_share else "warn"
    return Finding(e.id, "unknown_variant", source, status, summary, stats,
                   critical=share >= cfg.critical_factor * cfg.unknown_variant_alert_share)


def _freshness(e: Experiment, h: HourlyCounts | None, source: str, as_of: datetime, cfg: CheckConfig) -> Finding:
    start = e.start
    gap_limit = timedelta(hours=cfg.freshness_gap_hours)
    totals: dict[int, float] = {}
    if h is not None and len(h.code):
        hours, inv = np.unique(h.hour, return_inverse=True)
        sums = np.bincount(inv, weights=(h.units + h.leaked).astype(np.float64))
        totals = {int(t): float(v) for t, v in zip(hours, sums) if v > 0}
    live_for = as_of - start
    stats: dict[str, object] = {"gap_limit_hours": cfg.freshness_gap_hours}
    if not totals:
        stats.update({"last_units_at": None, "gap_hours": live_for / HOUR, "expected_units_in_gap": None})
        if live_for >= gap_limit:
            return Finding(e.id, "freshness", source, "alert",
                           f"no units have arrived since the experiment started {live_for / HOUR:.0f} h ago", stats,
                           critical=live_for >= cfg.critical_factor * gap_limit)
        return Finding(e.id, "freshness", source, "ok", "started less than the gap limit ago; no units yet", stats)
    last_hour = _hour_time(max(totals))
    data_until = min(as_of, last_hour + HOUR)
    gap = as_of - data_until
    gap_h = max(gap / HOUR, 0.0)
    # expected arrivals in the silent hours, from the same hours of the previous days
    gap_start = hour_index(ceil_hour(data_until))
    first = hour_index(floor_hour(start))
    days = cfg.freshness_baseline_days
    expected = 0.0
    for hh in range(gap_start, gap_start + math.ceil(gap_h)):
        past = [p for p in (hh - 24 * d for d in range(1, days + 1)) if first <= p < gap_start]
        if past:
            expected += sum(totals.get(p, 0.0) for p in past) / len(past)
    p_silence = math.exp(-expected)
    stats.update({"last_units_at": last_hour, "gap_hours": gap_h, "expected_units_in_gap": expected,
                  "p_silence": p_silence})
    if gap >= gap_limit and p_silence < cfg.alpha:
        return Finding(e.id, "freshness", source, "alert",
                       f"no new units for {gap_h:.0f} h (last at {last_hour:%Y-%m-%d %H:00} UTC); the same hours of the "
                       f"previous days brought {expected:,.0f} units", stats,
                       critical=gap >= cfg.critical_factor * gap_limit)
    if gap >= gap_limit and p_silence < 0.05:
        return Finding(e.id, "freshness", source, "warn",
                       f"no new units for {gap_h:.0f} h; {expected:.1f} were expected, so this may be a lull", stats)
    return Finding(e.id, "freshness", source, "ok",
                   f"last new units at {last_hour:%Y-%m-%d %H:00} UTC", stats)


def allocation_findings(
    experiments: Sequence[Experiment],
    counts_by_source: dict[str, pd.DataFrame],
    first_source: str,
    as_of: datetime,
    cfg: CheckConfig,
) -> list[Finding]:
    """All allocation-ratio findings for ``experiments`` (live ones) as of ``as_of``.

    ``counts_by_source`` maps each stage name to its counts frame (columns
    experiment, variant, hour, segment, units, leaked; hours aware UTC).
    """
    tables = {name: HourlyCounts.tables(df) for name, df in counts_by_source.items()}
    return allocation_findings_from(experiments, tables, first_source, as_of, cfg)


def allocation_findings_from(
    experiments: Sequence[Experiment],
    tables_by_source: dict[str, dict[str, HourlyCounts]],
    first_source: str,
    as_of: datetime,
    cfg: CheckConfig,
) -> list[Finding]:
    """:func:`allocation_findings` from counts already in :class:`HourlyCounts` form
    (stage -> experiment -> counts); a replay calls it once per step."""
    out: list[Finding] = []
    for name, tables in tables_by_source.items():
        out.extend(_srm_findings(experiments, tables, name, as_of, cfg))
    first = tables_by_source[first_source]
    for e in experiments:
        h = first.get(e.id)
        out.append(_leakage(e, h, first_source, cfg))
        out.append(_unknown(e, h, first_source, cfg))
        out.append(_freshness(e, h, first_source, as_of, cfg))
    return out
