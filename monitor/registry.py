"""The experiment registry: which experiments exist, their variants, designed
weights, control, ramp phases and status.

A registry table usually holds one row per experiment x phase x variant; the
config maps its column names (``registry.columns``). An inline list in the YAML
works the same way. A registry row that cannot be used (weights that do not sum
to 1, no control) does not stop the run: the experiment gets a ``design``
finding and is skipped by the other checks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime

import pandas as pd

from monitor.config import RegistryConfig, utc

__all__ = ["NO_EXPERIMENT", "Experiment", "Phase", "RegistryProblem", "experiments_from_frame", "experiments_from_inline"]

NO_EXPERIMENT = "(no experiment id)"
"""The experiment name of findings about rows whose experiment id is NULL."""

_WEIGHT_TOL = 1e-6


@dataclass(frozen=True)
class Phase:
    """One ramp phase: units first assigned in ``[start, end)`` are tested against ``weights``."""

    number: int
    start: datetime
    end: datetime | None
    weights: dict[str, float]

    def contains(self, t: datetime) -> bool:
        return self.start <= t and (self.end is None or t < self.end)


@dataclass(frozen=True)
class Experiment:
    id: str
    control: str
    variants: tuple[str, ...]
    """Control first, then the others in the order the registry gave them."""
    phases: tuple[Phase, ...]
    status: str | None = None
    owner: str | None = None
    title: str | None = None

    @property
    def start(self) -> datetime:
        return self.phases[0].start

    @property
    def end(self) -> datetime | None:
        return self.phases[-1].end

    def live_at(self, t: datetime, live_status: list[str] | None = None) -> bool:
        """Live at ``t``: started, not past its last phase's end, and, when a status
        column is mapped and the experiment has no end time, its status is one of
        ``live_status`` (so a row marked stopped without an end time is not live)."""
        if t < self.start or (self.end is not None and t >= self.end):
            return False
        if self.end is None and self.status is not None and live_status is not None:
            return self.status in live_status
        return True

    def phase_at(self, t: datetime) -> Phase | None:
        for ph in self.phases:
            if ph.contains(t):
                return ph
        return None

    def weight_vector(self, phase: Phase) -> list[float]:
        return [phase.weights.get(v, 0.0) for v in self.variants]


@dataclass(frozen=True)
class RegistryProblem:
    """An experiment the registry describes in a way the checks cannot use."""

    experiment: str
    message: str
    owner: str | None = None
    extra: dict[str, object] = field(default_factory=dict)


def _validate(exp_id: str, phases: list[Phase], control: str | None) -> str | None:
    if control is None:
        return "has no control variant (mark one with the is_control column or name it 'control')"
    for ph in phases:
        total = sum(ph.weights.values())
        if any((not math.isfinite(w)) or w < 0 for w in ph.weights.values()):
            return f"phase {ph.number}: weights must be non-negative numbers"
        if abs(total - 1.0) > _WEIGHT_TOL:
            return f"phase {ph.number}: designed weights sum to {total:.6g}, expected 1"
        if ph.weights.get(control, 0.0) <= 0:
            return f"phase {ph.number}: the control {control!r} has no weight"
    for a, b in zip(phases, phases[1:]):
        if a.end is None or a.end > b.start:
            return f"phases {a.number} and {b.number} overlap (phase {a.number} must end before {b.number} starts)"
    return None


def experiments_from_inline(cfg: RegistryConfig) -> tuple[list[Experiment], list[RegistryProblem]]:
    """Experiments written in the YAML (``registry.inline``)."""
    exps: list[Experiment] = []
    problems: list[RegistryProblem] = []
    for item in cfg.inline or []:
        phases = [
            Phase(number=i + 1, start=utc(p.start), end=utc(p.end) if p.end else None, weights=dict(p.weights))
            for i, p in enumerate(sorted(item.phases, key=lambda p: utc(p.start)))
        ]
        variants = [item.control] + sorted({v for p in phases for v in p.weights} - {item.control})
        err = _validate(item.experiment, phases, item.control)
        if err:
            problems.append(RegistryProblem(item.experiment, err, owner=item.owner))
            continue
        exps.append(
            Experiment(item.experiment, item.control, tuple(variants), tuple(phases), item.status, item.owner, item.title)
        )
    return exps, problems


def _bool(v: object) -> bool:
    if isinstance(v, str):
        return v.strip().lower() in {"1", "true", "t", "yes", "y"}
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return False
    return bool(v)


def _opt_str(v: object) -> str | None:
    if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA or v is pd.NaT:
        return None
    return str(v)


def _ts(v: object) -> datetime | None:
    if v is None or v is pd.NaT or (isinstance(v, float) and math.isnan(v)):
        return None
    ts = pd.Timestamp(v)  # type: ignore[arg-type]
    if ts is pd.NaT:
        return None
    return utc(ts.to_pydatetime())


def experiments_from_frame(df: pd.DataFrame, cfg: RegistryConfig) -> tuple[list[Experiment], list[RegistryProblem]]:
    """Experiments from registry rows (one per experiment x phase x variant).

    ``df`` has the registry query's output columns: experiment, variant, weight,
    phase_start and, when mapped, phase, phase_end, is_control, status, owner, title.
    """
    exps: list[Experiment] = []
    problems: list[RegistryProblem] = []
    if df.empty:
        return exps, problems
    df = df.copy()
    df["experiment"] = df["experiment"].map(_opt_str)
    nameless = df[df["experiment"].isna()]
    if len(nameless):
        # rows that describe no experiment: the experiment they were meant for would vanish unnoticed
        variants = sorted({str(v) for v in nameless["variant"].map(_opt_str) if v is not None})
        shown = ", ".join(variants[:5]) + (", ..." if len(variants) > 5 else "")
        problems.append(RegistryProblem(
            NO_EXPERIMENT, f"{len(nameless)} registry row{'s' if len(nameless) != 1 else ''} "
            f"{'have' if len(nameless) != 1 else 'has'} a NULL experiment id"
            f"{f' (variants {shown})' if variants else ''}; the experiment they describe is not monitored"))
    df = df[df["experiment"].notna()]
    for exp_id, rows in df.groupby("experiment", sort=True):
        exp_id = str(exp_id)
        owner = _opt_str(rows["owner"].iloc[0]) if "owner" in rows else None
        title = _opt_str(rows["title"].iloc[0]) if "title" in rows else None
        status = _opt_str(rows["status"].iloc[0]) if "status" in rows else None
        try:
            starts = rows["phase_start"].map(_ts)
        except (ValueError, TypeError):
            problems.append(RegistryProblem(exp_id, "phase_start is not a timestamp", owner=owner))
            continue
        if starts.isna().any():
            problems.append(RegistryProblem(exp_id, "a registry row has no phase_start", owner=owner))
            continue
        rows = rows.assign(_start=starts)
        key = "phase" if "phase" in rows else "_start"
        phases: list[Phase] = []
        bad: str | None = None
        for i, (_, prow) in enumerate(sorted(rows.groupby(key, sort=False), key=lambda g: min(g[1]["_start"]))):
            weights: dict[str, float] = {}
            for _, r in prow.iterrows():
                v = _opt_str(r["variant"])
                if v is None:
                    bad = "a registry row has no variant name"
                    break
                try:
                    weights[v] = weights.get(v, 0.0) + float(r["weight"])
                except (TypeError, ValueError):
                    bad = f"variant {v!r}: weight {r['weight']!r} is not a number"
                    break
            ends = prow["phase_end"].map(_ts) if "phase_end" in prow else pd.Series([None])
            end = None if ends.isna().all() else max(e for e in ends if e is not None)
            phases.append(Phase(i + 1, min(prow["_start"]), end, weights))
        if bad:
            problems.append(RegistryProblem(exp_id, bad, owner=owner))
            continue
        control: str | None = None
        if "is_control" in rows:
            ctl = sorted({str(r["variant"]) for _, r in rows.iterrows() if _bool(r["is_control"])})
            if len(ctl) > 1:
                problems.append(RegistryProblem(exp_id, f"has {len(ctl)} control variants ({', '.join(ctl)}); expected one", owner=owner))
                continue
            control = ctl[0] if ctl else None
        if control is None:
            names = {v for p in phases for v in p.weights}
            control = next((c for c in cfg.control_names if c in names), None)
        err = _validate(exp_id, phases, control)
        if err or control is None:
            problems.append(RegistryProblem(exp_id, err or "no control", owner=owner))
            continue
        order = list(dict.fromkeys(str(v) for v in rows["variant"]))
        variants = [control] + [v for v in order if v != control]
        exps.append(Experiment(exp_id, control, tuple(variants), tuple(phases), status, owner, title))
    return exps, problems
