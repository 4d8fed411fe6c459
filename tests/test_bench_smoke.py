"""The benchmark script runs end to end on a tiny warehouse (figures are not asserted)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def _bench(*args: str) -> list[str]:
    # -P and PYTHONPATH=tests: the bench imports the installed package, not the checkout's monitor/.
    env = {**os.environ, "PYTHONPATH": str(ROOT / "tests")}
    r = subprocess.run([sys.executable, "-P", "-m", "bench.run", "--size", "XS", "--repeat", "1", *args],
                       check=False, capture_output=True, text=True, cwd=ROOT, env=env, timeout=600)
    assert r.returncode == 0, r.stderr
    return r.stdout.splitlines()


def _figures(lines: list[str]) -> dict[str, tuple[float, float]]:
    out = {}
    for line in lines:
        parts = line.split()
        if len(parts) == 3 and parts[1].replace(".", "").isdigit():
            out[parts[0]] = (float(parts[1]), float(parts[2]))
    return out


@pytest.mark.slow
def test_benchmark_script_prints_its_table(tmp_path):
    lines = _bench("--kinds", "cold,warm,floor,floor-lean,stats,stats-looks,baseline", "--stats-experiments", "50",
                   "--dir", str(tmp_path))
    assert lines[0].startswith("size XS: 50,000 assignment rows")
    figures = _figures(lines)
    assert set(figures) == {"cold", "warm", "floor", "floor-lean", "stats", "stats-looks", "baseline"}
    assert all(sec > 0 and rss > 0 for sec, rss in figures.values())
    assert any(line.startswith("queries of the first cold run (s): registry") for line in lines)
    assert lines[-2].startswith("ratios: cold/floor") and "n/a" not in lines[-2]
    assert lines[-1].startswith("warm/cold on the assignment path") and "n/a" not in lines[-1]


@pytest.mark.postgres
@pytest.mark.slow
def test_benchmark_script_runs_against_postgres(tmp_path, pg_url):
    lines = _bench("--engine", "postgres", "--pg-url", pg_url, "--kinds", "cold,floor", "--dir", str(tmp_path))
    assert "engine postgres" in lines[0] and "loaded into PostgreSQL with COPY" in lines[0]
    assert set(_figures(lines)) == {"cold", "floor"}
    assert lines[-2].startswith("ratios: cold/floor")


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_worker_peak_memory_is_its_own_not_the_drivers(tmp_path):
    """A forked child's ``ru_maxrss`` starts from the parent's peak; the bench must not report it.

    The driver here holds 1 GiB; a stats worker on 10 experiments needs a small fraction of that."""
    from bench import run

    ballast = bytearray(1 << 30)
    ballast[::4096] = b"\x01" * ((1 << 30) // 4096)  # touch every page, so it is resident
    seconds, rss, _ = run._measure("stats", tmp_path, None, 10)
    assert seconds > 0
    assert 10 < rss < 600, rss
    assert run._hwm() > 1024  # the driver's own peak is above the ballast
    del ballast
