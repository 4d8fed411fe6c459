"""The benchmark script runs end to end on a tiny warehouse (figures are not asserted)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.slow
def test_benchmark_script_prints_its_table(tmp_path):
    r = subprocess.run([sys.executable, "-m", "tests.bench.run", "--size", "XS", "--repeat", "1",
                        "--kinds", "cold,warm,floor,baseline", "--dir", str(tmp_path)],
                       capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert lines[0].startswith("size XS: 50,000 assignment rows")
    for kind in ("cold", "warm", "floor", "baseline"):
        assert any(line.startswith(kind) for line in lines)
    assert lines[-1].startswith("ratios: cold/floor")
