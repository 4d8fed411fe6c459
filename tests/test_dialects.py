"""Dialect coverage for warehouses that cannot run here (Snowflake, BigQuery,
Trino, Amazon Redshift, Databricks SQL) plus Spark SQL: every query the monitor
sends is rendered for each dialect and parsed by sqlglot in that dialect, so a
syntax error in a dialect macro (sql/_dialect.sql.j2) fails CI.

How the SQL is obtained: one real cycle of the demo on DuckDB records every
query's result; then, per dialect, the same cycle (a dry run: nothing written)
runs against a warehouse stand-in whose SQL dialect is the target's. The
monitor's own code renders every query for that dialect, and the stand-in hands
back the DuckDB result of the query with the same name, so every later query
is rendered exactly as on the real engine. Template render flags that a single
cycle does not reach (incremental pulls, leak hours) are rendered directly.

What this proves and what not: sqlglot (https://github.com/tobymao/sqlglot,
a general-purpose SQL parser) accepts the text in that dialect and every CAST
names a type the dialect spells that way. It does not prove the engine runs it
(function semantics, types of the user's columns, bind-parameter types); the
README's engine table says which engines were run for real.
"""

from __future__ import annotations

import re
from pathlib import Path

import jinja2
import pandas as pd
import pytest
import sqlglot  # in the `test` extra
from sqlglot import exp
from sqlglot.tokens import TokenType

import monitor.cycle as cycle_mod
import monitor.templates as templates_mod
from monitor.config import load_config
from monitor.demo import DEMO_AS_OF
from monitor.pull import render_source_sql
from monitor.templates import offline_dialect, template_names
from monitor.warehouse import Warehouse, _spark_markers

#: target dialect -> sqlglot's name for it
TARGETS = {"snowflake": "snowflake", "bigquery": "bigquery", "trino": "trino", "redshift": "redshift",
           "databricks": "databricks", "spark": "spark"}


class _Recording(Warehouse):
    """A real DuckDB warehouse that keeps each query's result by query name."""

    frames: dict[str, pd.DataFrame]

    def query(self, name, sql, params, *, expanding=()):
        frame = super().query(name, sql, params, expanding=expanding)
        self.frames[name] = frame.copy()
        return frame


class _StandIn:
    """The Warehouse interface with a target SQL dialect: records what it is asked
    to run and answers with the DuckDB result of the same query."""

    def __init__(self, dialect: str, frames: dict[str, pd.DataFrame]) -> None:
        self._dialect = offline_dialect(dialect)
        self.frames = frames
        self.calls: list[tuple[str, str, dict, tuple[str, ...]]] = []
        self.stats: list = []
        self.url = self.label = f"stand-in for {dialect}"

    @property
    def dialect(self):
        return self._dialect

    def query(self, name, sql, params, *, expanding=()):
        self.calls.append((name, sql, dict(params), tuple(expanding)))
        return self.frames[name].copy()

    def probe(self, name, sql, params, *, expanding=()):
        return list(self.query(name, sql, params, expanding=expanding).columns)

    pinned = False  # like every engine but DuckDB: no session temp tables, each template keeps its own CTE

    def pin(self) -> bool:
        return False

    def dispose(self) -> None:
        pass


def _config(demo, tmp_path: Path):
    cfg = load_config(demo["config"])
    # a state store that does not exist: the dry runs use an empty one in memory and write nothing
    return cfg.model_copy(update={"state": cfg.state.model_copy(update={"url": f"sqlite:///{tmp_path / 'absent.sqlite'}"})})


@pytest.fixture(scope="module")
def duckdb_frames(demo, tmp_path_factory):
    cfg = _config(demo, tmp_path_factory.mktemp("dialects"))
    rec: dict[str, pd.DataFrame] = {}

    def _open(settings, *, tracer=None):
        wh = _Recording(settings.url, tracer=tracer, timeout_seconds=settings.query_timeout_seconds)
        wh.frames = rec
        return wh

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(cycle_mod, "open_warehouse", _open)
        cycle_mod.run_cycle(cfg, as_of=DEMO_AS_OF, dry_run=True)
    assert "registry" in rec and any(k.startswith("metric[") for k in rec)
    return rec


def _rendered(dialect: str, demo, tmp_path: Path, frames) -> tuple[list[tuple[str, str, dict, tuple]], set[str]]:
    """Every query of one dry-run cycle rendered for ``dialect``, plus the assignment
    template's render flags, and the names of the templates that were rendered."""
    cfg = _config(demo, tmp_path)
    # only the registry's rows matter for which queries run; empty answers keep the statistics cheap
    stand_in = _StandIn(dialect, {k: (v if k == "registry" else v.iloc[:0]) for k, v in frames.items()})
    used: set[str] = set()
    real_get = templates_mod._ENV.get_template

    def _get(name, *a, **kw):
        used.add(name)
        return real_get(name, *a, **kw)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(cycle_mod, "open_warehouse", lambda settings, *, tracer=None: stand_in)
        mp.setattr(templates_mod._ENV, "get_template", _get)
        cycle_mod.run_cycle(cfg, as_of=DEMO_AS_OF, dry_run=True)
        calls = list(stand_in.calls)
        params = next(p for n, _s, p, _e in calls if n.startswith("assignments["))
        for inc in (False, True):
            for leak in (False, True):
                for src in cfg.sources:
                    calls.append((f"assignments[{src.name}] incremental={inc} leak_hours={leak}",
                                  render_source_sql(src, stand_in, incremental=inc, leak_hours=leak), params, ("experiment_ids",)))
    return calls, used


def _parse(sql: str, params: dict, expanding: tuple[str, ...], dialect: str):
    """Expand list parameters to one marker per value (as the drivers do) and parse.

    sqlglot's parser forgives a missing ``)`` after a CAST type, so the tokens
    (which know the dialect's strings and quoted identifiers) are also checked
    for balanced parentheses."""
    text, _args = _spark_markers(sql, params, expanding)
    depth = 0
    for tok in sqlglot.Dialect.get_or_raise(TARGETS[dialect]).tokenize(text):
        depth += {TokenType.L_PAREN: 1, TokenType.R_PAREN: -1}.get(tok.token_type, 0)
        if depth < 0:
            raise sqlglot.errors.ParseError(f"unbalanced ')' at line {tok.line}")
    if depth:
        raise sqlglot.errors.ParseError(f"{depth} unclosed '('")
    trees = [t for t in sqlglot.parse(text, read=TARGETS[dialect]) if t is not None]
    assert len(trees) == 1, f"{len(trees)} statements"
    return text, trees[0]


#: Synonyms the engines document for a type sqlglot spells another way (recalled from
#: memory of the engines' data-type reference pages): Snowflake "Numeric data types"
#: (DOUBLE PRECISION, FLOAT8 = DOUBLE; INTEGER, BIGINT = INT); BigQuery "Data types"
#: (INT, INTEGER, BIGINT, SMALLINT = INT64). DOUBLE PRECISION is *not* one in BigQuery.
SYNONYMS: dict[str, dict[str, tuple[str, ...]]] = {
    "snowflake": {"DOUBLE": ("DOUBLE PRECISION", "FLOAT8"), "INT": ("INTEGER", "BIGINT")},
    "bigquery": {"INT64": ("INT", "INTEGER", "BIGINT", "SMALLINT")},
}


def _cast_types_as_written(text: str, tree, dialect: str) -> list[str]:
    """CAST target types that sqlglot would spell differently in ``dialect``:
    written ``AS X)`` where the dialect says ``AS Y)`` and X is not a documented synonym."""
    wrong = []
    for cast in tree.find_all(exp.Cast):
        spelled = cast.to.sql(TARGETS[dialect])
        accepted = (spelled, *SYNONYMS.get(dialect, {}).get(spelled, ()))
        if not any(re.search(rf"\bAS {re.escape(a)}\)", text, re.IGNORECASE) for a in accepted):
            wrong.append(spelled)
    return wrong


@pytest.mark.parametrize("dialect", sorted(TARGETS))
def test_every_query_parses_in_the_dialect(dialect, demo, duckdb_frames, tmp_path):
    calls, used = _rendered(dialect, demo, tmp_path, duckdb_frames)
    # every query template in sql/ was rendered (a new template must be reached by the cycle)
    # first_assignments.sql.j2 is DuckDB syntax, built only in pinned DuckDB sessions (monitor/firsts.py);
    # the DuckDB tests run it (test_sql_*.py, the first-assignment-relation cases)
    expected = set(template_names()) - {"first_assignments.sql.j2"}
    assert expected <= used, f"templates never rendered: {expected - used}"
    assert len(calls) >= 8
    for name, sql, params, expanding in calls:
        try:
            text, tree = _parse(sql, params, expanding, dialect)
        except sqlglot.errors.ParseError as exc:
            pytest.fail(f"{dialect}: query {name} does not parse: {str(exc).splitlines()[0]}")
        assert isinstance(tree, (exp.Select, exp.Union, exp.With, exp.Query)), f"{dialect}: {name} is not a query"
        wrong = _cast_types_as_written(text, tree, dialect)
        assert not wrong, f"{dialect}: {name}: CAST types {dialect} spells differently: {sorted(set(wrong))}"
        # identifiers are quoted the dialect's way, values stay bind parameters
        quote = "`" if dialect in ("bigquery", "databricks", "spark") else '"'
        assert f"{quote}unit_id{quote}" in sql or name == "registry" or "unit_id" not in sql
        assert not re.search(r"2026-\d\d-\d\d", sql), f"{dialect}: {name}: a time value was pasted into the SQL"


def _broken_templates(tmp_path: Path, good: str, bad: str) -> Path:
    """A copy of sql/ with one dialect branch of a macro broken on purpose."""
    dst = tmp_path / "sql"
    dst.mkdir()
    loader = templates_mod._ENV.loader
    for name in loader.list_templates():
        (dst / name).write_text(loader.get_source(templates_mod._ENV, name)[0], encoding="utf-8")
    macros = dst / "_dialect.sql.j2"
    text = macros.read_text()
    assert text.count(good) == 1
    macros.write_text(text.replace(good, bad))
    return dst


#: (dialect whose branch is broken, broken text, queries that use it, an intact dialect)
BREAKS = [
    ("bigquery", ("CAST({{ expr }} AS FLOAT64)", "CAST({{ expr }} AS FLOAT64"), "metric[", "snowflake"),   # a lost ')'
    ("spark", ("CAST({{ expr }} AS STRING)", "CAST({{ expr }} STRING)"), "assignments[", "trino"),          # a lost AS
]


@pytest.mark.parametrize(("dialect", "edit", "prefix", "intact"), BREAKS, ids=[b[0] for b in BREAKS])
def test_a_broken_macro_fails_the_dialect_check(dialect, edit, prefix, intact, demo, duckdb_frames, tmp_path):
    broken = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_broken_templates(tmp_path, *edit))),
                                undefined=jinja2.StrictUndefined, autoescape=False, trim_blocks=True,
                                lstrip_blocks=True, keep_trailing_newline=True)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(templates_mod, "_ENV", broken)
        calls, _used = _rendered(dialect, demo, tmp_path, duckdb_frames)
        hit = [c for c in calls if c[0].startswith(prefix)]
        assert hit
        for name, sql, params, expanding in hit:
            with pytest.raises(sqlglot.errors.ParseError):
                _parse(sql, params, expanding, dialect)
        # the same broken file leaves the other dialects' branches intact
        calls, _used = _rendered(intact, demo, tmp_path, duckdb_frames)
        for name, sql, params, expanding in calls:
            _parse(sql, params, expanding, intact)


def test_a_type_the_dialect_does_not_spell_is_caught():
    """The CAST check itself: DOUBLE PRECISION is not BigQuery's spelling (FLOAT64)."""
    text = "SELECT CAST(x AS DOUBLE PRECISION) AS y FROM t"
    tree = sqlglot.parse_one(text, read="bigquery")
    assert _cast_types_as_written(text, tree, "bigquery") == ["FLOAT64"]
    text = "SELECT CAST(x AS FLOAT64) AS y FROM t"
    assert _cast_types_as_written(text, sqlglot.parse_one(text, read="bigquery"), "bigquery") == []


def test_offline_quoting_escapes_the_quote_character():
    from monitor.templates import Quoter

    assert Quoter(offline_dialect("spark")).ident("a`b") == "`a``b`"
    assert Quoter(offline_dialect("bigquery")).ident("a`b") == "`a\\`b`"
    assert Quoter(offline_dialect("snowflake")).table('db.t"x') == '"db"."t""x"'
    for d in ("spark", "bigquery", "snowflake"):
        q = Quoter(offline_dialect(d)).ident("we`ird\"name")
        tree = sqlglot.parse_one(f"SELECT {q} FROM t", read=TARGETS[d])
        assert tree.expressions[0].name == 'we`ird"name'
