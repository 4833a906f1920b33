"""PostgreSQL DDL of the published tables, generated from the result models.

Types are mapped from the models' DuckDB types (:data:`PG_TYPES`), every table
and column gets a ``COMMENT`` from the model's docstring and field
descriptions, ``runs.run_id`` is the primary key (one publication per run),
the other tables are indexed on ``run_id``, and the ``latest_*`` views show the
newest published finished run.  Identifiers are quoted; comment texts are SQL
literals built from the models (never from data).
"""

from __future__ import annotations

import re

from takeup.schemas.ddl import ColumnSpec
from takeup.schemas.publication import published_columns
from takeup.schemas.results import LATEST_VIEWS, RESULT_TABLES

__all__ = ["PG_TYPES", "pg_type", "create_table_sql", "add_column_sql", "comment_sql", "views_sql",
           "reader_role_sql", "check_identifier"]

#: model SQL type -> PostgreSQL type
PG_TYPES: dict[str, str] = {
    "VARCHAR": "text",
    "BIGINT": "bigint",
    "DOUBLE": "double precision",
    "BOOLEAN": "boolean",
    "DATE": "date",
    "TIMESTAMP": "timestamp without time zone",
}


def check_identifier(name: str, what: str) -> str:
    if not re.fullmatch(r"[a-z_][a-z0-9_]{0,62}", name):
        raise ValueError(f"{what} {name!r} must be lower-case letters, digits and _ (at most 63, not starting "
                         "with a digit)")
    return name


def _q(identifier: str) -> str:
    return '"' + identifier.replace('"', '""') + '"'


def _lit(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def pg_type(col: ColumnSpec) -> str:
    try:
        return PG_TYPES[col.sql_type]
    except KeyError:
        raise TypeError(f"no PostgreSQL type for {col.sql_type} ({col.name})") from None


def _column_def(col: ColumnSpec) -> str:
    line = f"{_q(col.name)} {pg_type(col)}"
    if not col.nullable:
        line += " NOT NULL"
    if col.allowed is not None:
        values = ", ".join(_lit(v) for v in col.allowed)
        line += f" CHECK ({_q(col.name)} IN ({values}))"
    return line


def create_table_sql(schema: str, table: str) -> list[str]:
    """CREATE TABLE (and its run_id index) of the published copy of ``table``."""
    cols = [_column_def(c) for c in published_columns(table)]
    if table == "runs":
        cols.append('PRIMARY KEY ("run_id")')
    out = [f"CREATE TABLE IF NOT EXISTS {_q(schema)}.{_q(table)} (\n    " + ",\n    ".join(cols) + "\n)"]
    if table != "runs":
        out.append(f"CREATE INDEX IF NOT EXISTS {_q(table + '_run_id')} ON {_q(schema)}.{_q(table)} (\"run_id\")")
    return out


def add_column_sql(schema: str, table: str, col: ColumnSpec) -> str:
    """ALTER TABLE for a column a newer model added (nullable only; others need a new table)."""
    return f"ALTER TABLE {_q(schema)}.{_q(table)} ADD COLUMN IF NOT EXISTS {_q(col.name)} {pg_type(col)}"


def comment_sql(schema: str, table: str) -> list[str]:
    """COMMENT ON TABLE / COLUMN from the model's docstring and field descriptions."""
    doc = (RESULT_TABLES[table].__doc__ or "").strip().split("\n")[0]
    out = [f"COMMENT ON TABLE {_q(schema)}.{_q(table)} IS {_lit(doc + ' Published by takeup.')}"]
    for c in published_columns(table):
        out.append(f"COMMENT ON COLUMN {_q(schema)}.{_q(table)}.{_q(c.name)} IS {_lit(c.description)}")
    return out


def views_sql(schema: str) -> list[str]:
    """The latest_* views: rows of the newest finished run published (as in the warehouse)."""
    latest = (f"(SELECT run_id FROM {_q(schema)}.\"runs\" WHERE status IN ('ok', 'partial') "
              "ORDER BY started_at DESC, run_id DESC LIMIT 1)")
    out = []
    for view, table in LATEST_VIEWS.items():
        out.append(f"CREATE OR REPLACE VIEW {_q(schema)}.{_q(view)} AS SELECT * FROM {_q(schema)}.{_q(table)} "
                   f"WHERE run_id = {latest}")
        out.append(f"COMMENT ON VIEW {_q(schema)}.{_q(view)} IS "
                   f"{_lit(f'Rows of {table} of the latest finished run published.')}")
    return out


def reader_role_sql(schema: str, role: str) -> list[str]:
    """Grants of the read-only role dashboards log in through (the role itself is created by the caller)."""
    check_identifier(role, "reader role")
    return [f"GRANT USAGE ON SCHEMA {_q(schema)} TO {_q(role)}",
            f"GRANT SELECT ON ALL TABLES IN SCHEMA {_q(schema)} TO {_q(role)}",
            f"ALTER DEFAULT PRIVILEGES IN SCHEMA {_q(schema)} GRANT SELECT ON TABLES TO {_q(role)}"]
