"""State store: schema versions, migrations, the cycle lock."""

from __future__ import annotations

import os
import subprocess
import sys
from datetime import datetime, timedelta, timezone

import pytest
import sqlalchemy as sa

from monitor.errors import StateError
from monitor.state import SCHEMA_VERSION, LockHeld, StateStore, locks, meta


def test_new_store_gets_current_schema(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    assert s.schema_version() == SCHEMA_VERSION


def test_newer_schema_is_refused_with_explanation(tmp_path):
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    StateStore(url)
    eng = sa.create_engine(url)
    with eng.begin() as c:
        c.execute(sa.update(meta).values(value=str(SCHEMA_VERSION + 1)))
    eng.dispose()
    with pytest.raises(StateError, match=r"schema version \d+, newer than this expwatch understands"):
        StateStore(url)


def test_store_from_an_older_version_is_migrated(tmp_path):
    """A store whose meta row says an older version is brought up to date in place
    (every migration is idempotent against the tables an older version has)."""
    url = f"sqlite:///{tmp_path / 's.sqlite'}"
    eng = sa.create_engine(url)
    with eng.begin() as c:
        meta.create(c)
        c.execute(sa.insert(meta).values(key="schema_version", value="0"))
    eng.dispose()
    s = StateStore(url)
    assert s.schema_version() == SCHEMA_VERSION
    assert sa.inspect(s.engine).has_table("expwatch_alerts")


def test_lock_held_by_live_process_makes_second_cycle_step_aside(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    with s.lock():
        with pytest.raises(LockHeld, match="another expwatch cycle holds the state store lock"):
            with s.lock(wait_seconds=0.2):
                pass
    with s.lock():  # released
        pass


def test_lock_left_by_a_dead_process_is_taken_over(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    import socket

    now = datetime.now(timezone.utc)
    with s.engine.begin() as c:
        c.execute(sa.insert(locks).values(name="cycle", owner="x", host=socket.gethostname(), pid=pid,
                                          acquired_at=now, expires_at=now + timedelta(hours=2)))
    with s.lock():
        pass


def test_expired_lock_is_taken_over(tmp_path):
    s = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    now = datetime.now(timezone.utc)
    with s.engine.begin() as c:
        c.execute(sa.insert(locks).values(name="cycle", owner="x", host="elsewhere", pid=os.getpid(),
                                          acquired_at=now - timedelta(hours=3), expires_at=now - timedelta(hours=1)))
    with s.lock():
        pass


@pytest.mark.postgres
def test_state_store_on_postgres(pg_url):
    s = StateStore(pg_url)
    assert s.schema_version() == SCHEMA_VERSION
    with s.lock():
        with pytest.raises(LockHeld):
            with s.lock():
                pass
    s.dispose()
