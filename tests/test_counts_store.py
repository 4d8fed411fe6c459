"""The hourly counts in the state store: compact form (schema version 6) and the
migration that converts a version-5 store in place."""

from __future__ import annotations

import sqlite3
from datetime import datetime, timedelta, timezone

import pandas as pd
import pytest
import sqlalchemy as sa
from test_cycle import CONFIG, START, make_warehouse

from monitor.config import load_config
from monitor.cycle import run_cycle
from monitor.state import (MIGRATIONS, SCHEMA_VERSION, StateStore, count_series, counts, counts_v5, meta, prune,
                           runs, watermarks)

#: Bytes of pages per stored hourly row, every table and index holding the counts together,
#: allowed for a small synthetic cycle. Measured: 13.6 bytes per row on the demo (598,586 rows
#: in 8.2 MB, docs/reliability.md) and 21.3 here (1,920 rows), where half-empty last pages
#: weigh more; schema versions 1 to 5 used 147 here and about 220 on the demo (the segment
#: as JSON text and the hour as text in every row, and a separate index).
MAX_BYTES_PER_ROW = 40


def _count_bytes(path) -> int:
    con = sqlite3.connect(path)
    try:
        return con.execute("SELECT sum(pgsize) FROM dbstat WHERE name LIKE '%count%'").fetchone()[0]
    finally:
        con.close()


def test_hourly_counts_take_a_few_bytes_per_row(tmp_path):
    make_warehouse(tmp_path / "w.duckdb", skew_from_hour=120)
    (tmp_path / "c.yaml").write_text(CONFIG)
    cfg = load_config(tmp_path / "c.yaml")
    run_cycle(cfg, as_of=START + timedelta(hours=240))
    store = StateStore(cfg.state.url)
    rows = len(store.read_counts("assigned", ["steady", "tilted"]))
    store.dispose()
    assert rows > 1500  # 2 experiments x 2 variants x 2 platforms x ~240 hours
    per_row = _count_bytes(cfg.state.url.removeprefix("sqlite:///")) / rows
    assert per_row < MAX_BYTES_PER_ROW, f"{per_row:.1f} bytes per hourly row"


UTC = timezone.utc
H0 = datetime(2026, 11, 2, 5, tzinfo=UTC)


def _v5_rows() -> pd.DataFrame:
    """Counts as a version-5 store held them: two sources, a row without a variant, segments as JSON."""
    out = []
    for source in ("assigned", "filtered"):
        for exp in ("alpha", "beta"):
            for h in range(30):
                for variant, seg, units in (("control", '{"platform":"ios"}', 3 + h),
                                            ("treatment", '{"platform":"android"}', 7 + h % 5),
                                            ("treatment", '{"platform":null}', 1),
                                            (None, '{"platform":"ios"}', 2)):
                    if source == "filtered" and variant is None:
                        continue
                    out.append({"source": source, "experiment": exp, "variant": variant,
                                "hour": H0 + timedelta(hours=h), "segment": seg, "units": units, "leaked": h % 3})
    return pd.DataFrame(out)


def _v5_store(url: str, rows: pd.DataFrame) -> None:
    """A store built by migrations 1 to 5 (the version-5 code path), holding ``rows``."""
    eng = sa.create_engine(url)
    for version, migration in enumerate(MIGRATIONS[:5], start=1):
        with eng.begin() as conn:
            migration(conn)
            conn.execute(sa.delete(meta).where(meta.c.key == "schema_version"))
            conn.execute(sa.insert(meta).values(key="schema_version", value=str(version)))
    with eng.begin() as conn:
        conn.execute(sa.insert(counts_v5), rows.astype(object).where(rows.notna(), None).to_dict("records"))
        conn.execute(sa.insert(watermarks), [{"source": s, "experiment": e, "pulled_to": H0 + timedelta(hours=30)}
                                             for s in ("assigned", "filtered") for e in ("alpha", "beta")])
        conn.execute(sa.insert(runs).values(run_id="r1", started_at=H0 + timedelta(hours=31),
                                            as_of=H0 + timedelta(hours=30), outcome="ok", detail="{}"))
    eng.dispose()


def _sorted(frame: pd.DataFrame) -> pd.DataFrame:
    keys = ["experiment", "variant", "hour", "segment"]
    out = frame[keys + ["units", "leaked"]].astype({"variant": object})
    out["variant"] = [None if pd.isna(v) else v for v in out["variant"]]
    out = out.fillna({"variant": "-"})
    return out.sort_values(keys).reset_index(drop=True).astype({"units": "int64", "leaked": "int64"})


def test_migration_6_converts_a_version_5_store_in_place_keeping_every_count(tmp_path):
    _migrates_in_place(f"sqlite:///{tmp_path / 's.sqlite'}")


@pytest.mark.postgres
def test_migration_6_on_postgres(pg_url):
    _migrates_in_place(pg_url)


def _migrates_in_place(url: str) -> None:
    rows = _v5_rows()
    _v5_store(url, rows)
    assert StateStore(url, migrate=False).schema_version() == 5
    store = StateStore(url)
    assert store.schema_version() == SCHEMA_VERSION == 6
    tables = set(sa.inspect(store.engine).get_table_names())
    assert "expwatch_hourly_counts" not in tables and {counts.name, count_series.name} <= tables
    for source in ("assigned", "filtered"):
        got = store.read_counts(source, ["alpha", "beta"])
        want = rows[rows["source"] == source].drop(columns="source")
        pd.testing.assert_frame_equal(_sorted(got), _sorted(want), check_dtype=False)
        assert str(got["hour"].dtype) == "datetime64[ns, UTC]"
    # each (source, experiment, variant, segment) is stored once, not once per hour
    with store.engine.connect() as c:
        assert c.execute(sa.select(sa.func.count()).select_from(count_series)).scalar() == 2 * 4 + 2 * 3
        assert c.execute(sa.select(sa.func.count()).select_from(counts)).scalar() == len(rows)
    # the watermarks and runs are untouched; prune and the earlier-hours read work on the result
    assert store.watermarks("assigned") == {"alpha": H0 + timedelta(hours=30), "beta": H0 + timedelta(hours=30)}
    early = store.read_counts("assigned", ["alpha"], before=H0 + timedelta(hours=10, minutes=30))
    assert early["hour"].max() == H0 + timedelta(hours=10) and len(early) == 11 * 4
    assert set(prune(store, 1)["removed"].values()) == {0}
    store.dispose()


def test_replace_counts_round_trips_and_replaces_only_the_new_hours(tmp_path):
    store = StateStore(f"sqlite:///{tmp_path / 's.sqlite'}")
    rows = _v5_rows()
    first = rows[rows["source"] == "assigned"].drop(columns="source")
    with store.transaction() as conn:
        StateStore.replace_counts(conn, "assigned", H0, H0 + timedelta(hours=30), ["alpha", "beta"], first)
    since = H0 + timedelta(hours=20)
    again = first[first["hour"] >= since].assign(units=lambda f: f["units"] + 100)
    with store.transaction() as conn:
        StateStore.replace_counts(conn, "assigned", since, H0 + timedelta(hours=30), ["alpha", "beta"], again)
    want = pd.concat([first[first["hour"] < since], again])
    pd.testing.assert_frame_equal(_sorted(store.read_counts("assigned", ["alpha", "beta"])), _sorted(want),
                                  check_dtype=False)
    store.dispose()
