"""What expwatch tells the places it runs in: JSON log lines, the metrics file, the
terminal table, and the health check of ``expwatch status --max-age``."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from datetime import datetime, timedelta, timezone

import pytest
import sqlalchemy as sa

from monitor.cli import main
from monitor.state import runs

# the small synthetic warehouse of the serve tests, and its fixtures (one SRM experiment, one healthy)
import test_serve
from test_serve import START

UTC = timezone.utc
wdir, cfg, _reset_logging = test_serve.wdir, test_serve.cfg, test_serve._reset_logging


def test_status_max_age_is_a_health_check(cfg, capsys):
    args = ["status", "--config", str(cfg.path), "--max-age", "3h"]
    assert main(args) == 1  # no run yet (no state store either): unhealthy, not a usage error
    err = capsys.readouterr().err
    assert err.startswith("expwatch: unhealthy: no run has succeeded yet (status: no state store at ")
    assert err.count("\n") == 1
    assert main(["run", "--config", str(cfg.path), "--as-of", (START + timedelta(hours=100)).isoformat(),
                 "--format", "json"]) == 0
    capsys.readouterr()
    assert main(args) == 0  # the run finished just now
    # the same run, finished four hours ago
    eng = sa.create_engine(cfg.state.url)
    with eng.begin() as c:
        c.execute(sa.update(runs).values(finished_at=datetime.now(UTC) - timedelta(hours=4)))
    eng.dispose()
    assert main(args) == 1
    err = capsys.readouterr().err
    assert err.startswith("expwatch: unhealthy: the latest successful run finished ") and "--max-age 3h" in err
    assert main([*args[:-1], "3 hours"]) == 2  # a usage error, one line
    assert "--max-age" in capsys.readouterr().err


def _json_lines(err: str) -> list[dict]:
    lines = err.splitlines()
    assert lines, "no log lines"
    return [json.loads(ln) for ln in lines]  # every line is one JSON object, nothing else on stderr


def test_json_logs_are_json_only_with_the_run_id_on_every_line(cfg, capsys):
    as_of = START + timedelta(hours=120)
    assert main(["run", "--config", str(cfg.path), "--as-of", as_of.isoformat(), "--log-format", "json"]) == 0
    out, err = capsys.readouterr()
    assert out == ""  # no table between the JSON lines
    logs = _json_lines(err)
    cycle = next(x for x in logs if x.get("event") == "cycle")
    assert all(x.get("run_id") == cycle["run_id"] for x in logs)
    # each query once, stamped when it finished (before the cycle's summary), not again at the end
    queries = [x for x in logs if x.get("event") == "query"]
    names = [q["query"] for q in queries]
    assert len(names) == len(set(names)) and {"registry", "assignments[assigned]"} <= set(names)
    assert all(q["time"] <= cycle["time"] for q in queries) and queries[0]["time"] < cycle["time"]
    # the SRM experiment opens alerts: one warning record each, as many as the summary counts
    opened = [x for x in logs if x.get("event") == "alert_opened"]
    assert opened and len(opened) == cycle["events"]["opened"]
    assert all(x["level"] == "warning" and x["experiment"] and x["severity"] in ("warn", "alert", "critical") for x in opened)
    assert any(x["experiment"] == "tilted" and x["check"] == "srm" for x in opened)


def test_json_logs_step_aside_lock_wait_and_errors_are_records(cfg, capsys, tmp_path):
    from monitor.state import StateStore

    as_of = (START + timedelta(hours=100)).isoformat()
    store = StateStore(cfg.state.url)
    with store.lock():
        assert main(["run", "--config", str(cfg.path), "--as-of", as_of, "--log-format", "json", "--wait", "0.3"]) == 0
    store.dispose()
    out, err = capsys.readouterr()
    logs = _json_lines(err)
    assert out == "" and [x["event"] for x in logs] == ["lock_wait", "stepped_aside"]
    assert all(x["level"] == "warning" and x["run_id"] == logs[0]["run_id"] for x in logs)
    # a configuration error: one error record with the exit code, not a plain line
    assert main(["run", "--config", str(tmp_path / "missing.yaml"), "--log-format", "json"]) == 2
    (rec,) = _json_lines(capsys.readouterr().err)
    assert rec["level"] == "error" and rec["event"] == "error" and rec["exit_code"] == 2 and rec["run_id"]
    assert "missing.yaml" in rec["message"]


def test_text_output_without_a_terminal_is_not_hard_wrapped(cfg, capsys):
    as_of = (START + timedelta(hours=120)).isoformat()
    assert main(["run", "--config", str(cfg.path), "--as-of", as_of, "--dry-run", "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert main(["run", "--config", str(cfg.path), "--as-of", as_of, "--dry-run"]) == 0
    out = capsys.readouterr().out  # captured: not a terminal
    lines = out.splitlines()
    assert not any(ln != ln.rstrip() for ln in lines)  # no trailing spaces
    problems = [f for f in doc["findings"] if f["status"] != "ok"]
    assert problems
    for f in problems:  # every summary whole on one line, however long
        assert any(f["summary"] in ln for ln in lines), f["summary"]


def test_metrics_file_counts_runs_and_failures_and_carries_build_info(cfg, capsys, tmp_path):
    """Parsed with the official Prometheus Python client's text-format parser."""
    from prometheus_client.parser import text_string_to_metric_families

    from monitor import __version__

    prom = tmp_path / "m.prom"
    for h in (100, 110):
        assert main(["run", "--config", str(cfg.path), "--as-of", (START + timedelta(hours=h)).isoformat(),
                     "--format", "json", "--metrics-file", str(prom)]) == 0
    broken = tmp_path / "broken.yaml"
    broken.write_text(cfg.path.read_text().replace("duckdb:///w.duckdb", f"duckdb:///{tmp_path}/absent.duckdb"))
    assert main(["run", "--config", str(broken), "--metrics-file", str(prom)]) == 1
    capsys.readouterr()
    families = {f.name: f for f in text_string_to_metric_families(prom.read_text())}
    assert families["expwatch_runs"].type == "counter" and families["expwatch_run_failures"].type == "counter"
    assert [(s.name, s.value) for s in families["expwatch_runs"].samples] == [("expwatch_runs_total", 3)]
    assert [(s.name, s.value) for s in families["expwatch_run_failures"].samples] == [("expwatch_run_failures_total", 1)]
    (info,) = families["expwatch_build_info"].samples
    assert info.value == 1 and info.labels["version"] == __version__
    assert families["expwatch_last_attempt_success"].samples[0].value == 0


@pytest.fixture
def result(cfg):
    from monitor.cycle import run_cycle

    return run_cycle(cfg, as_of=START + timedelta(hours=120), dry_run=True)


def _render(result, width: int, color: bool = False) -> str:
    from rich.console import Console

    from monitor.report import print_text

    buf = io.StringIO()
    print_text(result, Console(file=buf, width=width, force_terminal=True, color_system="standard" if color else None,
                               highlight=False))
    return buf.getvalue()


@pytest.mark.parametrize("width", [80, 100, 160])
def test_run_table_reads_at_80_100_and_160_columns(result, width):
    out = _render(result, width)
    lines = out.splitlines()
    assert max(len(ln) for ln in lines) <= width
    header = next(ln for ln in lines if ln.lstrip().startswith("experiment"))
    assert header.split()[:3] == ["experiment", "phase", "units"]  # headers whole, never split into pieces
    words = set(out.split())
    problems = [f for f in result.findings if f.status != "ok"]
    assert problems
    for f in problems:  # each check that needs a look is named whole, with its severity word
        assert f"{f.check}·{f.scope}" in words or f"{f.check}·{f.scope}," in words, (width, f.check, f.scope)
    rows = {ln.split()[0]: ln for ln in lines if ln.split() and ln.split()[0] in {e.id for e in result.experiments}}
    assert set(rows) == {"steady", "tilted"}
    assert "all clear" in rows["steady"] and "CRITICAL srm·assigned" in rows["tilted"]  # 30% of treatment lost


def test_severities_look_different():
    from monitor.report import _SEVERITY_LOOK

    words = [w for w, _ in _SEVERITY_LOOK.values()]
    styles = [s for _, s in _SEVERITY_LOOK.values()]
    assert len(set(words)) == len(set(styles)) == 4  # apart by word (no colour) and by style (colour)


def test_run_table_colours_alerts_unlike_clear_rows(result):
    out = _render(result, 100, color=True)
    alert = next(ln for ln in out.splitlines() if "tilted" in ln)
    clear = next(ln for ln in out.splitlines() if "steady" in ln)
    assert "\x1b[1;7;31mCRITICAL" in alert and "\x1b[32mall clear" in clear


def test_version_loads_none_of_the_heavy_libraries():
    """``expwatch --version`` imports lazily (the time and memory it saves are measured by
    hand, see the README; here only which modules load)."""
    code = ("import sys\nfrom monitor.cli import main\ntry:\n    main(['--version'])\nexcept SystemExit:\n    pass\n"
            "heavy = ('pandas', 'scipy', 'sqlalchemy', 'pydantic', 'rich', 'matplotlib', 'numpy', 'duckdb', 'yaml')\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in heavy))")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=False)
    assert res.returncode == 0, res.stderr
    assert res.stdout.splitlines() == ["expwatch 0.1.0", "[]"]


def test_digest_without_matplotlib_asks_for_the_charts_extra(cfg, capsys, tmp_path, monkeypatch):
    assert main(["run", "--config", str(cfg.path), "--as-of", (START + timedelta(hours=120)).isoformat(),
                 "--format", "json"]) == 0
    capsys.readouterr()
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")] or ["matplotlib"]:
        monkeypatch.setitem(sys.modules, name, None)  # as if the extra were not installed
    assert main(["digest", "--config", str(cfg.path), "--out", str(tmp_path / "d.html")]) == 2
    err = capsys.readouterr().err
    assert err == "expwatch: charts need matplotlib, which is not installed: pip install 'expwatch[charts]'\n"
    assert not (tmp_path / "d.html").exists()
    # the plain-text digest needs no charts
    assert main(["digest", "--config", str(cfg.path)]) == 0
    assert "tilted" in capsys.readouterr().out


def test_records_inside_a_cycle_carry_its_run_id_without_the_cli(cfg):
    """The scheduler and notebooks call run_cycle directly: the records of its queries
    still carry the cycle's run id, and records after the cycle do not."""
    import logging

    from monitor.cycle import run_cycle
    from monitor.observe import JsonFormatter, RunContextFilter

    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    handler.addFilter(RunContextFilter())
    lg = logging.getLogger("monitor")
    level = lg.level
    lg.addHandler(handler)
    lg.setLevel(logging.INFO)
    try:
        result = run_cycle(cfg, as_of=START + timedelta(hours=120), dry_run=True)
        lg.info("after the cycle")
    finally:
        lg.setLevel(level)
    logs = [json.loads(x) for x in stream.getvalue().splitlines()]
    queries = [x for x in logs if x.get("event") == "query"]
    assert queries and all(q["run_id"] == result.run_id for q in queries)
    assert "run_id" not in logs[-1]


def test_status_and_metrics_count_clearing_episodes(tmp_path):
    """A clearing episode (ok again, not yet for checks.episode_clear_hours) is neither open
    nor gone: status shows it on its own line and the metrics file has a gauge for it."""
    from prometheus_client.parser import text_string_to_metric_families

    from monitor import ledger
    from monitor.findings import Finding
    from monitor.observe import metrics_text, read_status, render_status_text, status_to_json
    from monitor.state import StateStore

    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    store = StateStore(url)
    t0 = datetime(2026, 11, 20, 9, tzinfo=UTC)
    for i, status in enumerate(("alert", "ok")):
        at = t0 + timedelta(hours=i)
        found = [Finding("e1", "srm", "assigned", status, f"srm {status}"),
                 Finding("e2", "leakage", "assigned", "warn", "leakage warn")]
        with store.transaction() as conn:
            ev = ledger.plan(store.open_alerts(conn), found, ["e1", "e2"], as_of=at, clear_for=timedelta(hours=24))
            ledger.apply(conn, f"run-{i}", at, found, ev)
            StateStore.record_run(conn, f"run-{i}", at, at, "ok", {})
    store.dispose()
    report = read_status(url)
    assert report.clearing_alerts == {"srm": 1} and report.open_alerts == {("leakage", "warn"): 1}
    assert "  srm              clearing  1" in render_status_text(report).splitlines()
    doc = status_to_json(report)
    assert doc["clearing_alerts"] == 1 and doc["clearing_alerts_by"] == [{"check": "srm", "count": 1}]
    families = {f.name: f for f in text_string_to_metric_families(metrics_text(report, checks=["leakage", "srm"]))}
    assert {s.labels["check"]: s.value for s in families["expwatch_clearing_alerts"].samples} == {"leakage": 0, "srm": 1}


def test_spinner_counts_steps_and_its_clock_runs_while_a_step_computes():
    from rich.console import Console

    from monitor.cycle import CYCLE_STEPS
    from monitor.report import CycleProgress

    now = [100.0]
    progress = CycleProgress(clock=lambda: now[0])

    def shown() -> str:
        buf = io.StringIO()
        Console(file=buf, width=100, color_system=None).print(progress)
        return buf.getvalue().strip()

    assert shown() == "starting · 0s"
    progress.step("checks")
    assert shown() == f"step 3 of {len(CYCLE_STEPS)}: allocation checks · 0s"
    now[0] += 7.4  # no new step: the next redraw reads the clock again
    assert shown() == f"step 3 of {len(CYCLE_STEPS)}: allocation checks · 7s"
    progress.step("metric[render_ms]")
    now[0] += 60
    assert shown() == f"step 4 of {len(CYCLE_STEPS)}: guardrail metrics (render_ms) · 1:07"


def test_run_in_a_terminal_shows_step_n_of_m(cfg):
    """``expwatch run`` with standard error on a pseudo-terminal: the spinner names each step
    as 'step N of M', in order, and is erased at the end (transient)."""
    import os
    import pty
    import re

    from monitor.cycle import CYCLE_STEPS

    master, slave = pty.openpty()
    env = dict(os.environ, TERM="xterm-256color", COLUMNS="120")
    env.pop("NO_COLOR", None)
    p = subprocess.Popen([sys.executable, "-P", "-m", "monitor", "run", "--config", str(cfg.path), "--as-of",
                          (START + timedelta(hours=100)).isoformat()], stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                         stderr=slave, env=env)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO: the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    out = p.communicate(timeout=120)[0].decode()
    os.close(master)
    assert p.returncode == 0 and "tilted" in out  # the table went to standard output (a pipe)
    screen = b"".join(chunks).decode(errors="replace")
    m = len(CYCLE_STEPS)
    steps = [int(n) for n in re.findall(rf"step (\d) of {m}: ", screen)]
    assert steps and steps == sorted(steps), steps
    for text in ("step 1 of {m}: reading the registry", "step 2 of {m}: pulling assignment counts (assigned)",
                 "step 3 of {m}: allocation checks", "step {m} of {m}: recording the run"):
        assert text.format(m=m) in screen, text
