"""What a user installs is what runs: the built wheel, outside the checkout.

The rest of the suite imports the installed package (``conftest.py`` says which one
in the report header and refuses the checkout's ``monitor/`` in CI). These tests go
one step further and run the wheel itself in a child process that cannot see the
checkout: ``python -P`` (no current folder on ``sys.path``), the wheel's files first
on ``PYTHONPATH``, and a working folder outside the repository. The old template
loader (``str()`` of a resource object) failed every one of them.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from monitor.templates import template_names

ROOT = Path(__file__).resolve().parent.parent
DOCKERFILE = ROOT / "deploy" / "Dockerfile"


def test_templates_are_found():
    assert {"assignments.sql.j2", "registry.sql.j2"} <= set(template_names())


def _build_wheel(context: Path, out: Path) -> Path:
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(out), str(context)],
                   check=True, capture_output=True, timeout=600)
    return next(out.glob("expwatch-*.whl"))


def _docker_build_context(dst: Path) -> Path:
    """The files the image's build stage copies (its ``COPY`` lines, read from the Dockerfile),
    and nothing else: the install step of ``deploy/Dockerfile`` without a Docker daemon."""
    text = DOCKERFILE.read_text(encoding="utf-8")
    build_stage = re.split(r"^FROM ", text, flags=re.MULTILINE)[1]
    copies = re.findall(r"^COPY\s+(?!--from)(.+)$", build_stage, re.MULTILINE)
    assert copies, "the Dockerfile's build stage copies nothing"
    for line in copies:
        *sources, _target = line.split()
        for src in sources:
            path = ROOT / src
            if path.is_dir():
                shutil.copytree(path, dst / src, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
            else:
                shutil.copy2(path, dst / Path(src).name)
    return dst


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The wheel built from exactly what the Dockerfile's build stage copies."""
    context = _docker_build_context(tmp_path_factory.mktemp("context"))
    return _build_wheel(context, tmp_path_factory.mktemp("dist"))


@pytest.fixture(scope="module")
def installed(wheel: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The wheel unpacked by pip into a folder of its own (its dependencies come from the test
    environment, as the image's come from its virtual environment)."""
    target = tmp_path_factory.mktemp("site")
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "-q", "--target", str(target), str(wheel)],
                   check=True, capture_output=True, timeout=600)
    return target


def _run_installed(site: Path | str, *args: str, cwd: Path, timeout: int = 300) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(site)}
    return subprocess.run([sys.executable, "-P", "-m", "monitor", *args], check=False, capture_output=True, text=True,
                          cwd=cwd, env=env, timeout=timeout)


@pytest.mark.slow
def test_wheel_contains_templates(wheel: Path):
    names = set(zipfile.ZipFile(wheel).namelist())
    for tpl in (ROOT / "sql").glob("*.sql.j2"):
        assert f"monitor/sql/{tpl.name}" in names
    for tpl in (ROOT / "monitor" / "notify_templates").glob("*.j2"):
        assert f"monitor/notify_templates/{tpl.name}" in names


@pytest.mark.slow
def test_installed_wheel_runs_the_demo_outside_the_checkout(installed: Path, tmp_path: Path):
    """The Quickstart's first command, as the image's install step leaves the package: ``expwatch
    demo`` must build the warehouse, run a cycle and print the findings table."""
    r = _run_installed(installed, "demo", "--dir", str(tmp_path / "demo"), cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-2000:]
    assert "live experiments" in r.stdout
    assert "not found in search path" not in r.stderr
    shown = _run_installed(installed, "--version", cwd=tmp_path)
    assert shown.returncode == 0, shown.stderr
    # the code that ran is the wheel's, not the checkout's
    where = subprocess.run([sys.executable, "-P", "-c", "import monitor; print(monitor.__file__)"], check=False,
                           capture_output=True, text=True, cwd=tmp_path, env={**os.environ, "PYTHONPATH": str(installed)})
    assert Path(where.stdout.strip()).is_relative_to(installed), where.stdout

    config = tmp_path / "demo" / "expwatch.yaml"
    for command in (["validate", "--config", str(config)], ["sql", "--config", str(config)]):
        r = _run_installed(installed, *command, cwd=tmp_path)
        assert r.returncode == 0, (command, r.stderr[-2000:])
    assert "SELECT" in r.stdout


@pytest.mark.slow
def test_templates_load_from_a_zip(installed: Path, tmp_path: Path):
    """Templates are read through ``importlib.resources``, never as file-system paths, so the
    package works from a zip file too (``zipimport``)."""
    archive = tmp_path / "monitor.zip"
    with zipfile.ZipFile(archive, "w") as z:
        for path in (installed / "monitor").rglob("*"):
            if path.is_file() and "__pycache__" not in path.parts:
                z.write(path, path.relative_to(installed).as_posix())
    code = ("import monitor.templates as t, monitor.digest; "
            f"assert t.__file__.startswith({str(archive)!r}), t.__file__; "
            "names = t.template_names(); assert 'registry.sql.j2' in names, names; "
            "t._ENV.get_template('registry.sql.j2'); "
            "print(len(names))")
    r = subprocess.run([sys.executable, "-P", "-c", code], check=False, capture_output=True, text=True, cwd=tmp_path,
                       env={**os.environ, "PYTHONPATH": str(archive)}, timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
    assert int(r.stdout) >= 7
