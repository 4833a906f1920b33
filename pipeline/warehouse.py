"""Opening, creating and describing the DuckDB warehouse file."""

from __future__ import annotations

from takeup.pipeline.errors import WarehouseError  # noqa: F401  (re-exported)

import os
import shutil
import tempfile
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterator

import duckdb

from takeup.pipeline.pseudonym import (PseudonymKey, create_key_file, key_check_matches, legacy_fingerprint, load_key,
                                       make_key_check)
from takeup.schemas.config import StudyConfig, parse_config
from takeup.schemas.ddl import create_table_sql
from takeup.schemas.records import STORAGE_TABLES

__all__ = [
    "WarehouseError", "SCHEMA_VERSION", "default_warehouse_path", "init_warehouse", "connect",
    "stored_config", "store_config", "check_key", "all_table_models", "transaction", "private_umask",
    "temp_dir_for", "memory_connection", "upgrade_to_state",
]

#: 2: salted scrypt key check instead of the unsalted fingerprint; length-prefixed pseudonym messages
#: for new warehouses (older ones keep theirs, recorded as ``pseudonym_encoding``); see check_key.
#: 3: ``participant_state`` (one row per assigned participant x outcome, kept up to date at ingestion)
#: and ``participant_state_batches``; a warehouse of version 2 gets them on its first writable open
#: (:func:`upgrade_to_state`), record tables unchanged
SCHEMA_VERSION = "3"




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


def private_umask() -> None:
    """Deny group and others every file this process creates from now on (umask |= 077).

    DuckDB creates the ``.wal`` file and its spill files long after the connection
    is opened, so the umask is set for the process rather than around ``connect``.
    """
    current = os.umask(0o077)
    os.umask(current | 0o077)


def temp_dir_for(warehouse: Path) -> Path:
    """The private (0700) directory DuckDB spills to for ``warehouse``: ``<warehouse>.tmp``."""
    d = warehouse.with_name(warehouse.name + ".tmp")
    if d.is_symlink():
        raise WarehouseError(f"{d} is a symbolic link; takeup keeps spill files only in a private directory")
    try:
        d.mkdir(mode=0o700, exist_ok=True)
        os.chmod(d, 0o700)
    except OSError as exc:
        raise WarehouseError(f"cannot prepare the private spill directory {d}: {exc.strerror}") from None
    return d


def _memory_limit() -> str:
    return os.environ.get("TAKEUP_MEMORY_LIMIT", DEFAULT_MEMORY_LIMIT)


@contextmanager
def memory_connection() -> Iterator[duckdb.DuckDBPyConnection]:
    """An in-memory DuckDB connection that spills only to a fresh private (0700) directory, removed after."""
    private_umask()
    d = tempfile.mkdtemp(prefix="takeup-spill-")
    try:
        con = duckdb.connect(":memory:", config={"memory_limit": _memory_limit(), "temp_directory": d})
        try:
            yield con
        finally:
            con.close()
    finally:
        shutil.rmtree(d, ignore_errors=True)


def connect(path: Path | str, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """Open an existing warehouse (tables are created if a newer version added some).

    The process umask becomes restrictive (:func:`private_umask`) and DuckDB spills to the
    private directory :func:`temp_dir_for`.
    """
    p = Path(path)
    if not p.exists():
        raise WarehouseError(f"warehouse {p} does not exist; create it with 'takeup init --warehouse {p}'")
    private_umask()
    limit = _memory_limit()
    config = {"memory_limit": limit, "temp_directory": str(temp_dir_for(p))}
    try:
        con = duckdb.connect(str(p), read_only=read_only, config=config)
    except duckdb.IOException as exc:
        raise WarehouseError(f"cannot open warehouse {p}: {str(exc).splitlines()[0]}") from None
    except duckdb.Error as exc:
        raise WarehouseError(f"cannot open warehouse {p} with memory limit {limit!r}: "
                             f"{str(exc).splitlines()[0]}") from None
    if not read_only:
        _create_tables(con)
        upgrade_to_state(con)
    return con


def upgrade_to_state(con: duckdb.DuckDBPyConnection) -> bool:
    """Schema 2 -> 3: build ``participant_state`` from the stored records and record version 3.

    Runs on the first writable :func:`connect` of an older warehouse (``takeup ingest``,
    ``takeup run`` or ``takeup init`` on it).  The record tables are not touched, so every
    stored run reproduces as before.  Returns True when the warehouse was upgraded.
    """
    meta = dict(con.execute("SELECT key, value FROM warehouse_meta").fetchall())
    version = meta.get("schema_version")
    if version is None or not version.isdigit() or int(version) >= 3:
        return False
    from takeup.pipeline.participant_state import basis_for, refresh_state
    config = stored_config(con) or StudyConfig()
    refresh_state(con, basis_for(con, config))
    with transaction(con):
        con.execute("DELETE FROM warehouse_meta WHERE key = 'schema_version'")
        con.executemany("INSERT INTO warehouse_meta VALUES (?, ?)", [
            ("schema_version", SCHEMA_VERSION),
            (f"upgraded_{version}_to_{SCHEMA_VERSION}_at", datetime.now(timezone.utc).isoformat())])
    return True


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
    private_umask()
    con = duckdb.connect(str(p), config={"memory_limit": _memory_limit(), "temp_directory": str(temp_dir_for(p))})
    try:
        os.chmod(p, 0o600)
        _create_tables(con)
        meta = dict(con.execute("SELECT key, value FROM warehouse_meta").fetchall())
        if meta:
            check_key(con, key, p)
        with transaction(con):
            if not meta:
                con.executemany("INSERT INTO warehouse_meta VALUES (?, ?)", [
                    ("schema_version", SCHEMA_VERSION), ("key_check", make_key_check(key)),
                    ("pseudonym_encoding", key.encoding), ("created_at", datetime.now(timezone.utc).isoformat())])
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


def _upgrade_from_fingerprint(con: duckdb.DuckDBPyConnection, key: PseudonymKey, path: Path) -> None:
    """Schema 1 -> 2: replace the unsalted fingerprint by the salted check; keep the stored pseudonyms.

    Stored pseudonyms cannot be recomputed (raw identifiers are not kept), so the
    warehouse keeps the ``separator`` encoding it was built with.  That encoding is
    unambiguous when no site id holds U+001F, which is checked here.
    """
    bad = con.execute(
        "SELECT count(*) FROM (SELECT site_id FROM assignments UNION ALL SELECT site_id FROM uptake_events "
        "UNION ALL SELECT site_id FROM outcome_measurements) WHERE strpos(site_id, chr(31)) > 0").fetchone()[0]
    if bad:
        raise WarehouseError(
            f"warehouse {path} cannot be upgraded in place: {bad} stored row(s) have a site id containing the "
            "control character U+001F, whose pseudonyms may be ambiguous; build a new warehouse with "
            "'takeup init' and ingest the original files again")
    with transaction(con):
        con.execute("DELETE FROM warehouse_meta WHERE key IN ('key_fingerprint', 'schema_version', "
                    "'pseudonym_encoding', 'key_check')")
        con.executemany("INSERT INTO warehouse_meta VALUES (?, ?)", [
            ("schema_version", SCHEMA_VERSION), ("key_check", make_key_check(key)),
            ("pseudonym_encoding", "separator"), ("upgraded_at", datetime.now(timezone.utc).isoformat())])


def check_key(con: duckdb.DuckDBPyConnection, key: PseudonymKey, path: Path) -> PseudonymKey:
    """Refuse a key that differs from the one the warehouse was created with.

    Returns the key set to the warehouse's pseudonym encoding.  A schema-1 warehouse
    (unsalted fingerprint) is upgraded on the way when the key matches (needs a
    writable connection).
    """
    meta = dict(con.execute("SELECT key, value FROM warehouse_meta").fetchall())
    wrong = WarehouseError(
        f"the pseudonymisation key from {key.source} is not the one warehouse {path} was created with; "
        "ingesting with it would split participants into unrelated pseudonyms")
    if "key_check" in meta:
        if not key_check_matches(key, meta["key_check"]):
            raise wrong
    elif "key_fingerprint" in meta:
        if meta["key_fingerprint"] != legacy_fingerprint(key):
            raise wrong
        _upgrade_from_fingerprint(con, key, path)
        meta["pseudonym_encoding"] = "separator"
    return key.with_encoding(meta.get("pseudonym_encoding", "length_prefixed"))
