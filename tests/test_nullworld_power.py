"""Power on the realistic world: planted problems that every run must find.

``tests/nullworld.py`` plants one problem at a time into its null world (``build(..., plant=...)``);
``tests/bench/power.py`` measures the detection rate and delay of every planted problem over many
seeds (figures in the README's checks section). These tests assert only the cases with a wide
margin: 3% leakage (the alert threshold is 1%), an 8-hour stop of an exposure log in the day
(the gap limit is 6 h) and assignments copied between two experiments for 10% of their shared
units (a chi-square of several dozen on thousands of units). Each is also checked on the null
world of the same seed, where the same finding must be absent, so a check that flags everything
does not pass.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest
from bench.power import cycle, detected, judged_at
from nullworld import build

from monitor.config import parse_config
from monitor.cycle import run_cycle

SEEDS = (5000, 5001)


@pytest.mark.parametrize("strength", [1.0, 2.0])
def test_planting_leakage_leaks_three_percent_of_one_experiment(tmp_path: Path, strength: float) -> None:
    build(tmp_path, 7, plant=("leakage",), strength=strength)
    con = duckdb.connect(str(tmp_path / "world.duckdb"), read_only=True)
    try:
        share = dict(con.execute(
            "SELECT experiment_id, avg(CAST(n > 1 AS DOUBLE)) FROM (SELECT experiment_id, unit_id, "
            "count(DISTINCT variant) AS n FROM assignments GROUP BY ALL) GROUP BY 1").fetchall())
    finally:
        con.close()
    assert 0.02 * strength < share.pop("plain-half") < 0.04 * strength  # 3% x strength, a few leak after the end
    assert set(share.values()) == {0.0}  # the other experiments are untouched


def test_an_unknown_problem_is_refused(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="unknown problem.*leek"):
        build(tmp_path, 7, plant=("leek",))


@pytest.mark.slow
@pytest.mark.parametrize("seed", SEEDS)
def test_obvious_planted_problems_are_found_and_absent_from_the_null_world(tmp_path: Path, seed: int) -> None:
    null = parse_config(build(_dir(tmp_path, "null"), seed))
    for problem in ("leakage", "stop", "correlated"):
        at = judged_at(problem)
        assert not detected(run_cycle(null, as_of=at, dry_run=True, notify=False).findings, problem), problem
        cfg = parse_config(build(_dir(tmp_path, problem), seed, plant=(problem,)))
        assert cycle(cfg, problem, at), f"{problem} not detected on seed {seed}"


def _dir(root: Path, name: str) -> Path:
    (root / name).mkdir()
    return root / name
