"""Typos and missing files are errors, not silence: muting an experiment nobody knows,
reading a state store that does not exist, a webhook that would fail only at send
time, and a replay onset for an unknown experiment all exit 2 with one line."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pytest

from conftest import registry_frame, write_config, write_duckdb_warehouse
from monitor.cli import main
from monitor.config import load_config
from monitor.cycle import run_cycle

START = datetime(2026, 10, 1, tzinfo=UTC)
AS_OF = START + timedelta(hours=24)
CONFIG = "warehouse: {url: 'duckdb:///w.duckdb'}\nregistry: {table: experiments}\nassignments: {table: assignments}\n"


def _warehouse(tmp_path, extra: str = "", *, run: bool = True):
    rng = np.random.default_rng(5)
    n = 400
    rows = pd.DataFrame({"unit_id": [f"u{i}" for i in range(n)], "experiment_id": "dark-mode-reader",
                         "variant": rng.choice(["control", "treatment"], n),
                         "assigned_at": [START.replace(tzinfo=None) + timedelta(minutes=3 * i) for i in range(n)]})
    write_duckdb_warehouse(tmp_path / "w.duckdb", registry_frame(["dark-mode-reader"], START), rows)
    cfg = write_config(tmp_path / "c.yaml", CONFIG + extra)
    if run:
        run_cycle(load_config(cfg), as_of=AS_OF)
    return cfg


def _refused(capsys, argv, *words):
    capsys.readouterr()
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    # one error line (replay logs its progress at INFO before it)
    errors = [line for line in err.strip().splitlines() if " INFO " not in line]
    assert len(errors) == 1 and errors[0].startswith("expwatch: ") and "Traceback" not in err
    for w in words:
        assert w in err, err
    return err


def test_mute_of_an_unknown_experiment_is_an_error(tmp_path, capsys):
    cfg = str(_warehouse(tmp_path))
    _refused(capsys, ["mute", "dark-mode-readr", "--config", cfg, "--until", "2099-01-01", "--reason", "x"],
             "unknown experiment 'dark-mode-readr'", "did you mean 'dark-mode-reader'?")
    assert main(["mute", "dark-mode-reader", "--config", cfg, "--until", "2099-01-01", "--reason", "x"]) == 0
    assert main(["mute", "shelf-sort-v2", "--config", cfg, "--until", "2099-01-01", "--reason", "starts Monday",
                 "--not-yet-seen"]) == 0
    _refused(capsys, ["unmute", "dark-mode-readr", "--config", cfg], "is not muted")


def test_mute_knows_the_registry_before_the_first_run(tmp_path, capsys):
    cfg = str(_warehouse(tmp_path, run=False))
    assert main(["mute", "dark-mode-reader", "--config", cfg, "--until", "2099-01-01", "--reason", "x"]) == 0
    _refused(capsys, ["mute", "dark-mode", "--config", cfg, "--until", "2099-01-01", "--reason", "x"],
             "unknown experiment 'dark-mode'")


@pytest.mark.parametrize("command", [["alerts"], ["status"], ["digest"]])
def test_read_only_commands_refuse_a_missing_state_store(tmp_path, capsys, command):
    _warehouse(tmp_path, run=False)
    cfg = write_config(tmp_path / "typo.yaml", CONFIG + "state: {url: 'sqlite:///expwatch-stat.sqlite'}\n")
    _refused(capsys, [*command, "--config", str(cfg)], "no state store at", "expwatch-stat.sqlite")
    assert not (tmp_path / "expwatch-stat.sqlite").exists()


_HOOK = "notify:\n  webhooks:\n    - name: shelf-chat\n      url: 'https://chat.invalid/hook'\n"


@pytest.mark.parametrize("hook, setup, words", [
    ("      template: missing.json.j2\n", None, ["notify.webhooks[0].template: no such file"]),
    ("      template: {tpl}\n", '{"text": {{ message.header }}}', ["notify.webhooks[0].template:", "valid JSON"]),
    ("      template: {tpl}\n", '{"text": {{ message.header | tojson }}', ["notify.webhooks[0].template:", "line 1"]),
    ("      hmac_secret_env: EXPWATCH_TEST_UNSET_SECRET\n", None,
     ["notify.webhooks[0].hmac_secret_env: environment variable EXPWATCH_TEST_UNSET_SECRET is not set"]),
])
def test_validate_catches_what_would_fail_at_send_time(tmp_path, capsys, monkeypatch, hook, setup, words):
    monkeypatch.delenv("EXPWATCH_TEST_UNSET_SECRET", raising=False)
    tpl = tmp_path / "body.json.j2"
    if setup is not None:
        tpl.write_text(setup)
    cfg = _warehouse(tmp_path, _HOOK + hook.format(tpl=tpl), run=False)
    _refused(capsys, ["validate", "--config", str(cfg)], *words)


def test_validate_passes_a_good_webhook(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("EXPWATCH_TEST_SECRET", "s3cret")
    tpl = tmp_path / "body.json.j2"
    tpl.write_text('{"text": {{ message.header | tojson }}, "n": {{ message.events | length }}}')
    cfg = _warehouse(tmp_path, _HOOK + f"      template: {tpl}\n      hmac_secret_env: EXPWATCH_TEST_SECRET\n", run=False)
    assert main(["validate", "--config", str(cfg)]) == 0
    assert "webhook    ok    shelf-chat" in capsys.readouterr().out


def test_replay_onset_for_an_unknown_experiment(tmp_path, capsys):
    cfg = str(_warehouse(tmp_path, run=False))
    _refused(capsys, ["replay", "--config", cfg, "--from", "2026-10-01T06:00Z", "--to", "2026-10-01T08:00Z",
                      "--onset", "dark-mode-readr=2026-10-01T07:00Z"], "--onset: unknown experiment 'dark-mode-readr'")
