"""``expwatch explain``: the diagnosis of an SRM on the demo (DuckDB and PostgreSQL),
on synthetic counts whose answer is known by construction, the attachment to SRM
alerts, the command line and the three output formats."""

from __future__ import annotations

import base64
import json
import re
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from monitor.cli import main
from monitor.config import load_config, parse_config
from monitor.demo import DEMO_AS_OF
from monitor.errors import ConfigError
from monitor.explain import (
    JSON_FORMAT,
    attach_diagnoses,
    diagnose_counts,
    explain_experiment,
    render_html,
    render_text,
    to_json,
)
from monitor.registry import Experiment, Phase

from conftest import load_frames_into_postgres

UTC = timezone.utc
README = (Path(__file__).resolve().parent.parent / "README.md").read_text()


def _planted(summary, experiment):
    return next(p for p in summary.planted if p.experiment == experiment and p.check == "srm")


def _assert_filtering_stage(d):
    assert not d.healthy
    ph = d.main_phase
    assert ph.first_break == "filtered"
    assert [s.broken for s in ph.stages] == [False, True]
    tr = ph.transitions[0]
    # the bot filter removes about 7 % of treatment units against about 1 % of control (planted)
    assert tr.drop_rate["treatment"] > 3 * tr.drop_rate["control"]
    assert tr.p_value < d.alpha
    assert d.top_cause.category == "analysis_filtering" and d.top_cause.stage == "filtered"
    assert "breaks at stage filtered" in d.statement


def _assert_android(d, planted):
    assert not d.healthy
    ph = d.main_phase
    assert ph.first_break == "assigned"
    conc = ph.concentrated_in
    assert conc is not None and conc.dimension == "platform" and conc.removal_set == ("android",)
    for dim in ph.dimensions:
        if dim.dimension != "platform":
            assert not dim.concentrated
    # planted onset known by construction; the estimate must be within 12 h
    assert abs(ph.onset.onset - planted.onset) <= timedelta(hours=12)
    assert abs(conc.slice_onset.onset - planted.onset) <= timedelta(hours=12)
    assert conc.slice_onset.band_start <= conc.slice_onset.onset <= conc.slice_onset.band_end
    assert d.top_cause.category == "delivery"
    assert d.statement.startswith("the mismatch is concentrated in platform=android since 2026-11-18")
    # segment values are fixed at first assignment: losing android treatment units unbalances platform
    assert next(m for m in ph.dimensions if m.dimension == "platform").balance_p_value < d.alpha


# ---------------------------------------------------------------------------
# the demo
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo_cfg(demo):
    return load_config(demo["config"])


def test_filtering_stage_srm_is_attributed_to_the_filtered_stage(demo_cfg):
    _assert_filtering_stage(explain_experiment(demo_cfg, "quick-borrow-button", as_of=DEMO_AS_OF))


def test_platform_srm_is_attributed_to_android_after_its_onset(demo, demo_cfg):
    d = explain_experiment(demo_cfg, "offline-download-prompt", as_of=DEMO_AS_OF)
    _assert_android(d, _planted(demo["summary"], "offline-download-prompt"))


def test_healthy_experiments_explain_as_healthy(demo, demo_cfg):
    for exp in demo["summary"].healthy:
        d = explain_experiment(demo_cfg, exp, as_of=DEMO_AS_OF)
        assert d.healthy, (exp, d.statement)
        assert d.top_cause is None and all(not p.causes for p in d.phases)
        assert d.statement.startswith("no mismatch")


def test_ramped_experiment_gets_one_diagnosis_per_phase(demo_cfg):
    d = explain_experiment(demo_cfg, "audiobook-sample-ramp", as_of=DEMO_AS_OF)
    assert [p.phase for p in d.phases] == [1, 2, 3]
    assert [p.designed_share["treatment"] for p in d.phases] == pytest.approx([0.05, 0.2, 0.5])
    # units are attributed to the phase of their first assignment: shares follow the design
    for p in d.phases:
        assert p.stages[0].shares["treatment"] == pytest.approx(p.designed_share["treatment"], abs=0.02)


@pytest.mark.postgres
@pytest.mark.slow
def test_the_same_attributions_on_postgres(demo_frames, pg_url, tmp_path):
    frames, summary = demo_frames
    load_frames_into_postgres(pg_url, {k: frames[k] for k in ("experiments", "assignments", "assignments_filtered")},
                              "library_explain")
    cfg = parse_config({
        "warehouse": {"url": pg_url},
        "state": {"url": f"sqlite:///{tmp_path / 'pg-state.sqlite'}"},
        "registry": {"table": "library_explain.experiments"},
        "assignments": {"name": "assigned", "table": "library_explain.assignments",
                        "segments": ["platform", "region", "patron_type"]},
        "stages": [{"name": "filtered", "table": "library_explain.assignments_filtered"}],
    }, where="pg-config")
    _assert_filtering_stage(explain_experiment(cfg, "quick-borrow-button", as_of=DEMO_AS_OF))
    _assert_android(explain_experiment(cfg, "offline-download-prompt", as_of=DEMO_AS_OF),
                    _planted(summary, "offline-download-prompt"))
    assert not (tmp_path / "pg-state.sqlite").exists()  # explain records nothing


# ---------------------------------------------------------------------------
# synthetic counts, known by construction
# ---------------------------------------------------------------------------

T0 = datetime(2026, 3, 2, 0, 0, tzinfo=UTC)


def _exp(exp_id="synthetic", weights=(0.5, 0.5)):
    names = ("control", "treatment", "other")[: len(weights)]
    return Experiment(exp_id, "control", names, (Phase(1, T0, None, dict(zip(names, weights))),), "running")


def _frame(exp_id, hours, variants, segments, units):
    return pd.DataFrame({
        "experiment": exp_id,
        "variant": list(variants),
        "hour": pd.to_datetime([T0 + timedelta(hours=int(h)) for h in hours], utc=True),
        "segment": [json.dumps(s, separators=(",", ":")) for s in segments],
        "units": np.asarray(units, dtype=np.int64),
        "leaked": 0,
    })


def _binomial_frame(rng, exp_id, n_hours, per_hour, p_treat, segment):
    """Per hour, per_hour units split control/treatment with treatment probability p_treat[h]."""
    treat = rng.binomial(per_hour, p_treat)
    hours = np.repeat(np.arange(n_hours), 2)
    variants = ["control", "treatment"] * n_hours
    units = np.column_stack([per_hour - treat, treat]).ravel()
    return _frame(exp_id, hours, variants, [segment] * (2 * n_hours), units)


def test_step_change_at_a_known_hour():
    rng = np.random.default_rng(20261201)
    n_hours, step = 240, 150
    p = np.where(np.arange(n_hours) < step, 0.5, 0.44)
    frame = _binomial_frame(rng, "synthetic", n_hours, 400, p, {"platform": "web"})
    as_of = T0 + timedelta(hours=n_hours)
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["platform"], as_of=as_of)
    o = d.phases[0].onset
    planted = T0 + timedelta(hours=step)
    assert o.band_start <= planted <= o.band_end
    assert abs(o.onset - planted) <= timedelta(hours=6)
    assert not o.from_start
    assert o.shares_after["treatment"] == pytest.approx(0.44, abs=0.01)
    assert d.statement.startswith("the mismatch is spread over every segment value, since 2026-03-08")
    # a change after the start, in every slice, with no other experiment: not "assignment" first
    assert d.top_cause.category in {"interference", "delivery"}
    # the daily series sums the hourly one
    assert d.phases[0].daily.units.sum() == d.phases[0].hourly.units.sum() == frame["units"].sum()
    assert len(d.phases[0].daily.starts) == 10


def test_step_change_coinciding_with_another_experiment_points_at_interference():
    rng = np.random.default_rng(7)
    n_hours, step = 240, 150
    p = np.where(np.arange(n_hours) < step, 0.5, 0.44)
    frame = _binomial_frame(rng, "synthetic", n_hours, 400, p, {"platform": "web"})
    other = Experiment("neighbour", "control", ("control", "treatment"),
                       (Phase(1, T0 + timedelta(hours=step), None, {"control": 0.5, "treatment": 0.5}),), "running")
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["platform"], as_of=T0 + timedelta(hours=n_hours),
                        others=[other])
    assert d.top_cause.category == "interference"
    assert any("neighbour" in e for e in d.top_cause.evidence)


def test_skew_from_the_start_everywhere_points_at_assignment():
    rng = np.random.default_rng(11)
    n_hours = 120
    parts = [_binomial_frame(rng, "synthetic", n_hours, 100, np.full(n_hours, 0.47), {"platform": plat})
             for plat in ("android", "ios", "web")]
    frame = pd.concat(parts, ignore_index=True)
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["platform"], as_of=T0 + timedelta(hours=n_hours))
    assert d.phases[0].onset.from_start
    assert d.phases[0].concentrated_in is None
    assert d.top_cause.category == "assignment"
    assert "from the start of phase 1" in d.statement


def test_mismatch_confined_to_one_of_thirty_slices():
    rng = np.random.default_rng(30)
    n_hours, stores = 96, [f"branch-{i:02d}" for i in range(30)]
    parts = []
    for i, s in enumerate(stores):
        p = np.full(n_hours, 0.20 if i == 17 else 0.5)
        parts.append(_binomial_frame(rng, "synthetic", n_hours, 40, p, {"branch": s}))
    frame = pd.concat(parts, ignore_index=True)
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["branch"], as_of=T0 + timedelta(hours=n_hours))
    dim = d.phases[0].dimensions[0]
    # 30 values, more than the 20 kept: the skewed one is kept (ties in size are broken by input order)
    assert dim.n_values == 30
    assert dim.pooled_p_value < d.alpha  # the pooled SRM the drill-down starts from
    assert dim.concentrated and dim.removal_set == ("branch-17",)
    assert d.top_cause.category == "delivery"
    assert d.statement.startswith("the mismatch is concentrated in branch=branch-17")
    # each slice's chi-square is Pearson's goodness of fit (reference: scipy.stats.chisquare)
    for s in dim.slices:
        obs = np.array([s.units["control"], s.units["treatment"]], dtype=float)
        ref = stats.chisquare(obs, obs.sum() * np.array([0.5, 0.5]))
        assert s.chi2 == pytest.approx(ref.statistic, rel=1e-9, abs=1e-12)
        assert s.p_value == pytest.approx(ref.pvalue, rel=1e-9)


def test_a_dimension_with_thousands_of_values_is_folded_to_top_k_plus_other():
    rng = np.random.default_rng(3000)
    n_vals = 3000
    sizes = rng.permutation(n_vals) + 1  # distinct sizes, so the 20 largest are well defined
    treat = rng.binomial(sizes, 0.5)
    hours = np.repeat(rng.integers(0, 24, size=n_vals), 2)
    variants = ["control", "treatment"] * n_vals
    segs = [{"title_id": f"t{i}"} for i in range(n_vals) for _ in range(2)]
    frame = _frame("synthetic", hours, variants, segs, np.column_stack([sizes - treat, treat]).ravel())
    frame = frame[frame["units"] > 0]
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["title_id"], as_of=T0 + timedelta(hours=24))
    dim = d.phases[0].dimensions[0]
    assert dim.n_values == n_vals
    assert len(dim.slices) == 21 and dim.slices[-1].value == "(other)"
    assert dim.n_folded == n_vals - 20
    kept = [s.value for s in dim.slices[:20]]
    largest = {f"t{i}" for i in np.argsort(-sizes, kind="stable")[:20]}
    assert set(kept) == largest
    assert sum(sum(s.units.values()) for s in dim.slices) == int(sizes.sum())
    assert dim.daily_units.sum() == int(sizes.sum())


def test_null_segment_values_are_their_own_slice():
    frame = _frame("synthetic", [0, 0, 1, 1, 1, 1], ["control", "treatment"] * 3,
                   [{"platform": None}, {"platform": None}, {"platform": "ios"}, {"platform": "ios"},
                    {}, {}],  # a missing key is NULL too
                   [30, 10, 50, 52, 5, 5])
    d = diagnose_counts(_exp(), {"assigned": frame}, ["assigned"], ["platform"], as_of=T0 + timedelta(hours=2))
    dim = d.phases[0].dimensions[0]
    by_value = {s.value: s for s in dim.slices}
    assert set(by_value) == {"(null)", "ios"}
    assert by_value["(null)"].units == {"control": 35, "treatment": 15}
    assert by_value["ios"].units == {"control": 50, "treatment": 52}


def test_balance_and_drop_rates_match_scipy():
    rng = np.random.default_rng(99)
    n_hours = 72
    parts, filtered = [], []
    for plat, p in (("android", 0.45), ("ios", 0.5), ("web", 0.5)):
        f = _binomial_frame(rng, "synthetic", n_hours, 60, np.full(n_hours, p), {"platform": plat})
        parts.append(f)
        g = f.copy()
        keep_rate = np.where(g["variant"] == "treatment", 0.9, 0.97)
        g["units"] = rng.binomial(g["units"].to_numpy(), keep_rate)
        filtered.append(g)
    a, b = pd.concat(parts, ignore_index=True), pd.concat(filtered, ignore_index=True)
    d = diagnose_counts(_exp(), {"assigned": a, "filtered": b}, ["assigned", "filtered"], ["platform"],
                        as_of=T0 + timedelta(hours=n_hours))
    ph = d.phases[0]
    dim = ph.dimensions[0]
    table = np.array([[s.units["control"], s.units["treatment"]] for s in dim.slices], dtype=float)
    # reference: scipy.stats.chi2_contingency without continuity correction (Pearson homogeneity)
    ref = stats.chi2_contingency(table, correction=False)
    assert dim.balance_chi2 == pytest.approx(ref.statistic, rel=1e-9)
    assert dim.balance_p_value == pytest.approx(ref.pvalue, rel=1e-9)
    tr = ph.transitions[0]
    assigned = np.array([ph.stages[0].units[v] for v in ("control", "treatment")], dtype=float)
    kept = np.array([ph.stages[1].units[v] for v in ("control", "treatment")], dtype=float)
    ref2 = stats.chi2_contingency(np.vstack([assigned - kept, kept]), correction=False)
    assert tr.chi2 == pytest.approx(ref2.statistic, rel=1e-9)
    assert tr.p_value == pytest.approx(ref2.pvalue, rel=1e-9)


def test_counts_that_are_not_nested_are_reported_not_tested():
    a = _frame("synthetic", [0, 0], ["control", "treatment"], [{}, {}], [100, 100])
    b = _frame("synthetic", [0, 0], ["control", "treatment"], [{}, {}], [101, 90])
    d = diagnose_counts(_exp(), {"assigned": a, "filtered": b}, ["assigned", "filtered"], [],
                        as_of=T0 + timedelta(hours=1))
    tr = d.phases[0].transitions[0]
    assert not tr.nested and tr.p_value is None and tr.chi2 is None
    assert tr.dropped == {"control": -1, "treatment": 10}
    json.dumps(to_json(d), allow_nan=False)


def test_empty_counts_are_healthy_and_finite():
    d = diagnose_counts(_exp(), {}, ["assigned"], ["platform"], as_of=T0 + timedelta(hours=5))
    assert d.healthy and d.phases[0].onset.onset is None
    doc = to_json(d)
    json.dumps(doc, allow_nan=False)
    assert "no mismatch" in render_text(d)


# ---------------------------------------------------------------------------
# attached to SRM alerts
# ---------------------------------------------------------------------------


@pytest.mark.slow
def test_attach_diagnoses_to_srm_alerts(demo, demo_cfg):
    from monitor.cycle import run_cycle

    import dataclasses

    result = run_cycle(demo_cfg, as_of=DEMO_AS_OF, dry_run=True)
    counts = {s.name: s.counts for s in result.sources}
    # the cycle already attached the diagnoses; take them off again to see attach_diagnoses add them
    bare = []
    for f in result.findings:
        if "diagnosis" in f.statistics:
            stats = {k: v for k, v in f.statistics.items() if k != "diagnosis"}
            summary = f.summary.removesuffix(f"; {f.statistics['diagnosis']['statement']}")
            f = dataclasses.replace(f, statistics=stats, summary=summary)
        bare.append(f)
    out = attach_diagnoses(bare, counts, result.experiments, demo_cfg, as_of=DEMO_AS_OF)
    assert [f.summary for f in out] == [f.summary for f in result.findings]  # the same as in the cycle
    assert len(out) == len(result.findings)
    changed = 0
    for before, after in zip(bare, out):
        if before.check == "srm" and before.status == "alert":
            changed += 1
            diag = after.statistics["diagnosis"]
            assert after.summary == f"{before.summary}; {diag['statement']}"
            assert {k: v for k, v in after.statistics.items() if k != "diagnosis"} == before.statistics
            json.dumps(diag, allow_nan=False)
        else:
            assert after is before
    assert changed >= 3  # quick-borrow-button at filtered, offline-download-prompt at both stages
    srm = {(f.experiment, f.scope): f for f in out if f.check == "srm" and f.status == "alert"}
    qb = srm[("quick-borrow-button", "filtered")].statistics["diagnosis"]
    assert qb["first_breaking_stage"] == "filtered"
    assert qb["top_cause"]["category"] == "analysis_filtering"
    od = srm[("offline-download-prompt", "assigned")].statistics["diagnosis"]
    assert od["concentrated_in"] == {"dimension": "platform", "values": ["android"]}
    assert od["top_cause"]["category"] == "delivery"
    planted = _planted(demo["summary"], "offline-download-prompt").onset
    assert abs(datetime.fromisoformat(od["onset"].replace("Z", "+00:00")) - planted) <= timedelta(hours=12)
    assert od["band"][0] <= od["onset"] <= od["band"][1]
    assert od["top_slices"][0]["dimension"] == "platform" and od["top_slices"][0]["value"] == "android"
    # the same diagnosis as the explain command, from the counts already pulled
    assert od["statement"] == explain_experiment(demo_cfg, "offline-download-prompt", as_of=DEMO_AS_OF).statement


# ---------------------------------------------------------------------------
# bad input and the command line
# ---------------------------------------------------------------------------


def test_unknown_and_ended_experiments_are_config_errors(demo_cfg):
    with pytest.raises(ConfigError, match="'no-such-test' is not in the registry"):
        explain_experiment(demo_cfg, "no-such-test", as_of=DEMO_AS_OF)
    with pytest.raises(ConfigError, match="'holiday-banner' is not live .* ended"):
        explain_experiment(demo_cfg, "holiday-banner", as_of=DEMO_AS_OF)
    with pytest.raises(ConfigError, match="in the future"):
        explain_experiment(demo_cfg, "quick-borrow-button", as_of=datetime.now(UTC) + timedelta(days=1))


@pytest.mark.parametrize("exp_id, message", [("no-such-test", "is not in the registry"),
                                             ("holiday-banner", "is not live")])
def test_cli_bad_experiment_exits_2_with_one_line(demo, capsys, exp_id, message):
    code = main(["explain", exp_id, "--config", str(demo["config"]), "--as-of", "2026-11-30T09:00Z"])
    err = capsys.readouterr().err
    assert code == 2
    assert message in err and err.count("\n") == 1 and "Traceback" not in err


def test_cli_bad_as_of_and_format(demo, capsys):
    assert main(["explain", "quick-borrow-button", "--config", str(demo["config"]), "--as-of", "yesterday"]) == 2
    assert "--as-of" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["explain", "quick-borrow-button", "--config", str(demo["config"]), "--format", "pdf"])
    assert exc.value.code == 2


def test_cli_text_and_json(demo, capsys):
    args = ["explain", "offline-download-prompt", "--config", str(demo["config"]), "--as-of", "2026-11-30T09:00Z"]
    assert main(args) == 0
    text = capsys.readouterr().out
    for section in ("stages", "time (stage assigned)", "segments", "balance across variants", "likely causes"):
        assert section in text
    assert "concentrated in platform=android" in text
    assert main(args + ["--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["format"] == JSON_FORMAT and doc["experiment"] == "offline-download-prompt"
    assert doc["phases"][0]["first_breaking_stage"] == "assigned"
    # the README documents every key of the document
    section = README[README.index("## Explain an SRM"):]
    section = section[: section.index("\n## ", 5)]
    for key in doc:
        assert f"`{key}`" in section, key
    for key in doc["phases"][0]:
        assert f"`{key}`" in section, key


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.stack, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.imgs.append(dict(attrs))
        elif tag not in ("meta", "br", "link"):
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in self.stack:
            while self.stack.pop() != tag:
                pass

    def handle_data(self, data):
        self.text.append(data)


def test_html_is_self_contained_with_charts_and_escapes_markup(tmp_path, demo, capsys):
    out = tmp_path / "explain.html"
    code = main(["explain", "quick-borrow-button", "--config", str(demo["config"]), "--as-of", "2026-11-30T09:00Z",
                 "--format", "html", "--out", str(out)])
    assert code == 0 and capsys.readouterr().out == ""
    page = out.read_text(encoding="utf-8")
    p = _Collect()
    p.feed(page)
    p.close()
    assert not p.stack  # every element closed
    assert len(p.imgs) >= 5  # funnel, time, one per segment dimension
    for img in p.imgs:
        assert img["src"].startswith("data:image/png;base64,")
        assert base64.b64decode(img["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
        assert img.get("alt")
    assert not re.search(r"""(src|href)=["']?https?:""", page)  # nothing fetched from the network
    assert 'name="viewport"' in page

    evil = '<script>alert("x")</script>'
    frame = _frame(evil, [0, 0], ["control", "treatment"], [{"platform": "<b>web</b>"}] * 2, [60, 40])
    d = diagnose_counts(_exp(evil), {"assigned": frame}, ["assigned"], ["platform"], as_of=T0 + timedelta(hours=1))
    page = render_html(d)
    assert evil not in page and "<b>web</b>" not in page
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;" in page
    assert "&lt;b&gt;web&lt;/b&gt;" in page
