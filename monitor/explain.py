"""Explain a sample ratio mismatch: when it started, where it lives, and what likely caused it.

:func:`explain_experiment` pulls the hourly counts of one experiment at every configured
pipeline stage (read-only, nothing is recorded) and, per ramp phase, puts the
statistics of :mod:`monitor.stats.diagnosis` together:

* **time** -- observed against designed shares per day and per hour, and the
  maximum-likelihood onset of the mismatch with its band;
* **segments** -- for every configured segment dimension, per-slice tests (NULL
  values as the slice ``(null)``, wide dimensions folded to the 20 largest values
  plus ``(other)``), Holm-adjusted p-values, each slice's share of the pooled
  chi-square, and the smallest set of slices whose removal leaves the rest
  consistent with the design;
* **stages** -- the ratio at each stage, the first stage where it breaks, and the
  units dropped per variant between stages with a test of equal drop rates;
* **balance** -- whether each segment dimension is distributed alike across variants;
* **causes** -- likely causes, ranked, with the evidence behind each.

:func:`attach_diagnoses` computes the same diagnosis from counts a cycle has already
pulled and attaches a compact form of it to each SRM alert.

The renderers :func:`to_json`, :func:`render_text` and :func:`render_html` turn a
:class:`Diagnosis` into the three output formats of ``expwatch explain``.
"""

from __future__ import annotations

import base64
import io
import json
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import datetime, timedelta, timezone
from typing import Any

import numpy as np
import pandas as pd

from monitor.config import Config
from monitor.errors import ConfigError
from monitor.findings import Finding, clean_json
from monitor.registry import Experiment, Phase
from monitor.stats import StatsError
from monitor.stats.diagnosis import (
    categorical_balance,
    diagnose_slices,
    diagnose_stages,
    fold_small_slices,
    locate_onset,
)
from monitor.wording import ceil_hour, floor_hour, fmt_p

__all__ = [
    "CAUSES",
    "Cause",
    "Diagnosis",
    "DimensionDiagnosis",
    "JSON_FORMAT",
    "OnsetSummary",
    "PhaseDiagnosis",
    "ShareSeries",
    "SliceResult",
    "StageResult",
    "StageTransition",
    "attach_diagnoses",
    "diagnose_counts",
    "explain_experiment",
    "render_html",
    "render_text",
    "to_json",
]

log = logging.getLogger("monitor")

HOUR = timedelta(hours=1)
#: Number of values of a segment dimension kept before the rest are folded.
TOP_K = 20
NULL_LABEL = "(null)"
OTHER_LABEL = "(other)"
#: Identifier of the JSON document written by ``expwatch explain --format json``.
JSON_FORMAT = "expwatch.explain/1"

#: Our taxonomy of where sample ratio mismatches come from (after Fabijan et al. 2019).
CAUSES: dict[str, str] = {
    "assignment": "the split itself: units are handed out in other shares than designed",
    "delivery": "delivery/execution: some units of a variant never get (or never report) their experience",
    "log_processing": "log processing: a step that joins, deduplicates or drops log rows treats variants differently",
    "analysis_filtering": "analysis filtering: a filter applied before analysis removes units of one variant more often",
    "interference": "interference: another experiment or change starting at the same time alters who is counted",
}


# ---------------------------------------------------------------------------
# result types
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class ShareSeries:
    """Units and observed shares per period (day or hour) at one stage.

    Attributes
    ----------
    period : str
        ``"day"`` or ``"hour"``.
    starts : tuple of datetime
        Aware UTC start of each period.
    units : ndarray, shape (T, K)
        New units per period and variant.
    observed_share : ndarray, shape (T, K)
        Row shares; the designed shares for a period without units.
    """

    period: str
    starts: tuple[datetime, ...]
    units: np.ndarray
    observed_share: np.ndarray


@dataclass(frozen=True)
class OnsetSummary:
    """The estimated onset of the mismatch, in time.

    Attributes
    ----------
    onset : datetime or None
        Start of the first hour of the changed segment (aware UTC); None when the
        shares never deviate.
    band_start, band_end : datetime or None
        Hull of the hours inside the profile-likelihood band (inclusive starts).
    band_level : float
        Nominal level of the band.
    llr : float
        Maximised log-likelihood ratio against "as designed throughout".
    from_start : bool
        Whether the band includes the first hour of the phase (no evidence that the
        ratio was ever right).
    shares_before, shares_after : dict of str to float
        Observed shares before and from the onset.
    units_before, units_after : int
        Units before and from the onset.
    """

    onset: datetime | None
    band_start: datetime | None
    band_end: datetime | None
    band_level: float
    llr: float
    from_start: bool
    shares_before: dict[str, float]
    shares_after: dict[str, float]
    units_before: int
    units_after: int


@dataclass(frozen=True)
class SliceResult:
    """One value of a segment dimension.

    Attributes
    ----------
    value : str
        The segment value (``(null)`` for NULL, ``(other)`` for the folded rest).
    units : dict of str to int
        Units per variant.
    shares : dict of str to float
        Observed shares.
    chi2, p_value, p_holm : float
        Pearson test against the design, raw and Holm-adjusted over the slices.
    contribution : float
        Additive share of the slice in the pooled chi-square.
    removed : bool
        Whether the slice is in the removal set.
    """

    value: str
    units: dict[str, int]
    shares: dict[str, float]
    chi2: float
    p_value: float
    p_holm: float
    contribution: float
    removed: bool


@dataclass(frozen=True)
class DimensionDiagnosis:
    """Slice analysis and covariate balance of one segment dimension.

    Attributes
    ----------
    dimension : str
        Segment column name.
    slices : tuple of SliceResult
        Largest first, then ``(other)`` if anything was folded.
    n_values : int
        Distinct values seen (NULL counts as one).
    n_folded : int
        Values folded into ``(other)``.
    pooled_chi2, pooled_p_value : float
        Test of all slices together.
    removal_set : tuple of str
        Values whose removal leaves the rest consistent with the design, in
        removal order (greedy).
    remainder_p_value : float
        Pooled p-value of the rest after the removals.
    contrast_p_value : float
        Homogeneity test of the removed slices against the rest (1.0 if nothing
        was removed or nothing is left).
    concentrated : bool
        The mismatch is confined to ``removal_set``: the rest is consistent, the
        removed slices differ from the rest, and they are fewer than half of the
        non-empty values and hold less than half of the units.
    balance_chi2, balance_p_value, cramers_v : float
        Test that the dimension is distributed alike in every variant.
    balance_df : int
        Its degrees of freedom.
    worst_cell : tuple of (str, str, float) or None
        (value, variant, adjusted residual) of the cell with the largest absolute
        adjusted residual; None when the test has no degrees of freedom.
    slice_onset : OnsetSummary or None
        Onset estimated on the removal set alone, when ``concentrated``.
    daily_units : ndarray, shape (S, D, K)
        Units per slice (in the order of ``slices``), day of the phase and variant.
    """

    dimension: str
    slices: tuple[SliceResult, ...]
    n_values: int
    n_folded: int
    pooled_chi2: float
    pooled_p_value: float
    removal_set: tuple[str, ...]
    remainder_p_value: float
    contrast_p_value: float
    concentrated: bool
    balance_chi2: float
    balance_df: int
    balance_p_value: float
    cramers_v: float
    worst_cell: tuple[str, str, float] | None
    slice_onset: OnsetSummary | None
    daily_units: np.ndarray


@dataclass(frozen=True)
class StageResult:
    """The ratio at one pipeline stage within a phase.

    Attributes
    ----------
    stage : str
        Stage (source) name.
    units : dict of str to int
        Units per variant.
    shares : dict of str to float
        Observed shares.
    chi2, p_value : float
        Pearson test against the design.
    broken : bool
        ``p_value < alpha``.
    """

    stage: str
    units: dict[str, int]
    shares: dict[str, float]
    chi2: float
    p_value: float
    broken: bool


@dataclass(frozen=True)
class StageTransition:
    """Units lost between two consecutive stages.

    Attributes
    ----------
    from_stage, to_stage : str
        Stage names.
    dropped : dict of str to int
        Units lost per variant.
    drop_rate : dict of str to float
        ``dropped / units at from_stage``.
    chi2, p_value : float or None
        Homogeneity test of equal drop rates across variants; None when the counts
        are not nested (a variant has more units at ``to_stage``).
    df : int
        Degrees of freedom of that test (0 when not nested).
    nested : bool
        Whether every variant's count shrank or stayed.
    """

    from_stage: str
    to_stage: str
    dropped: dict[str, int]
    drop_rate: dict[str, float]
    chi2: float | None
    df: int
    p_value: float | None
    nested: bool


@dataclass(frozen=True)
class Cause:
    """One likely cause, with its evidence.

    Attributes
    ----------
    category : str
        A key of :data:`CAUSES`.
    score : float
        Rule-of-thumb plausibility in [0, 1] used only for ranking.
    stage : str or None
        The stage the cause points at, when it points at one.
    evidence : tuple of str
        Plain sentences, each naming the statistic behind it.
    """

    category: str
    score: float
    stage: str | None
    evidence: tuple[str, ...]

    @property
    def description(self) -> str:
        return CAUSES[self.category]


@dataclass(frozen=True)
class PhaseDiagnosis:
    """Everything known about one ramp phase.

    Attributes
    ----------
    phase : int
        Phase number (1-based).
    start, end : datetime, datetime or None
        Phase bounds; ``end`` None while it is running.
    designed_share : dict of str to float
        Designed weights.
    stages : tuple of StageResult
        One per configured stage, in pipeline order.
    transitions : tuple of StageTransition
        Between consecutive stages.
    first_break : str or None
        First stage whose ratio is inconsistent with the design.
    focus_stage : str
        Stage the time and segment analyses use: ``first_break``, or the first
        stage when nothing breaks.
    daily, hourly : ShareSeries
        Shares over time at ``focus_stage``.
    onset : OnsetSummary
        Onset of the mismatch at ``focus_stage`` (all slices together).
    dimensions : tuple of DimensionDiagnosis
        One per configured segment dimension.
    causes : tuple of Cause
        Ranked, most likely first; empty when the phase is consistent.
    statement : str
        One sentence.
    """

    phase: int
    start: datetime
    end: datetime | None
    designed_share: dict[str, float]
    stages: tuple[StageResult, ...]
    transitions: tuple[StageTransition, ...]
    first_break: str | None
    focus_stage: str
    daily: ShareSeries
    hourly: ShareSeries
    onset: OnsetSummary
    dimensions: tuple[DimensionDiagnosis, ...]
    causes: tuple[Cause, ...]
    statement: str

    @property
    def mismatch(self) -> bool:
        return self.first_break is not None

    @property
    def concentrated_in(self) -> DimensionDiagnosis | None:
        """The dimension that localises the mismatch best, if any."""
        cands = [d for d in self.dimensions if d.concentrated]
        return min(cands, key=lambda d: (d.contrast_p_value, -d.pooled_chi2)) if cands else None


@dataclass(frozen=True)
class Diagnosis:
    """The explanation of one experiment's allocation ratio.

    Attributes
    ----------
    experiment : str
        Experiment id.
    title, owner : str or None
        Registry fields.
    as_of : datetime
        End of the data considered (aware UTC).
    control : str
        Control variant.
    variants : tuple of str
        Control first.
    stage_names : tuple of str
        Configured stages in pipeline order.
    alpha : float
        Level of every "broken" verdict.
    phases : tuple of PhaseDiagnosis
        Phases that have started by ``as_of``.
    """

    experiment: str
    title: str | None
    owner: str | None
    as_of: datetime
    control: str
    variants: tuple[str, ...]
    stage_names: tuple[str, ...]
    alpha: float
    phases: tuple[PhaseDiagnosis, ...]

    @property
    def healthy(self) -> bool:
        return not any(p.mismatch for p in self.phases)

    @property
    def main_phase(self) -> PhaseDiagnosis | None:
        """The phase with the strongest mismatch (largest chi-square at its first
        breaking stage); the latest phase when none breaks."""
        broken = [p for p in self.phases if p.mismatch]
        if broken:
            return max(broken, key=lambda p: next(s.chi2 for s in p.stages if s.stage == p.first_break))
        return self.phases[-1] if self.phases else None

    @property
    def top_cause(self) -> Cause | None:
        p = self.main_phase
        return p.causes[0] if p is not None and p.causes else None

    @property
    def statement(self) -> str:
        p = self.main_phase
        if p is None:
            return "no phase of this experiment has started"
        if self.healthy:
            return p.statement
        return (f"phase {p.phase}: " if len(self.phases) > 1 else "") + p.statement


# ---------------------------------------------------------------------------
# formatting helpers
# ---------------------------------------------------------------------------


def _fmt_t(t: datetime | None) -> str:
    return "-" if t is None else t.astimezone(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _pct(x: float) -> str:
    return f"{100 * x:.1f}%"


def _shares_text(shares: dict[str, float]) -> str:
    return "/".join(f"{100 * s:.1f}" for s in shares.values()) + "%"


# ---------------------------------------------------------------------------
# the core: counts frames -> Diagnosis
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Rows:
    """One stage's rows of one experiment as integer codes."""

    t: np.ndarray  # hour index from the experiment's first hour
    k: np.ndarray  # variant index
    u: np.ndarray  # units
    combo: np.ndarray  # index into the shared segment-combination table


def _decode_segments(texts: Sequence[str], dims: Sequence[str]) -> list[list[str]]:
    """Per unique segment JSON text, the label of each dimension."""
    out = []
    for text in texts:
        try:
            values = json.loads(text) if text else {}
        except (TypeError, ValueError):
            values = {}
        if not isinstance(values, dict):
            values = {}
        row = []
        for d in dims:
            v = values.get(d)
            row.append(NULL_LABEL if v is None else str(v))
        out.append(row)
    return out


def _stage_rows(frame: pd.DataFrame, exp: Experiment, t0: datetime, n_hours: int,
                combo_index: dict[str, int]) -> _Rows:
    if frame is None or frame.empty:
        z = np.zeros(0, dtype=np.int64)
        return _Rows(z, z, z, z)
    rows = frame[frame["experiment"].astype(str) == exp.id]
    slot = {v: i for i, v in enumerate(exp.variants)}
    rows = rows[rows["variant"].isin(slot)]
    if rows.empty:
        z = np.zeros(0, dtype=np.int64)
        return _Rows(z, z, z, z)
    hours = pd.to_datetime(rows["hour"], utc=True)
    t = ((hours - pd.Timestamp(t0)) / pd.Timedelta(hours=1)).to_numpy().astype(np.int64)
    k = rows["variant"].map(slot).to_numpy().astype(np.int64)
    u = rows["units"].to_numpy().astype(np.int64)
    seg = rows["segment"].astype(object).where(rows["segment"].notna(), "{}").astype(str).to_numpy()
    for s in pd.unique(seg):
        combo_index.setdefault(s, len(combo_index))
    combo = pd.Index(list(combo_index)).get_indexer(seg).astype(np.int64)
    ok = (t >= 0) & (t < n_hours)
    return _Rows(t[ok], k[ok], u[ok], combo[ok])


def _hour_phase(exp: Experiment, t0: datetime, n_hours: int) -> np.ndarray:
    """Phase number of each hour (0 where an hour is not wholly inside one phase)."""
    ph = np.zeros(n_hours, dtype=np.int64)
    for p in exp.phases:
        lo = max(0, math.ceil((p.start - t0) / HOUR))
        hi = n_hours if p.end is None else min(n_hours, math.floor((p.end - t0) / HOUR))
        if hi > lo:
            ph[lo:hi] = p.number
    return ph


def _shares_dict(x: np.ndarray, variants: Sequence[str], w: np.ndarray) -> dict[str, float]:
    n = float(x.sum())
    s = x / n if n > 0 else w
    return {v: float(s[i]) for i, v in enumerate(variants)}


def _onset_summary(hourly: np.ndarray, w: np.ndarray, starts: Sequence[datetime], variants: Sequence[str]) -> OnsetSummary:
    est = locate_onset(hourly, w)
    if est.onset is None or est.band is None:
        return OnsetSummary(None, None, None, est.band_level, 0.0, True,
                            {v: float(w[i]) for i, v in enumerate(variants)},
                            {v: float(w[i]) for i, v in enumerate(variants)}, 0, int(hourly.sum()))
    lo, hi = est.band
    # the first hour with units: a band reaching it means "no evidence it was ever right"
    nz = np.flatnonzero(hourly.sum(axis=1) > 0)
    first = int(nz[0]) if nz.size else 0
    return OnsetSummary(
        onset=starts[est.onset], band_start=starts[lo], band_end=starts[hi], band_level=est.band_level,
        llr=est.llr, from_start=lo <= first,
        shares_before={v: float(est.shares_before[i]) for i, v in enumerate(variants)},
        shares_after={v: float(est.shares_after[i]) for i, v in enumerate(variants)},
        units_before=int(round(est.units_before)), units_after=int(round(est.units_after)),
    )


def _dimension(name: str, labels_of_combo: list[str], rows: _Rows, sel: np.ndarray, w: np.ndarray,
               variants: Sequence[str], alpha: float, hour_lo: int, n_phase_hours: int,
               starts: Sequence[datetime], hour_day: np.ndarray, n_days: int) -> DimensionDiagnosis:
    """Slice analysis of one dimension; also returns each row's folded slice code and the labels."""
    k = len(variants)
    uniq = sorted(set(labels_of_combo))
    position = {lab: i for i, lab in enumerate(uniq)}
    value_code_of_combo = np.array([position[lab] for lab in labels_of_combo], dtype=np.int64)
    row_value = value_code_of_combo[rows.combo[sel]] if sel.any() else np.zeros(0, dtype=np.int64)
    table = np.zeros((len(uniq), k))
    np.add.at(table, (row_value, rows.k[sel]), rows.u[sel])
    present = table.sum(axis=1) > 0
    n_values = int(present.sum())
    folded = fold_small_slices(uniq, table, TOP_K, other_label=OTHER_LABEL if OTHER_LABEL not in uniq else "(other values)")
    labels = [str(x) for x in folded.labels]
    # map every value to its folded slice
    to_slice = np.full(len(uniq), len(labels) - 1 if folded.folded_units > 0 else -1, dtype=np.int64)
    to_slice[folded.kept_index] = np.arange(folded.kept_index.size)
    row_slice = to_slice[row_value] if row_value.size else row_value
    counts = np.asarray(folded.counts)
    diag = diagnose_slices(counts, w, level=alpha) if counts.size else diagnose_slices(np.zeros((0, k)), w, level=alpha)
    removed = set(diag.removed)
    slices = tuple(
        SliceResult(
            value=labels[s], units={v: int(counts[s, i]) for i, v in enumerate(variants)},
            shares={v: float(diag.shares[s, i]) for i, v in enumerate(variants)},
            chi2=float(diag.chi2[s]), p_value=float(diag.p_value[s]), p_holm=float(diag.p_holm[s]),
            contribution=float(diag.contribution[s]), removed=s in removed,
        )
        for s in range(len(labels))
    )
    # does the removal set differ from the rest? (2 x K homogeneity)
    contrast_p = 1.0
    if removed and len(removed) < len(labels):
        mask = np.zeros(len(labels), dtype=bool)
        mask[list(removed)] = True
        two = np.vstack([counts[mask].sum(axis=0), counts[~mask].sum(axis=0)])
        contrast_p = float(categorical_balance(two).p_value)
    nonempty = int((counts.sum(axis=1) > 0).sum()) if counts.size else 0
    removed_units = float(counts[list(removed)].sum()) if removed else 0.0
    total_units = float(counts.sum()) if counts.size else 0.0
    concentrated = bool(
        diag.pooled_p_value < alpha and diag.consistent and removed and contrast_p < alpha
        and len(removed) < max(nonempty, 1) / 2.0 and removed_units < 0.5 * total_units
    )
    bal = categorical_balance(counts) if counts.size else categorical_balance(np.zeros((0, k)))
    worst = None
    if bal.df > 0:
        r = np.asarray(bal.adjusted_residuals)
        i, j = np.unravel_index(int(np.argmax(np.abs(r))), r.shape)
        worst = (labels[i], variants[j], float(r[i, j]))
    daily_units = np.zeros((len(labels), n_days, k))
    if row_slice.size:
        ok = row_slice >= 0
        np.add.at(daily_units, (row_slice[ok], hour_day[rows.t[sel][ok] - hour_lo], rows.k[sel][ok]), rows.u[sel][ok])
    slice_onset = None
    if concentrated:
        in_set = np.isin(row_slice, list(removed))
        hourly = np.zeros((n_phase_hours, k))
        np.add.at(hourly, (rows.t[sel][in_set] - hour_lo, rows.k[sel][in_set]), rows.u[sel][in_set])
        slice_onset = _onset_summary(hourly, w, starts, variants)
    return DimensionDiagnosis(
            dimension=name, slices=slices, n_values=n_values, n_folded=int(folded.n_folded) - int((~present).sum()),
            pooled_chi2=float(diag.pooled_chi2), pooled_p_value=float(diag.pooled_p_value),
            removal_set=tuple(labels[s] for s in diag.removed), remainder_p_value=float(diag.remainder_p_value),
            contrast_p_value=contrast_p, concentrated=concentrated,
            balance_chi2=float(bal.chi2), balance_df=int(bal.df), balance_p_value=float(bal.p_value),
            cramers_v=float(bal.cramers_v), worst_cell=worst, slice_onset=slice_onset,
            daily_units=_ro(daily_units),
    )


def _causes(ph_stages: Sequence[StageResult], transitions: Sequence[StageTransition], first_break: str | None,
            onset: OnsetSummary, conc: DimensionDiagnosis | None, overlaps: Sequence[tuple[str, datetime]],
            alpha: float, variants: Sequence[str]) -> tuple[Cause, ...]:
    """Rank likely causes by rules of thumb (see :func:`explain_experiment`, Notes)."""
    if first_break is None:
        return ()
    first = ph_stages[0]
    out: list[Cause] = []
    if first_break != first.stage:
        g = next(i for i, s in enumerate(ph_stages) if s.stage == first_break)
        prev, here = ph_stages[g - 1], ph_stages[g]
        tr = transitions[g - 1]
        ev = [f"the ratio is consistent with the design at stage {prev.stage} (p={fmt_p(prev.p_value)}) "
              f"but not at stage {here.stage} (p={fmt_p(here.p_value)})"]
        differential = tr.p_value is not None and tr.p_value < alpha
        if tr.nested:
            rates = ", ".join(f"{v} {_pct(r)}" for v, r in tr.drop_rate.items())
            ev.append(f"units dropped between {tr.from_stage} and {tr.to_stage}: {rates} "
                      f"(equal drop rates: p={fmt_p(tr.p_value)})")
        out.append(Cause("analysis_filtering", 0.8 if differential else 0.5, here.stage, tuple(ev)))
        out.append(Cause("log_processing", 0.6 if differential else 0.4, here.stage, tuple(ev)))
        if conc is not None:
            out.append(Cause("delivery", 0.3, here.stage,
                             (f"the mismatch at {here.stage} is confined to "
                              + ", ".join(f"{conc.dimension}={v}" for v in conc.removal_set),)))
    else:
        ev_stage = f"the ratio is already off at the first stage, {first.stage} (shares {_shares_text(first.shares)}, p={fmt_p(first.p_value)})"
        when = onset.from_start
        onset_ev = (f"no evidence the ratio was ever as designed: the onset band reaches the first hour "
                    f"({_fmt_t(onset.band_start)} .. {_fmt_t(onset.band_end)})" if when else
                    f"the shares were as designed until about {_fmt_t(onset.onset)} "
                    f"(band {_fmt_t(onset.band_start)} .. {_fmt_t(onset.band_end)}), then "
                    f"{_shares_text(onset.shares_after)}")
        ov_ev = tuple(f"experiment {eid} started or ended a phase at {_fmt_t(t)}, inside the onset band" for eid, t in overlaps)
        if conc is not None:
            where = ", ".join(f"{conc.dimension}={v}" for v in conc.removal_set)
            conc_ev = (f"the mismatch is confined to {where}: the other values are consistent with the design "
                       f"(p={fmt_p(conc.remainder_p_value)}) and differ from {where} (p={fmt_p(conc.contrast_p_value)})")
            so = conc.slice_onset
            if so is not None and so.onset is not None and not so.from_start:
                when = False
                onset_ev = f"in {where} the shares were as designed until about {_fmt_t(so.onset)} (band {_fmt_t(so.band_start)} .. {_fmt_t(so.band_end)})"
        if conc is not None and not when:
            out.append(Cause("delivery", 0.9, first.stage, (ev_stage, conc_ev, onset_ev)))
            out.append(Cause("interference", 0.5 if overlaps else 0.2, first.stage, (onset_ev, *ov_ev)))
            out.append(Cause("log_processing", 0.3, first.stage, (ev_stage, conc_ev)))
        elif conc is not None:
            out.append(Cause("delivery", 0.7, first.stage, (ev_stage, conc_ev, onset_ev)))
            out.append(Cause("assignment", 0.5, first.stage, (ev_stage, onset_ev, conc_ev)))
            out.append(Cause("log_processing", 0.3, first.stage, (ev_stage, conc_ev)))
        elif when:
            spread = "the mismatch is spread over every segment value (no small set of values explains it)"
            out.append(Cause("assignment", 0.9, first.stage, (ev_stage, onset_ev, spread)))
            out.append(Cause("delivery", 0.4, first.stage, (ev_stage, spread)))
            out.append(Cause("log_processing", 0.3, first.stage, (ev_stage,)))
        else:
            spread = "the mismatch is spread over every segment value (no small set of values explains it)"
            out.append(Cause("interference", 0.7 if overlaps else 0.3, first.stage, (onset_ev, spread, *ov_ev)))
            out.append(Cause("delivery", 0.6, first.stage, (ev_stage, onset_ev, spread)))
            out.append(Cause("assignment", 0.4, first.stage, (ev_stage, onset_ev)))
            out.append(Cause("log_processing", 0.3, first.stage, (ev_stage,)))
    out.sort(key=lambda c: -c.score)
    return tuple(out)


def _statement(stages: Sequence[StageResult], transitions: Sequence[StageTransition], first_break: str | None,
               onset: OnsetSummary, conc: DimensionDiagnosis | None, phase: Phase) -> str:
    if first_break is None:
        parts = ", ".join(f"{s.stage} p={fmt_p(s.p_value)}" for s in stages)
        return f"no mismatch: the split matches the design at every stage ({parts})"
    g = next(i for i, s in enumerate(stages) if s.stage == first_break)
    if g > 0:
        tr = transitions[g - 1]
        if tr.nested:
            worst = max(tr.drop_rate, key=lambda v: tr.drop_rate[v])
            best = min(tr.drop_rate, key=lambda v: tr.drop_rate[v])
            return (f"the ratio is as designed at stage {stages[g - 1].stage} but breaks at stage {first_break}, which drops "
                    f"{_pct(tr.drop_rate[worst])} of {worst} units against {_pct(tr.drop_rate[best])} of {best} "
                    f"(p={fmt_p(tr.p_value)})")
        return f"the ratio is as designed at stage {stages[g - 1].stage} but breaks at stage {first_break}"
    if conc is not None:
        where = ", ".join(f"{conc.dimension}={v}" for v in conc.removal_set)
        so = conc.slice_onset
        if so is not None and so.onset is not None and not so.from_start:
            return f"the mismatch is concentrated in {where} since {_fmt_t(so.onset)}"
        return f"the mismatch is concentrated in {where}, from the start of phase {phase.number}"
    if onset.onset is not None and not onset.from_start:
        return f"the mismatch is spread over every segment value, since {_fmt_t(onset.onset)}"
    return f"the mismatch is spread over every segment value, from the start of phase {phase.number}"


def diagnose_counts(
    exp: Experiment,
    counts_by_source: dict[str, pd.DataFrame],
    stage_names: Sequence[str],
    segments: Sequence[str],
    *,
    as_of: datetime,
    alpha: float = 0.001,
    others: Sequence[Experiment] = (),
) -> Diagnosis:
    """Diagnose one experiment from tidy hourly counts frames (no I/O).

    Parameters
    ----------
    exp : Experiment
        The experiment (variants, phases, designed weights).
    counts_by_source : dict of str to DataFrame
        Stage name -> counts frame (columns experiment, variant, hour, segment, units,
        leaked; hours aware UTC; segment canonical JSON), as from
        :func:`monitor.pull.pull_sources`. Other experiments' rows are ignored.
    stage_names : sequence of str
        Stages in pipeline order; a stage missing from ``counts_by_source`` counts
        as empty.
    segments : sequence of str
        Segment dimensions to analyse (keys of the ``segment`` JSON).
    as_of : datetime
        End of the data (aware).
    alpha : float
        Level of every "broken" verdict (the SRM check's alpha).
    others : sequence of Experiment
        Other experiments, whose phase boundaries inside an onset band are cited
        as evidence of interference.

    Returns
    -------
    Diagnosis
        See :func:`explain_experiment`.
    """
    if not stage_names:
        raise ConfigError("at least one stage is needed")
    as_of = as_of.astimezone(timezone.utc)
    t0 = floor_hour(exp.start)
    n_hours = max(0, int((ceil_hour(as_of) - t0) / HOUR))
    combo_index: dict[str, int] = {}
    stage_rows = [_stage_rows(counts_by_source.get(s), exp, t0, n_hours, combo_index) for s in stage_names]
    combo_texts = sorted(combo_index, key=combo_index.get)  # type: ignore[arg-type]
    labels = _decode_segments(combo_texts, segments)
    hour_phase = _hour_phase(exp, t0, n_hours)
    k = len(exp.variants)
    phases: list[PhaseDiagnosis] = []
    for ph in exp.phases:
        if ph.start >= as_of:
            continue
        w = np.asarray(exp.weight_vector(ph), dtype=float)
        w = w / w.sum()
        hours_in = np.flatnonzero(hour_phase == ph.number)
        if hours_in.size:
            lo, hi = int(hours_in[0]), int(hours_in[-1]) + 1
        else:
            lo = hi = max(0, min(n_hours, math.ceil((ph.start - t0) / HOUR)))
        n_ph = hi - lo
        starts = tuple(t0 + HOUR * (lo + i) for i in range(n_ph))
        sels = [(r.t >= lo) & (r.t < hi) for r in stage_rows]
        totals = np.zeros((len(stage_names), k))
        for g, (r, sel) in enumerate(zip(stage_rows, sels)):
            np.add.at(totals[g], r.k[sel], r.u[sel])
        try:
            sd = diagnose_stages(totals, w, level=alpha)
            nested = [True] * (len(stage_names) - 1)
        except StatsError:
            sd = None
            nested = [bool(np.all(totals[g + 1] <= totals[g])) for g in range(len(stage_names) - 1)]
        single = [diagnose_stages(totals[g:g + 1], w, level=alpha) for g in range(len(stage_names))] if sd is None else None
        st_res = []
        for g, name in enumerate(stage_names):
            chi2 = float(sd.chi2[g]) if sd is not None else float(single[g].chi2[0])  # type: ignore[index]
            p = float(sd.p_value[g]) if sd is not None else float(single[g].p_value[0])  # type: ignore[index]
            st_res.append(StageResult(name, {v: int(totals[g, i]) for i, v in enumerate(exp.variants)},
                                      _shares_dict(totals[g], exp.variants, w), chi2, p, p < alpha))
        trans = []
        for g in range(len(stage_names) - 1):
            dropped = totals[g] - totals[g + 1]
            rate = np.divide(dropped, totals[g], out=np.zeros(k), where=totals[g] > 0)
            if sd is not None:
                chi2_t: float | None = float(sd.drop_chi2[g])
                df_t, p_t = int(sd.drop_df[g]), float(sd.drop_p_value[g])
            elif nested[g]:
                pair = diagnose_stages(totals[g:g + 2], w, level=alpha)
                chi2_t, df_t, p_t = float(pair.drop_chi2[0]), int(pair.drop_df[0]), float(pair.drop_p_value[0])
            else:
                chi2_t, df_t, p_t = None, 0, None
            trans.append(StageTransition(stage_names[g], stage_names[g + 1],
                                         {v: int(dropped[i]) for i, v in enumerate(exp.variants)},
                                         {v: float(rate[i]) for i, v in enumerate(exp.variants)},
                                         chi2_t, df_t, p_t, nested[g]))
        first_break = next((s.stage for s in st_res if s.broken), None)
        focus_g = stage_names.index(first_break) if first_break else 0
        r, sel = stage_rows[focus_g], sels[focus_g]
        hourly = np.zeros((n_ph, k))
        np.add.at(hourly, (r.t[sel] - lo, r.k[sel]), r.u[sel])
        # days: UTC calendar days of the phase's hours
        day_key = np.array([s.date().toordinal() for s in starts], dtype=np.int64)
        day_vals, day_idx = np.unique(day_key, return_inverse=True) if n_ph else (np.zeros(0, np.int64), np.zeros(0, np.int64))
        daily = np.zeros((day_vals.size, k))
        np.add.at(daily, day_idx, hourly)
        day_starts = tuple(datetime.fromordinal(int(d)).replace(tzinfo=timezone.utc) for d in day_vals)

        def share_rows(x: np.ndarray) -> np.ndarray:
            n = x.sum(axis=1, keepdims=True)
            return np.where(n > 0, np.divide(x, n, out=np.zeros_like(x), where=n > 0), w)

        onset = _onset_summary(hourly, w, starts, exp.variants)
        dims = []
        for d_i, dname in enumerate(segments):
            dim = _dimension(dname, [lab[d_i] for lab in labels], r, sel, w, exp.variants, alpha, lo, n_ph, starts,
                             day_idx.astype(np.int64), int(day_vals.size))
            dims.append(dim)
        band = (onset.band_start, onset.band_end)
        conc_dims = [d for d in dims if d.concentrated]
        conc = min(conc_dims, key=lambda d: (d.contrast_p_value, -d.pooled_chi2)) if conc_dims else None
        if conc is not None and conc.slice_onset is not None and conc.slice_onset.onset is not None:
            band = (conc.slice_onset.band_start, conc.slice_onset.band_end)
        overlaps: list[tuple[str, datetime]] = []
        if band[0] is not None and band[1] is not None:
            b0, b1 = band[0] - HOUR, band[1] + 2 * HOUR
            for o in others:
                if o.id == exp.id:
                    continue
                for p2 in o.phases:
                    for t in (p2.start, p2.end):
                        if t is not None and b0 <= t <= b1 and (o.id, t) not in overlaps:
                            overlaps.append((o.id, t))
        causes = _causes(st_res, trans, first_break, onset, conc, overlaps, alpha, exp.variants)
        phases.append(PhaseDiagnosis(
            phase=ph.number, start=ph.start, end=ph.end,
            designed_share={v: float(w[i]) for i, v in enumerate(exp.variants)},
            stages=tuple(st_res), transitions=tuple(trans), first_break=first_break,
            focus_stage=stage_names[focus_g],
            daily=ShareSeries("day", day_starts, _ro(daily), _ro(share_rows(daily))),
            hourly=ShareSeries("hour", starts, _ro(hourly), _ro(share_rows(hourly))),
            onset=onset, dimensions=tuple(dims), causes=causes,
            statement=_statement(st_res, trans, first_break, onset, conc, ph),
        ))
    return Diagnosis(exp.id, exp.title, exp.owner, as_of, exp.control, tuple(exp.variants), tuple(stage_names),
                     float(alpha), tuple(phases))


def _ro(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=float, copy=True)
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------------------
# public entry points
# ---------------------------------------------------------------------------


def explain_experiment(cfg: Config, experiment_id: str, *, as_of: datetime | None = None) -> Diagnosis:
    """Explain the allocation ratio of one live experiment.

    Parameters
    ----------
    cfg : Config
        The loaded configuration (warehouse, registry, stages, segments, alpha).
    experiment_id : str
        The experiment to explain; it must be live at ``as_of``.
    as_of : datetime, optional
        End of the data considered (default now; naive means UTC).

    Returns
    -------
    Diagnosis
        Per ramp phase: stage ratios and drop-rate tests, shares per day and per
        hour with the onset of the mismatch, per-dimension slice analysis and
        covariate balance, ranked likely causes and a one-sentence statement.

    Raises
    ------
    ConfigError
        The experiment is not in the registry, is not live at ``as_of``, has a
        registry problem, or ``as_of`` is in the future.
    WarehouseError
        A query failed.

    Notes
    -----
    One query per stage, for this experiment only, over its whole window; the state
    store is neither read nor written. Units count toward the phase of their first
    assignment hour; hours that straddle a ramp are left out, as in the SRM check.
    Every "broken" verdict is a Pearson chi-square at the configured alpha (a
    single look, so it can disagree with the sequential SRM alert near the
    threshold). The time and segment analyses use the first stage whose ratio
    breaks (the first stage when none does).

    A dimension *localises* the mismatch when the greedy removal set leaves the
    rest consistent, the removed values differ from the rest (2 x K homogeneity
    test at alpha), and they are fewer than half of the values and hold less than
    half of the units; otherwise the mismatch is called spread. NULL segment values
    form the slice ``(null)``; beyond the 20 largest values the rest are folded
    into ``(other)``. The onset is "from the start" when its band reaches the
    phase's first hour with units.

    Likely causes follow the taxonomy of where SRMs arise in [1]_ (assignment,
    delivery/execution, log processing, analysis filtering, interference; our own
    names and wording), ranked by rules of thumb (common practice):

    * fine at the first stage, broken at a later one: analysis filtering, then log
      processing, at that stage (stronger when the drop rates differ at alpha);
    * broken at the first stage and confined to some segment values after an
      onset: delivery/execution for those values; interference if another
      experiment changed phase inside the onset band;
    * broken from the start in every slice: assignment;
    * broken in every slice after an onset: interference (strong if another
      experiment changed phase inside the band), delivery, assignment.

    The scores only order the list; they are not probabilities.

    References
    ----------
    .. [1] A. Fabijan, J. Gupchup, S. Gupta, J. Omhover, W. Qin, L. Vermeer and
       P. Dmitriev, "Diagnosing Sample Ratio Mismatch in Online Controlled
       Experiments: A Taxonomy and Rules of Thumb for Practitioners", Proceedings
       of KDD 2019, 2156-2164.
    """
    import sqlalchemy as sa

    from monitor.cycle import load_registry
    from monitor.pull import pull_sources
    from monitor.state import StateStore
    from monitor.warehouse import open_warehouse

    now = datetime.now(timezone.utc)
    as_of = now if as_of is None else (as_of.replace(tzinfo=timezone.utc) if as_of.tzinfo is None else as_of.astimezone(timezone.utc))
    if as_of > now:
        raise ConfigError(f"--as-of {as_of.isoformat()} is in the future")
    wh = open_warehouse(cfg.warehouse)
    # an empty store in memory: explain never reads or writes the real one
    state = StateStore("sqlite://", engine=sa.create_engine("sqlite://", poolclass=sa.pool.StaticPool), migrate=False)
    try:
        exps, problems = load_registry(cfg, wh)
        exp = next((e for e in exps if e.id == experiment_id), None)
        if exp is None:
            prob = next((p for p in problems if p.experiment == experiment_id), None)
            if prob is not None:
                raise ConfigError(f"experiment {experiment_id!r}: registry problem: {prob.message}")
            raise ConfigError(f"experiment {experiment_id!r} is not in the registry")
        if not exp.live_at(as_of, cfg.registry.live_status):
            end = f" (it ended {_fmt_t(exp.end)})" if exp.end is not None and exp.end <= as_of else ""
            raise ConfigError(f"experiment {experiment_id!r} is not live at {_fmt_t(as_of)}{end}; only live experiments can be explained")
        sources = pull_sources(cfg, wh, state, [exp], as_of, full_refresh=True)
    finally:
        wh.dispose()
        state.dispose()
    counts = {s.name: s.counts for s in sources}
    return diagnose_counts(exp, counts, [s.name for s in cfg.sources], cfg.sources[0].segments or [],
                           as_of=as_of, alpha=cfg.checks.alpha, others=exps)


def _compact(d: Diagnosis) -> dict[str, Any]:
    p = d.main_phase
    if p is None:
        return {"statement": d.statement}
    conc = p.concentrated_in
    onset = conc.slice_onset if conc is not None and conc.slice_onset is not None else p.onset
    top = []
    for dim in p.dimensions:
        for s in sorted(dim.slices, key=lambda s: -s.contribution)[:3]:
            top.append({"dimension": dim.dimension, "value": s.value, "contribution": s.contribution,
                        "p_holm": s.p_holm, "shares": s.shares})
    top.sort(key=lambda x: -x["contribution"])
    cause = d.top_cause
    return {
        "phase": p.phase,
        "statement": d.statement,
        "onset": onset.onset,
        "band": [onset.band_start, onset.band_end] if onset.onset is not None else None,
        "concentrated_in": ({"dimension": conc.dimension, "values": list(conc.removal_set)} if conc else None),
        "top_slices": top[:5],
        "first_breaking_stage": p.first_break,
        "top_cause": ({"category": cause.category, "stage": cause.stage, "evidence": list(cause.evidence)}
                      if cause else None),
    }


def attach_diagnoses(
    findings: Sequence[Finding],
    counts_by_source: dict[str, pd.DataFrame],
    experiments: Sequence[Experiment],
    cfg: Config,
    *,
    as_of: datetime | None = None,
) -> list[Finding]:
    """Attach a compact diagnosis to every SRM alert, from counts already pulled.

    Parameters
    ----------
    findings : sequence of Finding
        A cycle's findings; only ``check == "srm"`` with ``status == "alert"`` change.
    counts_by_source : dict of str to DataFrame
        Stage name -> counts frame, as the cycle pulled them (no query is made).
    experiments : sequence of Experiment
        The live experiments (the alerting ones must be among them; the others
        serve as evidence of interference).
    cfg : Config
        Configuration (stages, segments, alpha).
    as_of : datetime, optional
        End of the data; default the end of the latest hour present in the counts.

    Returns
    -------
    list of Finding
        The findings in the same order; each SRM alert gets
        ``statistics["diagnosis"]`` (phase, statement, onset, band,
        concentrated_in, top_slices, first_breaking_stage, top_cause) and the
        one-sentence statement appended to its summary. An alert whose experiment
        is not in ``experiments`` is returned unchanged.

    Notes
    -----
    The diagnosis is computed once per experiment and shared by its alerts at
    several stages. See :func:`explain_experiment` for the method.
    """
    if as_of is None:
        latest = [pd.to_datetime(f["hour"], utc=True).max() for f in counts_by_source.values() if len(f)]
        as_of = (max(latest).to_pydatetime() + HOUR) if latest else datetime.now(timezone.utc)
    by_id = {e.id: e for e in experiments}
    stage_names = [s.name for s in cfg.sources]
    segments = cfg.sources[0].segments or []
    cache: dict[str, dict[str, Any]] = {}
    out: list[Finding] = []
    for f in findings:
        if f.check != "srm" or f.status != "alert" or f.experiment not in by_id:
            out.append(f)
            continue
        if f.experiment not in cache:
            d = diagnose_counts(by_id[f.experiment], counts_by_source, stage_names, segments, as_of=as_of,
                                alpha=cfg.checks.alpha, others=experiments)
            cache[f.experiment] = clean_json(_compact(d))
        comp = cache[f.experiment]
        out.append(replace(f, statistics={**f.statistics, "diagnosis": comp},
                           summary=f"{f.summary}; {comp['statement']}"))
    return out


# ---------------------------------------------------------------------------
# renderers
# ---------------------------------------------------------------------------


def _onset_json(o: OnsetSummary | None) -> dict[str, Any] | None:
    if o is None:
        return None
    return {"onset": o.onset, "band": [o.band_start, o.band_end] if o.onset is not None else None,
            "band_level": o.band_level, "llr": o.llr, "from_start": o.from_start,
            "shares_before": o.shares_before, "shares_after": o.shares_after,
            "units_before": o.units_before, "units_after": o.units_after}


def _series_json(s: ShareSeries, variants: Sequence[str]) -> list[dict[str, Any]]:
    return [{"start": t, "units": {v: int(s.units[i, j]) for j, v in enumerate(variants)},
             "observed_share": {v: float(s.observed_share[i, j]) for j, v in enumerate(variants)}}
            for i, t in enumerate(s.starts)]


def to_json(d: Diagnosis) -> dict[str, Any]:
    """The JSON document of ``expwatch explain --format json`` (documented in the README)."""
    cause = d.top_cause
    doc = {
        "format": JSON_FORMAT,
        "experiment": d.experiment,
        "title": d.title,
        "owner": d.owner,
        "as_of": d.as_of,
        "control": d.control,
        "variants": list(d.variants),
        "stages": list(d.stage_names),
        "alpha": d.alpha,
        "healthy": d.healthy,
        "statement": d.statement,
        "top_cause": ({"category": cause.category, "description": cause.description, "stage": cause.stage,
                       "evidence": list(cause.evidence)} if cause else None),
        "phases": [
            {
                "phase": p.phase, "start": p.start, "end": p.end, "designed_share": p.designed_share,
                "mismatch": p.mismatch, "statement": p.statement,
                "stages": [{"stage": s.stage, "units": s.units, "observed_share": s.shares, "chi2": s.chi2,
                            "p_value": s.p_value, "broken": s.broken} for s in p.stages],
                "transitions": [{"from": t.from_stage, "to": t.to_stage, "dropped": t.dropped,
                                 "drop_rate": t.drop_rate, "chi2": t.chi2, "df": t.df, "p_value": t.p_value,
                                 "nested": t.nested} for t in p.transitions],
                "first_breaking_stage": p.first_break,
                "focus_stage": p.focus_stage,
                "time": {"onset": _onset_json(p.onset),
                         "daily": _series_json(p.daily, d.variants),
                         "hourly": _series_json(p.hourly, d.variants)},
                "segments": [
                    {"dimension": m.dimension, "n_values": m.n_values, "n_folded": m.n_folded,
                     "pooled_chi2": m.pooled_chi2, "pooled_p_value": m.pooled_p_value,
                     "removal_set": list(m.removal_set), "remainder_p_value": m.remainder_p_value,
                     "contrast_p_value": m.contrast_p_value, "concentrated": m.concentrated,
                     "slice_onset": _onset_json(m.slice_onset),
                     "slices": [{"value": s.value, "units": s.units, "observed_share": s.shares, "chi2": s.chi2,
                                 "p_value": s.p_value, "p_holm": s.p_holm, "contribution": s.contribution,
                                 "removed": s.removed} for s in m.slices]}
                    for m in p.dimensions],
                "balance": [
                    {"dimension": m.dimension, "chi2": m.balance_chi2, "df": m.balance_df,
                     "p_value": m.balance_p_value, "cramers_v": m.cramers_v,
                     "worst_cell": ({"value": m.worst_cell[0], "variant": m.worst_cell[1],
                                     "adjusted_residual": m.worst_cell[2]} if m.worst_cell else None)}
                    for m in p.dimensions],
                "causes": [{"category": c.category, "description": c.description, "score": c.score,
                            "stage": c.stage, "evidence": list(c.evidence)} for c in p.causes],
            }
            for p in d.phases
        ],
    }
    return clean_json(doc)


def render_text(d: Diagnosis) -> str:
    """Compact readable sections: verdict, stages, time, segments, balance, causes."""
    lines = [f"{d.experiment}" + (f" - {d.title}" if d.title else "") + f"  (as of {_fmt_t(d.as_of)})",
             f"verdict: {'healthy' if d.healthy else 'SRM'}: {d.statement}"]
    for p in d.phases:
        lines.append("")
        end = _fmt_t(p.end) if p.end else "running"
        lines.append(f"phase {p.phase}: {_fmt_t(p.start)} .. {end}, designed {_shares_text(p.designed_share)} "
                     f"({'/'.join(d.variants)})")
        lines.append("  stages")
        for s in p.stages:
            lines.append(f"    {s.stage:<14} n={sum(s.units.values()):>9,}  shares {_shares_text(s.shares):<14} "
                         f"p={fmt_p(s.p_value):<8} {'BROKEN' if s.broken else 'ok'}")
        for t in p.transitions:
            rates = " ".join(f"{v} {_pct(r)}" for v, r in t.drop_rate.items())
            lines.append(f"    {t.from_stage} -> {t.to_stage}: dropped {rates}; equal drop rates p={fmt_p(t.p_value)}"
                         + ("" if t.nested else " (counts not nested: not tested)"))
        o = p.onset
        lines.append(f"  time (stage {p.focus_stage})")
        if o.onset is None:
            lines.append("    shares never deviate from the design")
        elif not p.mismatch:
            lines.append(f"    consistent with the design; the best change point ({_fmt_t(o.onset)}, log-LR {o.llr:.1f}) "
                         "is not evidence of a change")
        else:
            lines.append(f"    onset {_fmt_t(o.onset)} (band {_fmt_t(o.band_start)} .. {_fmt_t(o.band_end)}, "
                         f"{o.band_level:.0%}); shares {_shares_text(o.shares_before)} before, "
                         f"{_shares_text(o.shares_after)} after" + ("; from the start" if o.from_start else ""))
        if len(p.daily.starts):
            last = p.daily.starts[-min(7, len(p.daily.starts)):]
            day_txt = ", ".join(f"{t:%m-%d} {_shares_text({v: float(p.daily.observed_share[len(p.daily.starts) - len(last) + i, j]) for j, v in enumerate(d.variants)})}"
                                for i, t in enumerate(last))
            lines.append(f"    last days: {day_txt}")
        lines.append("  segments")
        for m in p.dimensions:
            top = sorted(m.slices, key=lambda s: -s.contribution)[:3]
            tops = ", ".join(f"{s.value} {_shares_text(s.shares)} (Holm p={fmt_p(s.p_holm)}, "
                             f"{s.contribution:,.1f} of chi2)" for s in top)
            verdict = ("concentrated in " + ", ".join(m.removal_set)) if m.concentrated else (
                "spread" if m.pooled_p_value < d.alpha else "consistent")
            fold = f", {m.n_folded} folded into (other)" if m.n_folded else ""
            lines.append(f"    {m.dimension} ({m.n_values} values{fold}): {verdict}; pooled p={fmt_p(m.pooled_p_value)}; "
                         f"top {tops}")
        lines.append("  balance across variants")
        for m in p.dimensions:
            cell = (f"; largest residual {m.worst_cell[0]} x {m.worst_cell[1]} {m.worst_cell[2]:+.1f}"
                    if m.worst_cell else "")
            lines.append(f"    {m.dimension}: chi2={m.balance_chi2:,.1f} df={m.balance_df} p={fmt_p(m.balance_p_value)} "
                         f"V={m.cramers_v:.3f}{cell}")
        if p.causes:
            lines.append("  likely causes")
            for i, c in enumerate(p.causes, 1):
                at = f" at stage {c.stage}" if c.stage else ""
                lines.append(f"    {i}. {c.category}{at} (score {c.score:.1f}): {c.description}")
                for e in c.evidence:
                    lines.append(f"       - {e}")
    return "\n".join(lines) + "\n"


_HTML = """<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>expwatch explain: {{ d.experiment }}</title>
<style>
body{font-family:system-ui,sans-serif;margin:0 auto;max-width:60rem;padding:1rem;line-height:1.4;color:#222}
h1{font-size:1.3rem;word-break:break-word}h2{font-size:1.1rem;margin-top:2rem}h3{font-size:1rem}
.verdict{padding:.6rem;border-radius:.3rem;background:{{ '#e8f5e9' if d.healthy else '#fdecea' }}}
table{border-collapse:collapse;width:100%;font-size:.9rem;display:block;overflow-x:auto}
th,td{border-bottom:1px solid #ddd;padding:.25rem .5rem;text-align:left;white-space:nowrap}
img{max-width:100%;height:auto}.bad{color:#b71c1c;font-weight:600}small{color:#555}
</style></head><body>
<h1>{{ d.experiment }}{% if d.title %}: {{ d.title }}{% endif %}</h1>
<p><small>as of {{ fmt_t(d.as_of) }}; variants {{ d.variants|join(", ") }}; alpha {{ d.alpha }}</small></p>
<p class="verdict"><strong>{{ "healthy" if d.healthy else "SRM" }}</strong>: {{ d.statement }}</p>
{% for p in d.phases %}
<h2>Phase {{ p.phase }} ({{ fmt_t(p.start) }} .. {{ fmt_t(p.end) if p.end else "running" }})</h2>
<h3>Stages</h3>
<table><tr><th>stage</th><th>units</th><th>shares</th><th>p</th><th></th></tr>
{% for s in p.stages %}<tr><td>{{ s.stage }}</td><td>{{ "{:,}".format(s.units.values()|sum) }}</td>
<td>{{ shares(s.shares) }}</td><td>{{ fmt_p(s.p_value) }}</td><td class="{{ 'bad' if s.broken }}">{{ "broken" if s.broken else "ok" }}</td></tr>{% endfor %}
</table>
{% for t in p.transitions %}<p>{{ t.from_stage }} &rarr; {{ t.to_stage }}: dropped
{% for v, r in t.drop_rate.items() %}{{ v }} {{ pct(r) }}{% if not loop.last %}, {% endif %}{% endfor %}; equal drop rates p={{ fmt_p(t.p_value) }}</p>{% endfor %}
<img alt="units per variant at each stage" src="{{ charts[p.phase]['funnel'] }}">
<h3>Time (stage {{ p.focus_stage }})</h3>
{% if p.onset.onset and p.mismatch %}<p>Onset {{ fmt_t(p.onset.onset) }} (band {{ fmt_t(p.onset.band_start) }} .. {{ fmt_t(p.onset.band_end) }});
shares {{ shares(p.onset.shares_before) }} before, {{ shares(p.onset.shares_after) }} after.</p>{% else %}<p>The shares never deviate from the design.</p>{% endif %}
<img alt="observed share over time" src="{{ charts[p.phase]['time'] }}">
<h3>Segments</h3>
{% for m in p.dimensions %}<h4>{{ m.dimension }}{% if m.concentrated %}: concentrated in {{ m.removal_set|join(", ") }}{% endif %}</h4>
<img alt="share over time per {{ m.dimension }}" src="{{ charts[p.phase]['dim:' ~ m.dimension] }}">
<table><tr><th>value</th><th>units</th><th>shares</th><th>Holm p</th><th>contribution</th><th>removed</th></tr>
{% for s in m.slices %}<tr><td>{{ s.value }}</td><td>{{ "{:,}".format(s.units.values()|sum) }}</td><td>{{ shares(s.shares) }}</td>
<td>{{ fmt_p(s.p_holm) }}</td><td>{{ "%.1f"|format(s.contribution) }}</td><td>{{ "yes" if s.removed else "" }}</td></tr>{% endfor %}
</table>
<p><small>balance across variants: chi2={{ "%.1f"|format(m.balance_chi2) }}, df={{ m.balance_df }}, p={{ fmt_p(m.balance_p_value) }}, V={{ "%.3f"|format(m.cramers_v) }}</small></p>
{% endfor %}
{% if p.causes %}<h3>Likely causes</h3><ol>
{% for c in p.causes %}<li><strong>{{ c.category }}</strong>{% if c.stage %} at stage {{ c.stage }}{% endif %}: {{ c.description }}
<ul>{% for e in c.evidence %}<li>{{ e }}</li>{% endfor %}</ul></li>{% endfor %}</ol>{% endif %}
{% endfor %}
<p><small>Generated by expwatch explain. Decision support: confirm the cause in your own logs before acting.</small></p>
</body></html>
"""


def _png(fig: Any) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _charts(d: Diagnosis, p: PhaseDiagnosis) -> dict[str, str]:
    from monitor.charts import require_matplotlib

    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    def new_fig() -> Any:
        fig = Figure(figsize=(7, 2.6))
        FigureCanvasAgg(fig)
        return fig

    out: dict[str, str] = {}
    focus = d.variants[1] if len(d.variants) > 1 else d.variants[0]
    j = d.variants.index(focus)
    designed = p.designed_share[focus]
    days = list(p.daily.starts)

    fig = new_fig()
    ax = fig.subplots()
    x = np.arange(len(p.stages))
    width = 0.8 / max(len(d.variants), 1)
    for i, v in enumerate(d.variants):
        ax.bar(x + i * width, [s.units[v] for s in p.stages], width, label=v)
    ax.set_xticks(x + width * (len(d.variants) - 1) / 2, [s.stage for s in p.stages])
    ax.set_ylabel("units")
    ax.legend(fontsize=8)
    ax.set_title("units per variant at each stage", fontsize=9)
    out["funnel"] = _png(fig)

    fig = new_fig()
    ax = fig.subplots()
    ax.plot(days, p.daily.observed_share[:, j], marker="o", ms=3, label="all units")
    ax.axhline(designed, color="grey", ls="--", lw=1, label="designed")
    if p.mismatch and p.onset.onset is not None and not p.onset.from_start:
        ax.axvline(p.onset.onset, color="red", lw=1, label="onset")
    ax.set_ylabel(f"share of {focus}")
    ax.legend(fontsize=8)
    ax.set_title(f"daily share of {focus} (stage {p.focus_stage})", fontsize=9)
    fig.autofmt_xdate()
    out["time"] = _png(fig)

    for m in p.dimensions:
        fig = new_fig()
        ax = fig.subplots()
        for s_i, sl in enumerate(m.slices[:8]):
            du = m.daily_units[s_i]
            n = du.sum(axis=1)
            share = np.divide(du[:, j], n, out=np.full(n.shape, np.nan), where=n > 0)  # gaps, not zeros, in the plot
            ax.plot(days, share, lw=1.2, label=sl.value)
        ax.axhline(designed, color="grey", ls="--", lw=1)
        ax.set_ylabel(f"share of {focus}")
        ax.legend(fontsize=7, ncol=4)
        ax.set_title(f"daily share of {focus} per {m.dimension}", fontsize=9)
        fig.autofmt_xdate()
        out[f"dim:{m.dimension}"] = _png(fig)
    return out


def render_html(d: Diagnosis) -> str:
    """A self-contained HTML page: charts inline as PNG data URIs (matplotlib, Agg),
    text through Jinja2 with autoescape, readable offline and on a phone."""
    import jinja2

    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    tpl = env.from_string(_HTML)
    charts = {p.phase: _charts(d, p) for p in d.phases}
    return tpl.render(d=d, charts=charts, fmt_t=_fmt_t, fmt_p=fmt_p, pct=_pct, shares=_shares_text)
