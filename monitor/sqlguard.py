"""Check that a user-supplied ``sql:`` is one read-only query.

Every ``sql:`` in the configuration (registry, assignments, stages, metrics and
their denominators) is pasted into the monitor's templates as a subquery. Before
anything runs, :func:`check_select` parses it with sqlglot in the warehouse's
dialect and accepts exactly one statement that is a query (``SELECT``,
``WITH ... SELECT``, or a ``UNION`` / ``INTERSECT`` / ``EXCEPT`` of them) and
contains nothing that writes or changes the session:

* no second statement (``SELECT 1) AS s; COMMIT; INSERT ...`` does not parse as
  one query, and an unclosed string or comment is a tokenizer error);
* no data-changing node anywhere in the tree: ``INSERT`` / ``UPDATE`` /
  ``DELETE`` / ``MERGE`` (also inside a ``WITH``), ``SELECT ... INTO``,
  ``COPY``, DDL, ``SET``, transaction control, ``FOR UPDATE`` / ``FOR SHARE``;
* none of the functions in :data:`SIDE_EFFECT_FUNCTIONS` (``set_config``,
  PostgreSQL's server-file and large-object functions, sequences, ``dblink``...).

This is the first of three layers; the warehouse sessions are the second
(:mod:`monitor.warehouse`: PostgreSQL pulls in ``READ ONLY`` transactions,
DuckDB files opened read-only with external file access off) and a read-only
database role is the third (README, "Reliability").
"""

from __future__ import annotations

import logging

import sqlglot
from sqlglot import exp
from sqlglot.errors import ParseError, TokenError

__all__ = ["SIDE_EFFECT_FUNCTIONS", "check_select", "sqlglot_dialect"]

_SQLGLOT_LOG = logging.getLogger("sqlglot")

#: SQLAlchemy backend name -> sqlglot dialect name (others parse with sqlglot's generic dialect).
_DIALECTS = {
    "postgresql": "postgres", "duckdb": "duckdb", "spark": "spark", "databricks": "databricks",
    "sqlite": "sqlite", "mysql": "mysql", "mariadb": "mysql", "snowflake": "snowflake", "bigquery": "bigquery",
    "trino": "trino", "redshift": "redshift", "mssql": "tsql", "oracle": "oracle", "clickhouse": "clickhouse",
}

#: Functions with effects outside the query's result (lower case); refused wherever they appear.
SIDE_EFFECT_FUNCTIONS = frozenset({
    # session and transaction characteristics
    "set_config",
    # server files and large objects (PostgreSQL core and adminpack)
    "lo_export", "lo_import", "lo_unlink", "lo_create", "lo_creat", "lo_from_bytea", "lo_put", "lo_truncate",
    "pg_file_write", "pg_file_rename", "pg_file_unlink", "pg_file_sync",
    # sequences, remote statements, server control, notifications, locks
    "nextval", "setval", "dblink", "dblink_exec", "dblink_send_query",
    "pg_terminate_backend", "pg_cancel_backend", "pg_reload_conf", "pg_rotate_logfile", "pg_switch_wal",
    "pg_create_restore_point", "pg_promote", "pg_notify",
    "pg_advisory_lock", "pg_advisory_xact_lock", "pg_try_advisory_lock", "pg_try_advisory_xact_lock",
})

#: sqlglot node classes that write, define, or change the session or the transaction.
_WRITE_NODES = tuple(
    cls for cls in (getattr(exp, name, None) for name in (
        "Insert", "Update", "Delete", "Merge", "Into", "Copy", "Create", "Drop", "Alter", "AlterTable",
        "TruncateTable", "Set", "SetItem", "Transaction", "Commit", "Rollback", "Command", "Lock", "Pragma",
        "Use", "Attach", "Detach", "Install", "Load", "Grant", "Revoke", "Analyze", "Describe", "Kill",
    )) if isinstance(cls, type)
)


def sqlglot_dialect(backend: str | None) -> str | None:
    """sqlglot's dialect name for a SQLAlchemy backend (``postgresql``, ``duckdb``...) or ``spark``."""
    return _DIALECTS.get((backend or "").split("+")[0])


def _function_name(node: exp.Func) -> str:
    if isinstance(node, exp.Anonymous):
        return str(node.name).lower()
    return node.sql_name().lower()


def check_select(sql: str, dialect: str | None) -> str | None:
    """Why ``sql`` is not one read-only query (a short phrase), or None when it is.

    ``dialect`` is a sqlglot dialect name (:func:`sqlglot_dialect`); None parses
    with sqlglot's generic dialect.
    """
    quiet = _SQLGLOT_LOG.level
    _SQLGLOT_LOG.setLevel(logging.ERROR)  # its "falling back to parsing as a Command" notice: the answer says it
    try:
        statements = [s for s in sqlglot.parse(sql, read=dialect) if s is not None]
    except TokenError as exc:
        return f"cannot be read as SQL ({str(exc).splitlines()[0][:60]}...; an unclosed string or comment?)"
    except ParseError as exc:
        first = exc.errors[0] if exc.errors else {}
        where = f" at line {first['line']}, column {first['col']}" if first.get("line") else ""
        return f"is not one valid SQL statement (parse error{where})"
    finally:
        _SQLGLOT_LOG.setLevel(quiet)
    if len(statements) != 1:
        return f"holds {len(statements) or 'no'} statements; give exactly one SELECT"
    tree = statements[0]
    body = tree.this if isinstance(tree, exp.Subquery) else tree
    if not isinstance(body, exp.Query):
        kind = (str(tree.this).split() or ["?"])[0] if isinstance(tree, exp.Command) else tree.key
        kind = kind.upper()
        article = "an" if kind[:1] in "AEIOU" else "a"
        return f"is {article} {kind} statement; only a SELECT (or WITH ... SELECT) is allowed"
    for node in tree.walk():
        if isinstance(node, _WRITE_NODES):
            what = {"into": "SELECT ... INTO", "lock": "FOR UPDATE / FOR SHARE"}.get(node.key, node.key.upper())
            return f"contains {what}; only a read-only SELECT is allowed"
        if isinstance(node, exp.Func) and _function_name(node) in SIDE_EFFECT_FUNCTIONS:
            return f"calls {_function_name(node)}(), which has side effects; only a read-only SELECT is allowed"
    return None
