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

from takeup.pipeline.ingest.drop_folder import DEFAULT_SETTLE_SECONDS, DropFolders, move_after_commit, unsettled
from takeup.pipeline.ingest.many_files import expand_paths, ingest_paths
from takeup.pipeline.ingest.dry_run import prevalidate_file

__all__ = ["ingest_flow"]


@task(name="validate-file", cache_policy=NO_CACHE)
def validate_task(path: str, config_json: str | None, kind: str | None) -> dict:
    return asdict(prevalidate_file(Path(path), config_json, kind))


@task(name="load-files", cache_policy=NO_CACHE)
def load_task(warehouse: str, paths: list[str], kind: str | None, drop: dict | None = None,
              roots: list[str] | None = None) -> list[dict]:
    after = None
    if drop is not None:
        folders = _folders(drop, roots or [])

        def after(path, report):
            move_after_commit(path, report, folders)
    return [asdict(r) for r in ingest_paths(warehouse, [Path(p) for p in paths], kind=kind, after_commit=after)]


def _folders(drop: dict, roots: list[str]) -> DropFolders:
    return DropFolders(Path(drop["processed"]) if drop.get("processed") else None,
                       Path(drop["rejected"]) if drop.get("rejected") else None,
                       tuple(Path(r) for r in roots), float(drop.get("settle", DEFAULT_SETTLE_SECONDS)))


@flow(name="takeup-ingest")
def ingest_flow(paths: list[str], warehouse: str, kind: str | None = None, drop: dict | None = None) -> dict:
    """Validate ``paths`` in parallel, then load them in order through one writer.

    ``drop`` (``processed``, ``rejected``, ``settle``) makes ``paths`` drop folders: files still
    being written wait for the next run, and each file is moved after its batch is committed
    (:mod:`takeup.pipeline.ingest.drop_folder`).
    """
    from takeup.pipeline.warehouse import connect, stored_config
    con = connect(warehouse, read_only=False)
    try:
        cfg = stored_config(con)
    finally:
        con.close()
    deferred = []
    if drop is None:
        files = [str(p) for p in expand_paths([Path(p) for p in paths])]
    else:
        folders = _folders(drop, paths)
        files = []
        for f in expand_paths([Path(p) for p in paths], exclude=folders.excluded):
            why = unsettled(f, folders.settle)
            if why is None:
                files.append(str(f))
            else:
                deferred.append({"file": str(f), "status": "deferred", "message": f"still being written ({why})"})
    config_json = cfg.canonical_json() if cfg is not None else None
    checks = validate_task.map(files, config_json=config_json, kind=kind).result()
    reports = load_task(warehouse, files, kind, drop, list(paths))
    return {"validation": checks, "batches": reports, "deferred": deferred}


def run_ingest_flow(paths, warehouse, kind=None, drop: dict | None = None) -> dict:
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    return ingest_flow([str(p) for p in paths], str(warehouse), kind, drop)
