"""Opening, creating and describing the DuckDB warehouse file."""

from __future__ import annotations

from takeup.pipeline.errors import WarehouseError  # noqa: F401  (re-exported)

import os
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterator

import duckdb

from takeup.pipeline.pseudonym import PseudonymKey, create_key_file, load_key
from takeup.schemas.config import StudyConfig, parse_config
from takeup.schemas.ddl import create_table_sql
from takeup.schemas.records import STORAGE_TABLES

__all__ = [
    "WarehouseError", "SCHEMA_VERSION", "default_warehouse_path", "init_warehouse", "connect",
    "stored_config", "store_config", "check_key", "all_table_models", "transaction",
]

SCHEMA_VERSION = "1"




def default_warehouse_path() -> Path:
    return Path(os.environ.get("TAKEUP_WAREHOUSE", "takeup.duckdb"))


def all_table_models() -> dict:
    """Every table the warehouse holds: storage tables, then result tables."""
    from takeup.schemas.results import RESULT_TABLES
    return {**STORAGE_TABLES, **RESULT_TABLES}


def _create_tables(con: duckdb.DuckDBPyConnection) -> None:
    """Create missing tables, and add the nullable columns a newer version appended to a model."""
    from takeup.schemas.ddl import columns_of
    existing = {(t, c) for t, c in con.execute(
        "SELECT table_name, column_name FROM information_schema.columns WHERE table_schema = 'main'").fetchall()}
    tables = {t for t, _ in existing}
    for table, model in all_table_models().items():
        if table not in tables:
            con.execute(create_table_sql(table, model))
            continue
        for col in columns_of(model):
            if (table, col.name) not in existing and col.nullable:
                con.execute(f'ALTER TABLE "{table}" ADD COLUMN "{col.name}" {col.sql_type}')
    from takeup.schemas.results import create_views_sql
    for sql in create_views_sql():
        con.execute(sql)


#: DuckDB's memory budget for a connection (it spills to disk beyond it): keeps a run on
#: 10 million participants within about 2 GB of resident memory; override with TAKEUP_MEMORY_LIMIT
DEFAULT_MEMORY_LIMIT = "1200MB"


def connect(path: Path | str, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """Open an existing warehouse (tables are created if a newer version added some)."""
    p = Path(path)
    if not p.exists():
        raise WarehouseError(f"warehouse {p} does not exist; create it with 'takeup init --warehouse {p}'")
    limit = os.environ.get("TAKEUP_MEMORY_LIMIT", DEFAULT_MEMORY_LIMIT)
    try:
        con = duckdb.connect(str(p), read_only=read_only, config={"memory_limit": limit})
    except duckdb.IOException as exc:
        raise WarehouseError(f"cannot open warehouse {p}: {exc}") from None
    except duckdb.Error as exc:
        raise WarehouseError(f"cannot open warehouse {p} with memory limit {limit!r}: {exc}") from None
    if not read_only:
        _create_tables(con)
    return con


def init_warehouse(path: Path | str, config: StudyConfig | None = None) -> tuple[Path, Path | None]:
    """Create the warehouse file (mode 0600), its tables, the key file and store ``config``.

    Returns the warehouse path and the key file path (None when the key comes from
    the environment).  Idempotent: an existing warehouse keeps its data.
    """
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    key_path = None
    if not os.environ.get("TAKEUP_ID_KEY"):
        key_path = create_key_file(p)
    key = load_key(p)
    old_umask = os.umask(0o077)
    try:
        con = duckdb.connect(str(p))
    finally:
        os.umask(old_umask)
    try:
        os.chmod(p, 0o600)
        _create_tables(con)
        with transaction(con):
            meta = dict(con.execute("SELECT key, value FROM warehouse_meta").fetchall())
            if "key_fingerprint" in meta and meta["key_fingerprint"] != key.fingerprint():
                raise WarehouseError(
                    f"warehouse {p} was created with a different pseudonymisation key than the one in {key.source}")
            if not meta:
                con.executemany("INSERT INTO warehouse_meta VALUES (?, ?)", [
                    ("schema_version", SCHEMA_VERSION), ("key_fingerprint", key.fingerprint()),
                    ("created_at", datetime.now(timezone.utc).isoformat())])
            if config is not None or stored_config(con) is None:
                store_config(con, config or StudyConfig())
    finally:
        con.close()
    return p, key_path


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """BEGIN ... COMMIT, or ROLLBACK on any exception (then re-raise)."""
    con.execute("BEGIN TRANSACTION")
    try:
        yield con
    except BaseException:
        con.execute("ROLLBACK")
        raise
    else:
        con.execute("COMMIT")


def store_config(con: duckdb.DuckDBPyConnection, config: StudyConfig) -> str:
    """Record ``config`` as the warehouse's current study configuration; returns its hash."""
    h = config.config_hash()
    latest = con.execute(
        "SELECT config_hash FROM study_configs ORDER BY stored_at DESC LIMIT 1").fetchone()
    if latest is None or latest[0] != h:
        con.execute("INSERT INTO study_configs VALUES (?, ?, ?)",
                    [h, datetime.now(timezone.utc).replace(tzinfo=None), config.canonical_json()])
    return h


def stored_config(con: duckdb.DuckDBPyConnection) -> StudyConfig | None:
    row = con.execute("SELECT config_json FROM study_configs ORDER BY stored_at DESC LIMIT 1").fetchone()
    if row is None:
        return None
    import json
    return parse_config(json.loads(row[0]), "the warehouse's stored configuration")


def check_key(con: duckdb.DuckDBPyConnection, key: PseudonymKey, path: Path) -> None:
    """Refuse a key that differs from the one the warehouse was created with."""
    row = con.execute("SELECT value FROM warehouse_meta WHERE key = 'key_fingerprint'").fetchone()
    if row is not None and row[0] != key.fingerprint():
        raise WarehouseError(
            f"the pseudonymisation key from {key.source} is not the one warehouse {path} was created with; "
            "ingesting with it would split participants into unrelated pseudonyms")
