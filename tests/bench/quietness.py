"""Quietness of the monitor on the demo: replay it hourly and hold every episode
against the demo's answer key.

    python -m tests.bench.quietness [--dir DIR] [--from T1] [--to T2] [--every 1h]
                                    [--metrics-every 1d] [--clear-hours H] [--json FILE]

Builds the demo warehouse in ``--dir`` (reused when it already holds one), replays it
(:func:`monitor.replay.replay`, fast mode) with every planted problem's onset, and prints

* every episode (experiment, check, scope, opened, closed, highest severity), marked
  ``planted`` when the answer key has a problem for that experiment and check
  (for ``srm``: at the planted stage or a later one) and ``-`` otherwise;
* per planted problem: its episodes and the detection delay of the first one;
* the figures: episodes on combinations with no planted problem, planted problems
  with exactly one episode, and episodes that opened within 24 h of the previous
  episode on the same key closing.

Figures, not asserts: the targets live in the README's Replay section. The full
four-week hourly replay with daily metric steps takes minutes.
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

STAGES = ("assigned", "filtered")


def _time(text: str) -> datetime:
    return datetime.fromisoformat(text).astimezone(timezone.utc)


def _guardrail_metrics(cfg: object) -> dict[str, set[str]]:
    """Experiment -> the configured metrics a planted guardrail harm moves (the metrics
    read from the table and column the demo scales)."""
    from monitor.demo import EXPERIMENTS

    out: dict[str, set[str]] = {}
    for spec in EXPERIMENTS:
        for eff in spec.effects:
            if eff.check != "guardrail":
                continue
            out.setdefault(spec.experiment_id, set()).update(
                m.name for m in cfg.metrics if m.table == eff.table and m.columns.value == eff.column)
    return out


def _planted_for(t: dict, planted: list, guardrail_metrics: dict[str, set[str]]) -> list:
    """The planted problems an episode answers: one, or for a collision pair finding
    (reported once, under one experiment of the pair) the problem planted on each side."""
    out = []
    for p in planted:
        if p.check != t["check"]:
            continue
        if p.experiment != t["experiment"] and not (
                p.check == "collision" and t["scope"].split(":")[0] == p.experiment):
            continue
        if p.check == "srm" and p.stage and t["scope"] in STAGES and STAGES.index(t["scope"]) < STAGES.index(p.stage):
            continue
        if p.check == "guardrail" and t["scope"].split(":")[0] not in guardrail_metrics.get(p.experiment, ()):
            continue
        out.append(p)
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dir", default="expwatch-demo")
    ap.add_argument("--from", dest="start", default="2026-11-03T00:00Z")
    ap.add_argument("--to", dest="end", default="2026-11-30T09:00Z")
    ap.add_argument("--every", default="1h")
    ap.add_argument("--metrics-every", default="1d")
    ap.add_argument("--clear-hours", type=float, default=None, help="override checks.episode_clear_hours")
    ap.add_argument("--allocation-only", action="store_true")
    ap.add_argument("--json", metavar="FILE", help="also write the replay's JSON document here")
    ap.add_argument("--saved", metavar="FILE", help="analyse a replay JSON document written earlier instead of replaying")
    args = ap.parse_args(argv)

    from monitor.config import load_config
    from monitor.demo import build_demo_warehouse, demo_tables
    from monitor.demo_config import write_demo_config
    from monitor.replay import parse_every, replay, replay_to_json

    d = Path(args.dir)
    if not (d / "warehouse.duckdb").exists():
        build_demo_warehouse(d / "warehouse.duckdb")
        write_demo_config(d)
    summary = demo_tables()[1]
    cfg = load_config(d / "expwatch.yaml")
    if args.clear_hours is not None:
        cfg = cfg.model_copy(update={"checks": cfg.checks.model_copy(update={"episode_clear_hours": args.clear_hours})})
    planted = [p for p in summary.planted if p.check != "effect"]
    onsets = {(p.experiment, p.check): p.onset for p in planted if p.onset is not None}
    if args.saved:
        doc = json.loads(Path(args.saved).read_text(encoding="utf-8"))
    else:
        report = replay(cfg, _time(args.start), _time(args.end), every=parse_every(args.every),
                        metrics_every=parse_every(args.metrics_every, "--metrics-every"), onsets=onsets,
                        allocation_only=args.allocation_only)
        doc = replay_to_json(report)
    if args.json:
        Path(args.json).write_text(json.dumps(doc, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    alerts = doc["alerts"]
    print(f"replay {doc['start'][:16]} .. {doc['end'][:16]} every {doc['every_seconds'] // 3600}h: "
          f"{doc['steps']} steps in {doc['seconds']:.0f}s, {len(alerts)} episodes")
    guardrail_metrics = _guardrail_metrics(cfg)
    unplanted, by_problem, reopened = [], {id(p): [] for p in planted}, 0
    last_close: dict[tuple[str, str, str], datetime] = {}
    for t in sorted(alerts, key=lambda t: t["opened_at"]):
        key = (t["experiment"], t["check"], t["scope"])
        opened = _time(t["opened_at"])
        if key in last_close and opened - last_close[key] < timedelta(hours=24):
            reopened += 1
        if t["closed_at"]:
            last_close[key] = _time(t["closed_at"])
        p = _planted_for(t, planted, guardrail_metrics)
        for q in p:
            by_problem[id(q)].append(t)
        if not p:
            unplanted.append(t)
        print(f"  {'planted' if p else '-':<8} {t['experiment'][:28]:<28} {t['check']:<10} {t['scope'][:24]:<24} "
              f"{t['opened_at'][:16]} {(t['closed_at'] or 'open')[:16]:<16} {t['max_severity']}")
    print("planted problems:")
    keys_one = keys_all = 0
    for p in planted:
        eps = by_problem[id(p)]
        scopes = sorted({t["scope"] for t in eps})
        per_scope = {sc: sorted((t for t in eps if t["scope"] == sc), key=lambda t: t["opened_at"]) for sc in scopes}
        keys_all += len(scopes)
        keys_one += sum(len(v) == 1 for v in per_scope.values())
        ended = " (ended)" if p.experiment in summary.ended else ""
        print(f"  {p.experiment}{ended} · {p.check}{' · ' + p.stage if p.stage else ''}: "
              + ("no episode" if not eps else "; ".join(
                  f"{sc}: {len(v)} episode(s), first opened {v[0]['opened_at'][:16]}"
                  + ("" if v[0]["delay_hours"] is None else f", delay {v[0]['delay_hours']:+.0f}h")
                  for sc, v in per_scope.items())))
    print(f"episodes with no planted problem: {len(unplanted)}"
          f" ({', '.join(sorted({t['check'] for t in unplanted})) or 'none'})")
    print(f"planted problems detected: {sum(bool(by_problem[id(p)]) for p in planted)} of {len(planted)}; "
          f"their keys (experiment, check, scope) with exactly one episode: {keys_one} of {keys_all}")
    print(f"episodes reopened within 24 h of the previous close: {reopened}")
    if "quietness" in doc:
        q = doc["quietness"]
        print(f"quietness (clear span {q['clear_hours']:g} h): " + "; ".join(
            f"{r['check']} {r['episodes']} episodes, {r['flaps']} flaps, {r['reopened']} reopened, {r['returns']} returns"
            for r in q["by_check"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
