"""Publishing runs to PostgreSQL with psycopg 3: one transaction and COPY per run, idempotent per run_id.

Each run is appended in one transaction: an advisory lock (one publisher per
schema at a time), the tables and views created or extended when missing
(:mod:`takeup.pipeline.outputs.publish.postgres_schema`), then — unless
``runs`` already holds the run, in which case nothing changes — every result
table's rows of the run through ``COPY ... FROM STDIN``.  A failure rolls the
whole run back; dashboards see a run completely or not at all.
"""

from __future__ import annotations

import duckdb

from takeup.pipeline.errors import PublishError
from takeup.pipeline.outputs.publish import postgres_schema as ddl
from takeup.pipeline.outputs.publish.published_rows import bind, published_select
from takeup.pipeline.outputs.publish.targets import Target
from takeup.schemas.publication import published_columns
from takeup.schemas.results import LATEST_VIEWS, RESULT_TABLES

__all__ = ["publish_postgres", "connect_postgres"]

_BATCH = 10_000


def connect_postgres(target: Target):
    """A psycopg connection to ``target`` (errors name the target without its password)."""
    try:
        import psycopg
    except ImportError:  # pragma: no cover - a dependency of the package
        raise PublishError("publishing to PostgreSQL needs psycopg 3 (pip install 'psycopg[binary]')") from None
    try:
        return psycopg.connect(target.location, connect_timeout=10, application_name="takeup-publish")
    except psycopg.Error as exc:
        raise PublishError(f"cannot connect to {target.name}: {target.scrub(_first_line(exc))}") from None


def _first_line(exc: BaseException) -> str:
    lines = [x.strip() for x in str(exc).strip().splitlines() if x.strip()]
    return " ".join(lines[:2]) if lines else type(exc).__name__


def _ensure_schema(cur, schema: str) -> None:
    cur.execute(f'CREATE SCHEMA IF NOT EXISTS "{schema}"')
    cur.execute("SELECT table_name, column_name FROM information_schema.columns WHERE table_schema = %s", [schema])
    existing = {(t, c) for t, c in cur.fetchall()}
    tables = {t for t, _ in existing}
    changed = False
    for table in RESULT_TABLES:
        if table not in tables:
            for sql in ddl.create_table_sql(schema, table) + ddl.comment_sql(schema, table):
                cur.execute(sql)
            changed = True
            continue
        for col in published_columns(table):
            if (table, col.name) not in existing:
                if not col.nullable:
                    raise PublishError(f"published table {schema}.{table} lacks the required column {col.name}; "
                                       "publish to a new schema ([publish] postgres_schema)")
                cur.execute(ddl.add_column_sql(schema, table, col))
                changed = True
    cur.execute("SELECT table_name FROM information_schema.views WHERE table_schema = %s", [schema])
    if changed or not set(LATEST_VIEWS) <= {r[0] for r in cur.fetchall()}:
        for sql in ddl.views_sql(schema):
            cur.execute(sql)


def _grant_reader(cur, schema: str, role: str) -> None:
    from psycopg import sql
    ddl.check_identifier(role, "reader role")
    cur.execute("SELECT 1 FROM pg_roles WHERE rolname = %s", [role])
    if cur.fetchone() is None:
        cur.execute(sql.SQL("CREATE ROLE {} NOLOGIN").format(sql.Identifier(role)))
    for statement in ddl.reader_role_sql(schema, role):
        cur.execute(statement)


def publish_postgres(con: duckdb.DuckDBPyConnection, target: Target, run_ids: list[str], min_cell_count: int,
                     reader_role: str | None = None) -> list[tuple[str, str, int | None, str]]:
    """Append each run of ``run_ids`` (oldest first) to ``target``.

    Returns one (run_id, status, rows, message) per run; status ``ok``,
    ``unchanged`` (already there) or ``failed`` (that run rolled back; later runs
    are still tried).  Connection failures raise :class:`PublishError`.
    """
    import psycopg
    schema = ddl.check_identifier(target.schema, "PostgreSQL schema")
    out = []
    pg = connect_postgres(target)
    try:
        for run_id in run_ids:
            try:
                with pg.transaction():
                    with pg.cursor() as cur:
                        cur.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", [f"takeup publish {schema}"])
                        _ensure_schema(cur, schema)
                        if reader_role:
                            _grant_reader(cur, schema, reader_role)
                        cur.execute(f'SELECT 1 FROM "{schema}"."runs" WHERE run_id = %s', [run_id])
                        if cur.fetchone() is not None:
                            out.append((run_id, "unchanged", None, f"{target.name} already holds this run"))
                            continue
                        rows = 0
                        for table in RESULT_TABLES:
                            rows += _copy_table(con, cur, schema, table, run_id, min_cell_count)
                out.append((run_id, "ok", rows, f"appended to schema {schema}"))
            except psycopg.Error as exc:
                out.append((run_id, "failed", None, target.scrub(f"{type(exc).__name__}: {_first_line(exc)}")))
            except PublishError as exc:
                out.append((run_id, "failed", None, target.scrub(str(exc))))
    finally:
        pg.close()
    return out


def _copy_table(con: duckdb.DuckDBPyConnection, cur, schema: str, table: str, run_id: str, k: int) -> int:
    names = [c.name for c in published_columns(table)]
    cols = ", ".join(f'"{n}"' for n in names)
    sql = published_select(table, "run")
    result = con.execute(sql, bind(sql, run_id, k))
    n = 0
    with cur.copy(f'COPY "{schema}"."{table}" ({cols}) FROM STDIN') as copy:
        while True:
            batch = result.fetchmany(_BATCH)
            if not batch:
                break
            for row in batch:
                copy.write_row(row)
            n += len(batch)
    return n
