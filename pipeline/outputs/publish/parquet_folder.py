"""Publishing to a folder of Parquet versions, switched atomically.

Layout of the target folder ``DIR``::

    DIR/current -> versions/<version>        (a symbolic link, replaced by one rename)
    DIR/versions/<version>/runs.parquet      every finished run up to the published one
    DIR/versions/<version>/site_estimates.parquet ...           (one file per result table)
    DIR/versions/<version>/latest_site_estimates.parquet ...    (the published run's rows)
    DIR/versions/<version>/manifest.json     run_id, as_of, schema version, rows and SHA-256 per file

A version is written under ``versions/.tmp-*``, flushed to disk, renamed to its
final name, and only then does ``current`` switch to it (``rename(2)`` of a new
link over the old one), so a reader that resolves ``current`` once sees one
whole version; a process killed at any moment leaves the previous version
current.  The newest ``keep_versions`` versions are kept (the current one always).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import secrets
import shutil
from datetime import datetime, timezone
from pathlib import Path

import duckdb

from takeup.pipeline.errors import PublishError
from takeup.pipeline.outputs.publish.published_rows import (RUNS_UP_TO, bind, published_run,
                                                                 published_select, run_row_count)
from takeup.schemas.results import LATEST_VIEWS, RESULT_TABLES

__all__ = ["publish_parquet", "current_manifest", "verify_version"]

CURRENT = "current"
VERSIONS = "versions"
MANIFEST = "manifest.json"


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _fsync(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def current_manifest(folder: Path) -> dict | None:
    """The manifest of the current version of ``folder`` (None when there is none)."""
    try:
        return json.loads((Path(folder) / CURRENT / MANIFEST).read_text())
    except (OSError, ValueError):
        return None


def verify_version(version_dir: Path) -> dict:
    """Check every file of a version against its manifest (SHA-256 and presence); returns the manifest."""
    manifest = json.loads((version_dir / MANIFEST).read_text())
    for name, meta in manifest["files"].items():
        got = _sha256(version_dir / name)
        if got != meta["sha256"]:
            raise PublishError(f"{version_dir / name}: SHA-256 {got} differs from the manifest's {meta['sha256']}")
    return manifest


def _check_folder(folder: Path) -> None:
    if folder.exists() and not folder.is_dir():
        raise PublishError(f"Parquet target {folder} is a file; give a folder")
    cur = folder / CURRENT
    if cur.exists() and not cur.is_symlink():
        raise PublishError(f"{cur} exists and is not a symbolic link; takeup switches versions by replacing that "
                           "link, so move it away first")


def _clean_leftovers(folder: Path) -> None:
    """Remove what a publication killed midway left: unfinished versions, unswitched links."""
    for p in (folder / VERSIONS).glob(".tmp-*"):
        shutil.rmtree(p, ignore_errors=True)
    for p in folder.glob(f".{CURRENT}-*"):
        if p.is_symlink():
            p.unlink(missing_ok=True)


def _prune(folder: Path, keep: int) -> list[str]:
    versions = folder / VERSIONS
    current = os.path.basename(os.readlink(folder / CURRENT)) if (folder / CURRENT).is_symlink() else None
    names = sorted(p.name for p in versions.iterdir() if p.is_dir() and not p.name.startswith("."))
    removed = []
    for name in names[:max(0, len(names) - keep)]:
        if name != current:
            shutil.rmtree(versions / name, ignore_errors=True)
            removed.append(name)
    return removed


def _version_name(run_id: str, when: datetime) -> str:
    safe = run_id if re.fullmatch(r"[A-Za-z0-9._-]{1,80}", run_id) else hashlib.sha256(run_id.encode()).hexdigest()[:16]
    return f"{when:%Y%m%dT%H%M%S%fZ}_{safe}"


def publish_parquet(con: duckdb.DuckDBPyConnection, folder: Path, run_id: str, min_cell_count: int,
                    keep_versions: int, schema_version: str) -> tuple[str, int, str]:
    """Publish ``run_id`` to ``folder``; returns (status ``ok``/``unchanged``, rows of the run, message)."""
    folder = Path(folder)
    _check_folder(folder)
    run = published_run(con, run_id)
    history = [r[0] for r in con.execute(RUNS_UP_TO + " ORDER BY r.started_at, r.run_id", {"run": run_id}).fetchall()]
    _clean_leftovers(folder)
    old = current_manifest(folder)
    if (old is not None and old.get("run_id") == run_id and old.get("runs") == history
            and old.get("min_cell_count") == min_cell_count and old.get("schema_version") == schema_version):
        return "unchanged", run_row_count(con, run_id), f"current version {os.readlink(folder / CURRENT)} holds it"
    versions = folder / VERSIONS
    versions.mkdir(parents=True, exist_ok=True)
    now = datetime.now(timezone.utc)
    name = _version_name(run_id, now)
    tmp = versions / f".tmp-{secrets.token_hex(6)}"
    tmp.mkdir()
    try:
        files: dict[str, dict] = {}
        jobs = [(f"{t}.parquet", t, "history") for t in RESULT_TABLES]
        jobs += [(f"{v}.parquet", t, "run") for v, t in LATEST_VIEWS.items()]
        for fname, table, scope in jobs:
            path = tmp / fname
            sql = published_select(table, scope)
            n = con.execute(f"COPY ({sql}) TO $path (FORMAT parquet)",
                            {**bind(sql, run_id, min_cell_count), "path": str(path)}).fetchall()[0][0]
            _fsync(path)
            files[fname] = {"rows": int(n), "sha256": _sha256(path), "table": table,
                            "rows_of": "published run" if scope == "run" else "finished runs up to the published one"}
        manifest = {"run_id": run_id, "as_of": run.as_of.isoformat(), "run_started_at": run.started_at.isoformat(),
                    "published_at": now.isoformat(), "schema_version": schema_version,
                    "min_cell_count": min_cell_count, "runs": history, "files": files}
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=2, sort_keys=True))
        _fsync(tmp / MANIFEST)
        _fsync(tmp)
        os.rename(tmp, versions / name)
        _fsync(versions)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    link = folder / f".{CURRENT}-{secrets.token_hex(6)}"
    os.symlink(f"{VERSIONS}/{name}", link)
    try:
        os.replace(link, folder / CURRENT)
    except BaseException:
        link.unlink(missing_ok=True)
        raise
    _fsync(folder)
    removed = _prune(folder, keep_versions)
    msg = f"version {name}" + (f"; removed {len(removed)} old version(s)" if removed else "")
    return "ok", run_row_count(con, run_id), msg


