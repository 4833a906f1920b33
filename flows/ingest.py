"""``ingest_flow``: validate files in parallel, load them through the single writer.

DuckDB allows one writer, so loading is serial (each file one atomic batch);
the per-file validation — reading the file, checking its header and running
every row check against an empty in-memory warehouse — is independent per
file and is mapped across the task runner's workers (threads, or a Dask
cluster).  The writer waits, with backoff, while another process holds the
warehouse's lock (:func:`takeup.pipeline.warehouse.connect_waiting`).
"""

from __future__ import annotations

import os
from dataclasses import asdict
from pathlib import Path

import takeup.flows  # noqa: F401  (Prefect defaults)
from prefect import flow, task
from prefect.cache_policies import NO_CACHE

from takeup.pipeline.ingest.many_files import expand_paths, ingest_paths
from takeup.pipeline.ingest.dry_run import prevalidate_file

__all__ = ["ingest_flow"]


@task(name="validate-file", cache_policy=NO_CACHE)
def validate_task(path: str, config_json: str | None, kind: str | None) -> dict:
    return asdict(prevalidate_file(Path(path), config_json, kind))


@task(name="load-files", cache_policy=NO_CACHE)
def load_task(warehouse: str, paths: list[str], kind: str | None) -> list[dict]:
    return [asdict(r) for r in ingest_paths(warehouse, [Path(p) for p in paths], kind=kind)]


@flow(name="takeup-ingest")
def ingest_flow(paths: list[str], warehouse: str, kind: str | None = None) -> dict:
    """Validate ``paths`` in parallel, then load them in order through one writer."""
    from takeup.pipeline.warehouse import connect, stored_config
    con = connect(warehouse, read_only=False)
    try:
        cfg = stored_config(con)
    finally:
        con.close()
    files = [str(p) for p in expand_paths([Path(p) for p in paths])]
    config_json = cfg.canonical_json() if cfg is not None else None
    checks = validate_task.map(files, config_json=config_json, kind=kind).result()
    reports = load_task(warehouse, files, kind)
    return {"validation": checks, "batches": reports}


def run_ingest_flow(paths, warehouse, kind=None) -> dict:
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    return ingest_flow([str(p) for p in paths], str(warehouse), kind)
