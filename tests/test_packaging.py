"""A non-editable install ships the SQL templates inside the package."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from monitor.templates import template_names

ROOT = Path(__file__).resolve().parent.parent


def test_templates_are_found():
    assert {"assignments.sql.j2", "registry.sql.j2"} <= set(template_names())


@pytest.mark.slow
def test_wheel_contains_templates(tmp_path):
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(tmp_path), str(ROOT)],
                   check=True, capture_output=True, timeout=600)
    wheel = next(tmp_path.glob("expwatch-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    for tpl in (ROOT / "sql").glob("*.sql.j2"):
        assert f"monitor/sql/{tpl.name}" in names
    for tpl in (ROOT / "monitor" / "notify_templates").glob("*.j2"):
        assert f"monitor/notify_templates/{tpl.name}" in names
