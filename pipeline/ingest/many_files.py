"""Ingest many files into a warehouse through one connection (the single writer)."""

from __future__ import annotations

from pathlib import Path
from typing import Callable, Iterable, Sequence

from takeup.pipeline.ingest.batch import BatchReport, IngestError, ingest_file, literal_path  # noqa: F401
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


def ingest_paths(warehouse: Path | str, paths: Sequence[Path | str], kind: str | None = None,
                 progress: bool = False, config: StudyConfig | None = None, delimiter: str = "auto",
                 encoding: str = "utf-8", after_commit: Callable[[Path, BatchReport], None] | None = None,
                 exclude: Sequence[Path] = ()) -> list[BatchReport]:
    """Ingest ``paths`` (files, or directories searched for :data:`SEARCHED_SUFFIXES`) in the given order.

    ``after_commit(path, report)`` is called after each file's batch has been committed
    (or recorded as rejected, or found already loaded): the drop folder moves the file
    there (:mod:`takeup.pipeline.ingest.drop_folder`).  ``delimiter`` and ``encoding``
    are passed to :func:`~takeup.pipeline.ingest.batch.ingest_file`.

    Each file is its own atomic batch; a file that cannot be ingested is reported
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
            for f in files:
                try:
                    report = ingest_file(con, f, key, cfg, kind=kind, delimiter=delimiter, encoding=encoding)
                except IngestError as exc:
                    report = BatchReport(file=str(f), status="rejected", message=str(exc))
                reports.append(report)
                if after_commit is not None:
                    after_commit(Path(f), report)
                if bar is not None:
                    bar.advance(task)
        finally:
            if bar is not None:
                bar.stop()
        return reports
    finally:
        con.close()
