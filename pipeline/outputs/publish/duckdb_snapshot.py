"""Publishing a DuckDB snapshot file: result tables and latest_* views, replaced by one rename.

The snapshot is built under a temporary name beside the target (attached to the
warehouse connection, filled with ``CREATE TABLE ... AS SELECT``, detached, views
added, flushed to disk) and then renamed over the target.  A dashboard that holds
the old file open keeps reading the old file (the rename replaces the directory
entry, not the open file), never blocks the next publication and never touches the
warehouse's lock; the next connection it opens sees the new snapshot.

Besides the result tables (every finished run up to the published one, small cells
suppressed) and the ``latest_*`` views, the snapshot has a one-row table
``publication`` (run_id, as_of, published_at, schema_version, min_cell_count, runs).
"""

from __future__ import annotations

import json
import os
import secrets
from datetime import datetime, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.errors import PublishError
from takeup.pipeline.outputs.publish.published_rows import (RUNS_UP_TO, bind, published_run,
                                                                 published_select, run_row_count)
from takeup.schemas.results import RESULT_TABLES, create_views_sql

__all__ = ["publish_duckdb", "snapshot_info"]

_ALIAS = "_takeup_snapshot"


def _literal(text: str) -> str:
    """A SQL string literal (ATTACH takes no bound parameter; the path is the one takeup chose)."""
    return "'" + text.replace("'", "''") + "'"


def snapshot_info(path: Path) -> dict | None:
    """The ``publication`` row of the snapshot at ``path`` (None when absent or unreadable)."""
    if not Path(path).is_file():
        return None
    try:
        con = duckdb.connect(str(path), read_only=True)
    except duckdb.Error:
        return None
    try:
        row = con.execute("SELECT run_id, min_cell_count, runs, schema_version FROM publication").fetchall()
    except duckdb.Error:
        return None
    finally:
        con.close()
    if len(row) != 1:
        return None
    return {"run_id": row[0][0], "min_cell_count": row[0][1], "runs": json.loads(row[0][2]),
            "schema_version": row[0][3]}


def _clean_leftovers(target: Path) -> None:
    for p in target.parent.glob(f".{target.name}.tmp-*"):
        p.unlink(missing_ok=True)


def publish_duckdb(con: duckdb.DuckDBPyConnection, target: Path, run_id: str, min_cell_count: int,
                   schema_version: str) -> tuple[str, int, str]:
    """Publish ``run_id`` to the snapshot file ``target``; returns (status, rows of the run, message)."""
    target = Path(target)
    if target.is_dir():
        raise PublishError(f"DuckDB snapshot target {target} is a folder; give a file name")
    if not target.parent.is_dir():
        raise PublishError(f"DuckDB snapshot target {target}: its folder {target.parent} does not exist")
    run = published_run(con, run_id)
    history = [r[0] for r in con.execute(RUNS_UP_TO + " ORDER BY r.started_at, r.run_id", {"run": run_id}).fetchall()]
    _clean_leftovers(target)
    old = snapshot_info(target)
    if old == {"run_id": run_id, "min_cell_count": min_cell_count, "runs": history, "schema_version": schema_version}:
        return "unchanged", run_row_count(con, run_id), f"{target} already holds this run"
    tmp = target.with_name(f".{target.name}.tmp-{secrets.token_hex(6)}")
    now = datetime.now(timezone.utc)
    try:
        con.execute(f"ATTACH {_literal(str(tmp))} AS {_ALIAS}")
        try:
            for table in RESULT_TABLES:
                sql = published_select(table, "history")
                con.execute(f'CREATE TABLE {_ALIAS}.main."{table}" AS {sql}', bind(sql, run_id, min_cell_count))
            con.execute(f"CREATE TABLE {_ALIAS}.main.publication AS SELECT $run AS run_id, $as_of::DATE AS as_of, "
                        "$started::TIMESTAMP AS run_started_at, $now::TIMESTAMP AS published_at, "
                        "$schema AS schema_version, $k::BIGINT AS min_cell_count, $runs AS runs",
                        {"run": run_id, "as_of": run.as_of, "started": run.started_at,
                         "now": now.replace(tzinfo=None), "schema": schema_version, "k": min_cell_count,
                         "runs": json.dumps(history)})
        finally:
            con.execute(f"DETACH {_ALIAS}")
        snap = duckdb.connect(str(tmp))
        try:
            for sql in create_views_sql():
                snap.execute(sql)
            snap.execute("CHECKPOINT")
        finally:
            snap.close()
        fd = os.open(tmp, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, target)
        dfd = os.open(target.parent, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    finally:
        tmp.unlink(missing_ok=True)
        Path(str(tmp) + ".wal").unlink(missing_ok=True)
    return "ok", run_row_count(con, run_id), f"snapshot {target} ({len(history)} run(s))"
