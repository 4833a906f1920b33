"""Dry-run validation of one file against an empty in-memory warehouse.

Used by the ingest flow to check files in parallel before the single writer
loads them: the same row checks as a real load (generated from the record
models), with a throwaway pseudonymisation key, touching no warehouse.
Duplicates and conflicts against stored rows are only known at load time.
"""

from __future__ import annotations

import json
import secrets
from dataclasses import dataclass
from pathlib import Path

from takeup.pipeline.ingest.batch import ingest_file
from takeup.pipeline.pseudonym import PseudonymKey
from takeup.pipeline.warehouse import memory_connection
from takeup.schemas.config import StudyConfig, parse_config
from takeup.schemas.ddl import create_table_sql
from takeup.schemas.records import STORAGE_TABLES

__all__ = ["Prevalidation", "prevalidate_file"]


@dataclass(frozen=True)
class Prevalidation:
    file: str
    status: str            # would_load | rejected
    kind: str | None
    rows_read: int
    rows_failing_checks: int
    reasons: dict
    message: str | None


def prevalidate_file(path: Path, config_json: str | None = None, kind: str | None = None) -> Prevalidation:
    config = parse_config(json.loads(config_json)) if config_json else StudyConfig()
    with memory_connection() as con:     # spills, if at all, to a private directory removed afterwards
        for table, model in STORAGE_TABLES.items():
            con.execute(create_table_sql(table, model))
        key = PseudonymKey(secrets.token_bytes(32), "ephemeral validation key")
        r = ingest_file(con, path, key, config, kind=kind)
    return Prevalidation(file=str(path), status="would_load" if r.status == "loaded" else "rejected",
                         kind=r.kind, rows_read=r.rows_read, rows_failing_checks=r.rows_quarantined,
                         reasons=dict(r.reasons), message=r.message)
