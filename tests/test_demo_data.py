"""Properties of the demo warehouse that hold by construction.

Share checks use the exact binomial test and Pearson's chi-square goodness-of-fit
test from the reference library: scipy.stats.binomtest and scipy.stats.chisquare
(SciPy 1.17 reference guide). "Balanced" means p > 1e-3 and "imbalanced" means
p < 1e-3 -- the usual SRM alarm threshold, common practice. Tolerances on
measured shares are about 4 binomial standard errors, sqrt(p(1-p)/n), unless a
comment says otherwise.
"""

from __future__ import annotations

from datetime import timedelta

import duckdb
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.demo import (
    DEMO_AS_OF,
    DEMO_SEED,
    EXPERIMENTS,
    PRE_PERIOD_DAYS,
    TABLE_SCHEMAS,
    DemoSummary,
    ExperimentSpec,
    MetricEffect,
    PhaseSpec,
    PlantedProblem,
    _build,
    build_demo_warehouse,
    demo_tables,
)
from monitor.errors import ConfigError

AS_OF = pd.Timestamp(DEMO_AS_OF.replace(tzinfo=None))
LIVE = {
    "quick-borrow-button", "offline-download-prompt", "reader-font-size", "audiobook-sample-ramp",
    "hold-queue-reminder", "due-date-nudge", "kids-corner-'lesefüchse'", "search-autocomplete",
    "dark-mode-reader", "author-follow", "shelf-carousel", "night-reading-timer",
    "licence-queue-reminder", "title-page-reviews", "review-after-return",
    "reading-streak-badge", "reader-swipe-pages",
}
HEALTHY = {
    "audiobook-sample-ramp", "hold-queue-reminder", "kids-corner-'lesefüchse'", "search-autocomplete",
    "author-follow", "shelf-carousel", "night-reading-timer",
}


@pytest.fixture(scope="module")
def demo():
    return demo_tables()


@pytest.fixture(scope="module")
def firsts(demo):
    """First row of each (experiment, unit) in both stages."""
    tables, _ = demo
    out = {}
    for name in ("assignments", "assignments_filtered"):
        df = tables[name].sort_values("assigned_at", kind="stable")
        out[name] = df.drop_duplicates(["experiment_id", "unit_id"]).reset_index(drop=True)
    return out


def _counts(df: pd.DataFrame, variants) -> np.ndarray:
    return df["variant"].value_counts().reindex(list(variants), fill_value=0).to_numpy()


def _binom_p(k: int, n: int, p: float = 0.5) -> float:
    return stats.binomtest(int(k), int(n), p).pvalue


def _spec(eid: str) -> ExperimentSpec:
    return next(s for s in EXPERIMENTS if s.experiment_id == eid)


# ----------------------------------------------------------------- schemas, registry


def test_frames_have_schema_columns_and_dtypes(demo):
    tables, summary = demo
    assert set(tables) == set(TABLE_SCHEMAS)
    for name, schema in TABLE_SCHEMAS.items():
        df = tables[name]
        assert list(df.columns) == [c for c, _ in schema], name
        for col, sql in schema:
            s = df[col]
            if sql == "VARCHAR":
                assert pd.api.types.is_string_dtype(s), (name, col)
                assert s.notna().all(), (name, col)
            elif sql == "TIMESTAMP":
                assert s.dtype == np.dtype("datetime64[us]"), (name, col)
            elif sql == "DOUBLE":
                assert s.dtype == np.float64 and np.isfinite(s.to_numpy()).all(), (name, col)
            elif sql == "INTEGER":
                assert s.dtype == np.int32, (name, col)
            elif sql == "BOOLEAN":
                assert s.dtype == np.bool_, (name, col)
        assert summary.rows[name] == len(df)


def test_registry_live_and_one_ended(demo):
    reg, summary = demo[0]["experiments"], demo[1]
    status = reg.groupby("experiment_id")["status"].agg(set)
    assert all(len(v) == 1 for v in status)
    status = status.map(lambda v: next(iter(v)))
    assert set(status[status == "running"].index) == LIVE
    assert set(status[status == "stopped"].index) == {"holiday-banner"}
    assert set(summary.live) == LIVE and summary.ended == ("holiday-banner",)
    assert reg["owner"].str.fullmatch(r"[a-z]+(-[a-z]+)*-team").all()


def test_registry_weights_controls_and_contiguous_phases(demo):
    reg = demo[0]["experiments"]
    per_phase = reg.groupby(["experiment_id", "phase"])
    assert (per_phase["weight"].sum() - 1.0).abs().max() <= 1e-9
    assert (per_phase["is_control"].sum() == 1).all()
    assert (reg.loc[reg["is_control"], "variant"] == "control").all()
    for eid, g in reg.groupby("experiment_id"):
        phases = g.drop_duplicates("phase").sort_values("phase")
        assert phases["phase"].tolist() == list(range(1, len(phases) + 1))
        variant_sets = g.groupby("phase")["variant"].agg(frozenset)
        assert variant_sets.nunique() == 1, eid
        starts, ends = phases["phase_start"].to_numpy(), phases["phase_end"].to_numpy()
        assert (ends[:-1] == starts[1:]).all(), eid
        if g["status"].iat[0] == "running":
            assert pd.isna(ends[-1]), eid
        else:
            assert ends[-1] == np.datetime64(AS_OF - pd.Timedelta(days=10)), eid
    starts = reg.groupby("experiment_id")["phase_start"].min()
    # the allocation-problem experiments start on different days (the novelty ones share days with them)
    first = starts.drop(["reading-streak-badge", "reader-swipe-pages"])
    assert first.dt.normalize().nunique() == len(first)
    assert (starts >= AS_OF - pd.Timedelta(days=28)).all()


# ----------------------------------------------------------------- assignments


def test_rows_inside_experiment_windows(demo):
    tables = demo[0]
    reg = tables["experiments"]
    lo = reg.groupby("experiment_id")["phase_start"].min()
    hi = reg.groupby("experiment_id")["phase_end"].max().where(
        reg.groupby("experiment_id")["status"].first() == "stopped", AS_OF)
    for name in ("assignments", "assignments_filtered"):
        a = tables[name]
        assert (a["assigned_at"] >= a["experiment_id"].map(lo)).all()
        assert (a["assigned_at"] < a["experiment_id"].map(hi)).all()
        assert set(a["experiment_id"]) == set(reg["experiment_id"])


def test_filtered_is_subset_and_removes_whole_units(demo):
    raw, filt = demo[0]["assignments"], demo[0]["assignments_filtered"]
    h_raw = pd.util.hash_pandas_object(raw, index=False).to_numpy()
    h_f = pd.util.hash_pandas_object(filt, index=False).to_numpy()
    u_raw, c_raw = np.unique(h_raw, return_counts=True)
    u_f, c_f = np.unique(h_f, return_counts=True)
    pos = np.searchsorted(u_raw, u_f)
    assert (pos < u_raw.size).all() and (u_raw[np.minimum(pos, u_raw.size - 1)] == u_f).all()
    assert (c_f <= c_raw[pos]).all()
    assert len(filt) < len(raw)
    # A unit kept by the bot filter keeps all its rows.
    n_raw = raw.groupby(["experiment_id", "unit_id"]).size()
    n_f = filt.groupby(["experiment_id", "unit_id"]).size()
    assert (n_raw.loc[n_f.index] == n_f).all()


def test_one_variant_per_unit_except_planted_leakage(demo, firsts):
    raw = demo[0]["assignments"]
    nvar = raw.groupby(["experiment_id", "unit_id"])["variant"].nunique()
    leaked = nvar[nvar > 1]
    assert set(leaked.index.get_level_values(0)) == {"reader-font-size"}
    units = nvar.loc["reader-font-size"]
    share = float((units > 1).mean())
    se = np.sqrt(0.03 * 0.97 / units.size)
    assert abs(share - 0.03) < 4 * se, share
    # Leaked rows come after the unit's first (true) assignment.
    r = raw[raw["experiment_id"] == "reader-font-size"]
    f = firsts["assignments"]
    first = f[f["experiment_id"] == "reader-font-size"].set_index("unit_id")
    other = r[r["variant"].to_numpy() != first.loc[r["unit_id"], "variant"].to_numpy()]
    assert len(other) > 0
    assert (other["assigned_at"].to_numpy() > first.loc[other["unit_id"], "assigned_at"].to_numpy()).all()


def test_segments_fixed_per_unit_and_units_return(demo, firsts):
    raw = demo[0]["assignments"]
    assert (raw.groupby("unit_id")[["platform", "region", "patron_type"]].nunique() == 1).all().all()
    assert set(raw["platform"]) == {"android", "ios", "web"}
    assert 4 <= raw["region"].nunique() <= 5
    assert set(raw["patron_type"]) == {"new", "returning"}
    assert raw["unit_id"].str.fullmatch(r"p\d{7}").all()
    per_unit = raw.groupby(["experiment_id", "unit_id"]).size()
    assert per_unit.mean() > 1.4 and (per_unit > 1).mean() > 0.3
    # One shared population: many patrons are in two or more live experiments.
    f = firsts["assignments"]
    live = f[f["experiment_id"].isin(LIVE)]
    assert (live.groupby("unit_id").size() >= 2).sum() > 50_000


def test_new_units_per_day_and_seasonality(firsts):
    f = firsts["assignments"]
    day = f["assigned_at"].dt.floor("D")
    daily = {s.experiment_id: s.daily_units for s in EXPERIMENTS}
    for eid, g in f.assign(day=day).groupby("experiment_id"):
        per_day = g.groupby("day").size().iloc[1:-1]        # complete days only
        assert 0.6 * daily[eid] <= per_day.mean() <= 1.4 * daily[eid], (eid, per_day.mean())
    hours = f["assigned_at"].dt.hour.value_counts().reindex(range(24), fill_value=0)
    assert hours.loc[2:5].mean() < 0.35 * hours.loc[19:21].mean()
    assert hours.idxmax() in (19, 20, 21, 22)
    q = f[f["experiment_id"] == "quick-borrow-button"]
    per_day = q.groupby(q["assigned_at"].dt.floor("D")).size().iloc[1:-1]
    weekend = per_day.index.day_of_week >= 5
    ratio = per_day[weekend].mean() / per_day[~weekend].mean()
    assert 1.15 < ratio < 1.35, ratio          # designed 1.25


def test_healthy_experiments_are_balanced_in_both_stages(demo, firsts):
    reg = demo[0]["experiments"]
    for name, f in firsts.items():
        for eid in HEALTHY | {"dark-mode-reader", "reader-font-size", "quick-borrow-button"}:
            if name == "assignments_filtered" and eid == "quick-borrow-button":
                continue
            g = f[f["experiment_id"] == eid]
            r = reg[reg["experiment_id"] == eid]
            starts = r.drop_duplicates("phase").sort_values("phase")["phase_start"].to_numpy()
            phase = np.searchsorted(starts, g["assigned_at"].to_numpy(), side="right")
            for k in np.unique(phase):
                w = r[r["phase"] == k].set_index("variant")["weight"]
                obs = _counts(g[phase == k], w.index)
                p = stats.chisquare(obs, w.to_numpy() * obs.sum()).pvalue
                assert p > 1e-3, (name, eid, k, obs)


def test_ramp_phases_use_their_weights_and_pooling_would_false_alarm(demo, firsts):
    f = firsts["assignments"]
    g = f[f["experiment_id"] == "audiobook-sample-ramp"]
    reg = demo[0]["experiments"]
    r = reg[(reg["experiment_id"] == "audiobook-sample-ramp") & (reg["variant"] == "treatment")]
    starts = r.sort_values("phase")["phase_start"].to_numpy()
    phase = np.searchsorted(starts, g["assigned_at"].to_numpy(), side="right")
    for k, w in zip((1, 2, 3), (0.05, 0.20, 0.50)):
        gk = g[phase == k]
        t = int((gk["variant"] == "treatment").sum())
        assert _binom_p(t, len(gk), w) > 1e-3, (k, t, len(gk))
    assert _binom_p(int((g["variant"] == "treatment").sum()), len(g), 0.5) < 1e-50


def test_unequal_and_three_way_weights(firsts):
    f = firsts["assignments"]
    for eid, w in (("hold-queue-reminder", (0.5, 0.25, 0.25)), ("night-reading-timer", (1 / 3,) * 3)):
        spec = _spec(eid)
        obs = _counts(f[f["experiment_id"] == eid], spec.variants)
        assert stats.chisquare(obs, np.array(w) * obs.sum()).pvalue > 1e-3, (eid, obs)
    assert abs(sum(_spec("night-reading-timer").phases[0].weights) - 1.0) <= 1e-9


def test_quick_borrow_button_srm_only_after_filtering(firsts):
    raw = firsts["assignments"].query("experiment_id == 'quick-borrow-button'")
    filt = firsts["assignments_filtered"].query("experiment_id == 'quick-borrow-button'")
    n_raw = _counts(raw, ("control", "treatment"))
    n_f = _counts(filt, ("control", "treatment"))
    assert _binom_p(n_raw[1], n_raw.sum()) > 1e-3, n_raw
    assert _binom_p(n_f[1], n_f.sum()) < 1e-3, n_f
    dropped = 1 - n_f / n_raw
    assert 0.005 < dropped[0] < 0.02, dropped        # ~1.2% bots everywhere
    assert 0.06 < dropped[1] < 0.085, dropped        # plus ~6% tripped: 1 - 0.988 * 0.94
    # Elsewhere the bot filter removes about 1-2% of units, evenly.
    other_raw = firsts["assignments"].query("experiment_id != 'quick-borrow-button'")
    other_f = firsts["assignments_filtered"].query("experiment_id != 'quick-borrow-button'")
    share = 1 - other_f.groupby("experiment_id").size() / other_raw.groupby("experiment_id").size()
    assert ((share > 0.008) & (share < 0.02)).all(), share


def test_offline_download_prompt_android_srm_after_onset_only(demo, firsts):
    planted = next(p for p in demo[1].planted if p.experiment == "offline-download-prompt")
    onset = pd.Timestamp(planted.onset.replace(tzinfo=None))
    start = pd.Timestamp(_spec("offline-download-prompt").phases[0].start.replace(tzinfo=None))
    assert timedelta(days=9) <= onset - start <= timedelta(days=11)
    for name, f in firsts.items():
        g = f[f["experiment_id"] == "offline-download-prompt"]
        android = g["platform"] == "android"
        after = g["assigned_at"] >= onset
        pre = _counts(g[android & ~after], ("control", "treatment"))
        post = _counts(g[android & after], ("control", "treatment"))
        other_post = _counts(g[~android & after], ("control", "treatment"))
        assert _binom_p(pre[1], pre.sum()) > 1e-3, (name, pre)
        assert _binom_p(other_post[1], other_post.sum()) > 1e-3, (name, other_post)
        assert _binom_p(post[1], post.sum()) < 1e-10, (name, post)
        # 25% of treatment lost: expected treatment share 0.375 / 0.875 = 0.4286.
        share = post[1] / post.sum()
        assert abs(share - 0.75 / 1.75) < 4 * np.sqrt(0.25 / post.sum()), (name, share)


def test_due_date_nudge_has_no_rows_in_last_30_hours(demo):
    cutoff = AS_OF - pd.Timedelta(hours=30)
    planted = next(p for p in demo[1].planted if p.experiment == "due-date-nudge")
    assert planted.check == "freshness" and pd.Timestamp(planted.onset.replace(tzinfo=None)) == cutoff
    for name in ("assignments", "assignments_filtered"):
        a = demo[0][name]
        g = a[a["experiment_id"] == "due-date-nudge"]
        assert g["assigned_at"].max() < cutoff
        assert (g["assigned_at"] >= cutoff - pd.Timedelta(hours=6)).sum() > 50   # a sharp stop
        live = a[a["experiment_id"].isin(LIVE - {"due-date-nudge"})]
        recent = live[live["assigned_at"] >= AS_OF - pd.Timedelta(hours=3)]
        assert set(recent["experiment_id"]) == LIVE - {"due-date-nudge"}


def test_holiday_banner_ended_with_gross_srm(demo, firsts):
    reg = demo[0]["experiments"]
    end = reg.loc[reg["experiment_id"] == "holiday-banner", "phase_end"].iat[0]
    assert end == AS_OF - pd.Timedelta(days=10)
    a = demo[0]["assignments"]
    assert a.loc[a["experiment_id"] == "holiday-banner", "assigned_at"].max() < end
    n = _counts(firsts["assignments"].query("experiment_id == 'holiday-banner'"), ("control", "treatment"))
    assert _binom_p(n[1], n.sum()) < 1e-20 and abs(n[0] / n.sum() - 0.56) < 0.01


# ----------------------------------------------------------------- metric events


def test_event_tables_window_units_and_zeros(demo, firsts):
    tables = demo[0]
    first_start = tables["experiments"]["phase_start"].min()
    ev_start = (first_start - pd.Timedelta(days=PRE_PERIOD_DAYS)).normalize()
    units = pd.Series(firsts["assignments"]["unit_id"].unique())
    for name, tcol in (("reading_sessions", "started_at"), ("page_renders", "rendered_at"),
                       ("loans", "loaned_at"), ("app_errors", "occurred_at")):
        ev = tables[name]
        assert ev[tcol].min() >= ev_start and ev[tcol].max() < AS_OF, name
        assert (ev[tcol] < first_start).sum() > 0.2 * len(ev), name        # pre-period present
        assert ev["unit_id"].str.fullmatch(r"p\d{7}").all(), name
    total = sum(len(tables[n]) for n in ("reading_sessions", "page_renders", "loans", "app_errors"))
    assert 1_000_000 <= total <= 2_000_000, total
    assert (tables["reading_sessions"]["minutes"] > 0).all()
    assert (tables["page_renders"]["render_ms"] > 0).all()
    errors = tables["app_errors"]
    assert units.isin(errors["unit_id"]).mean() < 0.5          # most units: zero errors
    loans = tables["loans"]
    assert units.isin(loans.loc[loans["cancelled"], "unit_id"]).mean() < 0.5
    assert set(errors["error_code"]) <= {"SYNC_TIMEOUT", "LICENCE_CHECK", "RENDER_OOM", "NET_OFFLINE",
                                         "AUDIO_DECODE"}


def _ratio(tables, firsts, eid, table, tcol, col, treatment):
    """Mean per event of ``col``: treatment / control, after and before first assignment."""
    f = firsts["assignments"]
    u = f.loc[f["experiment_id"] == eid, ["unit_id", "variant", "assigned_at"]]
    ev = tables[table].merge(u, on="unit_id")
    after = ev[tcol] >= ev["assigned_at"]
    out = []
    for part in (ev[after], ev[~after]):
        m = part.groupby("variant")[col].agg(["mean", "std", "size"])
        se = np.sqrt(((m["std"] / m["mean"]) ** 2 / m["size"]).sum())       # delta method
        out.append((m.loc[treatment, "mean"] / m.loc["control", "mean"], se))
    return out


@pytest.mark.parametrize("eid,table,tcol,col,treatment,lift", [
    ("shelf-carousel", "reading_sessions", "started_at", "minutes", "treatment", 0.06),
    ("dark-mode-reader", "page_renders", "rendered_at", "render_ms", "dark", 0.09),
    ("search-autocomplete", "reading_sessions", "started_at", "minutes", "suggest", 0.0),
    ("search-autocomplete", "page_renders", "rendered_at", "render_ms", "suggest", 0.0),
    ("reader-font-size", "page_renders", "rendered_at", "render_ms", "treatment", 0.0),
])
def test_planted_metric_effects_apply_after_assignment_only(demo, firsts, eid, table, tcol, col,
                                                            treatment, lift):
    (post, se_post), (pre, se_pre) = _ratio(demo[0], firsts, eid, table, tcol, col, treatment)
    assert abs(post - (1 + lift)) < 4 * se_post, (post, se_post)
    assert abs(pre - 1.0) < 4 * se_pre, (pre, se_pre)


def test_fading_effect_spec_decays(demo):
    """Extension point: a fading (novelty-like) effect is strong early, gone late."""
    start = DEMO_AS_OF - timedelta(days=20)
    spec = ExperimentSpec(
        "fading-test", "Fading test", "test-team", ("control", "treatment"),
        (PhaseSpec(start, (0.5, 0.5)),), 3000,
        effects=(MetricEffect("reading_sessions", "minutes", "treatment", 0.5, "effect",
                              "Test effect.", fade_days=2.0),),
    )
    tables, summary = _build((spec,), 7, DEMO_AS_OF)
    f = tables["assignments"].drop_duplicates("unit_id")
    ev = tables["reading_sessions"].merge(f[["unit_id", "variant", "assigned_at"]], on="unit_id")
    age = (ev["started_at"] - ev["assigned_at"]).dt.total_seconds() / 86400
    early = ev[(age >= 0) & (age < 1)].groupby("variant")["minutes"].mean()
    late = ev[age >= 10].groupby("variant")["minutes"].mean()
    # Mean multiplier over the first day is 1 + 0.5 * 2 * (1 - exp(-1/2)) = 1.39.
    assert early["treatment"] / early["control"] > 1.2
    assert abs(late["treatment"] / late["control"] - 1.0) < 0.08
    assert summary.healthy == ("fading-test",)


# ----------------------------------------------------------------- summary


def test_summary_answer_key(demo):
    summary = demo[1]
    assert isinstance(summary, DemoSummary) and summary.path is None
    assert summary.as_of == DEMO_AS_OF and summary.as_of.utcoffset() == timedelta(0)
    assert set(summary.healthy) == HEALTHY
    keyed = {(p.experiment, p.check, p.stage) for p in summary.planted}
    assert keyed == {
        ("quick-borrow-button", "srm", "filtered"),
        ("offline-download-prompt", "srm", "assigned"),
        ("reader-font-size", "leakage", None),
        ("due-date-nudge", "freshness", None),
        ("dark-mode-reader", "guardrail", None),
        ("shelf-carousel", "effect", None),
        ("holiday-banner", "srm", "assigned"),
        ("licence-queue-reminder", "spillover", None),
        ("title-page-reviews", "collision", None),
        ("review-after-return", "collision", None),
        ("reading-streak-badge", "novelty", None),
        ("reader-swipe-pages", "novelty", None),
    }
    for p in summary.planted:
        assert isinstance(p, PlantedProblem) and p.description.endswith(".")
        assert p.onset is None or p.onset.utcoffset() == timedelta(0)
    crash = next(p for p in summary.planted if p.experiment == "offline-download-prompt")
    assert crash.segment == {"platform": "android"} and crash.onset is not None


# ----------------------------------------------------------------- determinism, I/O, errors


def test_same_seed_identical_frames_other_seed_differs(demo):
    tables, summary = demo_tables(DEMO_SEED)
    for name, df in demo[0].items():
        pd.testing.assert_frame_equal(tables[name], df, check_exact=True)
    assert summary == demo[1]
    other, _ = demo_tables(DEMO_SEED + 1)
    assert not other["assignments"].equals(tables["assignments"])


def test_build_warehouse_overwrites_and_closes(tmp_path, demo):
    path = tmp_path / "wh" / "demo.duckdb"
    path.parent.mkdir()
    path.write_bytes(b"not a database")
    path.with_name(path.name + ".wal").write_bytes(b"stale wal")
    summary = build_demo_warehouse(path)
    assert summary.path == path and summary.rows == demo[1].rows
    assert not path.with_name(path.name + ".wal").exists()
    con = duckdb.connect(str(path), read_only=True)     # fails if a writer were still open
    try:
        for name, schema in TABLE_SCHEMAS.items():
            cols = con.execute(f'DESCRIBE "{name}"').fetchall()
            assert [(c[0], c[1]) for c in cols] == list(schema), name
            assert con.execute(f'SELECT count(*) FROM "{name}"').fetchone()[0] == summary.rows[name]
        eid = "kids-corner-'lesefüchse'"
        n = con.execute("SELECT count(*) FROM assignments WHERE experiment_id = ?", [eid]).fetchone()[0]
        assert n == int((demo[0]["assignments"]["experiment_id"] == eid).sum()) > 0
        open_phase = con.execute(
            "SELECT count(*) FROM experiments WHERE status = 'running' AND phase_end IS NULL").fetchone()[0]
        assert open_phase > 0
    finally:
        con.close()


def test_bad_input_raises_config_error(tmp_path):
    with pytest.raises(ConfigError, match="seed"):
        demo_tables(-1)
    with pytest.raises(ConfigError, match="seed"):
        demo_tables("20261130")
    with pytest.raises(ConfigError, match="directory"):
        build_demo_warehouse(tmp_path)
    bad = ExperimentSpec("bad", "Bad", "test-team", ("control", "treatment"),
                         (PhaseSpec(DEMO_AS_OF - timedelta(days=3), (0.5, 0.6)),), 100)
    with pytest.raises(ConfigError, match="weights"):
        _build((bad,), 1, DEMO_AS_OF)
