"""Power on the realistic world: plant one problem at a time, run the real cycle, count detections.

    python -m tests.bench.power [--seeds N] [--problems srm,leakage,...] [--strength K] [--dir DIR]

For every problem of ``tests/nullworld.py`` (:data:`PROBLEMS`) and every seed, the world is built
with that one problem planted (at ``--strength`` times its stated size) and :func:`monitor.cycle.run_cycle` runs on it (dry run, every
check at its defaults). A problem is *detected* when the check that should see it gives the
experiment it was planted in a finding at ``warn`` or worse (:func:`detected`); for the stop of
the exposure log the cycle runs at the end of the 8-hour stop, for every other problem at the
end of the data.

Delay: for each detected seed, cycles at a few times after the onset (:data:`DELAY_GRID`, in
hours; the onset is the planted experiment's start, or the start of the stop) and the first at
which the problem is detected. The grid is coarse, so a delay reads "detected by then".

Base rate: the same finding on the null world of the same seed (nothing planted), at the same
decision time. A detection rate means something only well above it. The
novelty check judges at whole weeks since the phase start and spillover only on whole ramp
phases, so they get no grid.

Figures, not asserts: the README's checks section records a run; ``tests/test_nullworld_power.py``
asserts the cases that are robust. The per-seed worlds are built from seeds 5000 + i.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
from datetime import datetime, timedelta
from pathlib import Path

try:  # run as python -m tests.bench.power, or imported by the tests (tests/ on sys.path)
    import nullworld as world
except ModuleNotFoundError:
    from tests import nullworld as world

from monitor.config import parse_config
from monitor.cycle import run_cycle
from monitor.findings import Finding

AS_OF, PROBLEMS, TARGETS, STOP_AT, build = world.AS_OF, world.PROBLEMS, world.TARGETS, world.STOP_AT, world.build

#: Problem -> hours after onset at which the delay cycles run (none: no delay measured).
DELAY_GRID: dict[str, tuple[float, ...]] = {
    "srm": (24, 72, 168, 336), "leakage": (1, 3, 6, 12, 24), "guardrail": (24, 72, 168, 336),
    "correlated": (24, 72, 168), "stop": (5, 6, 7),
}
FIRST_SEED = 5000


def onset(problem: str) -> datetime:
    """When the planted problem starts (the experiment's first phase, or the stop)."""
    if problem == "stop":
        return STOP_AT
    eid = TARGETS[problem][0]
    return AS_OF - timedelta(days=world.DAYS - world.EXPERIMENTS[eid][0][0][0])


def judged_at(problem: str) -> datetime:
    """The cycle that decides detection: the end of the stop, or the end of the data."""
    return STOP_AT + timedelta(hours=world.STOP_HOURS) if problem == "stop" else AS_OF


def detected(findings: list[Finding], problem: str) -> bool:
    """The right check flags the right experiment (and metric, or other experiment) at warn or worse."""
    eid, check, scope = TARGETS[problem]
    return any(f.experiment == eid and f.check == check and f.status != "ok"
               and (scope is None or f.scope.split(":")[0] == scope) for f in findings)


def cycle(cfg, problem: str, as_of: datetime) -> bool:
    return detected(run_cycle(cfg, as_of=as_of, dry_run=True, notify=False).findings, problem)


def null_findings(seeds: range, directory: Path) -> dict[tuple[int, datetime], list[Finding]]:
    """The findings of the null world of every seed at every decision time: what a check says
    with nothing planted, the base rate a detection must be read against."""
    out = {}
    for seed in seeds:
        d = directory / f"null-{seed}"
        d.mkdir(parents=True, exist_ok=True)
        cfg = parse_config(build(d, seed))
        for at in {judged_at(p) for p in PROBLEMS}:
            out[seed, at] = run_cycle(cfg, as_of=at, dry_run=True, notify=False).findings
    return out


def study(problem: str, seeds: range, directory: Path, strength: float = 1.0) -> tuple[int, list[float | None]]:
    """(seeds detected, per detected seed the first grid hour detected, None when only at the decision)."""
    hits, delays = 0, []
    for seed in seeds:
        d = directory / f"{problem}-{seed}"
        d.mkdir(parents=True, exist_ok=True)
        cfg = parse_config(build(d, seed, plant=(problem,), strength=strength))
        if not cycle(cfg, problem, judged_at(problem)):
            continue
        hits += 1
        grid = DELAY_GRID.get(problem)
        if grid:
            first = next((h for h in grid if cycle(cfg, problem, onset(problem) + timedelta(hours=h))), None)
            delays.append(first)
    return hits, delays


def _delay_text(problem: str, delays: list[float | None]) -> str:
    if problem not in DELAY_GRID:
        return "-"
    if not delays:
        return "n/a"
    known = [h for h in delays if h is not None]
    late = len(delays) - len(known)
    text = f"median {statistics.median(known):g} h, max {max(known):g} h" if known else ""
    if late:
        text += f"{'; ' if text else ''}{late} only at the decision"
    return text


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--problems", default=",".join(PROBLEMS), help="comma-separated, from: " + ", ".join(PROBLEMS))
    ap.add_argument("--strength", type=float, default=1.0, help="multiply every planted size (share shift, "
                    "leaked and copied shares, effects) by this, in (0, 10]")
    ap.add_argument("--dir", default=None, help="where the worlds are written (default: a temporary directory)")
    args = ap.parse_args(argv)
    problems = [p for p in args.problems.split(",") if p]
    unknown = [p for p in problems if p not in PROBLEMS]
    problem = (f"--problems: unknown {', '.join(unknown)}" if unknown else "--seeds must be >= 1"
               if args.seeds < 1 else "--strength must be in (0, 10]" if not 0 < args.strength <= 10 else None)
    if problem:
        print(f"error: {problem}", file=sys.stderr)
        return 2
    seeds = range(FIRST_SEED, FIRST_SEED + args.seeds)
    with tempfile.TemporaryDirectory() as tmp:
        directory = Path(args.dir or tmp)
        print(f"power on the realistic world: {args.seeds} seeds per problem, one problem planted at a time, "
              f"strength {args.strength:g}, every check at its defaults; delay grid in hours after onset")
        null = null_findings(seeds, directory)
        print(f"{'problem':13s} {'check':10s} {'experiment':11s} {'detected':>9s} {'null world':>10s}  "
              "delay (detected seeds)")
        for p in problems:
            hits, delays = study(p, seeds, directory, args.strength)
            base = sum(detected(null[seed, judged_at(p)], p) for seed in seeds)
            eid, check, _ = TARGETS[p]
            print(f"{p:13s} {check:10s} {eid:11s} {hits:4d} / {args.seeds:<3d} {base:4d} / {args.seeds:<3d}  "
                  f"{_delay_text(p, delays)}")
        for p in problems:
            print(f"  {p}: {PROBLEMS[p]}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
