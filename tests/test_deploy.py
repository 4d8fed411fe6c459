"""The deployment recipes in deploy/ are well-formed and do what deploy/README.md says.

Validated here, with the real tools where they install from the package registries
(CI sets EXPWATCH_REQUIRE_TOOLS=1, so there a missing tool fails instead of skipping):

- the crontab commands pass ``shellcheck`` and, run under ``/bin/sh`` with the paths moved
  into a temporary directory and a stand-in for the expwatch executable, export the
  environment file, say in one line when ``flock`` skipped a run, and log the digest to a
  file the service user owns;
- every cron expression parses with APScheduler's ``CronTrigger.from_crontab``, and the
  cycle runs at minute 5 everywhere;
- the systemd units pass ``systemd-analyze verify`` (ExecStart pointed at an executable
  that exists here), ``systemd-analyze security --offline`` rates both services "OK", and
  ``systemd-analyze calendar`` normalises the timer to minute 5;
- the Kubernetes manifest validates against the Kubernetes API schema (the
  ``kubernetes-validate`` package, strict: unknown fields fail) and asks for the
  RuntimeDefault seccomp profile;
- the Dockerfile pins its base image to an exact release, has a build stage, a non-root
  final stage and a HEALTHCHECK whose command parses;
- every command line the recipes run parses with expwatch's own argument parser.

NOT validated here (no container engine daemon, no cluster, no init system running
these units): that the image builds and runs, that a Kubernetes API server admits the
manifest, that the units start under systemd with their system call filter, and that a
real cron daemon runs the lines.
"""

from __future__ import annotations

import fcntl
import os
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
SERVICES = ("expwatch.service", "expwatch-serve.service")


def _need(tool: str) -> str:
    """The path of ``tool``; skips when it is absent, unless EXPWATCH_REQUIRE_TOOLS=1 (CI)."""
    path = shutil.which(tool)
    if path is None:
        if os.environ.get("EXPWATCH_REQUIRE_TOOLS") == "1":
            pytest.fail(f"{tool} is not installed and EXPWATCH_REQUIRE_TOOLS=1")
        pytest.skip(f"{tool} is not installed")
    return path


def _expwatch_argv(command: str) -> list[str]:
    """The arguments after the expwatch executable in a shell command line (up to the
    first operator: ``;``, ``&&``, ``>>``, ...)."""
    lex = shlex.shlex(command, posix=True, punctuation_chars=True)
    lex.whitespace_split = True
    words = list(lex)
    i = next(i for i, w in enumerate(words) if w.endswith("/expwatch") or w == "expwatch")
    out = []
    for w in words[i + 1:]:
        if w in ("2", "1") or set(w) <= set(";&|<>()"):
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


def _cron_lines() -> list[tuple[list[str], str]]:
    """(the five time fields, the command) of every job line of the crontab."""
    lines = [ln for ln in (DEPLOY / "crontab.example").read_text().splitlines()
             if ln.strip() and not ln.startswith("#") and not re.match(r"^[A-Z_]+=", ln)]
    return [(ln.split(None, 5)[:5], ln.split(None, 5)[5]) for ln in lines]


def test_crontab_lines_parse_and_use_flock():
    lines = _cron_lines()
    assert len(lines) == 2
    cmds = {}
    for fields, command in lines:
        CronTrigger.from_crontab(" ".join(fields))
        assert "flock -n" in command
        argv = _expwatch_argv(command)
        cmds[argv[0]] = (fields, command)
    assert set(cmds) == {"run", "digest"}
    assert cmds["run"][0] == ["5", "*", "*", "*", "*"]  # minute 5, as the timer, the CronJob and schedule.checks
    assert cmds["run"][0][0] == ScheduleConfig().checks.split()[0]
    assert cmds["digest"][0][:2] == ["0", "8"]  # the morning digest, as schedule.digest
    locks = {re.search(r"flock -n (?:-E \d+ )?(\S+)", c).group(1) for _, c in cmds.values()}
    assert len(locks) == 2  # the digest never waits behind a cycle
    _parses(_expwatch_argv(cmds["run"][1]))
    assert "--quiet" in _expwatch_argv(cmds["run"][1])  # cron mails only news
    _parses(_expwatch_argv(cmds["digest"][1]))


def test_crontab_commands_pass_shellcheck():
    shellcheck = _need("shellcheck")
    for _, command in _cron_lines():
        # SC1091: the environment file exists only on the target host, so shellcheck cannot follow it
        res = subprocess.run([shellcheck, "--shell=sh", "--exclude=SC1091", "-"], input=command,
                             capture_output=True, text=True, timeout=60)
        assert res.returncode == 0, res.stdout + res.stderr


def _local_cron_command(command: str, tmp: Path) -> str:
    """The crontab command with its host paths moved under ``tmp`` and expwatch replaced by ``tmp/expwatch``."""
    return (command.replace("/opt/expwatch/.venv/bin/expwatch", str(tmp / "expwatch"))
            .replace("/etc/expwatch/env", str(tmp / "env"))
            .replace("/run/lock/", f"{tmp}/").replace("/var/lib/expwatch/", f"{tmp}/"))


def _run_cron(command: str) -> subprocess.CompletedProcess[str]:
    env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin"), "HOME": "/nonexistent"}  # cron's sparse environment
    return subprocess.run(["/bin/sh", "-c", command], capture_output=True, text=True, timeout=60, env=env)


def test_crontab_commands_export_secrets_and_report_skips(tmp_path):
    _need("flock")
    cmds = {_expwatch_argv(c)[0]: c for _, c in _cron_lines()}
    # the systemd EnvironmentFile format: NAME=value lines, no "export"
    (tmp_path / "env").write_text("EXPWATCH_WAREHOUSE_PASSWORD=s3cret\nEXPWATCH_STATE_PASSWORD=other\n")
    stand_in = tmp_path / "expwatch"
    stand_in.write_text('#!/bin/sh\n'
                        'if [ "$1" = digest ]; then echo "expwatch: smtp refused" >&2; exit 1; fi\n'
                        'echo "child sees ${EXPWATCH_WAREHOUSE_PASSWORD:-nothing}"\n')
    stand_in.chmod(0o755)
    run = _local_cron_command(cmds["run"], tmp_path)
    res = _run_cron(run)
    assert res.returncode == 0 and res.stdout == "child sees s3cret\n", res.stdout + res.stderr

    # a held lock: the skipped run says so in one line (cron mails it) instead of exiting 1 silently
    lock = re.search(r"flock -n -E 75 (\S+)", run).group(1)
    with open(lock, "w") as held:
        fcntl.flock(held, fcntl.LOCK_EX)
        res = _run_cron(run)
    assert res.stdout.count("\n") == 1 and "skipped" in res.stdout and lock in res.stdout, res.stdout + res.stderr

    # the digest's output goes to a log in the service user's directory; a failure mails one line naming it
    digest = _local_cron_command(cmds["digest"], tmp_path)
    assert ">> /var/lib/expwatch/" in cmds["digest"]  # StateDirectory=expwatch: owned by the expwatch user
    res = _run_cron(digest)
    log = tmp_path / "digest.log"
    assert log.read_text() == "expwatch: smtp refused\n"
    assert res.stdout == f"expwatch digest: failed with exit code 1; see {log}\n", res.stdout + res.stderr


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


def test_systemd_analyze_verify(tmp_path):
    _need("systemd-analyze")
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


def _security_score(path: Path) -> tuple[float, str]:
    res = subprocess.run([_need("systemd-analyze"), "security", "--offline=true", "--no-pager", str(path)],
                         capture_output=True, text=True, timeout=60)
    m = re.search(r"Overall exposure level for \S+: (\d+\.\d+) (\w+)", res.stdout + res.stderr)
    assert m, res.stdout + res.stderr
    return float(m.group(1)), m.group(2)


def test_systemd_security_score_of_the_services(tmp_path):
    """Both services are hardened to what a read-only network client needs: systemd's own
    rating is "OK" (below 2.0; the units scored 8.5 EXPOSED before), and what stays open is the
    network and writable-executable memory, as the units' comments say."""
    for name in SERVICES:
        score, rating = _security_score(DEPLOY / name)
        assert score <= 2.0 and rating == "OK", (name, score, rating)
        svc = _unit(name)["Service"]
        assert svc["CapabilityBoundingSet"] == "" and svc["PrivateDevices"] == "true"
        assert svc["RestrictAddressFamilies"].split() == ["AF_INET", "AF_INET6", "AF_UNIX"]
    # the measurement is not vacuous: the same unit without its hardening lines is exposed
    bare = "\n".join(ln for ln in (DEPLOY / "expwatch.service").read_text().splitlines()
                     if not re.match(r"(Protect|Private|Restrict|SystemCall|Capability|Ambient|Lock|Remove|Keyring|UMask|NoNew)", ln))
    (tmp_path / "expwatch.service").write_text(bare)
    assert _security_score(tmp_path / "expwatch.service")[0] > 8.0


def test_the_timer_service_logs_json_only():
    argv = _expwatch_argv(_unit("expwatch.service")["Service"]["ExecStart"])
    assert "--quiet" in argv and argv[argv.index("--log-format") + 1] == "json"


def test_kubernetes_manifest_validates_against_the_api_schema():
    import kubernetes_validate

    version = kubernetes_validate.latest_version()
    docs = [d for d in yaml.safe_load_all((DEPLOY / "kubernetes-cronjob.yaml").read_text()) if d]
    for doc in docs:
        kubernetes_validate.validate(doc, version, strict=True)
    cronjob = next(d for d in docs if d["kind"] == "CronJob")
    pod = cronjob["spec"]["jobTemplate"]["spec"]["template"]["spec"]
    assert pod["securityContext"]["seccompProfile"] == {"type": "RuntimeDefault"}
    # the validator does reject what the API server would: a misspelt field, a wrong type
    bad = yaml.safe_load(yaml.safe_dump(cronjob))
    bad["spec"]["jobTemplate"]["spec"]["template"]["spec"]["securityContext"]["seccompprofile"] = {"type": "RuntimeDefault"}
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(bad, version, strict=True)
    bad = yaml.safe_load(yaml.safe_dump(cronjob))
    bad["spec"]["concurrencyPolicy"] = 1
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(bad, version, strict=True)


def test_dockerfile_is_multi_stage_and_non_root():
    text = (DEPLOY / "Dockerfile").read_text()
    args = dict(re.findall(r"^ARG\s+(\w+)=(\S+)", text, re.M))
    froms = [(re.sub(r"\$\{(\w+)\}", lambda m: args[m.group(1)], image), stage)
             for image, stage in re.findall(r"^FROM\s+(\S+)(?:\s+AS\s+(\S+))?", text, re.M | re.I)]
    assert len(froms) >= 2 and froms[0][1].lower() == "build"
    for image, _ in froms:  # an exact release (python:3.11.13-slim-bookworm) or a digest, never a moving tag
        assert re.fullmatch(r"python:\d+\.\d+\.\d+-slim-[a-z]+(@sha256:[0-9a-f]{64})?|python@sha256:[0-9a-f]{64}", image), image
    assert "--constraint constraints.txt" in text and (DEPLOY / "constraints.txt").is_file()
    final = text[text.rindex("\nFROM"):]
    assert re.search(r"^COPY --from=build ", final, re.M)
    assert "build-essential" not in final and "apt-get install" not in final  # no build tools in the final image
    users = re.findall(r"^USER\s+(\S+)", final, re.M)
    assert users and users[-1].split(":")[0] not in ("root", "0")
    cmd = re.search(r"^CMD\s+(\[.*\])", final, re.M).group(1)
    _parses(yaml.safe_load(cmd))
    health = re.search(r"^HEALTHCHECK\s.*?CMD\s+(\[[^]]*\])", final, re.M | re.S).group(1)
    argv = yaml.safe_load(health)
    assert argv[0] == "expwatch" and "--max-age" in argv
    _parses(argv[1:])


def test_constraints_pin_every_runtime_dependency():
    """deploy/constraints.txt pins an exact version of each dependency the image installs."""
    import tomllib

    pins = {}
    for ln in (DEPLOY / "constraints.txt").read_text().splitlines():
        if ln.strip() and not ln.startswith("#"):
            name, sep, version = ln.partition("==")
            assert sep and version, ln
            pins[re.sub(r"[-_.]+", "-", name).lower()] = version
    project = tomllib.loads((DEPLOY.parent / "pyproject.toml").read_text())["project"]
    wanted = project["dependencies"] + project["optional-dependencies"]["postgres"] + project["optional-dependencies"]["charts"]
    for req in wanted:
        name = re.sub(r"[-_.]+", "-", re.match(r"[A-Za-z0-9_.-]+", req).group(0)).lower()
        assert name in pins, name


def test_host_setup_creates_what_the_units_and_the_crontab_use():
    """deploy/README.md's host setup (tried by hand, docs/deploy-tested.md) creates every
    directory the units may write and the virtual environment whose expwatch they start."""
    readme = (DEPLOY / "README.md").read_text(encoding="utf-8")
    setup = readme.split("## Host setup", 1)[1].split("```bash", 1)[1].split("```", 1)[0]
    created = set(re.findall(r"install -d .*?(/\S+)$", setup, re.M))
    venv = re.search(r"-m venv (\S+)", setup).group(1)
    assert re.search(rf"{re.escape(venv)}/bin/pip install", setup) and "charts" in setup  # digest --send needs charts
    for unit in SERVICES:
        text = (DEPLOY / unit).read_text(encoding="utf-8")
        (writable,) = re.findall(r"^ReadWritePaths=(.*)$", text, re.M)
        assert set(writable.split()) <= created, unit
        assert re.search(r"^ExecStart=(\S+)", text, re.M).group(1) == f"{venv}/bin/expwatch", unit
        assert re.search(r"^WorkingDirectory=(\S+)", text, re.M).group(1) in created, unit
    cron = (DEPLOY / "crontab.example").read_text(encoding="utf-8")
    assert set(re.findall(r"(/\S+)/bin/expwatch", cron)) == {venv}
    assert {str(Path(p).parent) for p in re.findall(r"(/var/lib/\S+?)(?:[;\s]|$)", cron)} <= created
