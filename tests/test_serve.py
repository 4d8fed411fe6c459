"""``expwatch serve``, the schedule section, structured logs, the metrics file and
``expwatch status``, on a small synthetic warehouse."""

from __future__ import annotations

import json
import logging
import os
import re
import signal
import subprocess
import sys
import threading
import time
import types
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from monitor.cli import main
from monitor.config import load_config
from monitor.errors import ConfigError
from monitor.observe import metrics_text, read_status
from monitor.serve import CycleOutcome, Server, check_job, digest_job, serve
from monitor.serve_config import ScheduleConfig, parse_cron, schedule_of
from monitor.state import StateStore, locks

from conftest import registry_frame, write_duckdb_warehouse

UTC = timezone.utc
START = datetime(2026, 10, 1, tzinfo=UTC)
ROOT = Path(__file__).resolve().parent.parent


def make_warehouse(path: Path, seed: int = 3) -> None:
    """One healthy and one SRM experiment (treatment loses 30% of units), 120 hours."""
    rng = np.random.default_rng(seed)
    frames = []
    for exp in ("steady", "tilted"):
        n = 6000
        v = rng.choice(["control", "treatment"], n)
        t = pd.Timestamp(START.replace(tzinfo=None)) + pd.to_timedelta(rng.integers(0, 120 * 3600, n), unit="s")
        df = pd.DataFrame({"unit_id": [f"{exp}{i}" for i in range(n)], "experiment_id": exp, "variant": v,
                           "assigned_at": t, "platform": rng.choice(["android", "ios"], n)})
        if exp == "tilted":
            df = df[~((df["variant"] == "treatment") & (rng.random(n) < 0.3))]
        frames.append(df)
    write_duckdb_warehouse(path, registry_frame(("steady", "tilted"), START), pd.concat(frames, ignore_index=True))


CONFIG = """
warehouse: {url: "duckdb:///w.duckdb"}
registry: {table: experiments}
assignments: {table: assignments, segments: [platform]}
timezone: Europe/Berlin
"""


@pytest.fixture(scope="module")
def wdir(tmp_path_factory):
    d = tmp_path_factory.mktemp("serve")
    make_warehouse(d / "w.duckdb")
    return d


@pytest.fixture
def cfg(wdir, tmp_path):
    (wdir / f"{tmp_path.name}.yaml").write_text(CONFIG + f'state: {{url: "sqlite:///{tmp_path / "state.sqlite"}"}}\n')
    return load_config(wdir / f"{tmp_path.name}.yaml")


@pytest.fixture(autouse=True)
def _reset_logging():
    yield
    lg = logging.getLogger("monitor")
    lg.handlers.clear()
    lg.setLevel(logging.NOTSET)
    lg.propagate = True


# -- the schedule section -------------------------------------------------------------------


def test_schedule_defaults_and_cron_validation():
    s = ScheduleConfig()
    assert (s.checks, s.digest, s.coalesce, s.interval_seconds) == ("5 * * * *", "0 8 * * *", True, None)
    with pytest.raises(ValueError, match="not a valid cron expression"):
        ScheduleConfig(checks="61 * * * *")
    with pytest.raises(ValueError, match="five-field"):
        ScheduleConfig(digest="0 8 * *")
    with pytest.raises(ConfigError, match=r"^schedule\.checks: '\* \* \*' is not a five-field"):
        parse_cron("* * *", key="schedule.checks")
    assert schedule_of(object()) == ScheduleConfig()  # a config without the section gets the defaults


def test_cron_is_read_in_the_config_time_zone():
    # 08:00 in Berlin is 07:00 UTC in winter (CET = UTC+1) and 06:00 UTC in summer (CEST = UTC+2);
    # the offsets are those of the IANA tz database (common practice, recalled from memory)
    trig = parse_cron("0 8 * * *", timezone="Europe/Berlin")
    winter = trig.get_next_fire_time(None, datetime(2026, 12, 2, 0, 0, tzinfo=UTC))
    summer = trig.get_next_fire_time(None, datetime(2026, 7, 1, 0, 0, tzinfo=UTC))
    assert winter.astimezone(UTC) == datetime(2026, 12, 2, 7, 0, tzinfo=UTC)
    assert summer.astimezone(UTC) == datetime(2026, 7, 1, 6, 0, tzinfo=UTC)


def test_server_jobs_use_the_schedule(cfg):
    s = Server(cfg.model_copy(update={"schedule": ScheduleConfig(checks="5 * * * *", digest=None, misfire_grace_seconds=90)}))
    s.scheduler.start(paused=True)
    try:
        jobs = {j.id: j for j in s.scheduler.get_jobs()}
        assert set(jobs) == {"checks"}  # digest: None switches it off
        j = jobs["checks"]
        assert (j.max_instances, j.coalesce, j.misfire_grace_time) == (1, True, 90)
        assert str(j.trigger.timezone) == "Europe/Berlin"
    finally:
        s.scheduler.shutdown(wait=False)


# -- jobs -------------------------------------------------------------------------------------


def test_interval_jobs_never_overlap():
    running, peak, calls = [0], [0], []
    guard = threading.Lock()

    def slow_check(_cfg):
        with guard:
            running[0] += 1
            peak[0] = max(peak[0], running[0])
        calls.append(time.monotonic())
        time.sleep(1.3)  # longer than the 1 s interval
        with guard:
            running[0] -= 1
        return CycleOutcome("checks", "ok", None, 1.3, "")

    fake = types.SimpleNamespace(schedule=ScheduleConfig(interval_seconds=1, digest=None), timezone="UTC")
    s = Server(fake, check=slow_check)
    s.start()
    time.sleep(3.6)
    s.stop(wait=True)
    assert peak[0] == 1 and 2 <= len(calls) <= 3
    assert len(s.outcomes) == len(calls)


def test_check_job_skips_when_the_lock_is_held(cfg, caplog):
    store = StateStore(cfg.state.url)
    with store.lock():
        with caplog.at_level(logging.WARNING, logger="monitor"):
            out = check_job(cfg)
    store.dispose()
    assert out.outcome == "skipped" and "holds the state store lock" in out.message
    assert any(getattr(r, "event", None) == "cycle_skipped" for r in caplog.records)


def test_check_job_runs_a_cycle_and_writes_metrics(cfg, tmp_path):
    prom = tmp_path / "expwatch.prom"
    out = check_job(cfg, metrics_file=str(prom))
    assert out.outcome == "ok" and out.run_id
    text = prom.read_text()
    _assert_prometheus_text(text)
    assert re.search(r'^expwatch_open_alerts\{check="srm",severity="(alert|critical)"\} 1$', text, re.M)
    assert re.search(r"^expwatch_last_attempt_success 1$", text, re.M)
    last = float(re.search(r"^expwatch_last_success_timestamp_seconds (\S+)$", text, re.M).group(1))
    assert abs(last - time.time()) < 600
    assert not list(tmp_path.glob(".expwatch.prom.*"))  # the temporary file was renamed away


def test_failed_cycle_is_logged_and_the_scheduler_survives(tmp_path):
    (tmp_path / "bad.yaml").write_text('warehouse: {url: "duckdb:///missing-dir/none.duckdb"}\n'
                                       "registry: {table: experiments}\nassignments: {table: assignments}\n")
    out = check_job(load_config(tmp_path / "bad.yaml"), metrics_file=str(tmp_path / "m.prom"))
    assert out.outcome == "failed" and out.message.startswith("cycle failed: ")
    assert "expwatch_last_attempt_success 0" in (tmp_path / "m.prom").read_text()


def test_digest_job_without_and_with_the_digest_module(cfg, monkeypatch):
    assert digest_job(cfg, module="monitor._no_such_digest_module").outcome == "skipped"
    called = []
    mod = types.ModuleType("monitor._fake_digest")
    mod.run_digest = lambda c: called.append(c)
    monkeypatch.setitem(sys.modules, "monitor._fake_digest", mod)
    assert digest_job(cfg, module="monitor._fake_digest").outcome == "ok" and called == [cfg]
    other = types.ModuleType("monitor._fake_digest_old")
    other.send_digest = lambda digest, email_cfg: None  # a different signature: not called
    monkeypatch.setitem(sys.modules, "monitor._fake_digest_old", other)
    assert digest_job(cfg, module="monitor._fake_digest_old").outcome == "skipped"


def test_serve_in_process_stops_after_the_running_cycle(cfg):
    cfg2 = cfg.model_copy(update={"schedule": ScheduleConfig(interval_seconds=1, digest=None)})
    stop = threading.Event()
    code: list[int] = []
    th = threading.Thread(target=lambda: code.append(serve(cfg2, stop=stop, install_signals=False)))
    th.start()
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not read_status(cfg.state.url).runs:
        time.sleep(0.2)
    stop.set()
    th.join(120)
    assert code == [0]
    assert read_status(cfg.state.url).runs
    eng = sa.create_engine(cfg.state.url)
    with eng.connect() as c:
        assert c.execute(sa.select(sa.func.count()).select_from(locks)).scalar() == 0  # lock released
    eng.dispose()


def test_serve_process_exits_0_on_sigterm_with_json_logs(wdir, tmp_path):
    conf = tmp_path / "c.yaml"
    conf.write_text(CONFIG.replace('"duckdb:///w.duckdb"', f'"duckdb:///{wdir / "w.duckdb"}"'))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-P", "-m", "monitor", "serve", "--config", str(conf), "--log-format", "json"],
                         stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env)
    lines = []
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        line = p.stderr.readline()
        if not line:
            break
        lines.append(json.loads(line))
        if lines[-1].get("event") == "serve_started":
            break
    p.send_signal(signal.SIGTERM)
    rest, _ = p.communicate(timeout=60)[1], None
    assert p.returncode == 0
    lines += [json.loads(x) for x in (rest or "").splitlines() if x.strip()]
    events = [x.get("event") for x in lines]
    assert "serve_started" in events and "serve_signal" in events and events[-1] == "serve_stopped"
    started = next(x for x in lines if x.get("event") == "serve_started")
    nxt = datetime.fromisoformat(started["next_checks"])
    assert nxt.astimezone(UTC).minute == 5  # "5 * * * *" in Europe/Berlin: minute 5 in UTC too


# -- run --log-format json, --metrics-file, status ----------------------------------------------


def _assert_prometheus_text(text: str) -> None:
    """Lines of the Prometheus text exposition format 0.0.4 (Prometheus documentation,
    "Exposition formats", text-based format): comments '# HELP name text' / '# TYPE name
    gauge', samples 'name{label="value",...} number'; the file ends with a newline."""
    assert text.endswith("\n")
    sample = re.compile(r'^[a-zA-Z_:][a-zA-Z0-9_:]*(\{([a-zA-Z_][a-zA-Z0-9_]*="([^"\\\n]|\\.)*",?)*\})? -?[0-9.e+]+$')
    typed = set()
    for ln in text.splitlines():
        if ln.startswith("# TYPE "):
            typed.add(ln.split()[2])
        elif not ln.startswith("# HELP "):
            assert sample.match(ln), ln
            assert ln.split("{")[0].split(" ")[0] in typed, ln


def test_run_json_logs_carry_run_id_query_durations_and_rows(cfg, capsys, tmp_path):
    as_of = START + timedelta(hours=120)
    code = main(["run", "--config", str(cfg.path), "--as-of", as_of.isoformat(), "--format", "json",
                 "--log-format", "json", "--metrics-file", str(tmp_path / "m.prom")])
    assert code == 0
    out, err = capsys.readouterr()
    doc = json.loads(out)
    logs = [json.loads(x) for x in err.splitlines() if x.strip()]
    queries = [x for x in logs if x.get("event") == "query"]
    assert {q["query"] for q in queries} >= {"registry", "assignments[assigned]"}
    assert all(q["seconds"] >= 0 and isinstance(q["rows"], int) and q["rows"] >= 0 for q in queries)
    assert all(q["rows"] > 0 for q in queries if q["query"] in ("registry", "assignments[assigned]"))
    checks = {x["check"]: x for x in logs if x.get("event") == "check"}
    assert set(checks) == {"allocation", "guardrail", "novelty", "spillover", "collision"}
    assert all(c["seconds"] >= 0 and c["run_id"] == queries[0]["run_id"] for c in checks.values())
    assert checks["allocation"]["findings"] == sum(f["check"] in ("srm", "leakage", "unknown_variant", "unattributed",
                                                                 "freshness", "design") for f in doc["findings"])
    cycle = next(x for x in logs if x.get("event") == "cycle")
    assert cycle["run_id"] == queries[0]["run_id"] and cycle["recorded"] is True
    assert doc["run_id"] == cycle["run_id"]
    _assert_prometheus_text((tmp_path / "m.prom").read_text())


def test_status_shows_recent_runs_and_open_alerts(cfg, capsys):
    assert main(["status", "--config", str(cfg.path)]) == 2  # a store that does not exist is refused ...
    assert "no state store at" in capsys.readouterr().err
    assert not Path(cfg.state.url.removeprefix("sqlite:///")).exists()  # ... and not created
    for h in (100, 120):
        assert main(["run", "--config", str(cfg.path), "--as-of", (START + timedelta(hours=h)).isoformat(), "--format", "json"]) == 0
    capsys.readouterr()
    assert main(["status", "--config", str(cfg.path), "--format", "json", "--limit", "5"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["format"] == "expwatch.status/1" and len(doc["runs"]) == 2
    assert [r["as_of"][:13] for r in doc["runs"]] == ["2026-10-06T00", "2026-10-05T04"]
    assert all(r["outcome"] == "ok" and r["seconds"] >= 0 and r["experiments"] == 2 for r in doc["runs"])
    assert doc["open_alerts"] == sum(x["count"] for x in doc["open_alerts_by"]) >= 1
    assert main(["status", "--config", str(cfg.path)]) == 0
    text = capsys.readouterr().out
    assert "open alerts: " in text and doc["runs"][0]["run_id"] in text
    assert main(["status", "--config", str(cfg.path), "--limit", "0"]) == 2


def test_metrics_text_without_any_run_is_finite():
    from monitor.observe import StatusReport

    text = metrics_text(StatusReport((), {}, None, False), checks=["srm"])
    _assert_prometheus_text(text)
    assert "expwatch_last_success_timestamp_seconds 0\n" in text
    assert 'expwatch_open_alerts{check="srm",severity="warn"} 0' in text


def test_json_formatter_and_run_context_filter():
    import io

    stream = io.StringIO()
    lg = logging.getLogger("monitor.test_json")
    handler = logging.StreamHandler(stream)
    from monitor.observe import JsonFormatter, RunContextFilter

    handler.setFormatter(JsonFormatter())
    ctx = RunContextFilter()
    ctx.context["run_id"] = "r-1"
    handler.addFilter(ctx)
    lg.addHandler(handler)
    lg.setLevel(logging.INFO)
    lg.propagate = False
    try:
        lg.info("query %s", "registry", extra={"event": "query", "seconds": 0.25, "rows": 3, "bad": float("nan"),
                                               "at": datetime(2026, 11, 30, 9, tzinfo=UTC)})
        lg.info("explicit", extra={"run_id": "r-2"})
    finally:
        lg.removeHandler(handler)
    first, second = (json.loads(x) for x in stream.getvalue().splitlines())  # strict JSON: no NaN
    assert first["message"] == "query registry" and first["run_id"] == "r-1" and first["rows"] == 3
    assert first["bad"] is None and first["at"] == "2026-11-30T09:00:00+00:00" and first["level"] == "info"
    assert second["run_id"] == "r-2"  # a record's own field wins over the context


def test_every_serve_json_line_carries_a_run_id(wdir, tmp_path):
    """``serve --log-format json``: a line of a cycle carries that cycle's run id (a skipped
    cycle's too), a line of the scheduler itself the session's id; every line has ``serve_id``."""
    conf = tmp_path / "c.yaml"
    state = tmp_path / "state.sqlite"
    conf.write_text(CONFIG.replace('"duckdb:///w.duckdb"', f'"duckdb:///{wdir / "w.duckdb"}"')
                    + f'state: {{url: "sqlite:///{state}"}}\nschedule: {{interval_seconds: 2, digest: null}}\n')
    store = StateStore(f"sqlite:///{state}")
    held = store.lock()
    held.__enter__()  # the first cycle finds the lock taken and skips
    p = subprocess.Popen([sys.executable, "-P", "-m", "monitor", "serve", "--config", str(conf), "--log-format", "json"],
                         stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    raw: list[str] = []
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            line = p.stderr.readline()
            if not line:
                break
            raw.append(line)
            event = json.loads(line).get("event")
            if event == "cycle_skipped" and held is not None:
                held.__exit__(None, None, None)
                held = None
            if event == "cycle":
                break
    finally:
        if held is not None:
            held.__exit__(None, None, None)
        p.send_signal(signal.SIGTERM)
        rest = p.communicate(timeout=120)[1]
        store.dispose()
    assert p.returncode == 0
    lines = [json.loads(x) for x in raw + rest.splitlines() if x.strip()]  # every line is one JSON object
    assert all(x.get("run_id") and x.get("serve_id") for x in lines), [x for x in lines if not x.get("run_id")]
    (session,) = {x["serve_id"] for x in lines}
    by_event = {x.get("event"): x for x in lines}
    for own in ("serve_started", "serve_signal", "serve_stopped"):
        assert by_event[own]["run_id"] == session
    skipped, cycle = by_event["cycle_skipped"], by_event["cycle"]
    assert session != skipped["run_id"] != cycle["run_id"] != session
    recorded = [r.run_id for r in read_status(f"sqlite:///{state}").runs]
    assert cycle["run_id"] in recorded and skipped["run_id"] not in recorded
    queries = [x for x in lines if x.get("event") == "query"]
    assert queries and {x["run_id"] for x in queries} <= set(recorded)
