"""The deployment recipes in deploy/ are well-formed.

Validated here: the Kubernetes manifest parses as YAML with the fields a CronJob
needs and takes its secrets from a Secret; every cron expression (crontab lines,
the CronJob schedule, the config defaults) parses with APScheduler's
``CronTrigger.from_crontab``; the systemd units pass ``systemd-analyze verify``
when that tool is installed (with ExecStart pointed at an executable that
exists here, since /opt/expwatch does not); the timer's calendar expression is
checked by ``systemd-analyze calendar``; the Dockerfile has a build stage
(``FROM ... AS build``), a final stage that copies from it, and a non-root USER;
every command line the recipes run parses with expwatch's own argument parser.

NOT validated here (no container engine, no cluster, no init system running
these units): that the image builds and runs, that the manifest is accepted by
a Kubernetes API server, that the units start under systemd, and that cron
runs the lines.
"""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml
from apscheduler.triggers.cron import CronTrigger

from monitor.cli import _build_parser
from monitor.serve_config import ScheduleConfig

DEPLOY = Path(__file__).resolve().parent.parent / "deploy"
UNITS = ("expwatch.service", "expwatch.timer", "expwatch-serve.service")


def _expwatch_argv(command: str) -> list[str]:
    """The arguments after the expwatch executable in a shell command line."""
    words = shlex.split(command)
    i = next(i for i, w in enumerate(words) if w.endswith("/expwatch") or w == "expwatch")
    out = []
    for w in words[i + 1:]:
        if w in (">>", ">", "2>&1", "2>>", "&&", "|"):
            break
        out.append(w)
    return out


def _parses(argv: list[str]) -> None:
    if argv and argv[0] == "digest" and "digest" not in _subcommands():
        pytest.skip("the digest subcommand is not in this version yet")
    _build_parser().parse_args(argv)


def _subcommands() -> set[str]:
    parser = _build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    return set(sub.choices)


def test_crontab_lines_parse_and_use_flock():
    lines = [ln for ln in (DEPLOY / "crontab.example").read_text().splitlines()
             if ln.strip() and not ln.startswith("#") and not re.match(r"^[A-Z_]+=", ln)]
    assert len(lines) == 2
    cmds = {}
    for ln in lines:
        fields = ln.split(None, 5)
        CronTrigger.from_crontab(" ".join(fields[:5]))
        assert "flock -n" in fields[5]
        argv = _expwatch_argv(fields[5])
        cmds[argv[0]] = (fields[:5], fields[5])
    assert set(cmds) == {"run", "digest"}
    assert cmds["digest"][0][:2] == ["0", "8"]  # the morning digest
    locks = {re.search(r"flock -n (\S+)", c).group(1) for _, c in cmds.values()}
    assert len(locks) == 2  # the digest never waits behind a cycle
    _parses(_expwatch_argv(cmds["run"][1]))
    assert "--quiet" in _expwatch_argv(cmds["run"][1])  # cron mails only news
    _parses(_expwatch_argv(cmds["digest"][1]))


def test_schedule_defaults_parse():
    s = ScheduleConfig()
    CronTrigger.from_crontab(s.checks)
    CronTrigger.from_crontab(s.digest)


def test_kubernetes_cronjob_manifest():
    docs = [d for d in yaml.safe_load_all((DEPLOY / "kubernetes-cronjob.yaml").read_text()) if d]
    kinds = {d["kind"]: d for d in docs}
    assert set(kinds) == {"ConfigMap", "CronJob"}
    cj = kinds["CronJob"]
    assert cj["apiVersion"] == "batch/v1"
    spec = cj["spec"]
    CronTrigger.from_crontab(spec["schedule"])
    assert spec["concurrencyPolicy"] == "Forbid"
    pod = spec["jobTemplate"]["spec"]["template"]["spec"]
    assert pod["restartPolicy"] in ("Never", "OnFailure")
    assert pod["securityContext"]["runAsNonRoot"] is True and pod["securityContext"]["runAsUser"] != 0
    (c,) = pod["containers"]
    assert {"secretRef": {"name": "expwatch-secrets"}} in c["envFrom"]
    assert c["securityContext"]["allowPrivilegeEscalation"] is False
    _parses(c["args"])
    mounts = {m["name"]: m["mountPath"] for m in c["volumeMounts"]}
    assert mounts["config"] == "/etc/expwatch" and "/etc/expwatch/expwatch.yaml" in c["args"]
    assert pod["volumes"][0]["configMap"]["name"] == kinds["ConfigMap"]["metadata"]["name"]
    # the config in the ConfigMap holds no secret, only ${NAME} references
    conf = yaml.safe_load(kinds["ConfigMap"]["data"]["expwatch.yaml"])
    assert "${EXPWATCH_WAREHOUSE_PASSWORD}" in conf["warehouse"]["url"]


def _unit(name: str) -> dict[str, dict[str, str]]:
    out: dict[str, dict[str, str]] = {}
    section = None
    for ln in (DEPLOY / name).read_text().splitlines():
        ln = ln.strip()
        if not ln or ln.startswith("#"):
            continue
        if ln.startswith("["):
            section = ln.strip("[]")
            out[section] = {}
        else:
            k, _, v = ln.partition("=")
            out[section][k] = v
    return out


def test_systemd_units_fields_and_commands():
    svc, timer, serve = (_unit(n) for n in UNITS)
    assert svc["Service"]["Type"] == "oneshot" and svc["Service"]["User"] == "expwatch"
    assert timer["Timer"]["Unit"] == "expwatch.service" and timer["Install"]["WantedBy"] == "timers.target"
    assert serve["Service"]["KillSignal"] == "SIGTERM" and serve["Service"]["User"] == "expwatch"
    for u in (svc, serve):
        assert u["Service"]["EnvironmentFile"] == "/etc/expwatch/env"
        _parses(_expwatch_argv(u["Service"]["ExecStart"]))


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze is not installed")
def test_systemd_analyze_verify(tmp_path):
    for name in UNITS:
        text = (DEPLOY / name).read_text().replace("/opt/expwatch/.venv/bin/expwatch", shutil.which("true") or "/bin/true")
        (tmp_path / name).write_text(text)
    res = subprocess.run(["systemd-analyze", "verify", *(str(tmp_path / n) for n in UNITS)],
                         capture_output=True, text=True, timeout=60)
    # verify also reports on units it loads as dependencies (the host's own); keep our units' lines
    ours = [ln for ln in (res.stdout + res.stderr).splitlines() if any(n in ln for n in UNITS)]
    assert res.returncode == 0 and not ours, res.stdout + res.stderr
    cal = _unit("expwatch.timer")["Timer"]["OnCalendar"]
    res = subprocess.run(["systemd-analyze", "calendar", cal], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    assert re.search(r"Normalized form: \*-\*-\* \*:05:00", res.stdout)


def test_dockerfile_is_multi_stage_and_non_root():
    text = (DEPLOY / "Dockerfile").read_text()
    froms = re.findall(r"^FROM\s+(\S+)(?:\s+AS\s+(\S+))?", text, re.M | re.I)
    assert len(froms) >= 2 and froms[0][1].lower() == "build"
    assert all("slim" in image for image, _ in froms)
    final = text[text.rindex("\nFROM"):]
    assert re.search(r"^COPY --from=build ", final, re.M)
    assert "build-essential" not in final and "apt-get install" not in final  # no build tools in the final image
    users = re.findall(r"^USER\s+(\S+)", final, re.M)
    assert users and users[-1].split(":")[0] not in ("root", "0")
    cmd = re.search(r"^CMD\s+(\[.*\])", final, re.M).group(1)
    _parses(yaml.safe_load(cmd))
