"""Ingest many files into a warehouse through one connection (the single writer)."""

from __future__ import annotations

from pathlib import Path
from typing import Iterable, Sequence

import duckdb

from takeup.pipeline.ingest.batch import BatchReport, IngestError, ingest_file, literal_path  # noqa: F401
from takeup.pipeline.ingest.file_groups import WINDOW_MAX_BYTES, WINDOW_MAX_FILES, NeedsAlone, WindowFile, ingest_window, prepare_file
from takeup.pipeline.participant_state import basis_for, refresh_state
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.warehouse import check_key, connect, stored_config
from takeup.schemas.config import StudyConfig

__all__ = ["ingest_paths", "expand_paths"]


def expand_paths(paths: Iterable[Path]) -> list[Path]:
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            out.extend(sorted(q for q in p.rglob("*") if q.suffix.lower() in (".csv", ".parquet")))
        else:
            out.append(p)
    return out


def _alone(con, f: Path, key, cfg, kind) -> BatchReport:
    try:
        return ingest_file(con, f, key, cfg, kind=kind)
    except IngestError as exc:
        return BatchReport(file=str(f), status="rejected", message=str(exc))


def _ingest_in_windows(con, files: list[Path], key, cfg: StudyConfig, kind: str | None,
                       reports: list[BatchReport], advance) -> None:
    """Every file in order: runs of small files as windows (file_groups), the others alone."""
    prepared: dict[int, WindowFile | None] = {}

    def prep(i: int) -> WindowFile | None:
        if i not in prepared:
            prepared[i] = prepare_file(Path(files[i]), cfg)
        return prepared[i]

    i, cap = 0, WINDOW_MAX_FILES
    while i < len(files):
        window: list[WindowFile] = []
        shas: set[str] = set()
        size = 0
        while i + len(window) < len(files) and len(window) < cap:
            wf = prep(i + len(window))
            if wf is None or wf.sha in shas or (window and size + wf.size > WINDOW_MAX_BYTES):
                break
            window.append(wf)
            shas.add(wf.sha)
            size += wf.size
        if window:
            loaded = {r[0] for r in con.execute(
                "SELECT DISTINCT sha256 FROM batches WHERE status = 'loaded' AND list_contains($s, sha256)",
                {"s": [w.sha for w in window]}).fetchall()}
            first_loaded = next((n for n, w in enumerate(window) if w.sha in loaded), None)
            if first_loaded is not None:
                window = window[:first_loaded]     # the file with known content goes alone (duplicate_batch)
        if len(window) < 2:
            reports.append(_alone(con, files[i], key, cfg, kind))
            advance(1)
            i, cap = i + 1, WINDOW_MAX_FILES
            continue
        try:
            reports.extend(ingest_window(con, window, key, cfg, kind))
        except NeedsAlone as exc:
            cap = max(exc.position, 1)             # the files before it as a window, then it alone
            continue
        except (duckdb.Error, RuntimeError):
            # not expected: the window was rolled back; each file alone gets its own verdict
            for f in window:
                reports.append(_alone(con, f.path, key, cfg, kind))
        advance(len(window))
        i, cap = i + len(window), WINDOW_MAX_FILES


def ingest_paths(warehouse: Path | str, paths: Sequence[Path | str], kind: str | None = None,
                 progress: bool = False, config: StudyConfig | None = None) -> list[BatchReport]:
    """Ingest ``paths`` (files, or directories searched for .csv/.parquet) in the given order.

    Each file is its own atomic batch; runs of small files are staged, checked and committed
    together (:mod:`takeup.pipeline.ingest.file_groups`) with the same per-file results as
    one by one.  A file that cannot be ingested is reported
    as rejected and the others still load.  An infrastructure failure (out of memory,
    disk full, permission denied) is not the file's fault: it stops here with
    :class:`~takeup.pipeline.errors.InfrastructureError`, the files before it stay loaded.
    """
    warehouse = Path(warehouse)
    files = expand_paths(paths)
    con = connect(warehouse)
    try:
        key = check_key(con, load_key(warehouse), warehouse)   # set to the warehouse's pseudonym encoding
        cfg = config or stored_config(con) or StudyConfig()
        reports: list[BatchReport] = []
        bar = None
        if progress:
            from rich.progress import Progress
            bar = Progress(transient=True)
            bar.start()
            task = bar.add_task("ingesting", total=len(files))
        try:
            def advance(n: int) -> None:
                if bar is not None:
                    bar.advance(task, n)

            _ingest_in_windows(con, files, key, cfg, kind, reports, advance)
        finally:
            if bar is not None:
                bar.stop()
        # once per set of files: the participants the new batches touch get their state rows
        # recomputed (a failure before this leaves the batches listed as not applied; the next
        # ingestion or run applies them)
        refresh_state(con, basis_for(con, cfg))
        return reports
    finally:
        con.close()
