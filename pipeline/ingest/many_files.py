"""Ingest many files into a warehouse through one connection (the single writer)."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Iterable, Sequence

import duckdb

from takeup.pipeline.ingest.batch import BatchReport, IngestError, ingest_file, literal_path  # noqa: F401
from takeup.pipeline.ingest.file_groups import WINDOW_MAX_BYTES, WINDOW_MAX_FILES, NeedsAlone, WindowFile, ingest_window, prepare_file
from takeup.pipeline.participant_state import basis_for, refresh_state
from takeup.pipeline.pseudonym import load_key
from takeup.pipeline.warehouse import check_key, connect, stored_config
from takeup.schemas.config import StudyConfig

__all__ = ["ingest_paths", "expand_paths"]


#: files a directory is searched for: what is read, and what is refused with advice rather than ignored
SEARCHED_SUFFIXES = (".csv", ".csv.gz", ".tsv", ".parquet", ".xlsx", ".xls", ".ods")


def expand_paths(paths: Iterable[Path], exclude: Iterable[Path] = ()) -> list[Path]:
    """Files as given, and the files of given directories (searched recursively, sorted).

    ``exclude``: directories whose files are left out (the drop folder's processed / rejected folders).
    """
    skip = [Path(x).resolve() for x in exclude]
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            out.extend(sorted(q for q in p.rglob("*") if q.is_file() and q.name.lower().endswith(SEARCHED_SUFFIXES)
                              and not q.name.startswith(".")
                              and not any(q.resolve().is_relative_to(d) for d in skip)))
        else:
            out.append(p)
    return out


def _ingest_in_windows(con, files: list[Path], key, cfg: StudyConfig, kind: str | None,
                       reports: list[BatchReport], advance, delimiter: str = "auto", encoding: str = "utf-8",
                       after_commit: Callable[[Path, BatchReport], None] | None = None) -> None:
    """Every file in order: runs of small files as windows (file_groups), the others alone.

    ``after_commit(path, report)`` follows each file's verdict, in file order, once its batch
    (or its window's transaction) is committed.
    """
    prepared: dict[int, WindowFile | None] = {}

    def prep(i: int) -> WindowFile | None:
        if i not in prepared:
            prepared[i] = prepare_file(Path(files[i]), cfg, delimiter=delimiter, encoding=encoding)
        return prepared[i]

    def done(new: list[tuple[Path, BatchReport]]) -> None:
        for path, report in new:
            reports.append(report)
            if after_commit is not None:
                after_commit(Path(path), report)

    def _alone(con, f: Path, key, cfg, kind) -> tuple[Path, BatchReport]:
        try:
            return f, ingest_file(con, f, key, cfg, kind=kind, delimiter=delimiter, encoding=encoding)
        except IngestError as exc:
            return f, BatchReport(file=str(f), status="rejected", message=str(exc))

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
            done([_alone(con, files[i], key, cfg, kind)])
            advance(1)
            i, cap = i + 1, WINDOW_MAX_FILES
            continue
        try:
            done([(w.path, r) for w, r in zip(window, ingest_window(con, window, key, cfg, kind), strict=True)])
        except NeedsAlone as exc:
            cap = max(exc.position, 1)             # the files before it as a window, then it alone
            continue
        except (duckdb.Error, RuntimeError):
            # not expected: the window was rolled back; each file alone gets its own verdict
            done([_alone(con, f.path, key, cfg, kind) for f in window])
        advance(len(window))
        i, cap = i + len(window), WINDOW_MAX_FILES


def ingest_paths(warehouse: Path | str, paths: Sequence[Path | str], kind: str | None = None,
                 progress: bool = False, config: StudyConfig | None = None, delimiter: str = "auto",
                 encoding: str = "utf-8", after_commit: Callable[[Path, BatchReport], None] | None = None,
                 exclude: Sequence[Path] = ()) -> list[BatchReport]:
    """Ingest ``paths`` (files, or directories searched for :data:`SEARCHED_SUFFIXES`) in the given order.

    ``after_commit(path, report)`` is called after each file's batch has been committed
    (or recorded as rejected, or found already loaded): the drop folder moves the file
    there (:mod:`takeup.pipeline.ingest.drop_folder`).  ``delimiter`` and ``encoding``
    are passed to :func:`~takeup.pipeline.ingest.batch.ingest_file`.

    Each file is its own atomic batch; runs of small files are staged, checked and committed
    together (:mod:`takeup.pipeline.ingest.file_groups`) with the same per-file results as
    one by one.  A file that cannot be ingested is reported
    as rejected and the others still load.  An infrastructure failure (out of memory,
    disk full, permission denied) is not the file's fault: it stops here with
    :class:`~takeup.pipeline.errors.InfrastructureError`, the files before it stay loaded.
    """
    warehouse = Path(warehouse)
    files = expand_paths(paths, exclude)
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

            _ingest_in_windows(con, files, key, cfg, kind, reports, advance, delimiter=delimiter, encoding=encoding,
                               after_commit=after_commit)
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
