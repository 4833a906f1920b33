"""Opening, creating and describing the DuckDB warehouse file."""

from __future__ import annotations

from takeup.pipeline.errors import WarehouseBusyError, WarehouseError  # noqa: F401  (re-exported)

import os
import random
import re
import shutil
import sys
import tempfile
import time
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
    "temp_dir_for", "memory_connection", "connect_waiting", "lock_wait_seconds", "DEFAULT_LOCK_WAIT",
    "LOCK_WAIT_ENV", "upgrade_to_state",
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
    """Every table the warehouse holds: storage tables, result tables, then `publications`.

    :func:`connect` creates a missing one on open, so older warehouses gain `publications`.
    """
    from takeup.schemas.publication import PUBLICATION_TABLES
    from takeup.schemas.results import RESULT_TABLES
    return {**STORAGE_TABLES, **RESULT_TABLES, **PUBLICATION_TABLES}


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
        if table in _WIDENED_CHECKS:
            _widen_checks(con, table, model, [c for t, c in existing if t == table])
        for col in columns_of(model):
            if (table, col.name) not in existing and col.nullable:
                con.execute(f'ALTER TABLE "{table}" ADD COLUMN "{col.name}" {col.sql_type}')
    from takeup.schemas.results import create_views_sql
    for sql in create_views_sql():
        con.execute(sql)


#: tables whose value CHECKs a later version widened (``runs.status`` gained ``abandoned``)
_WIDENED_CHECKS = ("runs",)
_TARGET_CHECKS: dict[str, list[str]] = {}     # DDL -> its CHECK expressions as DuckDB prints them


def _check_texts(con: duckdb.DuckDBPyConnection, table: str) -> list[str]:
    return sorted(r[0] for r in con.execute(
        "SELECT expression FROM duckdb_constraints() WHERE table_name = $t AND constraint_type = 'CHECK' "
        "AND database_name = current_database() AND schema_name = 'main'", {"t": table}).fetchall())


def _widen_checks(con: duckdb.DuckDBPyConnection, table: str, model, columns: list[str]) -> None:
    """Rebuild ``table`` when its CHECKs differ from the model's (DuckDB cannot alter a CHECK).

    Runs inside the writer's lock, in one transaction; the rows are copied column by name.
    """
    wanted = create_table_sql(table, model)
    if wanted not in _TARGET_CHECKS:
        with duckdb.connect(":memory:") as scratch:
            scratch.execute(wanted)
            _TARGET_CHECKS[wanted] = _check_texts(scratch, table)
    if _check_texts(con, table) == _TARGET_CHECKS[wanted]:
        return
    from takeup.schemas.ddl import columns_of
    keep = [c.name for c in columns_of(model) if c.name in columns]
    cols = ", ".join(f'"{c}"' for c in keep)
    tmp = f"_{table}_widened"
    with transaction(con):
        con.execute(f'DROP TABLE IF EXISTS "{tmp}"')
        con.execute(create_table_sql(tmp, model))
        con.execute(f'INSERT INTO "{tmp}" ({cols}) SELECT {cols} FROM "{table}"')
        con.execute(f'DROP TABLE "{table}"')
        con.execute(f'ALTER TABLE "{tmp}" RENAME TO "{table}"')


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


# ----------------------------------------------------------------------------- the lock: writers wait
#: seconds a command waits for another process's lock on a DuckDB file before giving up
#: (the command line's default; ``takeup serve`` uses 900); ``--wait`` sets :data:`LOCK_WAIT_ENV`
DEFAULT_LOCK_WAIT = 60.0
LOCK_WAIT_ENV = "TAKEUP_LOCK_WAIT"
#: the longest pause between two attempts (the pauses double from 50 ms, with +-50 % jitter so that
#: several waiting writers do not retry in step)
_MAX_PAUSE = 1.0

_LOCK_RE = re.compile(r"Conflicting lock is held in (?P<prog>.*?)(?: \(PID (?P<pid>\d+)\))?(?: by user (?P<user>\S+))?\.(?:\s|$)")


def lock_wait_seconds() -> float:
    """How long to wait for a lock: ``$TAKEUP_LOCK_WAIT`` (seconds), else :data:`DEFAULT_LOCK_WAIT`."""
    text = os.environ.get(LOCK_WAIT_ENV)
    if text:
        try:
            value = float(text)
        except ValueError:
            raise WarehouseError(f"{LOCK_WAIT_ENV}={text!r} is not a number of seconds") from None
        if value >= 0:
            return value
    return DEFAULT_LOCK_WAIT


def _lock_holder(exc: BaseException) -> str | None:
    """'PID 7412, /usr/bin/python3.11' from DuckDB's lock error; '' for a lock error naming nobody; else None."""
    text = str(exc)
    if "Could not set lock" not in text and "Conflicting lock" not in text:
        return None
    m = _LOCK_RE.search(text)
    if not m:
        return ""
    parts = [f"PID {m['pid']}"] if m["pid"] else []
    parts.append(m["prog"].strip())
    if m["user"]:
        parts.append(f"user {m['user']}")
    return ", ".join(p for p in parts if p)


def _announce(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def connect_waiting(path: Path | str, *, read_only: bool = False, config: dict | None = None,
                    wait: float | None = None, what: str = "warehouse") -> duckdb.DuckDBPyConnection:
    """``duckdb.connect`` that waits, with backoff, while another process holds the file's lock.

    DuckDB lets one process write a file, or several read it, never both.  A writer
    (ingest, run, publish, the flows) and a reader (alerts, runs, report, export) both
    wait up to ``wait`` seconds (default :func:`lock_wait_seconds`), announcing once on
    stderr that they wait and on what.  After the wait:
    :class:`~takeup.pipeline.errors.WarehouseBusyError`, a plain sentence naming the
    holder when DuckDB does.  Any other failure to open is a :class:`WarehouseError`.

    Everything that opens a DuckDB file for takeup goes through here
    (:func:`connect` for the warehouse itself).
    """
    p = Path(path)
    total = lock_wait_seconds() if wait is None else max(0.0, float(wait))
    deadline = time.monotonic() + total
    pause = 0.05
    announced = False
    holder = ""
    while True:
        try:
            return duckdb.connect(str(p), read_only=read_only, config=config or {})
        except duckdb.IOException as exc:
            found = _lock_holder(exc)
            if found is None:
                raise WarehouseError(f"cannot open {what} {p}: {str(exc).splitlines()[0]}") from None
            holder = found or holder
        except duckdb.Error as exc:
            raise WarehouseError(f"cannot open {what} {p}: {str(exc).splitlines()[0]}") from None
        left = deadline - time.monotonic()
        if left <= 0:
            who = f" ({holder})" if holder else ""
            raise WarehouseBusyError(
                f"{what} {p} is still locked by another process{who} after waiting {total:g} s: one writer at a "
                "time (ingest, run, publish), and no writer while a program holds it open. Try again when that "
                "process has finished, wait longer with --wait SECONDS, or stop the process; dashboards should "
                "read a published copy, never the warehouse") from None
        if not announced:
            who = f" ({holder})" if holder else ""
            _announce(f"takeup: {what} {p} is locked by another process{who}; "
                      f"waiting up to {total:g} s for it ...")
            announced = True
        time.sleep(min(left, pause * random.uniform(0.5, 1.5)))
        pause = min(pause * 2, _MAX_PAUSE)


def connect(path: Path | str, read_only: bool = False, wait: float | None = None) -> duckdb.DuckDBPyConnection:
    """Open an existing warehouse (tables are created if a newer version added some).

    Waits for another process's lock (:func:`connect_waiting`; ``wait`` seconds, default
    :func:`lock_wait_seconds`).  The process umask becomes restrictive
    (:func:`private_umask`) and DuckDB spills to the private directory :func:`temp_dir_for`.
    """
    p = Path(path)
    if not p.exists():
        raise WarehouseError(f"warehouse {p} does not exist; create it with 'takeup init --warehouse {p}'")
    private_umask()
    limit = _memory_limit()
    config = {"memory_limit": limit, "temp_directory": str(temp_dir_for(p))}
    try:
        con = connect_waiting(p, read_only=read_only, config=config, wait=wait)
    except WarehouseError as exc:
        if "memory_limit" in str(exc) or "memory limit" in str(exc):
            raise WarehouseError(f"{exc} (memory limit {limit!r})") from None
        raise
    if not read_only:
        try:
            _create_tables(con)
            upgrade_to_state(con)
        except BaseException:
            con.close()
            raise
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
    con = connect_waiting(p, config={"memory_limit": _memory_limit(), "temp_directory": str(temp_dir_for(p))})
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
