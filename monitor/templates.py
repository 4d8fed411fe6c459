"""Render the SQL templates in ``sql/``.

Templates are Jinja2 with ``StrictUndefined``: a variable a template needs and
the caller did not give fails loudly. Two rules keep them safe:

* every identifier that comes from the config (table, column) is quoted by the
  SQLAlchemy dialect here, through :class:`Quoter`, before a template sees it;
* every value (times, experiment ids) is a bind parameter (``:as_of``), never
  text pasted into the SQL.

The templates ship inside the installed package as ``monitor/sql`` (a regular
package, so that :func:`importlib.resources.files` gives one folder in every
kind of install); in a source checkout that package is the top-level ``sql/``
folder (``pyproject.toml`` maps it).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from importlib import resources
from importlib.resources.abc import Traversable
from typing import Any

import jinja2
from sqlalchemy.engine import Dialect, default
from sqlalchemy.sql import compiler

from monitor.config import RegistryConfig, SourceConfig
from monitor.errors import ConfigError

__all__ = ["OFFLINE_DIALECTS", "Quoter", "naive_utc", "offline_dialect", "registry_context", "render", "source_context",
           "template_names"]


def naive_utc(t: datetime) -> datetime:
    """A time as a bind parameter for the templates' naive-UTC timestamp columns (a naive
    input is taken to be UTC already)."""
    return t if t.tzinfo is None else t.astimezone(UTC).replace(tzinfo=None)


class _PackageLoader(jinja2.BaseLoader):
    """Load templates from a package's resources (:func:`importlib.resources.files`).

    Works wherever the package is: a wheel in site-packages, an editable install
    and a zip file, because it only reads resources through their ``Traversable``
    interface and never turns one into a file-system path.
    """

    def __init__(self, package: str) -> None:
        self.package = package

    def _root(self) -> Traversable:
        return resources.files(self.package)

    def get_source(self, environment: jinja2.Environment, template: str) -> tuple[str, None, Callable[[], bool]]:
        resource = self._root().joinpath(template)
        if not resource.is_file():
            raise jinja2.TemplateNotFound(template)
        return resource.read_text(encoding="utf-8"), None, lambda: True

    def list_templates(self) -> list[str]:
        return sorted(r.name for r in self._root().iterdir() if r.is_file() and r.name.endswith(".j2"))


_ENV = jinja2.Environment(
    loader=_PackageLoader("monitor.sql"),
    undefined=jinja2.StrictUndefined,
    autoescape=False,
    trim_blocks=True,
    lstrip_blocks=True,
    keep_trailing_newline=True,
)


def template_names() -> list[str]:
    """The query templates (macro files starting with ``_`` excluded)."""
    return sorted(n for n in _ENV.list_templates() if n.endswith(".sql.j2") and not n.startswith("_"))


def render(name: str, dialect: Dialect | str, **context: Any) -> str:
    """Render template ``name`` (e.g. ``"assignments.sql.j2"``) for ``dialect``."""
    dname = dialect if isinstance(dialect, str) else dialect.name
    try:
        tpl = _ENV.get_template(name)
        sql = tpl.render(dialect=dname, **context)
    except jinja2.UndefinedError as exc:
        raise ConfigError(f"SQL template {name}: {exc.message}") from exc
    except jinja2.TemplateError as exc:
        raise ConfigError(f"SQL template {name}: {exc}") from exc
    return "\n".join(line.rstrip() for line in sql.strip().splitlines()) + "\n"


#: Engines whose identifier quoting is known here without their SQLAlchemy dialect
#: package: the Spark backend (no SQLAlchemy dialect) and the warehouses the
#: dialect tests render for. Names are the ones those packages register.
OFFLINE_DIALECTS: dict[str, str] = {
    "spark": "`", "databricks": "`", "bigquery": "`",
    "snowflake": '"', "trino": '"', "redshift": '"',
}


class _BackslashPreparer(compiler.IdentifierPreparer):
    """BigQuery: a backtick inside a quoted identifier is escaped with a backslash."""

    def _escape_identifier(self, value: str) -> str:
        return value.replace("\\", "\\\\").replace("`", "\\`")


def offline_dialect(name: str) -> Dialect:
    """A SQLAlchemy dialect that only quotes identifiers like engine ``name``
    (backticks for Spark, Databricks and BigQuery; double quotes for Snowflake,
    Trino and Redshift), for rendering templates without the engine's driver.

    Raises
    ------
    ConfigError
        ``name`` is not one of :data:`OFFLINE_DIALECTS`.
    """
    try:
        quote = OFFLINE_DIALECTS[name]
    except KeyError:
        raise ConfigError(f"no offline SQL dialect {name!r} (known: {', '.join(sorted(OFFLINE_DIALECTS))})") from None
    base = _BackslashPreparer if name == "bigquery" else compiler.IdentifierPreparer

    class _Preparer(base):  # type: ignore[valid-type,misc]
        def __init__(self, dialect: Dialect, **kw: Any) -> None:
            super().__init__(dialect, initial_quote=quote, escape_quote=quote)

    dialect_cls = type(f"_{name.title()}Dialect", (default.DefaultDialect,), {"name": name, "preparer": _Preparer})
    return dialect_cls()


@dataclass(frozen=True)
class Quoter:
    """Quote identifiers with the dialect's own rules."""

    dialect: Dialect

    def ident(self, name: str) -> str:
        return self.dialect.identifier_preparer.quote_identifier(name)

    def table(self, dotted: str) -> str:
        """``schema.table`` (or ``catalog.schema.table``): each part quoted."""
        parts = [p for p in dotted.split(".")]
        if not all(parts):
            raise ConfigError(f"table name {dotted!r} has an empty part")
        return ".".join(self.ident(p) for p in parts)

    def from_clause(self, table: str | None, sql: str | None, alias: str) -> str:
        if table is not None:
            return self.table(table)
        assert sql is not None
        body = sql.strip().rstrip(";")
        return f"(\n{body}\n) AS {self.ident(alias)}"


def source_context(src: SourceConfig, q: Quoter) -> dict[str, Any]:
    """Template variables for an assignment source (or pipeline stage)."""
    assert src.columns is not None
    cols = src.columns
    return {
        "source": q.from_clause(src.table, src.sql, "user_source"),
        "cols": {
            "unit": q.ident(cols.unit),
            "experiment": q.ident(cols.experiment),
            "variant": q.ident(cols.variant),
            "timestamp": q.ident(cols.timestamp),
        },
        "segments": [
            {"column": q.ident(seg), "alias": q.ident(f"seg_{i}")} for i, seg in enumerate(src.segments or [])
        ],
    }


_REGISTRY_ALIASES = ("experiment", "variant", "weight", "phase", "phase_start", "phase_end", "is_control", "status", "owner", "title")


def registry_context(reg: RegistryConfig, q: Quoter) -> dict[str, Any]:
    mapping = reg.columns
    columns = []
    for alias in _REGISTRY_ALIASES:
        col = getattr(mapping, alias)
        if col is not None:
            columns.append((q.ident(alias), q.ident(col)))
    return {"source": q.from_clause(reg.table, reg.sql, "user_registry"), "columns": columns}
