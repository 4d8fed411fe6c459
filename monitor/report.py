"""Render a cycle's result: a compact terminal table, or the JSON document.

The JSON document is a public interface, documented in the README ("JSON
output"); ``tests/test_report.py`` checks that it matches that documentation.
"""

from __future__ import annotations

import json
import time
from collections import defaultdict
from collections.abc import Callable
from typing import Any

from rich.console import Console
from rich.table import Table
from rich.text import Text

from monitor.cycle import CYCLE_STEPS, CycleResult
from monitor.findings import clean_json

__all__ = ["CycleProgress", "to_json", "to_json_text", "print_text"]

JSON_VERSION = 1
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


#: how each severity looks in the terminal: a different word and a different style, so the
#: levels stay apart without colour too (NO_COLOR, TERM=dumb)
_SEVERITY_LOOK = {
    0: ("ok", "green"),
    1: ("warn", "yellow"),
    2: ("ALERT", "bold red"),
    3: ("CRITICAL", "bold reverse red"),
}


def _label(severity: int) -> Text:
    word, style = _SEVERITY_LOOK[severity]
    return Text(word, style=style)


def print_text(result: CycleResult, console: Console) -> None:
    """One line per live experiment naming only the checks that need a look, then the
    problems, most severe first.

    The layout reads at 80 columns: the last column wraps at word boundaries in a
    terminal. Without a terminal nothing is wrapped and no line ends in spaces.
    """
    if console.is_terminal:
        _print_text(result, console)
        return
    with console.capture() as cap:
        _print_text(result, console)
    console.file.write("".join(ln.rstrip() + "\n" for ln in cap.get().splitlines()))


def _print_text(result: CycleResult, console: Console) -> None:
    by_exp: dict[str, list[Any]] = defaultdict(list)
    # a collision pair finding is reported under one experiment of the pair; the other's line names it too
    pair_of: dict[str, list[Text]] = defaultdict(list)
    for f in result.findings:
        if f.status != "ok":
            by_exp[f.experiment].append(f)
            if f.check == "collision" and f.scope != "pairs":
                other, _, metric = f.scope.partition(":")
                pair_of[other].append(Text.assemble(_label(f.severity), f" collision·{f.experiment}"
                                                    f"{':' + metric if metric else ''} (under {f.experiment})"))
    table = Table(title=f"expwatch · {len(result.experiments)} live experiments · as of {result.as_of:%Y-%m-%d %H:%M} UTC",
                  title_justify="left", show_edge=False, pad_edge=False, box=None)
    table.add_column("experiment", no_wrap=True)
    table.add_column("phase", justify="right", no_wrap=True)
    table.add_column("units", justify="right", no_wrap=True)
    table.add_column("checks that need a look", ratio=1)
    entries = {e["experiment"]: e for e in _experiment_entries(result)}
    for e in result.experiments:
        entry = entries[e.id]
        found = sorted(by_exp.get(e.id, []), key=lambda f: (-f.severity, f.check, f.scope))
        if found or pair_of.get(e.id):
            cell = Text(", ").join([Text.assemble(_label(f.severity), " ", _where(f)) for f in found] + pair_of.get(e.id, []))
        else:
            cell = Text("all clear", style="green")
        table.add_row(e.id, str(entry["phase"] or "-"), f"{sum(entry['units'].values()):,}", cell)
    console.print(table)
    problems = [f for f in result.findings if f.status != "ok"]
    if problems:
        console.print()
        grid = Table.grid(padding=(0, 1))
        grid.add_column(no_wrap=True)
        grid.add_column(ratio=1)
        for f in sorted(problems, key=lambda f: (-f.severity, f.experiment, f.check, f.scope)):
            grid.add_row(_label(f.severity), Text(f"{f.experiment} · {_where(f)}: {f.summary}"))
        console.print(grid)
    new = [ev for ev in result.events if ev.kind in ("opened", "escalated", "resolved")]
    if new:
        console.print()
        console.print(f"alert ledger: {', '.join(f'{sum(1 for e in new if e.kind == k)} {k}' for k in ('opened', 'escalated', 'resolved') if any(e.kind == k for e in new))}")
    if result.note:
        console.print(f"note: {result.note}")


def _where(f: Any) -> str:
    """``check·scope`` (the stage, metric or pair), or the check alone for registry problems."""
    return f.check if f.scope == "registry" else f"{f.check}·{f.scope}"


class CycleProgress:
    """The text beside the terminal spinner: ``step 4 of 8: guardrail metrics (render_ms) · 12s``.

    :meth:`step` takes the cycle's ``on_step`` names; the clock is read whenever the spinner
    redraws (``__rich__``), so the seconds go on counting while a step computes, between
    two ``on_step`` calls.
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._t0 = clock()
        self._index = {name: i for i, (name, _) in enumerate(CYCLE_STEPS)}
        self.number = 0
        self.what = "starting"

    def step(self, name: str) -> None:
        base, _, detail = name.partition("[")
        i = self._index.get(base)
        if i is None:
            self.what = name
            return
        self.number = i + 1
        self.what = CYCLE_STEPS[i][1] + (f" ({detail.rstrip(']')})" if detail else "")

    def __rich__(self) -> Text:
        secs = int(self._clock() - self._t0)
        where = f"step {self.number} of {len(CYCLE_STEPS)}: " if self.number else ""
        return Text(f"{where}{self.what} · {secs // 60}:{secs % 60:02d}" if secs >= 60 else f"{where}{self.what} · {secs}s")
