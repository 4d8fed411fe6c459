"""Render a cycle's result: a compact terminal table, or the JSON document.

The JSON document is a public interface, documented in the README ("JSON
output"); ``tests/test_report.py`` checks that it matches that documentation.
"""

from __future__ import annotations

import json
from collections import defaultdict
from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from monitor.cycle import CycleResult
from monitor.findings import SEVERITY_NAMES, clean_json

__all__ = ["to_json", "to_json_text", "print_text"]

JSON_VERSION = 1
_STATUS_STYLE = {"ok": "green", "warn": "yellow", "alert": "bold red"}
_RANK = {"ok": 0, "warn": 1, "alert": 2}


def _experiment_entries(result: CycleResult) -> list[dict[str, Any]]:
    first = result.sources[0].counts if result.sources else None
    per_exp: dict[str, dict[str, int]] = defaultdict(dict)
    if first is not None and len(first):
        sums = first.groupby(["experiment", "variant"], dropna=False)["units"].sum()
        for (exp, var), n in sums.items():
            per_exp[str(exp)]["(null)" if var is None or var != var else str(var)] = int(n)
    worst: dict[str, str] = {}
    for f in result.findings:
        if _RANK[f.status] >= _RANK.get(worst.get(f.experiment, "ok"), 0):
            worst[f.experiment] = f.status
    out = []
    for e in result.experiments:
        ph = e.phase_at(result.as_of)
        units = per_exp.get(e.id, {})
        out.append({
            "experiment": e.id,
            "title": e.title,
            "owner": e.owner,
            "phase": ph.number if ph else None,
            "phase_start": ph.start if ph else None,
            "weights": dict(ph.weights) if ph else {},
            "control": e.control,
            "units": {v: units.get(v, 0) for v in e.variants} | {k: v for k, v in units.items() if k not in e.variants},
            "status": worst.get(e.id, "ok"),
        })
    return out


def to_json(result: CycleResult) -> dict[str, Any]:
    doc = {
        "version": JSON_VERSION,
        "run_id": result.run_id,
        "as_of": result.as_of,
        "recorded": result.recorded,
        "note": result.note,
        "experiments": _experiment_entries(result),
        "findings": [f.to_json() for f in result.findings],
        "events": [e.to_json() for e in result.events if e.kind != "changed"],
    }
    return clean_json(doc)  # type: ignore[no-any-return]


def to_json_text(result: CycleResult) -> str:
    return json.dumps(to_json(result), indent=2, ensure_ascii=False, sort_keys=False)


def _cell(status: str, text: str = "") -> Text:
    return Text(text or status, style=_STATUS_STYLE.get(status, ""))


def print_text(result: CycleResult, console: Console) -> None:
    """The table of live experiments with each check's status, then the problems."""
    by_exp: dict[str, dict[str, list[Any]]] = defaultdict(lambda: defaultdict(list))
    for f in result.findings:
        by_exp[f.experiment][f.check].append(f)
    stages = [s.name for s in result.sources]
    table = Table(title=f"expwatch · {len(result.experiments)} live experiments · as of {result.as_of:%Y-%m-%d %H:%M} UTC",
                  title_justify="left", show_edge=False, pad_edge=False)
    table.add_column("experiment", no_wrap=True)
    table.add_column("phase", justify="right", no_wrap=True)
    table.add_column("units", justify="right", no_wrap=True)
    for s in stages:
        table.add_column(f"srm {s}", overflow="fold")
    for c in ("leakage", "unknown_variant", "freshness"):
        table.add_column(c.replace("unknown_variant", "variants"), overflow="fold")
    table.add_column("guardrails", overflow="fold")
    table.add_column("effects", overflow="fold")  # novelty, spillover, collision: the worst of them
    entries = {e["experiment"]: e for e in _experiment_entries(result)}
    for e in result.experiments:
        checks = by_exp.get(e.id, {})
        entry = entries[e.id]
        srm_cells = []
        for s in stages:
            fs = [f for f in checks.get("srm", []) if f.scope == s]
            srm_cells.append(_cell(fs[0].status) if fs else Text("-"))
        other = []
        for c in ("leakage", "unknown_variant", "freshness"):
            fs = checks.get(c, [])
            other.append(_cell(fs[0].status) if fs else Text("-"))
        for group in (("guardrail",), ("novelty", "spillover", "collision")):
            fs = [f for c in group for f in checks.get(c, [])]
            worst = max((f.status for f in fs), key=lambda st: _RANK[st], default=None)
            other.append(_cell(worst) if worst else Text("-"))
        table.add_row(e.id, str(entry["phase"] or "-"), f"{sum(entry['units'].values()):,}", *srm_cells, *other)
    console.print(table)
    problems = [f for f in result.findings if f.status != "ok"]
    if problems:
        console.print()
        for f in sorted(problems, key=lambda f: (-f.severity, f.experiment, f.check, f.scope)):
            label = SEVERITY_NAMES[f.severity].upper()
            console.print(Text.assemble((f"{label:<8}", _STATUS_STYLE[f.status]), f" {f.experiment} · {f.check}"
                                        f"{'' if f.scope in ('registry',) else ' · ' + f.scope}: ", (f.summary, "")))
    new = [ev for ev in result.events if ev.kind in ("opened", "escalated", "resolved")]
    if new:
        console.print()
        console.print(f"alert ledger: {', '.join(f'{sum(1 for e in new if e.kind == k)} {k}' for k in ('opened', 'escalated', 'resolved') if any(e.kind == k for e in new))}")
    if result.note:
        console.print(f"note: {result.note}")
