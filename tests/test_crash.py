"""Crash safety: a cycle killed with SIGKILL at a random point leaves the state
store consistent, the next run completes, and no alert is lost or opened twice.

The kills hit separate processes that run the real command line
(``monitor.cli.main(["run", ...])``). Most trials fork a parent that has already
imported expwatch (interpreter start-up and imports take seconds on a loaded
2-core machine, which would make 30 trials too slow); two trials and the
concurrency test start ``python -m monitor run`` itself.

The reference for "nothing lost, nothing doubled" is the same schedule of runs
without kills, in-process, on a fresh store: the killed store's alert ledger must
end up equal to it.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.state import alert_events, alerts, findings, runs

from conftest import registry_frame, write_duckdb_warehouse

UTC = timezone.utc
START = datetime(2026, 10, 1, tzinfo=UTC)
HOURS = 240
ROOT = Path(__file__).resolve().parent.parent


def _units(rng, exp, n, weights, prefix):
    names = list(weights)
    v = rng.choice(names, n, p=list(weights.values()))
    secs = rng.integers(0, HOURS * 3600, n)
    t = pd.Timestamp(START.replace(tzinfo=None)) + pd.to_timedelta(secs, unit="s")
    return pd.DataFrame({"unit_id": [f"{prefix}{i}" for i in range(n)], "experiment_id": exp, "variant": v,
                         "assigned_at": t, "platform": rng.choice(["android", "ios"], n)})


def make_warehouse(path: Path, seed: int = 7) -> None:
    """Three 50/50 experiments: 'steady' is healthy; 'tilted' loses 30% of new
    treatment units from hour 120 (SRM); 'leaky' has 4% of units seen again in
    the other variant an hour later (leakage)."""
    rng = np.random.default_rng(seed)
    w = {"control": 0.5, "treatment": 0.5}
    a = _units(rng, "steady", 8000, w, "s")
    b = _units(rng, "tilted", 8000, w, "t")
    late = b["assigned_at"] >= pd.Timestamp(START.replace(tzinfo=None) + timedelta(hours=120))
    b = b[~(late & (b["variant"] == "treatment") & (rng.random(len(b)) < 0.3))]
    c = _units(rng, "leaky", 8000, w, "l")
    again = c[rng.random(len(c)) < 0.04].copy()
    again["variant"] = np.where(again["variant"] == "control", "treatment", "control")
    again["assigned_at"] = again["assigned_at"] + pd.Timedelta(hours=1)
    write_duckdb_warehouse(path, registry_frame(("steady", "tilted", "leaky"), START),
                           pd.concat([a, b, c, again], ignore_index=True))


CONFIG = """
warehouse: {url: "duckdb:///w.duckdb"}
state: {url: "sqlite:///STATE"}
registry: {table: experiments}
assignments: {table: assignments, segments: [platform]}
"""


def _config(d: Path, state: str) -> Path:
    p = d / f"{state}.yaml"
    p.write_text(CONFIG.replace("STATE", f"{state}.sqlite"))
    return p


@pytest.fixture(scope="module")
def wdir(tmp_path_factory):
    d = tmp_path_factory.mktemp("crash")
    make_warehouse(d / "w.duckdb")
    return d


def _as_of(i: int) -> datetime:
    return START + timedelta(hours=150 + 3 * i)


def _fork_run(config: Path, as_of: datetime, out: Path) -> int:
    """Start ``expwatch run`` in a forked child (stdout/stderr to ``out``); returns its pid."""
    pid = os.fork()
    if pid == 0:  # child: the real command line, then exit without running the parent's cleanup
        code = 1
        try:
            fd = os.open(out, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
            os.dup2(fd, 1)
            os.dup2(fd, 2)
            from monitor.cli import main

            code = main(["run", "--config", str(config), "--as-of", as_of.isoformat(), "--format", "json"])
        finally:
            os._exit(code)
    return pid


def _wait(pid: int, timeout: float = 120.0) -> int | None:
    """Exit code, or None when killed by a signal."""
    deadline = time.monotonic() + timeout
    while True:
        got, status = os.waitpid(pid, os.WNOHANG)
        if got:
            return os.waitstatus_to_exitcode(status) if os.WIFEXITED(status) else None
        if time.monotonic() > deadline:
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
            raise AssertionError("a run did not finish in time")
        time.sleep(0.01)


def _kill_after(pid: int, delay: float) -> bool:
    """SIGKILL ``pid`` after ``delay`` seconds unless it exited; True when it was killed."""
    deadline = time.monotonic() + delay
    while time.monotonic() < deadline:
        got, status = os.waitpid(pid, os.WNOHANG)
        if got:
            return False
        time.sleep(0.005)
    os.kill(pid, signal.SIGKILL)
    _, status = os.waitpid(pid, 0)
    return os.WIFSIGNALED(status)


def _store(url: str):
    eng = sa.create_engine(url, poolclass=sa.pool.NullPool)
    with eng.connect() as c:
        integrity = c.exec_driver_sql("PRAGMA integrity_check").scalar()
        run_rows = c.execute(sa.select(runs.c.run_id, runs.c.as_of, runs.c.detail)).all()
        per_run = dict(c.execute(sa.select(findings.c.run_id, sa.func.count()).group_by(findings.c.run_id)).all())
        alert_rows = [dict(r) for r in c.execute(sa.select(alerts).order_by(alerts.c.id)).mappings()]
        events = [dict(r) for r in c.execute(sa.select(alert_events).order_by(alert_events.c.id)).mappings()]
    eng.dispose()
    return integrity, run_rows, per_run, alert_rows, events


def _assert_consistent(url: str) -> tuple[int, list[dict]]:
    """Integrity of the state store; returns (number of runs, alerts)."""
    import json

    integrity, run_rows, per_run, alert_rows, events = _store(url)
    assert integrity == "ok"
    run_ids = {r.run_id for r in run_rows}
    # a run row exists iff its findings exist, with the count the run recorded
    assert set(per_run) == run_ids
    for r in run_rows:
        assert per_run[r.run_id] == json.loads(r.detail)["findings"]
    assert {e["run_id"] for e in events} <= run_ids
    assert {a["opened_run"] for a in alert_rows} <= run_ids
    open_keys = [a["key"] for a in alert_rows if a["state"] == "open"]
    assert len(open_keys) == len(set(open_keys)), "two open alerts for one key"
    by_alert: dict[int, list[str]] = {}
    for e in events:
        by_alert.setdefault(e["alert_id"], []).append(e["event"])
    for a in alert_rows:
        kinds = by_alert.get(a["id"], [])
        assert kinds[:1] == ["opened"] and kinds.count("opened") == 1, (a["key"], kinds)
    return len(run_rows), alert_rows


def _ledger(alert_rows: list[dict]) -> list[tuple]:
    return sorted((a["key"], a["state"], a["severity"], a["max_severity"], a["opened_at"], a["resolved_at"]) for a in alert_rows)


@pytest.mark.slow
def test_sigkill_at_random_points_loses_and_doubles_nothing(wdir):
    trials = 30
    rng = np.random.default_rng(20261202)
    config = _config(wdir, "killed")
    url = load_config(config).state.url
    # the reference: the same schedule of runs, never killed
    ref_cfg = load_config(_config(wdir, "reference"))
    for i in range(trials):
        run_cycle(ref_cfg, as_of=_as_of(i))
    _, ref_alerts = _assert_consistent(ref_cfg.state.url)
    ref = _ledger(ref_alerts)
    keys = {a["key"] for a in ref_alerts}
    assert sum("tilted" in k and "srm" in k for k in keys) >= 1 and any("leaky" in k and "leakage" in k for k in keys)
    assert not any("steady" in k for k in keys)

    # how long one forked run takes here, to spread the kill points over it: the shorter of a
    # cold and a warm run, so a busy moment during the first does not push the kills past the end
    spans = []
    for name in ("first", "second"):
        t0 = time.monotonic()
        assert _wait(_fork_run(config, _as_of(0), wdir / f"{name}.log")) == 0
        spans.append(time.monotonic() - t0)
    span = min(spans)
    killed = 0
    for i in range(trials):
        before, _ = _assert_consistent(url)
        pid = _fork_run(config, _as_of(i), wdir / f"kill{i}.log")
        killed += _kill_after(pid, float(rng.uniform(0.0, span)))
        mid, _ = _assert_consistent(url)
        assert mid in (before, before + 1)  # the killed run wrote all of its work or none of it
        # the next run completes (it takes over the dead process's lock) and is recorded
        assert _wait(_fork_run(config, _as_of(i), wdir / f"next{i}.log")) == 0, (wdir / f"next{i}.log").read_text()
        after, _ = _assert_consistent(url)
        assert after == mid + 1
    assert killed >= trials // 3, f"only {killed} of {trials} runs were killed before they finished"
    _, got = _assert_consistent(url)
    assert _ledger(got) == ref  # each problem: one alert, opened once, same times as without kills


def _real_run(config: Path, as_of: datetime) -> subprocess.Popen:
    # -P and no PYTHONPATH: the child imports the installed package, as the tests do
    return subprocess.Popen([sys.executable, "-P", "-m", "monitor", "run", "--config", str(config), "--as-of", as_of.isoformat(),
                             "--format", "json"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.mark.slow
def test_python_m_monitor_run_killed_then_rerun(wdir):
    rng = np.random.default_rng(7)
    config = _config(wdir, "real")
    url = load_config(config).state.url
    for i in range(2):
        p = _real_run(config, _as_of(i))
        time.sleep(float(rng.uniform(1.0, 6.0)))
        p.send_signal(signal.SIGKILL)
        p.communicate()
        n_mid = _assert_consistent(url)[0] if Path(url.removeprefix("sqlite:///")).exists() else 0
        p = _real_run(config, _as_of(i))
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
        assert _assert_consistent(url)[0] == n_mid + 1


@pytest.mark.slow
def test_two_concurrent_runs_make_one_cycle_of_alerts(wdir):
    config = _config(wdir, "concurrent")
    url = load_config(config).state.url
    # an existing store (as after the first deployment run): creating a brand-new store from two
    # processes at once is not covered here
    from monitor.state import StateStore

    StateStore(url).dispose()
    as_of = _as_of(20)
    procs = [_real_run(config, as_of) for _ in range(2)]
    outs = [p.communicate(timeout=120) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [o[1] for o in outs]
    n_runs, got = _assert_consistent(url)
    stepped = sum("stepped aside" in err for _, err in outs)
    assert n_runs + stepped == 2 and n_runs >= 1
    ref_cfg = load_config(_config(wdir, "concurrent_ref"))
    run_cycle(ref_cfg, as_of=as_of)
    _, ref = _assert_consistent(ref_cfg.state.url)
    # one cycle's worth: the same alerts as a single run (a second run of the same hour adds no event)
    assert _ledger(got) == _ledger(ref)
    _, _, _, _, events = _store(url)
    assert len(events) == len(ref)
